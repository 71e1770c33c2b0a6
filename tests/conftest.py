"""Shared fixtures.  Paths are built from this file, never from the machine."""

from __future__ import annotations

from pathlib import Path

import pytest

TESTS = Path(__file__).resolve().parent
REPO = TESTS.parent
DATA = TESTS / "data"


#: Copies of the NIST StRD nonlinear-regression files (public domain), as NIST distributes them.
NIST_DIR = DATA / "nist_strd"


@pytest.fixture
def data_dir() -> Path:
    return DATA
