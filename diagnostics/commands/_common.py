"""Small helpers shared by the subcommands: JSON lines, unit formatting, paths."""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any, TextIO

from diagnostics.results import jsonable


def emit_json(record: dict[str, Any], stream: TextIO | None = None) -> None:
    """Print one JSON object on one line (NaN/inf already mapped to null)."""
    stream = stream or sys.stdout
    stream.write(json.dumps(jsonable(record), allow_nan=False, separators=(",", ":")) + "\n")
    stream.flush()


def fmt(value: float | None, scale: float = 1.0, digits: int = 3) -> str:
    """Format ``value * scale`` with ``digits`` significant digits, '-' for missing."""
    if value is None or not math.isfinite(value):
        return "-"
    return f"{value * scale:.{digits}g}"


def iter_files(paths: Iterable[str | Path], suffixes: tuple[str, ...] | None = None) -> Iterator[Path]:
    """Files named, and files below named folders (sorted), optionally by suffix."""
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            for child in sorted(p for p in path.rglob("*") if p.is_file()):
                if child.name.startswith(".") or any(part.startswith(".") for part in child.relative_to(path).parts):
                    continue
                if suffixes is None or child.suffix.lower() in suffixes:
                    yield child
        else:
            yield path


def analyse_each(paths: Iterable[Path], analyse: Callable[[Path], dict[str, Any]], *,
                 json_lines: bool, command: str) -> tuple[list[dict[str, Any]], int]:
    """Run ``analyse`` on every input, whatever fails: ``(good records, failures)``.

    With ``json_lines`` each record (good or failed, with its ``error``) is printed
    as it comes and no records are kept; otherwise each failure is printed to
    stderr as ``beamdiag COMMAND: error: ...`` and the good records are returned
    for the caller's table.
    """
    good: list[dict[str, Any]] = []
    failed = 0
    for path in paths:
        record = analyse(path)
        failed += record["error"] is not None
        if json_lines:
            emit_json(record)
        elif record["error"] is not None:
            print(f"beamdiag {command}: error: {record['error']}", file=sys.stderr)
        else:
            good.append(record)
    return good, failed
