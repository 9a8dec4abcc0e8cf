"""The strip's memory in `tapcurve calibrate`: identification, what it is worth, files and the pipeline.

The recordings are written by the project's own recorder from codes made with
known laws, so every figure can be checked against them:

- the divider: tap voltage = V_ex * R_below / (r_ref + R_total) (Ohm's law and
  the voltage divider; e.g. Horowitz & Hill, "The Art of Electronics", 3rd ed.
  2015, chapter 1; from memory), ideal ADC code = round(V / V_ref * 2^N);
- the static law, made up for these tests: curvature = 60 x + 30 x^2 for x >= 0,
  150 x for x < 0, x the memory-free relative change;
- the memory: the model of :mod:`acquire.core.memory` run forward (its closed
  forms are checked in tests/acquire/core/test_memory.py) with parameters made
  up here: creep gain 0.15 with tau 1 s, and play-operator hysteresis whose
  major loop is 5.4 % of the range wide.

Requirement (the brief): parameters back within 10 %.
"""
from __future__ import annotations

import importlib.util
import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from acquire.commands.calibrate import calibrate_files, holds_from_recording
from acquire.commands.calibrate_motion import calibrate_with_motion
from acquire.commands.calibrate_memory import (MotionSeries, add_memory, fit_strip_memory, holds_series_from_files,
                                               invert_static_law, memory_report_lines)
from acquire.core.calibration import Calibration
from acquire.core.calibration_fit import fit_calibration
from acquire.core.memory import SegmentMemory, StripMemory
from acquire.core.memory_fit import hysteresis_band
from acquire.core.pipeline import Pipeline
from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import load_rig
from acquire.store.recorder import Recorder
from acquire.store.recording import open_recording
from acquire.virtual.strip import StripSettings

REPO = Path(__file__).resolve().parents[3]
RIG_PATH = REPO / "acquire" / "rigs" / "demo_finger.toml"
RATE = 1000.0
BITS = 12
R0 = np.array([5000.0, 5200.0, 4900.0, 5100.0, 5050.0, 4950.0])
C1, C2, D1 = 60.0, 30.0, 150.0
GRID = [0.0, 0.035, 0.07, 0.14]  # play thresholds, units of x (the x range is about 0.7)
CREEP = SegmentMemory(creep_gains=[0.15], creep_taus_s=[1.0])
HYSTERESIS = SegmentMemory(GRID, [0.75, 0.12, 0.08, 0.05], [0.15], [1.0])
HOLDS = [("flat", 0.0), ("curvature=10/m", 10.0), ("curvature=20/m", 20.0), ("curvature=30/m", 30.0),
         ("curvature=40/m", 40.0), ("flat", 0.0), ("curvature=-10/m", -10.0), ("curvature=-25/m", -25.0),
         ("flat", 0.0)]


def x_of_curvature(k):
    """Inverse of the made-up static law."""
    k = np.asarray(k, dtype=np.float64)
    pos = (-C1 + np.sqrt(C1 * C1 + 4 * C2 * np.maximum(k, 0))) / (2 * C2)
    return np.where(k >= 0, pos, k / D1)


def hold_program(holds, *, hold_s=2.5, move_s=0.3):
    """Curvature per frame: holds joined by smooth moves, and the label intervals."""
    parts, spans, t0, prev = [np.zeros(int(0.5 * RATE))], [], 0.5, 0.0
    for label, k in holds:
        s = np.arange(int(move_s * RATE)) / (move_s * RATE)
        parts += [prev + (k - prev) * (3 * s * s - 2 * s ** 3), np.full(int(hold_s * RATE), float(k))]
        spans.append((label, t0 + move_s + 0.05, t0 + move_s + hold_s - 0.05))
        t0, prev = t0 + move_s + hold_s, k
    return np.concatenate(parts), spans


def motion_program(seed, *, n_moves):
    """Curvature per frame of a made-up motion: ramps of random speed to random targets, random holds."""
    rng = np.random.default_rng(seed)
    parts, cur = [np.zeros(int(2 * RATE))], 0.0
    for _ in range(n_moves):
        target = rng.uniform(-25.0, 40.0)
        parts.append(np.linspace(cur, target, int(rng.uniform(0.3, 1.5) * RATE) + 1)[1:])
        parts.append(np.full(int(rng.uniform(0.2, 4.0) * RATE), target))
        cur = target
    return np.concatenate(parts)


