"""The virtual finger's elastica tables: the relaxed finger, a pure moment, the grid's node at zero.

Closed forms (any mechanics handbook, e.g. Gere & Timoshenko, Mechanics of Materials): a
cantilever with no load is straight; under a pure end moment M its curvature is M / EI
everywhere (a circular arc).
"""
from __future__ import annotations


import numpy as np
import pytest

from acquire.virtual.elastica import elastica_tables
from acquire.virtual.model import FingerModel

SEG = (0.016,) * 6
EI = 3.0e-3
LEN = sum(SEG)


def _tables(n_moment):
    return elastica_tables(SEG, EI, -0.6, 0.0, -5 * EI / LEN, 5 * EI / LEN, n_moment, 2 * EI / LEN**2, 5)


def test_relaxed_finger_reads_straight():
    # no moment, no load: straight (closed form), from the table as the scenarios read it
    model = FingerModel(seed=3)
    eq = model.equilibrium(moment_nm=np.zeros(3), load_n=np.zeros(3))
    np.testing.assert_allclose(eq["curvature_per_m"], 0.0, atol=1e-9)
    np.testing.assert_allclose(eq["tip_xy_m"], [[model.rig.sensor_length_m, 0.0]] * 3, atol=1e-12)
    # and the strip reads its flat resistance there
    rows, w = model._grid_weights(np.zeros(1), np.zeros(1))
    np.testing.assert_allclose(model._interp(model.static_strip.table, rows, w), 0.0, atol=1e-12)


def test_pure_moment_is_an_arc():
    # M / EI everywhere at every node of the moment grid (closed form); no load
    tb = _tables(21)
    moments = tb.moment_grid
    n_load = tb.load_grid.size
    theta = tb.theta_taps[::n_load]  # load 0 rows
    kappa = np.diff(theta, axis=1) / np.asarray(SEG)
    np.testing.assert_allclose(kappa, np.repeat(moments[:, None] / EI, 6, axis=1), rtol=1e-9, atol=1e-9)


def test_moment_grid_keeps_a_node_at_zero():
    assert 0.0 in _tables(21).moment_grid
    with pytest.raises(ValueError, match="no node at 0"):
        _tables(20)


def test_tables_kept_on_disk_are_the_solved_ones(tmp_path, monkeypatch):
    # acquire/virtual/table_cache.py: a second process loads what the first solved, bit for bit;
    # a damaged file is solved again and replaced; an empty TAPCURVE_CACHE_DIR switches the disk off.
    import dataclasses

    solve = elastica_tables.__wrapped__  # past the in-process cache
    monkeypatch.setenv("TAPCURVE_CACHE_DIR", str(tmp_path))
    fresh = solve(SEG, EI, -0.6, 0.0, -5 * EI / LEN, 5 * EI / LEN, 11, 2 * EI / LEN**2, 5)
    (path,) = tmp_path.glob("elastica-*.npz")
    loaded = solve(SEG, EI, -0.6, 0.0, -5 * EI / LEN, 5 * EI / LEN, 11, 2 * EI / LEN**2, 5)
    for f in dataclasses.fields(fresh):
        np.testing.assert_array_equal(getattr(loaded, f.name), getattr(fresh, f.name))
    path.write_bytes(b"not a numpy file")
    again = solve(SEG, EI, -0.6, 0.0, -5 * EI / LEN, 5 * EI / LEN, 11, 2 * EI / LEN**2, 5)
    np.testing.assert_array_equal(again.xy_nodes, fresh.xy_nodes)
    assert path.read_bytes()[:2] == b"PK"  # replaced by a readable .npz (a zip file)
    other = tmp_path / "off"
    monkeypatch.setenv("TAPCURVE_CACHE_DIR", "")
    solve(SEG, EI, -0.6, 0.0, -5 * EI / LEN, 5 * EI / LEN, 13, 2 * EI / LEN**2, 5)
    assert len(list(tmp_path.glob("elastica-*.npz"))) == 1 and not other.exists()
