"""Reference curvatures from filmed markers: marker CSV, arc geometry, batched fit.

Filmed markers along a finger (:func:`read_marker_csv`) are modelled as points
on a planar curve of piecewise circular arcs (:func:`marker_positions`) and
fitted, all frames at once, with one curvature per segment plus the base pose
(:func:`fit_marker_frames`). Clock alignment: :mod:`acquire.core.align`.

SI units inside (m, 1/m, rad, s); mm only in the CSV. Arc length from the base
(tap 0); the curve leaves the base heading +x, positive curvature turns toward
+y. A base-frame point p is seen at (x0, y0) + R(phi) p, pose = (x0_m, y0_m,
phi_rad). All pure (only read_marker_csv reads its file), any thread; returned
arrays are new and owned by the caller, inputs are never modified or kept.
"""
from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["MarkerError", "MarkerTrack", "MarkerFit", "read_marker_csv", "default_marker_arc_m",
           "marker_positions", "fit_marker_frames"]

MAX_ABS_MM = 1e6          # larger marker coordinates are absurd (1 km)
_HUBER_C = 2.0            # Huber weight min(1, c sigma / r)   (common practice, no source)
_TUKEY_C = 4.685          # Tukey biweight cut, in sigma       (common practice, no source)
_HUBER_MAX_ITERS = 20     # IRLS phase 0 (Huber) limit per frame
_TUKEY_ITERS = 1          # IRLS phase 1: Tukey reweighting steps, then weights fixed
_CHI2_TOL = 1e-2          # stop when chi-square changes less (parameters move < 0.1 sd)


class MarkerError(ValueError):
    """A marker file the user gave is unusable; the message is one line naming it."""


@dataclass(frozen=True, eq=False)
class MarkerTrack:
    """Marker positions per camera frame, as read from a marker CSV.

    Attributes
    ----------
    t_s : ndarray, shape (F,)
        Camera clock per frame, s, strictly increasing.
    xy_m : ndarray, shape (F, K, 2)
        Marker positions in the camera plane, m; NaN where not detected.
    source : str
        Name of the file the track came from (for messages).
    """

    t_s: np.ndarray
    xy_m: np.ndarray
    source: str


# --- CSV ---------------------------------------------------------------------

def read_marker_csv(path, *, n_markers: int, name: str | None = None) -> MarkerTrack:
    """Read a marker CSV (``t_s,m0_x_mm,m0_y_mm,...``) strictly.

    Parameters
    ----------
    path : str or os.PathLike
        The CSV file (RFC 4180, UTF-8, one header row, one row per camera
        frame; blank lines ignored; an undetected marker leaves both cells empty).
    n_markers : int
        Number of markers the rig declares (K).
    name : str, optional
        How to name the file in messages and ``MarkerTrack.source``; default the path.

    Returns
    -------
    MarkerTrack
        Times in s, positions converted from mm to m (new arrays, caller owns them).

    Raises
    ------
    MarkerError
        One line naming the file and the problem, with line and column where
        relevant (empty file, header only, wrong header or marker count, bad
        row length, non-numeric or non-finite cell, half-empty marker, t_s not
        strictly increasing, marker missing in every frame, |value| > 1e6 mm).
    """
    n_markers = int(n_markers)
    if n_markers < 1:
        raise ValueError(f"n_markers must be >= 1, got {n_markers}")
    label = str(path) if name is None else str(name)
    text = _read_text(path, label)
    header, rows, lines = _split_rows(text, label)
    _check_header(header, n_markers, label)
    values, empty = _parse_cells(rows, lines, header, label, text)
    return _build_track(values, empty, lines, header, label)


def _fail(label: str, problem: str):
    raise MarkerError(f"{label}: {problem}")


def _read_text(path, label: str) -> str:
    try:
        return Path(path).read_bytes().decode("utf-8-sig")
    except OSError as exc:
        _fail(label, f"cannot read the file ({exc.strerror or exc})")
    except UnicodeDecodeError as exc:
        _fail(label, f"not UTF-8 text (byte {exc.start})")


def _split_rows(text: str, label: str):
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header, rows, lines = None, [], []
    try:
        for row in reader:
            if not row or (len(row) == 1 and not row[0].strip()):
                continue                    # blank line
            if header is None:
                header = [c.strip() for c in row]
            elif len(row) != len(header):
                _fail(label, f"line {reader.line_num} has {len(row)} cells, the header has {len(header)}")
            else:
                rows.append(row)
                lines.append(reader.line_num)
    except csv.Error as exc:
        _fail(label, f"line {reader.line_num}: not valid CSV ({exc})")
    if header is None:
        _fail(label, "is empty (expected a header t_s,m0_x_mm,m0_y_mm,... and one row per frame)")
    if not rows:
        _fail(label, "has a header but no data rows")
    return header, rows, lines


