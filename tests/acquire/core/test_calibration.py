"""Calibration: labels, reference tables, steady parts, fitting, files, rig checks, tare."""
from __future__ import annotations

import dataclasses
import json
from datetime import datetime

import numpy as np
import pytest

from acquire.core.calibration import (
    Calibration,
    CalibrationError,
    Hold,
    LabelError,
    fit_calibration,
    load_reference_table,
    parse_label,
    reference_for,
    steady_part,
)
from acquire.errors import UserError
from acquire.rig import load_rig, parse_rig

# Ground truth for the fitting tests (made up for the tests): an asymmetric two-sided law in the
# model's own family, curvature = c1 x + c2 x^2 per side, x = (R - R0) / R0.
R0 = np.array([9000.0, 9500.0, 10000.0, 10500.0, 11000.0, 11500.0])
POS = (250.0, -300.0)  # x >= 0: stiffer response at large bends
NEG = (400.0, 900.0)  # x < 0: the other direction is less sensitive


def true_curvature(x):
    x = np.asarray(x, dtype=np.float64)
    return np.where(x >= 0, POS[0] * x + POS[1] * x**2, NEG[0] * x + NEG[1] * x**2)


def x_of(kappa):
    """Inverse of true_curvature (the root of the quadratic on the right side)."""
    kappa = np.asarray(kappa, dtype=np.float64)
    out = np.empty_like(kappa)
    for (c1, c2), sel in ((POS, kappa >= 0), (NEG, kappa < 0)):
        out[sel] = (-c1 + np.sqrt(c1 * c1 + 4 * c2 * kappa[sel])) / (2 * c2)
    return out


def synthetic_holds(*, noise_ohm=2.0, frames=200, seed=0, refs=(0.0, 10.0, 20.0, 30.0, 40.0, -10.0, -20.0, -30.0)):
    rng = np.random.default_rng(seed)
    holds = []
    for ref in refs:
        r = R0 * (1 + x_of(np.full(6, ref)))
        holds.append(Hold(np.full(6, ref), r + rng.normal(scale=noise_ohm, size=(frames, 6)), label=f"curvature={ref}/m"))
    holds.append(Hold(np.zeros(6), R0 + rng.normal(scale=noise_ohm, size=(frames, 6)), label="flat"))
    return holds


@pytest.fixture
def rig():
    return load_rig(None)


# ----------------------------------------------------------------------------- labels

@pytest.mark.parametrize(
    "text, expected",
    [
        # curvature of a circle is 1 / radius (elementary differential geometry)
        ("flat", 0.0),
        ("  FLAT ", 0.0),
        ("radius=25mm", 40.0),
        ("radius = -25 mm", -40.0),
        ("radius=2.5cm", 40.0),
        ("radius=0.05m", 20.0),
        ("Radius=1e2mm", 10.0),
        ("curvature=40/m", 40.0),
        ("curvature=-12.5/m", -12.5),
        ("curvature=40 1/m", 40.0),
        ("curvature=0.04/mm", 40.0),
        ("squeeze test", None),
        ("radiusless", None),
        ("", None),
    ],
)
def test_parse_label(text, expected):
    got = parse_label(text)
    if expected is None:
        assert got is None
    else:
        assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("text", ["radius=25", "radius=0mm", "curvature=forty/m", "radius=25 inch"])
def test_malformed_reference_labels_raise(text):
    with pytest.raises(LabelError, match="label"):
        parse_label(text)
    assert issubclass(LabelError, UserError)


