"""Wire-scanner profiles: CSV with ``# key: value`` header lines, or Parquet.

Format
------
::

    # device: WS-02
    # plane: x
    # timestamp: 2026-11-30T08:15:00Z
    # position_unit: mm
    position,signal
    -3.00,0.012
    -2.95,0.015
    ...

Header lines (``# key: value``, before the column names; keys are
case-insensitive):

``plane``
    ``x``, ``y`` or ``u`` (a tilted wire).  When absent: the plane the caller
    expects (a scan step's ``"x"``/``"y"`` key), else a lone ``x``/``y``/``u``
    token of the file name (``WS-01_x_0800.csv`` -> ``x``), else ``x``; the
    metadata then say so (``plane_source``).
``wire_angle_deg``
    Angle of the wire normal from +x toward +y, degrees.  Required for ``u``;
    for ``x``/``y`` it may be omitted and must be 0/90 if given.
``timestamp``
    ISO 8601 with ``Z`` or an offset, or epoch seconds.  When absent: the time the
    caller gives (a scan's own timestamp), else the file's modification time; the
    metadata then say so (``timestamp_source``).
``device``
    Scanner name.  When absent, the file name gives it: the stem up to the first
    ``_`` (``WS-02_0815.csv`` -> ``WS-02``), or the whole stem.  Inside a scan
    folder the scan's monitor name is used instead (see :mod:`.scan`).
``position_unit``
    ``m``, ``mm`` (default), ``um`` or ``µm``.

All header lines are optional, so a bare ``position,signal`` table is a
profile too; a key that looks like a misspelt known key (``# plan: x``) is
refused rather than kept.  Any other ``# key: value`` line is kept in
:attr:`Profile.metadata`; ``#`` lines
without a colon are comments.  The table needs the columns ``position`` and
``signal`` (finite numbers); other columns are ignored.  Positions must be
strictly monotonic: a scan recorded with decreasing positions is reversed so
that ``position_m`` increases; a repeated or back-and-forth position is refused.

A Parquet profile has the same two columns; the header keys come from the
file's key-value metadata, or from constant ``device``/``plane``/``timestamp``
columns.
"""

from __future__ import annotations

import difflib
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from diagnostics.errors import located
from diagnostics.measurements import PLANES, Profile
from diagnostics.readers import _util

#: Position units accepted in ``position_unit`` and their factor to metres.
POSITION_UNITS = {"m": 1.0, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "μm": 1e-6}

#: Header keys with a meaning; any other key goes to ``Profile.metadata``.
HEADER_KEYS = ("device", "plane", "wire_angle_deg", "timestamp", "position_unit")

_WHAT = "a wire-scanner profile with '# plane:' and '# timestamp:' lines and columns position,signal"
_PLANE_ANGLE_DEG = {"x": 0.0, "y": 90.0}


def read_profile(path: str | Path, *, plane: str | None = None,
                 timestamp: pd.Timestamp | None = None) -> Profile:
    """Read one wire-scanner profile (CSV or Parquet) into a :class:`Profile` in SI.

    Parameters
    ----------
    path : str or Path
        The profile file, in the format of the module docstring.
    plane : {"x", "y", "u"}, optional, keyword-only
        The plane to assume when the file has no ``# plane:`` line.
    timestamp : pandas.Timestamp, optional, keyword-only
        The time to assume when the file has no ``# timestamp:`` line (default:
        the file's modification time).

    Returns
    -------
    Profile
        ``position_m`` strictly increasing (metres), ``signal`` as float64,
        ``timestamp`` in UTC.

    Raises
    ------
    diagnostics.errors.InputError
        One line naming the file, the line or header key, and what was expected.
    """
    profile, _ = read_profile_with_origin(path, plane=plane, timestamp=timestamp)
    return profile