def _check_header(header: list[str], n_markers: int, label: str) -> None:
    ncol = len(header)
    if ncol != 1 + 2 * n_markers:
        if ncol >= 3 and ncol % 2 == 1 and header[0] == "t_s":
            _fail(label, f"has {(ncol - 1) // 2} markers, the rig has {n_markers}")
        _fail(label, f"header has {ncol} columns, expected t_s and 2 per marker "
                     f"({1 + 2 * n_markers} for the rig's {n_markers} markers)")
    want = ["t_s"] + [f"m{k}_{a}_mm" for k in range(n_markers) for a in "xy"]
    for col, (got, exp) in enumerate(zip(header, want), start=1):
        if got != exp:
            _fail(label, f"header column {col} is {got!r}, expected {exp!r}")


def _parse_cells(rows, lines, header, label, text):
    """Cells -> (float array, NaN for empty cells; empty-cell mask). Vectorised when the
    text is ASCII with no underscore beyond the header's (numpy would take 1_000)."""
    if text.isascii() and text.count("_") == sum(h.count("_") for h in header):
        cells = np.array(rows, dtype=str)
        try:
            return np.where(cells == "", "nan", cells).astype(float), cells == ""
        except ValueError:
            pass                                   # find the culprit cell by cell
    values, empty = np.empty((len(rows), len(header))), np.empty((len(rows), len(header)), bool)
    for i, row in enumerate(rows):
        for j, c in enumerate(c.strip() for c in row):
            try:
                if "_" in c or not c.isascii():
                    raise ValueError(c)
                values[i, j], empty[i, j] = (float(c) if c else np.nan), not c
            except ValueError:
                _fail(label, f"line {lines[i]}, column {header[j]}: {c[:40]!r} is not a number")
    return values, empty


def _build_track(values, empty, lines, header, label) -> MarkerTrack:
    bad = ~empty & ~np.isfinite(values)
    if bad.any():
        i, c = np.argwhere(bad)[0]
        _fail(label, f"line {lines[i]}, column {header[c]}: {float(values[i, c])!r} is not a finite number")
    t = values[:, 0]
    if empty[:, 0].any():
        _fail(label, f"line {lines[int(np.argmax(empty[:, 0]))]}: t_s is empty")
    if (np.diff(t) <= 0).any():
        i = int(np.argmax(np.diff(t) <= 0)) + 1
        _fail(label, f"line {lines[i]}: t_s {float(t[i])!r} is not after the previous {float(t[i - 1])!r} "
                     "(t_s must be strictly increasing)")
    xy = values[:, 1:]
    half = empty[:, 1::2] != empty[:, 2::2]
    if half.any():
        i, k = np.argwhere(half)[0]
        which = header[1 + 2 * k + (1 if empty[i, 1 + 2 * k] else 0)]
        _fail(label, f"line {lines[i]}: marker {k} has only one of its two cells "
                     f"({which} is empty; leave both empty when undetected)")
    big = ~empty[:, 1:] & (np.abs(xy) > MAX_ABS_MM)
    if big.any():
        i, c = np.argwhere(big)[0]
        _fail(label, f"line {lines[i]}, column {header[c + 1]}: {float(xy[i, c])!r} mm is absurd "
                     f"(|value| > {MAX_ABS_MM:g} mm)")
    never = empty[:, 1::2].all(axis=0)
    if never.any():
        k = int(np.argmax(never))
        _fail(label, f"marker {k} (m{k}_x_mm, m{k}_y_mm) is missing in every frame")
    xy = np.where(empty[:, 1:], np.nan, xy * 1e-3)
    return MarkerTrack(t_s=t.copy(), xy_m=xy.reshape(len(t), -1, 2), source=label)


# --- geometry: piecewise circular arcs, points as complex x + iy --------------
# Internally frames are on the LAST axis (k: (S, F), markers: (K, F)), so that
# numpy's inner loops run over thousands of frames rather than 6 segments.

@dataclass(frozen=True, eq=False)
class _Layout:
    L: np.ndarray        # (S,) segment lengths, m
    j: np.ndarray        # (K,) tap index (markers at a tap) or segment index (others)
    ds: np.ndarray       # (K,) arc length from tap j, m (0 at a tap)
    s: np.ndarray        # (K,) arc length of each marker, m
    o: np.ndarray        # (K,) normal offset of each marker, m
    inner: np.ndarray    # indices of the markers not at a tap


def default_marker_arc_m(segment_lengths_m) -> np.ndarray:
    """Default marker arc lengths: one marker per tap, S+1 values in m (new array)."""
    return np.concatenate([[0.0], np.cumsum(np.asarray(segment_lengths_m, dtype=float).ravel())])