def test_reference_table_toml_and_csv(tmp_path):
    toml = tmp_path / "jigs.toml"
    toml.write_text(
        '[references]\n'
        '"jig A" = [40.0, 40.0, 20.0, 0.0, 0.0, 0.0]\n'
        '"jig B" = 25.0\n'
        '"jig C" = ["radius=50mm", "radius=50mm", "flat", "flat", nan, nan]\n'
        '"flat" = 1.0\n',
        encoding="utf-8",
    )
    table = load_reference_table(toml)
    assert table["jig A"] == [40.0, 40.0, 20.0, 0.0, 0.0, 0.0]
    np.testing.assert_allclose(reference_for("jig B", n_segments=6, table=table), 25.0)
    c = reference_for("jig C", n_segments=6, table=table)
    np.testing.assert_allclose(c[:4], [20.0, 20.0, 0.0, 0.0])
    assert np.isnan(c[4:]).all()
    np.testing.assert_allclose(reference_for("flat", n_segments=6, table=table), 1.0)  # table wins
    np.testing.assert_allclose(reference_for("radius=10mm", n_segments=6, table=table), 100.0)
    assert reference_for("other", n_segments=6, table=table) is None
    with pytest.raises(CalibrationError, match="jig A"):
        reference_for("jig A", n_segments=5, table=table)

    csv = tmp_path / "jigs.csv"
    csv.write_text("label,s0,s1,s2\n# comment\njig A,40,radius=25mm,flat\n", encoding="utf-8")
    assert load_reference_table(csv) == {"jig A": [40.0, 40.0, 0.0]}

    bad = tmp_path / "bad.toml"
    bad.write_text('[references]\n"jig" = ["banana"]\n', encoding="utf-8")
    with pytest.raises(CalibrationError, match="bad.toml.*jig"):
        load_reference_table(bad)
    with pytest.raises(CalibrationError, match="not found"):
        load_reference_table(tmp_path / "missing.toml")


# ----------------------------------------------------------------------------- steady part

def test_steady_part_drops_edges_and_transients():
    # The rule is ours (documented in steady_part): common practice, no source.
    rng = np.random.default_rng(1)
    rate = 100.0
    t = np.arange(1000) / rate  # 10 s
    v = 10000.0 + rng.normal(scale=2.0, size=(1000, 2))
    v[:, 0] += 800.0 * np.exp(-np.clip(t - 2.0, 0, None) / 0.15) * (t >= 2.0)  # settling after 2 s
    v[600:620, 1] += np.linspace(0, 300, 20)  # a knock at 6 s
    v[640, 0] = np.nan
    mask = steady_part(t, v, 1.5, 9.0)
    assert not mask[t < 1.75].any() and not mask[t > 8.75].any()  # trimmed edges
    assert not mask[(t >= 2.0) & (t < 2.4)].any()  # the settling transient
    assert not mask[600:620].any()
    assert not mask[640]
    assert mask.sum() > 0.75 * ((t > 1.75) & (t < 8.75)).sum()  # most of the hold survives
    assert steady_part(t, v, 5.0, 5.0).sum() == 0


# ----------------------------------------------------------------------------- fitting

def test_fit_recovers_known_asymmetric_law(rig):
    cal, report = fit_calibration(synthetic_holds(), rig=rig, degree=2)
    np.testing.assert_allclose(cal.r0_ohm, R0, rtol=1e-4)
    for k in range(6):
        np.testing.assert_allclose(cal.positive[k], POS, rtol=0.02)
        np.testing.assert_allclose(cal.negative[k], NEG, rtol=0.05)
    # curvatures between the holds, against the generating law
    kappa = np.linspace(-30.0, 40.0, 141)
    r = R0[None, :] * (1 + x_of(np.repeat(kappa[:, None], 6, axis=1)))
    got, outside = cal.evaluate(r)
    np.testing.assert_allclose(got, np.repeat(kappa[:, None], 6, axis=1), atol=0.1)
    assert not outside.any()
    for s in report.segments:
        assert s.rms_residual_per_m < 0.05 and s.rms_residual_percent < 0.1
        assert (s.curvature_min_per_m, s.curvature_max_per_m) == (-30.0, 40.0)
        assert s.n_holds == 9 and s.n_frames == 9 * 200
        assert (s.degree_positive, s.degree_negative) == (2, 2)
    assert report.all_warnings == []
    assert "segment" in report.summary()


