"""Fixtures of the display tests: real widgets on Qt's offscreen platform (set in tests/conftest.py)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from acquire.core.calibration_fit import fit_calibration
from acquire.rig import load_rig
from acquire.virtual import FingerModel

ARTIFACTS = Path(__file__).resolve().parents[1] / "artifacts"


@pytest.fixture(scope="session")
def rig():
    return load_rig(None)


@pytest.fixture(scope="session")
def calibration(rig):
    """Fitted to the simulator's (seed 0) segment resistances at known uniform curvatures."""
    model = FingerModel(rig=rig, seed=0)
    t = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t))
             for k in (-40, -20, 0, 20, 40, 80, 120)]
    cal, _ = fit_calibration(holds, rig=rig)
    return cal


@pytest.fixture(scope="session")
def calibration_path(tmp_path_factory, calibration):
    p = tmp_path_factory.mktemp("cal") / "demo-calibration.json"
    calibration.save(p)
    return p


@pytest.fixture(scope="session")
def artifacts() -> Path:
    """Screenshots land here (git-ignored) to be looked at by a person."""
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


@pytest.fixture
def gui(qapp):
    from display.app import make_app

    return make_app()
