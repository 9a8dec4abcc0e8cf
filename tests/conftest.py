"""Shared test fixtures: paths to the outside test vectors, offscreen Qt."""
from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

# CI has no display; Qt widgets render offscreen (set before any Qt import)
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

REPO = Path(__file__).resolve().parents[1]
SHARED = REPO.parent / "shared"


@pytest.fixture(scope="session")
def packet_vectors() -> dict:
    """Packets made outside this project (../shared/vectors/packets.json)."""
    path = SHARED / "vectors" / "packets.json"
    if not path.is_file():
        pytest.skip(f"{path} not present (a user's clone has no ../shared): external vectors skipped")
    return json.loads(path.read_text())