def test_beyond_range_is_extrapolated_linearly_and_flagged(rig):
    cal, _ = fit_calibration(synthetic_holds(noise_ohm=0.0), rig=rig, degree=2)
    x_hi = cal.x_max[0]
    x = x_hi * np.array([1.5, 2.0, 2.5])
    r = np.repeat((R0[0] * (1 + x))[:, None], 6, axis=1) * (R0 / R0[0])
    k, outside = cal.evaluate(r)
    assert outside.all()
    assert (k[:, 0] > cal.curvature_max_per_m[0]).all()  # not clipped
    d = np.diff(k[:, 0])
    assert d[0] == pytest.approx(d[1], rel=1e-9)  # a straight line
    slope_edge = POS[0] + 2 * POS[1] * x_hi  # derivative of the generating law at the edge
    assert d[0] / (0.5 * x_hi) == pytest.approx(slope_edge, rel=1e-6)
    assert cal.coverage_warnings(r)[0].startswith("segment 0: 3 of 3 frames")


def test_non_monotone_fit_is_lowered_or_refused(rig):
    # Monotone data that flatten out: a least-squares quadratic through the origin turns over
    # inside the range (its derivative 1200 - 2 * 8710 * 0.08 < 0 at the last hold; computed by hand).
    xs = {0.0: 0.0, 20.0: 0.02, 35.0: 0.04, 40.0: 0.06, 40.5: 0.08}
    holds = [Hold(np.full(6, k), np.full((10, 6), 10000.0 * (1 + x))) for k, x in xs.items()]
    holds.append(Hold(np.full(6, -20.0), np.full((10, 6), 10000.0 * 0.95)))
    with pytest.raises(CalibrationError, match="not monotone"):
        fit_calibration(holds, rig=rig, degree=2, on_non_monotone="refuse")
    cal, report = fit_calibration(holds, rig=rig, degree=2)
    assert any("degree 2 fit is not monotone" in w for w in report.all_warnings)
    assert report.segments[0].degree_positive == 1
    k = cal.curvature_per_m(np.linspace(10000.0, 10900.0, 50)[:, None].repeat(6, axis=1))
    assert np.all(np.diff(k, axis=0) > 0)


def test_non_monotone_data_warn_or_refuse(rig):
    # Resistance that rises and then falls again with curvature: no monotone law exists.
    xs = {0.0: 0.0, 10.0: 0.04, 20.0: 0.08, 30.0: 0.09, 40.0: 0.07}
    holds = [Hold(np.full(6, k), np.full((10, 6), 10000.0 * (1 + x))) for k, x in xs.items()]
    with pytest.raises(CalibrationError, match="segment 0.*30.00 to \\+40.00.*not monotone"):
        fit_calibration(holds, rig=rig, on_non_monotone="refuse")
    _, report = fit_calibration(holds, rig=rig)
    assert sum("data are not monotone" in w for w in report.segments[0].warnings) == 1


def test_wrong_sign_and_missing_flat_are_refused(rig):
    flat = Hold(np.zeros(6), np.full((5, 6), 10000.0), label="flat")
    lower = Hold(np.full(6, 30.0), np.full((5, 6), 9000.0), label="radius=33mm")
    with pytest.raises(CalibrationError, match="segment 0.*label signs"):
        fit_calibration([flat, lower], rig=rig)
    bent = Hold(np.full(6, 30.0), np.full((5, 6), 11000.0))
    with pytest.raises(CalibrationError, match="no flat hold"):
        fit_calibration([bent], rig=rig)
    with pytest.raises(CalibrationError, match="no bent holds"):
        fit_calibration([flat], rig=rig)
    with pytest.raises(CalibrationError, match="5 segments|expected 6"):
        fit_calibration([(0.0, np.full((5, 5), 1.0))], rig=rig)