def strip_resistance(curvature, memory):
    """Segment resistances (N, 6) of a strip with ``memory`` (None: ideal) bent to ``curvature`` (N,)."""
    xs = x_of_curvature(curvature)[:, None] * np.ones((1, R0.size))
    return R0 * (1.0 + (xs if memory is None else StripMemory([memory] * R0.size).forward(xs, rate_hz=RATE)))


def divider_codes(r_seg, *, r_ref, rng, noise_lsb=0.7):
    below = np.cumsum(r_seg[:, ::-1], axis=1)[:, ::-1]
    v = below / (r_ref + below[:, :1]) * (1 << BITS) + rng.normal(scale=noise_lsb, size=r_seg.shape)
    return np.clip(np.rint(v), 0, (1 << BITS) - 1).astype(np.uint16)


def write_recording(path, resistance, labels, *, seed=0):
    rig = load_rig(RIG_PATH)
    codes = divider_codes(resistance, r_ref=rig.r_ref_ohm, rng=np.random.default_rng(seed))
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    hello = {"protocol": 1, "firmware": "test", "adc_bits": BITS, "channels": rig.n_channels, "rate_hz": RATE}
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=json.dumps(hello),
                   channel_names=rig.channels, n_segments=rig.n_segments)
    rec.start()
    seq = np.arange(n, dtype=np.int64)
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq / RATE, t_host_s=seq / RATE,
                         status=np.zeros(n, dtype=np.uint8)))
    for text, a, b in labels:
        rec.add_label(text, t_start_s=a, t_end_s=b)
    rec.stop()
    assert rec.error is None
    return codes


def static_calibration(path, rig):
    """The static calibration alone (what calibrate fitted before the memory)."""
    with open_recording(path) as rec:
        holds, _ = holds_from_recording(rec, rig=rig, rate_hz=RATE, adc_bits=BITS)
    return fit_calibration(holds, rig=rig, degree=(2, 1))[0]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("memory")
    k, spans = hold_program(HOLDS)
    out = {"dir": d, "rig": load_rig(RIG_PATH)}
    for name, memory in (("creep", CREEP), ("ideal", None), ("hysteresis", HYSTERESIS)):
        out[name] = d / f"{name}.h5"
        write_recording(out[name], strip_resistance(k, memory), spans)
    return out


@pytest.fixture(scope="module")
def creep_run(files):
    return calibrate_files([files["creep"]], rig=files["rig"])


def test_creep_from_holds_comes_back_within_10_percent(creep_run):
    rep = creep_run.memory_report
    for seg in rep.segments:
        assert seg.kept and seg.creep_from == "holds"
        assert seg.creep_gain == pytest.approx(0.15, rel=0.1)
        assert seg.creep_tau_s == pytest.approx(1.0, rel=0.1)
        assert seg.heldout_rms_memory_per_m < 0.5 * seg.heldout_rms_static_per_m
    assert any("no unloading seen: hysteresis not identified" in n for n in creep_run.notes)
    model = creep_run.calibration.memory_model
    assert model is not None and model.n_segments == 6
    lines = memory_report_lines(creep_run)
    assert "kept in segment(s) 0, 1, 2, 3, 4, 5" in lines[0] and len(lines[1].splitlines()) >= 8


def test_static_law_is_refitted_to_settled_holds(creep_run, files):
    # hold means still contain creep; with it taken out the law is the made-up one at the references
    refs = np.array([10.0, 20.0, 30.0, 40.0, -10.0, -25.0])
    r = R0 * (1.0 + x_of_curvature(refs)[:, None])
    before = static_calibration(files["creep"], files["rig"]).curvature_per_m(r) - refs[:, None]
    after = creep_run.calibration.curvature_per_m(r) - refs[:, None]
    assert np.abs(after).max() < 0.2 < np.abs(before).max()