def _layout(segment_lengths_m, s_m, offset_m) -> _Layout:
    L = np.asarray(segment_lengths_m, dtype=float).ravel()
    if L.size == 0 or not np.all(np.isfinite(L)) or np.any(L <= 0):
        raise ValueError("segment_lengths_m must be a non-empty list of positive lengths")
    taps = default_marker_arc_m(L)
    s = taps if s_m is None else np.asarray(s_m, dtype=float).ravel()
    o = np.zeros(s.shape) if offset_m is None else np.asarray(offset_m, dtype=float).ravel()
    if s.size == 0 or o.shape != s.shape or not np.all(np.isfinite(np.r_[s, o])) or np.any(s < 0):
        raise ValueError("s_m (>= 0) and offset_m must be finite, one value per marker each")
    near = np.abs(s[:, None] - taps[None, :]) <= 1e-12 * taps[-1]
    at_tap = near.any(axis=1)
    j = np.clip(np.searchsorted(taps, s, side="right") - 1, 0, L.size - 1)
    j = np.where(at_tap, np.argmax(near, axis=1), j)
    ds = np.where(at_tap, 0.0, s - taps[j])
    return _Layout(L=L, j=j, ds=ds, s=s, o=o, inner=np.flatnonzero(~at_tap))


def _turns(x):
    """For turn angles x (rad): e^{ix/2}, sin(x/2)/(x/2), cos(x/2), sin(x/2)."""
    h = 0.5 * x
    c, s = np.cos(h), np.sin(h)
    u = np.empty(x.shape, dtype=complex)
    u.real, u.imag = c, s
    return u, np.divide(s, h, out=np.ones_like(h), where=h != 0), c, s


def _g(x, sinc, c, s):
    """(e^{ix} - 1 - ix)/(ix)^2 from _turns: weight of a chord integrated over its arc."""
    small = np.abs(x) < 0.05
    xs, x2 = np.where(small, 1.0, x), x * x
    out = np.empty(x.shape, dtype=complex)
    out.real = 0.5 * sinc * sinc
    out.imag = np.where(small, x * (1 / 6 - x2 * (1 / 120 - x2 / 5040)), (xs - 2 * s * c) / (xs * xs))
    return out


def _shape(k, lay: _Layout) -> dict:
    """Base-frame taps and markers (complex) for curvatures k (S, F).

    Chords are ``l sinc(kl/2) e^{i(theta + kl/2)}``: exact as k -> 0.
    """
    L = lay.L[:, None]
    kl = k * L
    u, sinc, c, s = _turns(kl)
    E = np.ones((k.shape[0] + 1, k.shape[1]), dtype=complex)   # e^{i theta} at each tap
    np.cumprod(u * u, axis=0, out=E[1:])
    P = np.zeros(E.shape, dtype=complex)                         # tap positions
    np.cumsum(L * sinc * E[:-1] * u, axis=0, out=P[1:])
    Ej = E[lay.j]
    p = P[lay.j] + 1j * lay.o[:, None] * Ej
    n, dm = lay.inner, lay.ds[lay.inner][:, None]               # markers between taps
    kd = k[lay.j[n]] * dm
    um, sincm, cm, sm = _turns(kd)
    p[n] += Ej[n] * um * (dm * sincm + 1j * lay.o[n][:, None] * (um - np.conj(um)))
    return {"kl": kl, "seg": (sinc, c, s), "E": E, "P": P, "kd": kd, "mk": (sincm, cm, sm),
            "Ej": Ej, "p": p}


def marker_positions(curvature_per_m, *, segment_lengths_m, s_m=None, offset_m=None,
                     pose=None) -> np.ndarray:
    """Marker positions of piecewise circular arcs, closed form, all frames at once.

    Parameters
    ----------
    curvature_per_m : array_like, shape (F, S)
        Curvature of each segment per frame, 1/m (constant within a segment).
    segment_lengths_m : array_like, shape (S,)
        Segment lengths, m.
    s_m : array_like, shape (K,), optional
        Arc length of each marker from the base, m (>= 0); beyond the tip the
        last segment's arc is continued. Default: the S+1 taps.
    offset_m : array_like, shape (K,), optional
        Marker distance from the sensor line along the +y normal, m; default 0.
    pose : array_like, shape (F, 3), optional
        ``(x0_m, y0_m, phi_rad)`` of the base in the camera plane; default identity.

    Returns
    -------
    ndarray, shape (F, K, 2)
        Marker positions, m (new array, caller owns it). Pure; any thread.
    """
    lay = _layout(segment_lengths_m, s_m, offset_m)
    k = np.asarray(curvature_per_m, dtype=float)
    if k.ndim != 2 or k.shape[1] != lay.L.size:
        raise ValueError(f"curvature_per_m must have shape (F, {lay.L.size}), got {k.shape}")
    p = _shape(k.T, lay)["p"].T
    if pose is not None:
        pose = np.asarray(pose, dtype=float)
        if pose.shape != (k.shape[0], 3):
            raise ValueError(f"pose must have shape ({k.shape[0]}, 3), got {pose.shape}")
        p = (pose[:, 0] + 1j * pose[:, 1])[:, None] + np.exp(1j * pose[:, 2])[:, None] * p
    return np.stack([p.real, p.imag], axis=-1)