def test_one_sided_holds_borrow_slope_with_warning(rig):
    holds = [h for h in synthetic_holds(refs=(0.0, 20.0, 40.0))]
    cal, report = fit_calibration(holds, rig=rig, degree=2)
    assert any("no negative holds" in w for w in report.all_warnings)
    slopes = np.array([c[0] for c in cal.positive])
    r = (cal.r0_ohm * (1 - 0.02))[None, :]
    k, outside = cal.evaluate(r)
    np.testing.assert_allclose(k[0], slopes * -0.02, rtol=1e-9)  # initial slope, mirrored
    assert outside.all()


def test_unknown_segments_in_a_hold_are_ignored(rig):
    holds = synthetic_holds()
    jig = np.array([35.0, 35.0, np.nan, np.nan, np.nan, np.nan])  # a jig that only defines segments 0-1
    r = R0 * (1 + x_of(np.full(6, 35.0)))
    r[2:] = 1.0  # whatever the undefined segments read must not matter
    holds.append(Hold(jig, np.repeat(r[None, :], 50, axis=0)))
    cal, report = fit_calibration(holds, rig=rig)
    assert report.segments[0].n_holds == 10 and report.segments[0].n_frames == 9 * 200 + 50
    assert report.segments[2].n_holds == 9 and report.segments[2].n_frames == 9 * 200
    assert report.all_warnings == []
    ref, _ = fit_calibration(synthetic_holds(), rig=rig)
    np.testing.assert_array_equal(cal.positive[2], ref.positive[2])


# ----------------------------------------------------------------------------- files, rig, tare

def test_json_round_trip_with_provenance(rig, tmp_path):
    recs = [{"path": "holds1.h5", "sha256": "ab" * 32}]
    cal, _ = fit_calibration(synthetic_holds(), rig=rig, recordings=recs)
    path = tmp_path / "cal.json"
    cal.save(path)
    d = json.loads(path.read_text(encoding="utf-8"))  # strict JSON (RFC 8259) via the stdlib
    assert d["format"] == "tapcurve-calibration" and d["model"]["name"] == "two-sided-polynomial"
    assert d["rig"]["sha256"] == rig.sha256 and d["recordings"] == recs
    assert len(d["r0_ohm"]) == 6 and d["fit_report"]["segments"][0]["n_holds"] == 9
    created = datetime.fromisoformat(d["created_utc"])  # ISO 8601 (ISO 8601-1:2019)
    assert created.utcoffset().total_seconds() == 0
    assert isinstance(d["software_version"], str) and d["software_version"]
    back = Calibration.load(path)
    rng = np.random.default_rng(7)
    r = R0 * (1 + rng.uniform(-0.05, 0.15, size=(100, 6)))
    np.testing.assert_array_equal(back.evaluate(r)[0], cal.evaluate(r)[0])
    np.testing.assert_array_equal(back.evaluate(r)[1], cal.evaluate(r)[1])
    assert back.report.segments[3] == cal.report.segments[3]
    assert back.to_json() == cal.to_json()


def test_broken_calibration_files_are_user_errors(tmp_path):
    p = tmp_path / "c.json"
    p.write_text("{not json", encoding="utf-8")
    with pytest.raises(CalibrationError, match="c.json.*JSON"):
        Calibration.load(p)
    p.write_text('{"format": "something else"}', encoding="utf-8")
    with pytest.raises(CalibrationError, match="c.json.*not a tapcurve calibration"):
        Calibration.load(p)
    p.write_text('{"format": "tapcurve-calibration", "format_version": 1, "model": {"name": "two-sided-polynomial"}}')
    with pytest.raises(CalibrationError, match="c.json.*key"):
        Calibration.load(p)
    with pytest.raises(UserError, match="not found"):
        Calibration.load(tmp_path / "none.json")