def test_ideal_strip_keeps_the_static_calibration(files):
    run = calibrate_files([files["ideal"]], rig=files["rig"])
    assert run.calibration.memory is None
    assert not any(s.kept for s in run.memory_report.segments)
    static = static_calibration(files["ideal"], files["rig"])
    for k in range(6):
        assert run.calibration.positive[k] == pytest.approx(static.positive[k], rel=1e-12)


def test_static_option_skips_the_memory(creep_run, files):
    run = add_memory(creep_run, files=[files["creep"]], rig=files["rig"], static=True)
    assert run.memory_report is None and memory_report_lines(run) == ["memory: not fitted (--static)"]


def test_inverse_of_the_static_law_is_exact():
    cal = Calibration(r0_ohm=R0, positive=[[C1, C2]] * 6, negative=[[D1]] * 6, x_min=np.full(6, -0.2),
                      x_max=np.full(6, 0.6), curvature_min_per_m=np.full(6, -30.0),
                      curvature_max_per_m=np.full(6, 46.8), readout_kind="divider", rig={"n_segments": 6})
    k = np.linspace(-60.0, 80.0, 57)[:, None] * np.ones((1, 6))  # beyond the range too (straight on)
    x = invert_static_law(cal, k)
    assert np.allclose(cal.curvature_per_m(R0 * (1 + x)), k, atol=1e-6)
    inside = (k[:, 0] > -30.0) & (k[:, 0] < 46.8)
    assert np.allclose(x[inside], x_of_curvature(k[inside]), atol=1e-6)


def test_flat_holds_become_rows_of_the_hysteresis_fit():
    # Closed form: the play's definition, y_n = max(u_n - r, min(u_n + r, y_{n-1})) (Brokate & Sprekels
    # 1996, from memory), run over the holds' levels, gives what the creep-free reading of each flat hold
    # is (the creep's inverse is exact: tests/acquire/core/test_memory.py); its static signal is 0.
    from acquire.commands.calibrate_memory import HoldSpan, HoldsSeries, _hold_rows

    k, spans = hold_program(HOLDS)
    t = np.arange(k.size) / RATE
    series = HoldsSeries(t_s=t, resistance_ohm=strip_resistance(k, HYSTERESIS), rate_hz=RATE, holds=tuple(
        HoldSpan(label, a, b, np.full(6, kk)) for (label, a, b), (_, kk) in zip(spans, HOLDS)))
    law = Calibration(r0_ohm=R0, positive=[[C1, C2]] * 6, negative=[[D1]] * 6, x_min=np.full(6, -0.2),
                      x_max=np.full(6, 0.6), curvature_min_per_m=np.full(6, -30.0),
                      curvature_max_per_m=np.full(6, 46.8), readout_kind="divider", rig={"n_segments": 6})
    [(y, u)] = _hold_rows(law, [series], np.full(6, 0.15), np.full(6, 1.0))
    td = t[::10]  # decimated to about 100 frames/s
    plays, want = np.zeros(len(GRID)), []
    for (label, a, b), (_, kk) in zip(spans, HOLDS):
        level = float(x_of_curvature(kk))
        plays = np.maximum(level - np.array(GRID), np.minimum(level + np.array(GRID), plays))
        rows = (td >= a) & (td <= b)
        if kk == 0.0:
            want.append(float(plays @ HYSTERESIS.pi_weights))
            assert np.all(u[rows] == 0.0)
            assert np.allclose(y[rows], want[-1], rtol=0, atol=2e-4)
        else:
            assert np.isnan(u[rows]).all()
    assert want[1] == pytest.approx(0.0168, abs=1e-12)  # after the largest bend: sum of w_j r_j, every play turned
    assert want[2] < -0.01  # after the opposite bend


@pytest.fixture(scope="module")
def motion_fit(files):
    rig = files["rig"]
    km = motion_program(3, n_moves=30)
    r = strip_resistance(km, HYSTERESIS) * (1 + np.random.default_rng(4).normal(scale=2e-5, size=(km.size, 6)))
    motion = MotionSeries(np.arange(km.size) / RATE, r, km[:, None] * np.ones((1, 6)))
    static = static_calibration(files["hysteresis"], rig)
    holds = holds_series_from_files([files["hysteresis"]], _infos(files["hysteresis"], rig), rig=rig)
    return fit_strip_memory(static, holds, [motion], rig=rig, degree=(2, 1)), static, km