def read_profile_with_origin(path: str | Path, *, plane: str | None = None,
                             timestamp: pd.Timestamp | None = None) -> tuple[Profile, bool]:
    """:func:`read_profile`, and whether the device name was given in the file."""
    p = _util.require_file(path, _WHAT)
    fmt = _util.file_format(p, "a wire-scanner profile")
    if fmt == "csv":
        head = _util.peek_csv(p, _WHAT)
        header = _csv_header(p, head)
        _require_columns(p, head.names)
        table, row_name = _util.read_csv_table(p, head, {"position": "float", "signal": "float"}, only=True)
    else:
        table, row_name = _util.read_parquet_table(p, {"position": "float", "signal": "float"})
        _require_columns(p, table.column_names)
        header = _parquet_header(p, table)
    return _build(p, header, table, row_name, "header" if fmt == "csv" else "metadata key",
                  plane_hint=plane, time_hint=timestamp)


def _csv_header(path: Path, head: _util.CsvHead) -> dict[str, str]:
    header: dict[str, str] = {}
    for lineno, text in head.comments:
        if ":" not in text:
            continue  # a plain comment
        key, value = (part.strip() for part in text.split(":", 1))
        key = key.lower()
        if not key:
            raise located(path, f"line {lineno}: header line has no key before ':' (expected '# key: value')")
        if key in header:
            raise located(path, f"line {lineno}: header key {key!r} given twice")
        header[key] = value
    return header


def _parquet_header(path: Path, table: pa.Table) -> dict[str, str]:
    header: dict[str, str] = {}
    for raw_key, raw_value in (table.schema.metadata or {}).items():
        key = raw_key.decode("utf-8", "replace").strip().lower()
        if key in ("pandas", "arrow:schema") or key.startswith("arrow:"):
            continue
        header[key] = raw_value.decode("utf-8", "replace").strip()
    for key in ("device", "plane", "timestamp"):
        if key not in table.column_names:
            continue
        values = table.column(key).combine_chunks()
        distinct = values.unique()
        if len(distinct) != 1 or not distinct[0].is_valid:
            raise located(path, f"column {key!r} must hold one value for the whole profile, "
                                f"found {len(distinct)} distinct")
        value = distinct[0].as_py()
        header[key] = value.isoformat() if hasattr(value, "isoformat") else str(value)
        if hasattr(value, "tzinfo") and value.tzinfo is None:
            raise located(path, f"column {key!r} holds a time without a time zone")
    return header


def _require_columns(path: Path, names: tuple[str, ...] | list[str]) -> None:
    for required in ("position", "signal"):
        if required not in names:
            raise _util.missing_column(path, required, list(names))


def _build(path: Path, header: dict[str, str], table: pa.Table, row_name: _util.RowName,
           label: str, *, plane_hint: str | None = None,
           time_hint: pd.Timestamp | None = None) -> tuple[Profile, bool]:
    _refuse_near_misses(path, header, label)
    assumed: dict[str, str] = {}
    plane = header.get("plane")
    if plane is None:
        plane, assumed["plane_source"] = _assumed_plane(path, plane_hint)
    plane = plane.strip().lower()
    if plane not in PLANES:
        raise located(path, f"{label} 'plane': {header.get('plane', plane)!r} is not one of {', '.join(PLANES)}")
    angle_rad = _wire_angle(path, header, plane, label)
    if "timestamp" in header:
        timestamp = _util.parse_time(header["timestamp"], path, f"{label} 'timestamp'")
    elif time_hint is not None:
        timestamp, assumed["timestamp_source"] = pd.Timestamp(time_hint), "given by the caller"
    else:
        mtime_ns = path.stat().st_mtime_ns
        timestamp = pd.Timestamp(mtime_ns, unit="ns", tz="UTC")
        assumed["timestamp_source"] = "file modification time"
    unit = header.get("position_unit", "mm").strip()
    if unit not in POSITION_UNITS:
        raise located(path, f"{label} 'position_unit': unknown unit {unit!r} (expected m, mm or um)")
    device = header.get("device", "").strip()
    given = bool(device)
    if not given:
        device = device_from_name(path)

    if table.num_rows == 0:
        raise located(path, f"no data rows (expected {_WHAT})")
    _util.check_no_nulls(table, ["position", "signal"], path, row_name)
    for name in ("position", "signal"):
        _util.check_finite(table.column(name), path, name, row_name)
    position = np.array(_util.column_numpy(table.column("position")), dtype=np.float64) * POSITION_UNITS[unit]
    signal = np.array(_util.column_numpy(table.column("signal")), dtype=np.float64)
    position, signal = _monotonic(path, position, signal, row_name)

    metadata = {k: v for k, v in header.items() if k not in HEADER_KEYS} | assumed
    profile = Profile(device=device, plane=plane, wire_angle_rad=angle_rad, timestamp=timestamp,  # type: ignore[arg-type]
                      position_m=position, signal=signal, source=str(path), metadata=metadata)
    return profile, given