def _dshape(lay: _Layout, sh: dict):
    """Base-frame d(marker)/d(k_i), real, (2K, S, F): x rows, then y rows.

    A curvature change on [a, b] turns everything distal about each point of
    [a, b]: dp(s)/dk_i = i * integral over [a, min(b, s)] of (p(s) - c(u)) du.
    """
    j, p, n, K = lay.j, sh["p"], lay.inner, lay.j.size
    L = lay.L[:, None]
    G = sh["P"][:-1] * L + sh["E"][:-1] * L**2 * _g(sh["kl"], *sh["seg"])
    full = (np.arange(L.size)[None, :] < j[:, None])[:, :, None].astype(float)
    D = np.empty((2 * K, L.size, p.shape[1]))
    np.multiply(G.imag[None] - L[None] * p.imag[:, None], full, out=D[:K])
    np.multiply(L[None] * p.real[:, None] - G.real[None], full, out=D[K:])
    if n.size:
        dm = lay.ds[n][:, None]
        Gm = sh["P"][j[n]] * dm + sh["Ej"][n] * dm**2 * _g(sh["kd"], *sh["mk"])
        D[n, j[n]] = Gm.imag - dm * p[n].imag
        D[K + n, j[n]] = dm * p[n].real - Gm.real
    return D


# --- batched robust fit --------------------------------------------------------

@dataclass(frozen=True, eq=False)
class MarkerFit:
    """Per-frame result of :func:`fit_marker_frames` (arrays owned by the caller).

    Attributes
    ----------
    curvature_per_m : ndarray, shape (F, S)
        Fitted curvature per segment, 1/m; NaN if the frame is not ``ok`` or
        the segment has no usable marker beyond its start.
    pose : ndarray, shape (F, 3)
        ``(x0_m, y0_m, phi_rad)`` of the base in the camera plane; NaN if not ok.
    residual_m : ndarray, shape (F,)
        RMS distance between observed and fitted markers, m, weighted by
        ``marker_weight`` (a rejected wild point does not count).
    curvature_sd_per_m : ndarray, shape (F, S)
        Standard uncertainty from the markers alone (Gauss-Newton covariance at
        the frame's noise scale, no prior), 1/m; inf if not determined to first order.
    marker_weight : ndarray, shape (F, K)
        Final robust weight of each marker in [0, 1]; 0 if missing or rejected.
    ok : ndarray of bool, shape (F,)
        Enough markers (2 * observed >= S + 3) and a finite, plausible fit.
    """

    curvature_per_m: np.ndarray
    pose: np.ndarray
    residual_m: np.ndarray
    curvature_sd_per_m: np.ndarray
    marker_weight: np.ndarray
    ok: np.ndarray