def test_the_holds_set_the_law_where_they_reach(files, monkeypatch):
    # Jig holds against a film whose reference reads 10 % high (a camera's scale off; made up): at the jigs
    # the calibration handed on (memory and law) must read the jigs' curvatures (set by their geometry,
    # exact here), not the film's. With the film's bins weighing as much as a hold it follows the film.
    import acquire.commands.calibrate_memory as cmem

    rig = files["rig"]
    km = motion_program(3, n_moves=30)
    film = MotionSeries(np.arange(km.size) / RATE, strip_resistance(km, HYSTERESIS),
                        1.1 * km[:, None] * np.ones((1, 6)))
    static = static_calibration(files["hysteresis"], rig)
    holds = holds_series_from_files([files["hysteresis"]], _infos(files["hysteresis"], rig), rig=rig)
    t, x, steps, _ = cmem._steps_all(static, holds)
    creep = cmem.fit_creep_steps(t, x, steps, taus_s=cmem.DEFAULT_TAUS_S)

    def worst_hold_error(weight):
        monkeypatch.setattr(cmem, "_FINAL_MOTION_WEIGHT", weight)
        law, _, memory = cmem._with_motion(static, holds, [film], creep, rig=rig, degree=(2, 1))[:3]
        k = cmem._holds_curvature(law, memory, holds)
        h = holds[0]
        return max(float(np.max(np.abs(np.mean(k[(h.t_s >= sp.t_start_s) & (h.t_s <= sp.t_end_s)], axis=0)
                                       / sp.reference_per_m - 1.0)))
                   for sp in h.holds if sp.reference_per_m[0] != 0.0)

    assert worst_hold_error(cmem._FINAL_MOTION_WEIGHT) < 0.03  # measured 0.023
    assert worst_hold_error(1.0) > 0.06  # measured 0.087


def _infos(path, rig):
    with open_recording(path) as rec:
        return holds_from_recording(rec, rig=rig, rate_hz=RATE, adc_bits=BITS)[1]


def test_motion_identifies_hysteresis_and_creep_within_10_percent(motion_fit):
    res, _, km = motion_fit
    xs = x_of_curvature(km[: int(0.75 * km.size)])  # the band over the range the fit saw
    band = 100 * hysteresis_band(HYSTERESIS, float(xs.min()), float(xs.max()))
    for seg in res.report.segments:
        # creep from the holds' clean steps where they show it (these holds do), else from the motion
        assert seg.kept and seg.creep_from in ("holds", "motion")
        assert seg.creep_gain == pytest.approx(0.15, rel=0.1)
        assert seg.creep_tau_s == pytest.approx(1.0, rel=0.1)
        assert seg.hysteresis_band_pct == pytest.approx(band, rel=0.1)
        assert seg.heldout_rms_memory_per_m < 0.25 * seg.heldout_rms_static_per_m


def test_memory_calibration_round_trips_and_the_pipeline_applies_it(motion_fit, files):
    res, static, _ = motion_fit
    cal = Calibration.from_json(res.calibration.to_json(), source="cal.json")
    assert cal.memory_model is not None
    assert cal.memory["fit_report"]["segments"][0]["kept"] is True  # the report rides along
    assert cal.tared(cal.r0_ohm).to_dict()["memory"] == cal.memory  # and survives a tare
    # a different motion, through the divider and the ADC, processed by the pipeline
    km = motion_program(11, n_moves=12)
    codes = divider_codes(strip_resistance(km, HYSTERESIS), r_ref=files["rig"].r_ref_ohm,
                          rng=np.random.default_rng(5))
    errors = {}
    for name, c in (("memory", cal), ("static", static)):
        pipe = Pipeline(rig=files["rig"], calibration=c, rate_hz=RATE, adc_bits=BITS, with_shape=False)
        k = pipe.process_codes(codes).curvature_per_m.astype(float)
        errors[name] = np.sqrt(np.mean((k[int(2 * RATE):] - km[int(2 * RATE):, None]) ** 2))
    assert errors["memory"] < 0.5 * errors["static"]