def _refuse_near_misses(path: Path, header: dict[str, str], label: str) -> None:
    """A key that is not a known one but close to one (``plan``) is a typo, not metadata."""
    for key in header:
        if key in HEADER_KEYS:
            continue
        hint = _util.did_you_mean(key, [k for k in HEADER_KEYS if k not in header])
        if hint and difflib.SequenceMatcher(None, key, hint.split("'")[1]).ratio() >= 0.8:
            raise located(path, f"{label} {key!r} is not a known key{hint}")


def _assumed_plane(path: Path, hint: str | None) -> tuple[str, str]:
    """The plane of a profile whose file does not name it, and where it came from."""
    if hint is not None:
        return hint, "given by the caller"
    tokens = [t.lower() for t in re.split(r"[_\-. ]+", path.stem)]
    named = [t for t in tokens if t in PLANES]
    if len(named) == 1:
        return named[0], "file name"
    return "x", "assumed (no plane in the file or its name)"


def _wire_angle(path: Path, header: dict[str, str], plane: str, label: str) -> float:
    text = header.get("wire_angle_deg")
    if text is None:
        if plane == "u":
            raise located(path, f"{label} 'wire_angle_deg' missing (required for plane u: angle of the wire normal from +x)")
        return math.radians(_PLANE_ANGLE_DEG[plane])
    try:
        angle = float(text)
    except ValueError:
        raise located(path, f"{label} 'wire_angle_deg': {text!r} is not a number") from None
    if not math.isfinite(angle):
        raise located(path, f"{label} 'wire_angle_deg': {text!r} is not a finite number")
    if plane in _PLANE_ANGLE_DEG and not math.isclose(angle, _PLANE_ANGLE_DEG[plane], abs_tol=1e-9):
        raise located(path, f"{label} 'wire_angle_deg': {angle:g} contradicts plane {plane} "
                            f"(expected {_PLANE_ANGLE_DEG[plane]:g}, or plane u)")
    return math.radians(angle)


def _monotonic(path: Path, position: np.ndarray, signal: np.ndarray,
               row_name: _util.RowName) -> tuple[np.ndarray, np.ndarray]:
    """Positions strictly increasing; a strictly decreasing scan is reversed."""
    if position.size < 2:
        return position, signal
    step = np.diff(position)
    if (step > 0).all():
        return position, signal
    if (step < 0).all():
        return position[::-1].copy(), signal[::-1].copy()
    direction = 1.0 if step[0] > 0 else -1.0
    bad = step * direction <= 0
    i = int(np.argmax(bad)) + 1
    if step[i - 1] == 0:
        raise located(path, f"{row_name(i)}: position repeats the previous row (expected strictly monotonic positions)")
    raise located(path, f"{row_name(i)}: position turns back (expected strictly monotonic positions)")


def device_from_name(path: Path) -> str:
    """Device name from a file name: the stem up to the first ``_`` (or the stem)."""
    stem = path.stem
    return stem.split("_", 1)[0] or stem


__all__ = ["HEADER_KEYS", "POSITION_UNITS", "device_from_name", "read_profile"]
