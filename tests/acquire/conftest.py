"""Fixtures for the acquire tests: the virtual finger on a real pseudo-terminal."""
from __future__ import annotations

import pytest

from acquire.virtual import VirtualFinger


@pytest.fixture
def finger(tmp_path):
    """A running virtual finger at 1 kHz; its port is ``finger.path``."""
    vf = VirtualFinger(rate_hz=1000, link_path=tmp_path / "finger")
    vf.start()
    assert vf.wait_ready(timeout_s=10)
    yield vf
    vf.stop()