def test_pipeline_with_memory_is_chunk_invariant(motion_fit, files):
    cal = motion_fit[0].calibration
    km = motion_program(12, n_moves=3)[:1500]
    codes = divider_codes(strip_resistance(km, HYSTERESIS), r_ref=files["rig"].r_ref_ohm,
                          rng=np.random.default_rng(6))

    def run(step):
        pipe = Pipeline(rig=files["rig"], calibration=cal, rate_hz=RATE, adc_bits=BITS, with_shape=False)
        parts = [pipe.process_codes(codes[i:i + step]) for i in range(0, codes.shape[0], step)]
        return np.concatenate([p.static_ohm for p in parts]), np.concatenate([p.curvature_per_m for p in parts])

    whole, one = run(codes.shape[0]), run(1)
    assert np.allclose(one[0], whole[0], rtol=0, atol=1e-9 * R0.max())
    assert np.allclose(one[1], whole[1], rtol=0, atol=1e-4)  # float32 curvature: its rounding


def test_calibrate_command_writes_the_memory(files):
    out = files["dir"] / "cal_cli.json"
    r = subprocess.run([sys.executable, "-m", "display.cli", "calibrate", str(files["creep"]), "--rig",
                        str(RIG_PATH), "--out", str(out)], capture_output=True, text=True, timeout=300, cwd=REPO)
    assert r.returncode == 0, r.stderr
    assert "memory: no unloading seen: hysteresis not identified" in r.stderr
    doc = json.loads(out.read_text())
    assert doc["memory"]["kind"] == "tapcurve-strip-memory"
    assert len(doc["memory"]["fit_report"]["segments"]) == 6
    assert Calibration.load(out).memory_model is not None


# --- end to end on the virtual finger's real strip ------------------------------------------------

#: the issue's target for the mean tip error with the memory model, calibrated from holds plus one 40 s filmed
#: free motion and measured on a grasp (bench/bench_memory.py): reached 0.73 / 1.24 / 1.21 % on the made-up
#: sessions of seeds 7 / 8 / 9 (the ideal strip: 0.79 / 0.58 / 0.61 %); this test runs seed 7
TIP_LIMIT_PERCENT = 1.5