def test_rig_disagreement_raises(rig):
    cal, _ = fit_calibration(synthetic_holds(), rig=rig)
    assert cal.check_rig(rig) == []
    five = parse_rig(
        '[sensor]\nsegment_lengths_mm = [10, 10, 10, 10, 10]\n'
        '[readout]\nkind = "divider"\nr_ref_ohm = 1000.0\nchannels = ["tap0","tap1","tap2","tap3","tap4"]\n',
        source="five.toml",
    )
    with pytest.raises(UserError, match="6 segments.*five.toml has 5"):
        cal.check_rig(five)
    with pytest.raises(UserError, match="readout kind"):
        cal.check_rig(dataclasses.replace(rig, readout_kind="constant-current"))
    edited = parse_rig(rig.text + "\n# edited\n", source="edited.toml")
    assert any("different rig file" in n for n in cal.check_rig(edited))


def test_tare_moves_r0_and_keeps_the_relative_law(rig):
    cal, _ = fit_calibration(synthetic_holds(), rig=rig)
    new_r0 = R0 * 1.03  # the strips drifted 3 %
    tared = cal.tared(new_r0)
    np.testing.assert_array_equal(tared.r0_ohm, new_r0)
    np.testing.assert_allclose(tared.curvature_per_m(new_r0[None, :]), 0.0, atol=1e-12)
    x = np.array([[-0.03], [0.0], [0.05], [0.1]])
    np.testing.assert_allclose(tared.curvature_per_m(new_r0 * (1 + x)), cal.curvature_per_m(cal.r0_ohm * (1 + x)),
                               rtol=1e-12, atol=1e-12)
    assert len(tared.tares) == 1 and tared.tares[0]["r0_ohm_before"] == list(cal.r0_ohm)
    assert len(cal.tares) == 0  # the original is unchanged
    with pytest.raises(CalibrationError, match="segment 2"):
        cal.tared(np.array([1.0, 1.0, np.nan, 1.0, 1.0, 1.0]))
    with pytest.raises(CalibrationError, match="6 flat"):
        cal.tared(np.ones(5))


# ----------------------------------------------------------------------------- file checks
# JSON is RFC 8259: NaN and Infinity are not JSON, yet Python's json module reads
# them (its documented extension), so the schema must refuse them itself.

def _edited_file(tmp_path, rig, edit):
    cal, _ = fit_calibration(synthetic_holds(), rig=rig)
    d = json.loads(cal.to_json())
    edit(d)
    p = tmp_path / "cal.json"
    p.write_text(json.dumps(d), encoding="utf-8")  # json.dumps writes NaN / Infinity as given
    return p


def _set(path, value):
    def edit(d):
        node = d
        for key in path[:-1]:
            node = node[key]
        node[path[-1]] = value
    return edit


@pytest.mark.parametrize(
    "path, value, words",
    [
        (("model", "segments", 2, "positive", 0), float("nan"), "model.segments[2].positive[0] must be a finite"),
        (("model", "segments", 0, "negative", 1), float("inf"), "model.segments[0].negative[1] must be a finite"),
        (("model", "segments", 1, "positive", 0), 1e300, "model.segments[1].positive[0] = 1e+300 is outside"),
        (("model", "segments", 3, "curvature_max_per_m"), 1e308, "model.segments[3].curvature_max_per_m"),
        (("model", "segments", 3, "x_min"), -5.0, "model.segments[3].x_min = -5.0 is outside -1 .. 0"),
        (("model", "segments", 3, "x_max"), "big", "model.segments[3].x_max must be a number"),
        (("model", "segments", 4, "positive"), [], "model.segments[4].positive must be a list of 1 .. 8"),
        (("r0_ohm", 5), float("nan"), "r0_ohm[5] must be a finite number"),
        (("r0_ohm", 5), -3.0, "r0_ohm[5] = -3.0 is outside"),
        (("r0_ohm",), "x", "r0_ohm must be a list"),
        (("rig", "r_ref_ohm"), float("inf"), "rig.r_ref_ohm must be a finite number"),
        (("rig", "segment_lengths_mm", 0), 1e300, "rig.segment_lengths_mm[0] = 1e+300 is outside"),
        (("rig", "n_segments"), 6.5, "rig.n_segments must be a whole number"),
        (("rig",), [], "rig must be an object"),
        (("model", "segments", 0, "x_max"), True, "x_max must be a number"),
    ],
)
def test_absurd_calibration_files_name_file_and_key(tmp_path, rig, path, value, words):
    p = _edited_file(tmp_path, rig, _set(path, value))
    with pytest.raises(CalibrationError) as info:
        Calibration.load(p)
    msg = str(info.value)
    assert msg.startswith(str(p)) and words in msg and "\n" not in msg, msg