def fit_marker_frames(track: MarkerTrack, *, segment_lengths_m, s_m=None, offset_m=None,
                      noise_m: float = 0.3e-3, max_curvature_per_m: float = 250.0,
                      roughness_scale_per_m: float | None = 100.0, max_iter: int = 40,
                      chunk_frames: int = 8192) -> MarkerFit:
    """Fit per-frame segment curvatures and base pose to filmed markers.

    Parameters
    ----------
    track : MarkerTrack
        Marker positions (F, K, 2), m, NaN where missing.
    segment_lengths_m : array_like, shape (S,)
        Segment lengths, m.
    s_m, offset_m : array_like, shape (K,), optional
        Marker arc lengths (strictly increasing, >= 0) and offsets along the
        +y normal, m; defaults: the S+1 taps, offset 0.
    noise_m : float
        Marker position noise per coordinate, m: floor of the robust scale.
    max_curvature_per_m : float
        Largest plausible |curvature|, 1/m; frames with no plausible fit are not ok.
    roughness_scale_per_m : float or None
        Scale of a weak prior on curvature differences between neighbouring
        segments, 1/m (cost ``sum((dk / scale)^2)`` next to chi-square); ``None``: off.
    max_iter : int
        Iteration limit per frame.
    chunk_frames : int
        Frames solved together; bounds memory (a few kB per frame).

    Returns
    -------
    MarkerFit
        New arrays, owned by the caller. Pure; runs on the caller's thread.

    Notes
    -----
    Unknowns per frame: S curvatures and the pose. The pose is eliminated in
    closed form (weighted 2-D Procrustes); Levenberg-Marquardt runs on the
    curvatures with the projected analytic Jacobian (variable projection),
    all frames of a chunk at once (stacked S x S systems), from a start where
    chord angles (tangent at mid-chord on an arc) are linear in curvature.
    Robust: IRLS on each marker's residual distance r, scale ``sigma =
    max(noise_m, median(r) / 1.1774)`` per frame (median distance of a 2-D
    normal), Huber weights ``min(1, 2 sigma/r)`` until nearly converged, then
    Tukey ``(1 - (r/(4.685 sigma))^2)^2``, 0 beyond (common practice, no
    source). Frames with a rejected marker or sharp-bend fits are refitted
    leaving each marker out in turn; the least robust objective (Tukey rho +
    prior) wins. Each frame has its own damping, weights and stopping, so
    results do not depend on chunking. With markers only at the taps a zigzag
    of alternating curvatures moves no tap to first order: near straight the
    prior decides it (large ``curvature_sd_per_m``) and a wild point within
    reach can pass for a sharp bend; markers at segment middles remove both.
    """
    lay = _layout(segment_lengths_m, s_m, offset_m)
    if np.any(np.diff(lay.s) <= 0):
        raise ValueError("s_m must be strictly increasing (markers ordered from the base)")
    xy = np.asarray(track.xy_m, dtype=float)
    if xy.ndim != 3 or xy.shape[1:] != (lay.s.size, 2):
        raise ValueError(f"track markers {xy.shape[1:]} do not match the layout's {lay.s.size}")
    F, K, S = xy.shape[0], lay.s.size, lay.L.size
    out = {"k": np.full((F, S), np.nan), "pose": np.full((F, 3), np.nan),
           "res": np.full(F, np.nan), "sd": np.full((F, S), np.inf),
           "w": np.zeros((F, K)), "ok": np.zeros(F, dtype=bool)}
    D = np.diff(np.eye(S), axis=0)                   # prior: sum((dk / scale)^2) -> k^T Pk k
    tau = np.inf if roughness_scale_per_m is None else float(roughness_scale_per_m)
    opts = (float(noise_m), float(max_curvature_per_m), int(max_iter), D.T @ D / tau**2)
    step = max(1, int(chunk_frames))
    for a in range(0, F, step):
        _fit_chunk(xy[a:a + step], lay, *opts, {n: v[a:a + step] for n, v in out.items()})
    return MarkerFit(curvature_per_m=out["k"], pose=out["pose"], residual_m=out["res"],
                     curvature_sd_per_m=out["sd"], marker_weight=out["w"], ok=out["ok"])


def _fit_chunk(xy, lay: _Layout, noise_m, k_max, max_iter, Pk, out) -> None:
    """Fit one chunk of frames; writes into the views in ``out``."""
    S = lay.L.size
    obs = (xy[..., 0] + 1j * xy[..., 1]).T                  # (K, F)
    valid = np.isfinite(obs)
    ok = 2 * valid.sum(axis=0) >= S + 3
    if not ok.any():
        return
    obs, valid = np.where(valid, obs, 0)[:, ok], valid[:, ok]
    k, w, sigma = _lm_irls(_start(obs, valid, lay), valid, obs, valid, lay, noise_m, max_iter, Pk)
    _leave_one_out(k, w, sigma, obs, valid, lay, noise_m, max_iter, Pk, k_max)
    sh = _shape(k, lay)
    r, pc, rot, z0 = _procrustes(sh["p"], obs, w)
    res = np.sqrt((w * np.abs(r) ** 2).sum(axis=0) / np.maximum(w.sum(axis=0), 1e-300))
    sd = _curvature_sd(_normal(_reduced_jacobian(lay, sh, pc, w), w)[0], sigma)
    pose = np.stack([z0.real, z0.imag, np.angle(rot)], axis=1)
    good = np.all(np.isfinite(pose), axis=1) & (np.abs(k) <= k_max).all(axis=0)
    k = np.where(_determined(w, lay), k, np.nan).T
    idx = np.flatnonzero(ok)[good]
    out["k"][idx], out["pose"][idx], out["res"][idx] = k[good], pose[good], res[good]
    out["sd"][idx], out["w"][idx], out["ok"][idx] = sd[good], w.T[good], True