def _bench_memory():
    spec = importlib.util.spec_from_file_location("bench_memory", REPO / "bench" / "bench_memory.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow  # about 25 s of CPU, a minute on a loaded 2-core machine
def test_real_strip_holds_plus_film_end_to_end(tmp_path):
    # Figures against the virtual finger's ground truth (its elastica model), not proofs: calibrated from
    # labelled holds plus one filmed free motion, each a new run of the finger (strip at rest, clock from 0),
    # then a different motion (the grasp) processed causally, in chunks, as live.
    bench = _bench_memory()
    rig = bench.filmed_rig()
    holds, rec, csv, grasp, truth = bench.session_files(tmp_path, rig, StripSettings(mode="real"), hold_s=6.0,
                                                        motion_s=40.0, grasp_s=16.0)
    quiet = io.StringIO()
    run = calibrate_with_motion([holds], [(rec, csv)], rig=rig, stdout=quiet, stderr=quiet)
    static = calibrate_with_motion([holds], [(rec, csv)], rig=rig, stdout=quiet, stderr=quiet, static=True,
                                   degree=run.degree)
    memory_pct = bench.tip_error_pct(rig, run.calibration, grasp, truth)
    static_pct = bench.tip_error_pct(rig, static.calibration, grasp, truth)
    print(f"\nreal strip, holds + film: mean tip error {memory_pct:.2f} % with memory, {static_pct:.2f} % static "
          f"(target 1.5 %)")
    assert all(s.kept for s in run.memory_report.segments)
    assert memory_pct <= TIP_LIMIT_PERCENT
    assert memory_pct < 0.4 * static_pct


# --- a film alone (no holds): memory kept only where the strip has it ----------------------------------


def _film_alone(folder, rig, *, seed, strip, gap_s=None, seconds=30.0):
    """A filmed free motion of the virtual finger (in process, the codes its device sends), recorded by the
    project's recorder, optionally with frames lost on the link over ``gap_s`` = (start, end) s; then
    ``calibrate --motion`` without holds. Returns the run."""
    from acquire.virtual.camera import Camera, CameraSettings, write_marker_csv
    from acquire.virtual.model import FingerModel

    free = FingerModel(rig=rig, seed=seed, scenario="free")
    seq = np.arange(int(seconds * RATE))
    stream = free.real_strip(strip).stream(rate_hz=RATE) if strip.real else None
    codes = free.codes(seq / RATE, frame_index=seq, strip=stream)
    keep = np.ones(seq.size, bool)
    if gap_s is not None:
        keep[int(gap_s[0] * RATE):int(gap_s[1] * RATE)] = False  # lost on the link: seq and time jump
    rec, csv = folder / f"free_{seed}_{strip.mode}.h5", folder / f"free_{seed}_{strip.mode}.csv"
    ring = FrameRing(capacity_frames=seq.size + 10, n_channels=rig.n_channels)
    hello = {"protocol": 1, "firmware": "test", "adc_bits": BITS, "channels": rig.n_channels, "rate_hz": RATE}
    recorder = Recorder(path=rec, ring=ring, rig_toml=rig.text, device_hello=json.dumps(hello),
                        channel_names=rig.channels, n_segments=rig.n_segments)
    recorder.start()
    t = seq[keep] / RATE
    ring.push(FrameBlock(codes=codes[keep], seq=seq[keep].astype(np.int64), t_device_s=t, t_host_s=t,
                         status=np.zeros(t.size, dtype=np.uint8)))
    recorder.stop()
    assert recorder.error is None
    camera = CameraSettings()
    _, t_cam = Camera(camera, rig=rig).frames_between(0.0, float(seq[-1] / RATE))
    write_marker_csv(csv, free, t_cam, settings=camera)
    quiet = io.StringIO()
    return calibrate_with_motion([], [(rec, csv)], rig=rig, stdout=quiet, stderr=quiet)


@pytest.mark.slow  # about 10 s of CPU per case
@pytest.mark.parametrize("seed, gap_s", [(1, None), (8, (12.0, 12.6))])
def test_ideal_strip_filmed_alone_keeps_no_memory(tmp_path, seed, gap_s):
    # The virtual finger's ideal strip is the static law alone (acquire/virtual/strip.py, mode "ideal"): it has
    # no memory by construction, so a memory model can only fit the film's noise and lag. Held out honestly
    # (both arms fitted to the same first 75 %), it must not win by the 5 % margin (common practice, no source).
    # Seed 8 kept a hysteresis model (bands 1.1-1.4 %) before both arms were fitted and aligned each on their
    # own; seed 1 fits the largest spurious bands (3-4.5 %). The seed-8 case also loses frames on the link (a
    # gap the recording shows as a jump in seq and time); a separate seed-8 case without the gap ran the same
    # film through the same fit (0.6 s of 30 s apart) and was dropped for the suite's time.
    run = _film_alone(tmp_path, _bench_memory().filmed_rig(), seed=seed, strip=StripSettings(mode="ideal"),
                      gap_s=gap_s)
    assert run.memory_report is not None
    assert not any(s.kept for s in run.memory_report.segments), run.memory_report.text()
    assert run.calibration.memory is None


@pytest.mark.slow  # about 15 s of CPU
def test_real_strip_filmed_alone_keeps_memory(tmp_path):
    # The virtual finger's default strip creeps and has hysteresis (4 % each, made-up magnitudes): the same
    # honest held-out comparison keeps memory in every segment, with a lower held-out error in each.
    run = _film_alone(tmp_path, _bench_memory().filmed_rig(), seed=0, strip=StripSettings(mode="real"),
                      gap_s=(12.0, 12.6))
    segs = run.memory_report.segments
    assert all(s.kept for s in segs), run.memory_report.text()
    assert all(s.heldout_rms_memory_per_m < s.heldout_rms_static_per_m for s in segs)
    assert run.calibration.memory is not None
