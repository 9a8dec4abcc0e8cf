"""Marker CSV, arc geometry, batched marker fit and camera/device clock alignment.

Outside sources: the geometry of circles (a circular arc, its chords, its
offset curves, composition of arcs: standard plane geometry), RFC 4180 for the
CSV syntax, and an independent brute-force grid search for the clock alignment.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d

from acquire.core.align import Alignment, AlignmentError, align_clocks
from acquire.core.markers import (MarkerError, MarkerTrack, default_marker_arc_m,
                                  fit_marker_frames, marker_positions, read_marker_csv)

L6 = np.full(6, 0.016)            # six 16 mm segments, as the demo rig (rigs/demo_finger.toml)
TAPS = default_marker_arc_m(L6)   # S + 1 markers, one per tap


# --- helpers: independent closed forms ----------------------------------------

def circle_points(k, s, offset=0.0):
    """Points at arc lengths s on one circular arc of curvature k leaving (0, 0) along +x,
    moved by ``offset`` along the +y normal.

    Standard geometry: the arc is a circle of centre (0, 1/k); the point at arc
    length s has angle k s: (sin(ks)/k, (1 - cos(ks))/k), unit normal (-sin ks, cos ks);
    1 - cos x = 2 sin^2(x/2) (half-angle identity) avoids cancellation for small k.
    """
    s = np.asarray(s, dtype=float)
    o = np.broadcast_to(np.asarray(offset, dtype=float), s.shape)
    th = k * s
    if k == 0:
        return np.stack([s, o], axis=-1)
    return np.stack([np.sin(th) / k - o * np.sin(th), 2 * np.sin(th / 2) ** 2 / k + o * np.cos(th)],
                    axis=-1)


def rigid(xy, phi, shift):
    """Rotate points (..., 2) by phi about the origin, then shift."""
    c, s = np.cos(phi), np.sin(phi)
    return np.stack([c * xy[..., 0] - s * xy[..., 1] + shift[0],
                     s * xy[..., 0] + c * xy[..., 1] + shift[1]], axis=-1)


def track(xy):
    xy = np.asarray(xy, dtype=float)
    return MarkerTrack(t_s=np.arange(xy.shape[0]) / 60.0, xy_m=xy, source="test")


def smooth_curvatures(rng, n, S=6):
    """Made-up finger poses: a common bend plus a gentle drift along the finger, 1/m."""
    return rng.uniform(-60, 60, (n, 1)) + np.cumsum(rng.normal(0, 4, (n, S)), axis=1)


# --- geometry -----------------------------------------------------------------

@pytest.mark.parametrize("k", [60.0, -40.0, 150.0, 1e-4, -1e-6, 0.0])
def test_chords_of_one_arc(k):
    xy = marker_positions(np.full((1, 6), k), segment_lengths_m=L6)[0]
    chord = np.linalg.norm(np.diff(xy, axis=0), axis=1)
    # chord of a circular arc of length L and curvature k: 2/k sin(kL/2) (standard geometry)
    expect = 0.016 if k == 0 else 2 / k * np.sin(k * 0.016 / 2)
    np.testing.assert_allclose(chord, expect, rtol=1e-13, atol=1e-16)
    np.testing.assert_allclose(xy, circle_points(k, TAPS), atol=1e-15)


def test_marker_positions_off_taps_with_offsets_and_pose():
    rng = np.random.default_rng(1)
    s = np.sort(rng.uniform(0, 0.11, 9))          # between taps, and beyond the tip (continued)
    o = rng.uniform(-0.004, 0.004, 9)
    pose = np.array([[0.12, -0.03, 2.3]])
    got = marker_positions(np.full((1, 6), 35.0), segment_lengths_m=L6, s_m=s, offset_m=o, pose=pose)[0]
    np.testing.assert_allclose(got, rigid(circle_points(35.0, s, o), 2.3, (0.12, -0.03)), atol=1e-15)


def test_two_arcs_compose():
    # composition of circular arcs (standard geometry): the second arc starts at the end of
    # the first, turned by the first arc's angle k1 L1
    k1, k2, L = 50.0, -80.0, np.array([0.02, 0.03])
    s = np.array([0.0, 0.007, 0.02, 0.031, 0.05])
    got = marker_positions(np.array([[k1, k2]]), segment_lengths_m=L, s_m=s)[0]
    first = circle_points(k1, s[:3])
    second = rigid(circle_points(k2, s[3:] - 0.02), k1 * 0.02, circle_points(k1, 0.02))
    np.testing.assert_allclose(got, np.vstack([first, second]), atol=1e-15)


# --- fit: one arc -------------------------------------------------------------

@pytest.mark.parametrize("k", [60.0, -40.0, 150.0, 1e-4, -1e-6, 0.0])
def test_fit_one_arc_any_pose(k):
    base = circle_points(k, TAPS)
    frames = [base, rigid(base, 2.1, (0.31, -0.07)), rigid(base, -2.9, (-0.5, 0.2))]
    fit = fit_marker_frames(track(frames), segment_lengths_m=L6)
    assert fit.ok.all()
    # one circle: every segment has curvature k (standard geometry); same for every pose
    np.testing.assert_allclose(fit.curvature_per_m, k, atol=1e-7)
    np.testing.assert_allclose(fit.pose[1], [0.31, -0.07, 2.1], atol=1e-12)
    np.testing.assert_allclose(fit.pose[2], [-0.5, 0.2, -2.9], atol=1e-12)
    assert np.all(fit.residual_m < 1e-12)


@pytest.mark.parametrize("k", [45.0, -70.0])
def test_offset_markers_on_offset_circle(k):
    o = 0.003 * np.array([1, -1, 1, -1, 1, -1, 1])        # on the surface, alternating sides
    xy = marker_positions(np.full((1, 6), k), segment_lengths_m=L6, offset_m=o)[0]
    # the offset (parallel) curve of a circle is a concentric circle of radius 1/k - offset
    # (standard geometry): distances from the centre (0, 1/k)
    radius = np.linalg.norm(xy - [0, 1 / k], axis=1)
    np.testing.assert_allclose(radius, np.abs(1 / k - o), rtol=1e-12)
    # neighbours are k L apart in angle: law of cosines between the two radii
    r = 1 / k - o
    chord = np.sqrt(r[:-1] ** 2 + r[1:] ** 2 - 2 * r[:-1] * r[1:] * np.cos(k * 0.016))
    np.testing.assert_allclose(np.linalg.norm(np.diff(xy, axis=0), axis=1), chord, rtol=1e-12)
    moved = rigid(xy, 0.7, (0.05, 0.02))[None]
    fit = fit_marker_frames(track(moved), segment_lengths_m=L6, offset_m=o)
    np.testing.assert_allclose(fit.curvature_per_m, k, atol=1e-6)
    # ignoring the offsets is measurably wrong, so the test can fail
    naive = fit_marker_frames(track(moved), segment_lengths_m=L6)
    assert np.nanmax(np.abs(naive.curvature_per_m - k)) > 1.0


# --- fit: missing and wild markers ----------------------------------------------

def test_missing_markers():
    # truth: curvatures put in through marker_positions, itself checked against circle
    # geometry above; precise markers (noise_m tiny) so the prior plays no part
    rng = np.random.default_rng(2)
    k = smooth_curvatures(rng, 25)
    xy = marker_positions(k, segment_lengths_m=L6, pose=np.c_[rng.normal(0, 0.02, (25, 2)),
                                                               rng.uniform(-3, 3, 25)])
    xy[0:10, 3] = np.nan           # a middle marker lost
    xy[10:20, 6] = np.nan          # the tip marker lost: nothing beyond tap 5 is seen
    xy[20:25, 1:4] = np.nan        # 4 markers left: 8 coordinates < 9 unknowns (counting)
    fit = fit_marker_frames(track(xy), segment_lengths_m=L6, noise_m=1e-6)
    assert fit.ok[:20].all() and not fit.ok[20:].any()
    np.testing.assert_allclose(fit.curvature_per_m[:10], k[:10], atol=1e-3)
    np.testing.assert_allclose(fit.curvature_per_m[10:20, :5], k[10:20, :5], atol=1e-3)
    assert np.isnan(fit.curvature_per_m[10:20, 5]).all() and np.isnan(fit.curvature_per_m[20:]).all()
    assert np.isinf(fit.curvature_sd_per_m[10:20, 5]).all()
    assert np.isfinite(fit.curvature_sd_per_m[:10]).all()
    assert (fit.marker_weight[0:10, 3] == 0).all()


@pytest.mark.parametrize("layout", ["taps", "taps_and_middles"])
def test_one_wild_marker(layout):
    rng = np.random.default_rng(3)
    s = TAPS if layout == "taps" else np.arange(13) * 0.008
    n = 30
    k = smooth_curvatures(rng, n)
    xy = marker_positions(k, segment_lengths_m=L6, s_m=s,
                          pose=np.c_[rng.normal(0, 0.02, (n, 2)), rng.uniform(-3, 3, n)])
    wild = rng.integers(1, s.size - 1, n)
    # truth as in test_missing_markers. A reflection: far off in the taps-only case, 150 mm,
    # out of reach of any bend (a chord is never longer than its arc: standard geometry);
    # within reach (20 mm) when markers at segment middles give redundancy
    dist = 0.15 if layout == "taps" else 0.02
    ang = rng.uniform(0, 2 * np.pi, n)
    xy[np.arange(n), wild] += dist * np.c_[np.cos(ang), np.sin(ang)]
    fit = fit_marker_frames(track(xy), segment_lengths_m=L6, s_m=s, noise_m=1e-6)
    assert fit.ok.all()
    assert (fit.marker_weight[np.arange(n), wild] == 0).all()
    np.testing.assert_allclose(fit.curvature_per_m, k, atol=0.05)
    # and with a little noise: within the stated uncertainty (5 sd; common practice, no source)
    noisy = xy + rng.normal(0, 5e-5, xy.shape)
    fit = fit_marker_frames(track(noisy), segment_lengths_m=L6, s_m=s, noise_m=5e-5)
    assert (fit.marker_weight[np.arange(n), wild] == 0).all()
    assert np.all(np.abs(fit.curvature_per_m - k) < 5 * fit.curvature_sd_per_m + 0.5)


def test_batched_fit_equals_per_frame_fits():
    # no outside source: an invariance check (frames are independent problems), with noise,
    # missing markers and wild points so that every code path runs
    rng = np.random.default_rng(4)
    n = 24
    k = smooth_curvatures(rng, n)
    xy = marker_positions(k, segment_lengths_m=L6, pose=np.c_[rng.normal(0, 0.02, (n, 2)),
                                                               rng.uniform(-3, 3, n)])
    xy += rng.normal(0, 2e-4, xy.shape)
    xy[::7, 2] = np.nan
    xy[3::9, 4] += 0.1
    batch = fit_marker_frames(track(xy), segment_lengths_m=L6, chunk_frames=16)
    for f in range(n):
        one = fit_marker_frames(track(xy[f:f + 1]), segment_lengths_m=L6)
        np.testing.assert_allclose(one.curvature_per_m[0], batch.curvature_per_m[f], atol=1e-8)
        np.testing.assert_allclose(one.pose[0], batch.pose[f], atol=1e-12)
        np.testing.assert_allclose(one.marker_weight[0], batch.marker_weight[f], atol=1e-9)


# --- marker CSV ---------------------------------------------------------------

def test_read_marker_csv(tmp_path):
    path = tmp_path / "session.csv"
    # RFC 4180: CRLF line ends, quoted fields allowed; layout t_s,mK_x_mm,mK_y_mm as specified
    # for filmed sessions, an undetected marker leaves both cells empty; 1 mm = 1e-3 m (SI)
    path.write_bytes(b't_s,m0_x_mm,m0_y_mm,m1_x_mm,m1_y_mm\r\n0.0,1.5,-2,"3",4e1\r\n'
                     b"0.02,1.25,-2.5,,\r\n\r\n0.04,1,2,3,4\r\n")
    tr = read_marker_csv(path, n_markers=2)
    np.testing.assert_array_equal(tr.t_s, [0.0, 0.02, 0.04])
    np.testing.assert_allclose(tr.xy_m[0], [[1.5e-3, -2e-3], [3e-3, 40e-3]])
    assert np.isnan(tr.xy_m[1, 1]).all() and tr.source == str(path)
    assert read_marker_csv(path, n_markers=2, name="cam A").source == "cam A"


HEAD3 = "t_s,m0_x_mm,m0_y_mm,m1_x_mm,m1_y_mm,m2_x_mm,m2_y_mm\n"


@pytest.mark.parametrize("content, n_markers, fragment", [
    ("", 3, "is empty"),
    (HEAD3, 3, "has a header but no data rows"),
    (HEAD3 + "0,1,2,3,abc,5,6\n", 3, "line 2, column m1_y_mm: 'abc' is not a number"),
    (HEAD3 + "0,1,2,3,4,5,6\n", 7, "has 3 markers, the rig has 7"),
    (HEAD3 + "0,1,2,,,5,6\n0.1,1,2,,,5,6\n", 3, "marker 1 (m1_x_mm, m1_y_mm) is missing in every frame"),
    (HEAD3 + "0,1,2,3,4,5,6\n0.1,1,,3,4,5,6\n", 3, "line 3: marker 0 has only one of its two cells"),
    (HEAD3 + "0,1,2,3,4,5,6\n0,1,2,3,4,5,6\n", 3, "line 3: t_s 0.0 is not after the previous 0.0"),
    (HEAD3 + "0,1,2,3,4,5,2e6\n", 3, "column m2_y_mm: 2000000.0 mm is absurd"),
    (HEAD3 + "0,1,2,3,nan,5,6\n", 3, "column m1_y_mm: nan is not a finite number"),
    (HEAD3 + "0,1_000,2,3,4,5,6\n", 3, "column m0_x_mm: '1_000' is not a number"),
    (HEAD3 + "0,1,2,3,4,5\n", 3, "line 2 has 6 cells, the header has 7"),
    ("t_s,x,m0_y_mm\n0,1,2\n", 1, "header column 2 is 'x', expected 'm0_x_mm'"),
])
def test_read_marker_csv_errors(tmp_path, content, n_markers, fragment):
    # the project's one-line error convention (DEVELOPERS.md): file named, line/column given
    path = tmp_path / "bad_markers.csv"
    path.write_text(content)
    with pytest.raises(MarkerError) as err:
        read_marker_csv(path, n_markers=n_markers)
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(str(path)) and "bad_markers.csv" in msg
    assert fragment in msg


# --- clock alignment ------------------------------------------------------------

FS, T_REC, S4 = 1000.0, 240.0, 4


@pytest.fixture(scope="module")
def motion():
    """Made-up finger motion (not measured): 4 segments, smoothed random bends of about
    +-40 1/m with slow and fast parts, at 1 kHz device rate; and the recording signal:
    a monotone nonlinear gain of it plus noise."""
    rng = np.random.default_rng(5)
    t = np.arange(int(T_REC * FS)) / FS
    t100 = np.arange(int(T_REC * 100) + 1) / 100            # drawn at 100 Hz, then interpolated
    slow = gaussian_filter1d(rng.normal(size=(t100.size, 1)), 60, axis=0)
    fast = gaussian_filter1d(rng.normal(size=(t100.size, S4)), 15, axis=0)
    k100 = 20 * slow / slow.std() + 20 * fast / fast.std(axis=0)
    kappa = np.stack([np.interp(t, t100, k100[:, c]) for c in range(S4)], axis=1)
    rec = 0.04 * np.tanh(kappa / 50) + 0.004 * kappa / 50 + rng.normal(0, 0.001, kappa.shape)
    return t, kappa, rec


def camera(motion, offset_s, rate_ppm, seed=6):
    """60 fps camera frames covering device times 60..180 s, clock mapped by offset and rate."""
    t, kappa, _ = motion
    rng = np.random.default_rng(seed)
    ratio = 1 + rate_ppm * 1e-6
    t_cam = (60.0 - offset_s) / ratio + np.arange(120 * 60) / 60.0
    t_dev = offset_s + ratio * t_cam
    cam = np.stack([np.interp(t_dev, t, kappa[:, c]) for c in range(S4)], axis=1)
    cam += rng.normal(0, 1.0, cam.shape)                   # marker fit noise, 1/m
    cam[rng.random(cam.shape) < 0.02] = np.nan             # undetermined here and there
    return t_cam, cam, t_dev


def plain_corr(t_rec, rec, t_cam, cam, offsets, rate_ppm):
    """Mean over segments of the plain Pearson correlation, per offset (one rate).

    The recording is on a uniform grid (t_rec = i / FS): linear interpolation by index.
    """
    u = (offsets[:, None] + (1 + rate_ppm * 1e-6) * t_cam[None, :] - t_rec[0]) * FS
    i = np.clip(np.floor(u).astype(np.int64), 0, t_rec.size - 2)
    frac = np.clip(u - i, 0.0, 1.0)
    total = np.zeros(offsets.size)
    for c in range(cam.shape[1]):
        fin = np.isfinite(cam[:, c])
        x = rec[i[:, fin], c] * (1 - frac[:, fin]) + rec[i[:, fin] + 1, c] * frac[:, fin]
        y = cam[fin, c] - cam[fin, c].mean()
        x -= x.mean(axis=1, keepdims=True)
        total += (x @ y) / np.sqrt((x * x).sum(axis=1) * (y @ y))
    return total / cam.shape[1]


def brute_force_alignment(t_rec, rec, t_cam, cam):
    """Independent check: exhaustive grid of offsets and rates, plain correlation.

    Global: offsets -60..60 s every 0.1 s, rates -450..450 ppm every 150 ppm, on every
    20th camera frame; then around the best: +-60 ms every 3 ms, +-100 ppm every 20 ppm.
    Returns (correlation, offset_s, rate_ppm) of the best grid point.
    """
    best = (-np.inf, 0.0, 0.0)
    offsets = np.arange(-60.0, 60.0 + 1e-9, 0.1)
    for ppm in np.arange(-450.0, 451.0, 150.0):
        c = plain_corr(t_rec, rec, t_cam[::20], cam[::20], offsets, ppm)
        best = max(best, (c.max(), offsets[np.argmax(c)], ppm))
    _, off0, ppm0 = best
    best = (-np.inf, 0.0, 0.0)
    offsets = off0 + np.arange(-0.06, 0.06 + 1e-9, 0.003)
    for ppm in ppm0 + np.arange(-100.0, 101.0, 20.0):
        c = plain_corr(t_rec, rec, t_cam, cam, offsets, ppm)
        best = max(best, (c.max(), offsets[np.argmax(c)], ppm))
    return best


@pytest.mark.parametrize("offset_s, rate_ppm", [(-50.0, 300.0), (-5.0, -450.0), (0.3, 300.0),
                                                (40.0, -450.0)])
def test_align_clocks_recovers_offset_and_rate(motion, offset_s, rate_ppm):
    # truth: the clock mapping we applied to the made-up motion; independent check: the
    # brute-force grid search above (plain correlation, no ranks, no FFT, no optimiser)
    t, _, rec = motion
    t_cam, cam, t_dev = camera(motion, offset_s, rate_ppm)
    a = align_clocks(t, rec, t_cam, cam)
    assert isinstance(a, Alignment)
    # requirement: within one camera frame and 50 ppm
    assert abs(a.offset_s - offset_s) < 1 / 60 and abs(a.rate_ppm - rate_ppm) < 50
    assert np.max(np.abs(a.to_device_time(t_cam) - t_dev)) < 1 / 60
    assert a.score > 0.9 and a.sharpness > 2 and a.n_frames_used > 0.9 * t_cam.size
    if offset_s in (-50.0, 40.0):
        corr_b, off_b, ppm_b = brute_force_alignment(t, rec, t_cam, cam)
        corr_s = plain_corr(t, rec, t_cam, cam, np.array([a.offset_s]), a.rate_ppm)[0]
        assert corr_s >= corr_b - 1e-3
        assert abs(a.offset_s - off_b) < 1 / 60 and abs(a.rate_ppm - ppm_b) < 50


def test_align_clocks_refuses_poor_motion(motion):
    t, _, rec = motion
    t_cam, cam, _ = camera(motion, 2.0, 100.0)
    rng = np.random.default_rng(7)
    still = 12.0 + rng.normal(0, 0.05, cam.shape)          # finger held still: noise only
    # held still: nothing to correlate (no source needed: the signal is noise by construction)
    with pytest.raises(AlignmentError, match="too little motion.*both directions"):
        align_clocks(t, 0.01 + rng.normal(0, 1e-4, rec.shape), t_cam, still)
    with pytest.raises(AlignmentError, match="too little motion"):
        align_clocks(t, rec, t_cam, still)
    # the camera moves but the recording shows something else
    with pytest.raises(AlignmentError, match="correlates only"):
        align_clocks(t, rng.normal(size=rec.shape), t_cam, cam)
    # strictly periodic motion: shifted by whole periods it matches equally well (periodicity)
    wave = 30 * np.sin(2 * np.pi * t / 2.0)[:, None] * np.ones((1, S4))
    cam_wave = 30 * np.sin(2 * np.pi * (t_cam + 2.0) / 2.0)[:, None] * np.ones((1, S4))
    with pytest.raises(AlignmentError, match="not distinct.*pauses of different lengths"):
        align_clocks(t, np.tanh(wave / 50), t_cam, cam_wave)
    # no overlap within the offset limit
    with pytest.raises(AlignmentError, match="no overlap"):
        align_clocks(t, rec, t_cam + 1000.0, cam)