def test_missing_key_is_named(tmp_path, rig):
    p = _edited_file(tmp_path, rig, lambda d: d["model"]["segments"][1].pop("x_min"))
    with pytest.raises(CalibrationError, match=r"cal.json: missing key model.segments\[1\].x_min"):
        Calibration.load(p)


def test_reference_table_values_are_bounded(tmp_path):
    # the bound is the label bound, |curvature| <= 1e4 1/m (acquire.core.labels)
    for entry in ("1e308", '"1e308"', "inf", '"radius=0.01mm"'):
        p = tmp_path / "jigs.toml"
        p.write_text(f'[references]\n"jig" = [{entry}]\n', encoding="utf-8")
        with pytest.raises(CalibrationError) as info:
            load_reference_table(p)
        msg = str(info.value)
        assert "jigs.toml" in msg and "'jig'" in msg and "10000 1/m" in msg, msg
        assert msg.count("jigs.toml") == 1


def test_other_segment_lengths_are_refused(rig):
    # README "Commands": a calibration for another rig exits 2; lengths decide what curvature means
    cal, _ = fit_calibration(synthetic_holds(), rig=rig)
    longer = parse_rig(rig.text.replace("[16.0, 16.0, 16.0,", "[16.0, 20.0, 16.0,"), source="longer.toml")
    with pytest.raises(CalibrationError) as info:
        cal.check_rig(longer)
    msg = str(info.value)
    assert "segment lengths" in msg and "longer.toml" in msg and "20.0" in msg and "\n" not in msg
    other_r_ref = parse_rig(rig.text.replace("r_ref_ohm = 10000.0", "r_ref_ohm = 4700.0"), source="r.toml")
    with pytest.raises(CalibrationError, match="r_ref_ohm"):
        cal.check_rig(other_r_ref)


def test_load_for_rig_refuses_other_lengths(tmp_path, rig):
    from acquire.core.calibration import load_for_rig

    cal, _ = fit_calibration(synthetic_holds(), rig=rig)
    p = tmp_path / "cal.json"
    cal.save(p)
    assert load_for_rig(p, rig) is not None
    longer = parse_rig(rig.text.replace("[16.0, 16.0, 16.0,", "[16.0, 20.0, 16.0,"), source="longer.toml")
    with pytest.raises(UserError, match="segment lengths"):
        load_for_rig(p, longer)


def test_same_recording_twice_is_refused():
    from acquire.core.calibration import check_distinct_recordings

    check_distinct_recordings([{"path": "a.h5", "sha256": "1"}, {"path": "b.h5", "sha256": "2"}])
    with pytest.raises(CalibrationError, match="b.h5: the same recording as a.h5"):
        check_distinct_recordings([{"path": "a.h5", "sha256": "1"}, {"path": "b.h5", "sha256": "1"}])
    with pytest.raises(CalibrationError, match="a.h5: the same recording as a.h5"):
        check_distinct_recordings([{"path": "a.h5", "sha256": "1"}, {"path": "a.h5", "sha256": "1"}])
