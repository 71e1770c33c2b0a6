"""Beam-position monitor readings: long-form CSV or Parquet.

Format
------
One row per BPM and time::

    timestamp,bpm,x_mm,y_mm,sum
    2026-11-30T06:00:00.000Z,BPM-01,0.0123,-0.0041,1.002
    2026-11-30T06:00:00.000Z,BPM-02,-0.0310,0.0175,0.998
    2026-11-30T06:00:00.100Z,BPM-01,0.0119,-0.0043,1.001

* ``timestamp``: ISO 8601 with ``Z`` or an offset (``+01:00``), or epoch seconds
  (a numeric column; decided from the first row).  Times without a zone are
  refused.
* ``bpm``: the monitor's name (non-empty text).
* positions: ``x_mm``/``y_mm`` (the usual unit), or ``x_m``/``y_m``, or
  ``x_um``/``y_um``; each plane in exactly one unit.  Converted to metres.
* ``sum`` (optional): the intensity signal, arbitrary units; an empty field or
  NaN means "not given" and becomes NaN; infinities are refused.
* any other column is kept as it is (numbers if all its values are numbers).

Rules (checked with vectorised numpy, so a 7-million-row file takes seconds)
--------------------------------------------------------------------------
* Positions must be finite numbers (no empty field, NaN or inf).
* Within each BPM, times strictly increase in file order: a repeated
  ``(timestamp, bpm)`` pair or a time going backwards is refused, naming the
  line.  Files written BPM after BPM are as welcome as files written time
  after time.
* The returned table is sorted by time (stable, so file order is kept within one
  time).

The result follows the BPM table contract of :mod:`diagnostics.measurements`:
``timestamp`` (datetime64[ns, UTC]), ``bpm`` (str), ``x_m``, ``y_m``, ``sum``
(float64), then the extra columns.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from diagnostics.errors import located
from diagnostics.measurements import BPM_COLUMNS
from diagnostics.readers import _util

#: Position column units and their factor to metres.
POSITION_UNITS = {"m": 1.0, "mm": 1e-3, "um": 1e-6}

_WHAT = "BPM readings with columns timestamp, bpm, x_mm, y_mm[, sum]"


def read_bpm(path: str | Path) -> pd.DataFrame:
    """Read a BPM readings file (CSV or Parquet) into the BPM table contract.

    Parameters
    ----------
    path : str or Path
        A ``.csv`` (or ``.txt``) or ``.parquet`` file in the format of the
        module docstring.

    Returns
    -------
    pandas.DataFrame
        Columns ``timestamp, bpm, x_m, y_m, sum`` and any extra input columns,
        sorted by time.

    Raises
    ------
    diagnostics.errors.InputError
        One line naming the file, the line (CSV) or row (Parquet) or column, and
        what was expected.
    """
    p = _util.require_file(path, _WHAT)
    fmt = _util.file_format(p, "BPM readings")
    head = _util.peek_csv(p, _WHAT) if fmt == "csv" else None
    names = head.names if head is not None else _util.parquet_names(p)
    for required in ("timestamp", "bpm"):
        if required not in names:
            raise _util.missing_column(p, required, names)
    units = {plane: _position_column(p, names, plane) for plane in ("x", "y")}
    kinds = {"timestamp": "time", "bpm": "name", units["x"]: "float", units["y"]: "float"}
    if "sum" in names:
        kinds["sum"] = "float"
    for taken in ("x_m", "y_m"):
        if taken in names and taken not in kinds:
            raise located(p, f"column {taken!r} clashes with the converted positions (rename it)")

    if head is not None:
        table, row_name = _util.read_csv_table(p, head, kinds)
    else:
        table, row_name = _util.read_parquet_table(p, kinds)
    if table.num_rows == 0:
        raise located(p, f"no data rows (expected {_WHAT})")

    _util.check_no_nulls(table, ["timestamp", units["x"], units["y"]], p, row_name)
    codes, bpms, bpm_text = _util.text_codes(table, "bpm")
    empty = _util.first_null(table, "bpm")
    if empty is None and "" in bpms:
        empty = int(np.argmax(codes == bpms.index("")))
    if empty is not None:
        raise located(p, f"{row_name(empty)}: column 'bpm' is empty (expected a BPM name)")

    # each column is made contiguous once, here, so pandas need not copy it again
    stamps = _util.contiguous(table.column("timestamp"))
    out: dict[str, pa.Array | pa.ChunkedArray] = {"timestamp": stamps, "bpm": bpm_text}
    for plane in ("x", "y"):
        column = units[plane]
        values = _util.contiguous(table.column(column))
        _util.check_finite(values, p, column, row_name)
        out[f"{plane}_m"] = pc.multiply(values, POSITION_UNITS[column.split("_", 1)[1]])
    if "sum" in kinds:
        total = _util.contiguous(table.column("sum"))
        if total.null_count:
            total = pc.fill_null(total, np.nan)
        _util.check_finite(total, p, "sum", row_name, allow_nan=True)
        out["sum"] = total
    else:
        out["sum"] = pa.array(np.full(table.num_rows, np.nan))
    for name in table.column_names:
        if name not in kinds and name not in out:
            out[name] = table.column(name)

    times = _util.column_numpy(stamps)
    in_order = _util.check_series_order(times, codes, len(bpms), p, row_name, bpms, "BPM")
    frame = _util.to_frame(out)
    if not in_order:
        frame = frame.iloc[np.argsort(times, kind="stable")].reset_index(drop=True)
    return frame


def _position_column(path: Path, names: tuple[str, ...], plane: str) -> str:
    """The one ``<plane>_<unit>`` column present, e.g. ``x_mm``."""
    found = [f"{plane}_{unit}" for unit in POSITION_UNITS if f"{plane}_{unit}" in names]
    if len(found) > 1:
        raise located(path, f"columns {found} give the {plane} position twice (expected one of them)")
    if not found:
        options = ", ".join(f"{plane}_{unit}" for unit in POSITION_UNITS)
        known = {"timestamp", "bpm", "sum", *(f"{q}_{u}" for q in "xy" for u in POSITION_UNITS)}
        others = [n for n in names if n not in known]
        hint = _util.did_you_mean(f"{plane}_mm", others)
        stray = [n for n in others if n.startswith(f"{plane}_") or n == plane]
        unit_hint = f"; unknown unit in {stray[0]!r}" if stray and not hint else ""
        raise located(path, f"missing column {plane}_mm{hint}{unit_hint} (expected one of {options}); "
                            f"columns found: {', '.join(repr(n) for n in names)}")
    return found[0]


__all__ = ["BPM_COLUMNS", "POSITION_UNITS", "read_bpm"]