def _leave_one_out(k, w, sigma, obs, valid, lay: _Layout, noise_m, max_iter, Pk, k_max) -> None:
    """Refit doubtful frames once without each marker in turn; keep the best candidate.

    Candidates are compared by Tukey rho of all observed markers at a common
    scale (the smallest robust scale among them) plus the prior; implausible
    ones (|k| > k_max) last. Updates k, w, sigma in place.
    """
    S = lay.L.size
    prior = np.einsum("if,ij,jf->f", k, Pk, k)
    flagged = np.flatnonzero(((w == 0) & valid).any(axis=0) | (np.abs(k) > k_max).any(axis=0)
                             | (prior > _TUKEY_C**2 / 6))
    m_idx, f_idx = np.nonzero(valid[:, flagged])             # one candidate per observed marker
    fr, slot = flagged[f_idx], f_idx
    vv = valid[:, fr].copy()
    vv[m_idx, np.arange(fr.size)] = False
    keep = 2 * vv.sum(axis=0) >= S + 3
    fr, slot, vv = fr[keep], slot[keep], vv[:, keep]
    if fr.size == 0:
        return
    kv, wv, _ = _lm_irls(_start(obs[:, fr], vv, lay), vv.astype(float), obs[:, fr], vv, lay,
                         noise_m, min(max_iter, 15), Pk, robust=False)   # losers need not converge
    rv, sv = _distances(kv, wv, obs[:, fr], valid[:, fr], lay, noise_m)
    r0, scale = _distances(k[:, flagged], w[:, flagged], obs[:, flagged], valid[:, flagged],
                           lay, noise_m)
    np.minimum.at(scale, slot, sv)
    cost = _objective(kv, rv, valid[:, fr], scale[slot], Pk, k_max)
    cost0 = _objective(k[:, flagged], r0, valid[:, flagged], scale, Pk, k_max)
    order = np.lexsort((cost, fr))                            # best candidate first per frame
    first = order[np.r_[True, fr[order][1:] != fr[order][:-1]]]
    first = first[cost[first] < cost0[slot[first]]]
    fb = fr[first]
    _, wt, st = _robust_weights(rv[:, first], valid[:, fb], noise_m, S + 3)
    k[:, fb], w[:, fb], sigma[fb] = kv[:, first], wt, st


def _distances(k, w, obs, valid, lay: _Layout, noise_m):
    """Distances of all markers to the fit (pose fitted with weights w) and the robust scale."""
    r = np.abs(_procrustes(_shape(k, lay)["p"], obs, w)[0])
    return r, _robust_weights(r, valid, noise_m, 0)[2]


def _objective(k, r, valid, sigma, Pk, k_max):
    """Tukey rho of observed distances r at scale sigma, plus the prior; inf if |k| > k_max."""
    u = r / sigma
    rho = _TUKEY_C**2 / 6 * (1 - np.clip(1 - (u / _TUKEY_C) ** 2, 0, None) ** 3)
    cost = (rho * valid).sum(axis=0) + np.einsum("if,ij,jf->f", k, Pk, k)
    return np.where((np.abs(k) <= k_max).all(axis=0), cost, np.inf)


def _procrustes(p, obs, w):
    """Best rigid placement of base-frame points p (K, F) on obs with weights w: the
    base-frame residual (model - observed), centred model points, e^{i phi}, x0 + i y0."""
    ws = np.maximum(w.sum(axis=0), 1e-300)
    pm, om = (w * p).sum(axis=0) / ws, (w * obs).sum(axis=0) / ws
    pc, oc = p - pm, obs - om
    rot = (w * np.conj(pc) * oc).sum(axis=0)
    mag = np.abs(rot)
    rot = np.where(mag > 0, rot / np.where(mag > 0, mag, 1.0), 1.0)
    return pc - np.conj(rot) * oc, pc, rot, om - rot * pm


def _reduced_jacobian(lay: _Layout, sh, pc, w):
    """Jacobian of the Procrustes residual w.r.t. k, (2K, S, F): variable projection,
    the pose columns projected out in the weighted metric (same GN step as on k, pose)."""
    D = _dshape(lay, sh)
    K, wk = w.shape[0], w[:, None, :]
    ws = np.maximum(w.sum(axis=0), 1e-300)
    Dx, Dy = D[:K], D[K:]
    Dx -= (wk * Dx).sum(axis=0) / ws
    Dy -= (wk * Dy).sum(axis=0) / ws
    beta = ((wk * pc.real[:, None]) * Dy - (wk * pc.imag[:, None]) * Dx).sum(axis=0)
    beta /= np.maximum((w * (pc.real**2 + pc.imag**2)).sum(axis=0), 1e-300)
    Dx += pc.imag[:, None] * beta
    Dy -= pc.real[:, None] * beta
    return D


