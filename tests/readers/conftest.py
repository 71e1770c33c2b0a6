"""Fixtures of the reader tests: the committed sample files and a writer for variants."""

from __future__ import annotations

from pathlib import Path

import pytest

READERS_DATA = Path(__file__).resolve().parent.parent / "data" / "readers"
GOOD = READERS_DATA / "good"
BROKEN = READERS_DATA / "broken"
SCANS = READERS_DATA / "scans"


@pytest.fixture
def good() -> Path:
    return GOOD


@pytest.fixture
def broken() -> Path:
    return BROKEN


@pytest.fixture
def scans() -> Path:
    return SCANS


@pytest.fixture
def write(tmp_path: Path):
    """``write(name, text_or_bytes) -> Path``: a file below ``tmp_path``."""

    def _write(name: str, content: str | bytes) -> Path:
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
        return path

    return _write