def _normal(J, wn, r=None):
    """J^T W J (S, S, F) and J^T W r (S, F) for stacked real Jacobians (2K, S, F)."""
    Jw = J * np.concatenate([wn, wn], axis=0)[:, None, :]
    S = J.shape[1]
    A = np.empty((S, S, J.shape[2]))
    for a in range(S):
        for b in range(a, S):
            A[a, b] = A[b, a] = np.einsum("mf,mf->f", Jw[:, a], J[:, b])
    if r is None:
        return A, None
    return A, np.einsum("maf,mf->af", Jw, np.concatenate([r.real, r.imag], axis=0))


def _start(obs, valid, lay: _Layout):
    """Closed-form start, curvatures (S, F), from the chords between consecutive markers.

    A chord of one circular arc points along the tangent at mid-arc, so the
    unwrapped chord angles are linear in the base angle and the curvatures;
    a weak smoothness prior picks the smoothest solution where the system is
    short of one equation (markers only at taps).
    """
    K, F = obs.shape
    S, L = lay.L.size, lay.L
    ar = np.broadcast_to(np.arange(K)[:, None], (K, F))
    nxt = np.minimum.accumulate(np.where(valid, ar, K)[::-1], axis=0)[::-1]
    nxt = np.concatenate([nxt[1:], np.full((1, F), K)], axis=0)       # next valid marker
    prv = np.maximum.accumulate(np.where(valid, ar, -1), axis=0)
    prv = np.concatenate([np.full((1, F), -1), prv[:-1]], axis=0)     # previous valid marker
    has, tgt = valid & (nxt < K), np.minimum(nxt, K - 1)
    vec = np.where(has, np.take_along_axis(obs, tgt, axis=0) - obs, 1)
    unit = vec / np.maximum(np.abs(vec), 1e-300)
    turn = np.angle(unit * np.conj(np.take_along_axis(unit, np.maximum(prv, 0), axis=0)))
    head = np.cumsum(np.where(has & (prv >= 0), turn, 0.0), axis=0)
    starts = np.concatenate([[0.0], np.cumsum(L)[:-1]])
    mid = 0.5 * (lay.s[:, None] + lay.s[tgt])
    X = np.concatenate([np.ones((K, 1, F)),
                        np.clip(mid[:, None] - starts[None, :, None], 0, L[None, :, None])], axis=1)
    Xw = X * has[:, None]
    A = np.einsum("kif,kjf->ijf", Xw, X)
    Dm = np.diff(np.eye(S), axis=0) * L.mean()
    A[1:, 1:] += (1e-6 * Dm.T @ Dm + 1e-9 * np.diag(L**2))[..., None]
    A[0, 0] += 1e-9
    return _solve_spd(A, np.einsum("kif,kf->if", Xw, head))[1:]


def _robust_weights(r, valid, noise_m, n_unknowns: int):
    """IRLS weights from marker residual distances r (K, F): (huber, tukey, sigma).

    Tukey weights fall back to Huber in a frame where they would leave fewer
    observations than unknowns.
    """
    K, n = r.shape[0], valid.sum(axis=0)
    srt = np.sort(np.where(valid, r, np.inf), axis=0)
    lo = np.take_along_axis(srt, np.clip((n - 1) // 2, 0, K - 1)[None], axis=0)[0]
    hi = np.take_along_axis(srt, np.clip(n // 2, 0, K - 1)[None], axis=0)[0]
    sigma = np.maximum(noise_m, 0.5 * (lo + hi) / 1.1774)
    u = r / sigma
    huber = np.minimum(1.0, _HUBER_C / np.maximum(u, 1e-300)) * valid
    biw = np.where(u < _TUKEY_C, (1 - (u / _TUKEY_C) ** 2) ** 2, 0.0) * valid
    return huber, np.where(2 * (biw > 0).sum(axis=0) >= n_unknowns, biw, huber), sigma


def _chi2(r, wn, k, Pk):
    return (wn * (r.real**2 + r.imag**2)).sum(axis=0) + np.einsum("if,ij,jf->f", k, Pk, k)


def _take(sh: dict, idx) -> dict:
    return {n: (tuple(a[:, idx] for a in v) if isinstance(v, tuple) else v[:, idx])
            for n, v in sh.items()}


def _put(sh: dict, idx, new: dict, sel) -> None:
    for n, v in sh.items():
        for a, b in (zip(v, new[n]) if isinstance(v, tuple) else [(v, new[n])]):
            a[:, idx[sel]] = b[:, sel]


def _lm_irls(k, w0, obs, valid, lay: _Layout, noise_m, max_iter, Pk, *, robust=True):
    """Levenberg-Marquardt on k (S, F) with IRLS weights, per frame, batched.

    Per frame: Huber weights until nearly converged, then Tukey weights, then
    fixed until converged (``robust=False``: ``w0`` throughout); a frame that
    is done is no longer touched. Returns k, weights (K, F), robust scale (F,).
    """
    S, F = k.shape
    Ltot = float(lay.L.sum())
    Ps = (Pk / Ltot**2)[..., None]                     # prior for scaled k (k * Ltot)
    lam, sigma, w = np.full(F, 1e-6), np.full(F, noise_m), w0.copy()
    phase, count = np.full(F, 0 if robust else 1), np.full(F, 0 if robust else _TUKEY_ITERS)
    active, diag = np.ones(F, dtype=bool), (np.arange(S), np.arange(S))
    sh = _shape(k, lay)                                 # state: shape and residual at k
    r_cur = _procrustes(sh["p"], obs, w)[0]
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        ka, oa, va, ph, sha = k[:, idx], obs[:, idx], valid[:, idx], phase[idx], _take(sh, idx)
        wh, wb, st = _robust_weights(np.abs(r_cur[:, idx]), va, noise_m, S + 3)
        reweight = (ph == 0) | (count[idx] < _TUKEY_ITERS)
        w[:, idx] = wa = np.where(reweight, np.where(ph == 1, wb, wh), w[:, idx])
        sigma[idx] = sa = np.where(reweight, st, sigma[idx])
        wn = wa / sa**2
        r, pc, _, _ = _procrustes(sha["p"], oa, wa)
        A, g = _normal(_reduced_jacobian(lay, sha, pc, wa) / Ltot, wn, r)
        A += Ps
        g += np.einsum("ijf,jf->if", Ps, ka * Ltot)
        A[diag] = A[diag] * (1 + lam[idx]) + 1e-12 * A[diag].mean(axis=0) + 1e-300
        step = _solve_spd(A, -g) / Ltot
        kn = ka + step
        shn = _shape(kn, lay)
        rn = _procrustes(shn["p"], oa, wa)[0]
        cost, cost_new = _chi2(r, wn, ka, Pk), _chi2(rn, wn, kn, Pk)
        better = cost_new <= cost
        k[:, idx[better]] = kn[:, better]
        _put(sh, idx, shn, better)
        r_cur[:, idx] = np.where(better, rn, r)
        lam[idx] = np.where(better, np.maximum(lam[idx] / 10, 1e-12), lam[idx] * 10)
        change = np.abs(cost - cost_new)
        done = ((better & (np.max(np.abs(step), axis=0) * Ltot < 1e-8))
                | (change < _CHI2_TOL + 1e-9 * cost) | (lam[idx] > 1e12))
        active[idx[done & (ph == 1) & (count[idx] >= _TUKEY_ITERS)]] = False
        to_tukey = (ph == 0) & (done | (change < 0.1 + 1e-3 * cost) | (count[idx] >= _HUBER_MAX_ITERS))
        count[idx] = np.where(to_tukey, 0, count[idx] + 1)
        phase[idx[to_tukey]] = 1
        lam[idx[to_tukey]] = 1e-6
    return k, w, sigma


def _solve_spd(A, b):
    """Solve stacked symmetric positive definite systems A (n, n, F) x = b (n, [m,] F).

    Gaussian elimination without pivoting (stable for SPD), vectorised over
    frames: much faster than one LAPACK call per small matrix. A is overwritten.
    """
    n, vec = A.shape[0], b.ndim == 2
    b = (b[:, None] if vec else b).copy()
    for i in range(n - 1):
        f = A[i + 1:, i] / A[i, i]
        A[i + 1:, i + 1:] -= f[:, None] * A[i, i + 1:][None]
        b[i + 1:] -= f[:, None] * b[i][None]
    x = np.empty_like(b)
    for i in range(n - 1, -1, -1):
        x[i] = (b[i] - (A[i, i + 1:, None] * x[i + 1:]).sum(axis=0)) / A[i, i]
    return x[:, 0] if vec else x


def _determined(w, lay: _Layout):
    """(S, F): segment i has a usable marker strictly beyond its start."""
    starts = np.concatenate([[0.0], np.cumsum(lay.L)[:-1]])
    return (((lay.s[:, None] > starts[None, :] + 1e-12).T.astype(float) @ (w > 0)) > 0)


def _curvature_sd(A, sigma):
    """(F, S): sqrt(diag(A^-1)) * sigma; inf where A is singular along a curvature
    (a 1e-9 ridge keeps A invertible; a variance it supplies > 1 % of is a null direction)."""
    S = A.shape[0]
    ridge = 1e-9 * np.einsum("iif->f", A) / S + 1e-300
    A = A + np.eye(S)[..., None] * ridge
    var = np.einsum("iif->if", _solve_spd(A, np.broadcast_to(np.eye(S)[..., None], A.shape)))
    return (np.where(ridge * var > 0.01, np.inf, np.sqrt(var)) * sigma).T
