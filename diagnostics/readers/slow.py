"""Slow channels (temperatures, magnet currents, ...): long-form CSV or Parquet.

Format
------
One row per channel and time::

    timestamp,channel,value,unit
    2026-11-30T06:00:00Z,T-01,22.41,degC
    2026-11-30T06:00:00Z,Q-05:current,41.250,A
    2026-11-30T06:01:00Z,T-01,22.43,degC

* ``timestamp``: ISO 8601 with ``Z`` or an offset, or epoch seconds (numeric
  column); times without a zone are refused.
* ``channel``: the channel's name (non-empty text).
* ``value``: a finite number (no empty field, NaN or inf).
* ``unit``: the unit as given (``degC``, ``A``, ``T``, ...), kept verbatim; may be
  empty for a dimensionless channel.  One channel keeps one unit throughout.
* any other column is kept.

The same rules as for BPM readings apply: within each channel, times strictly
increase in file order (a repeated ``(timestamp, channel)`` pair or a time going
backwards is refused); the table comes back sorted by time.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from diagnostics.errors import located
from diagnostics.measurements import SLOW_COLUMNS
from diagnostics.readers import _util

_WHAT = "slow-channel readings with columns timestamp, channel, value, unit"


def read_slow(path: str | Path) -> pd.DataFrame:
    """Read a slow-channel file (CSV or Parquet) into the slow table contract.

    Parameters
    ----------
    path : str or Path
        A ``.csv`` (or ``.txt``) or ``.parquet`` file as in the module docstring.

    Returns
    -------
    pandas.DataFrame
        ``timestamp`` (datetime64[ns, UTC]), ``channel`` (str), ``value``
        (float64), ``unit`` (str), then extra columns; sorted by time.

    Raises
    ------
    diagnostics.errors.InputError
        One line naming the file, line/row or column, and what was expected.
    """
    p = _util.require_file(path, _WHAT)
    fmt = _util.file_format(p, "slow-channel readings")
    head = _util.peek_csv(p, _WHAT) if fmt == "csv" else None
    names = head.names if head is not None else _util.parquet_names(p)
    for required in SLOW_COLUMNS:
        if required not in names:
            raise _util.missing_column(p, required, names)
    kinds = {"timestamp": "time", "channel": "name", "value": "float", "unit": "name"}
    if head is not None:
        table, row_name = _util.read_csv_table(p, head, kinds)
    else:
        table, row_name = _util.read_parquet_table(p, kinds)
    if table.num_rows == 0:
        raise located(p, f"no data rows (expected {_WHAT})")

    _util.check_no_nulls(table, ["timestamp", "value", "unit"], p, row_name)
    codes, channels, channel_text = _util.text_codes(table, "channel")
    empty = _util.first_null(table, "channel")
    if empty is None and "" in channels:
        empty = int(np.argmax(codes == channels.index("")))
    if empty is not None:
        raise located(p, f"{row_name(empty)}: column 'channel' is empty (expected a channel name)")
    _util.check_finite(table.column("value"), p, "value", row_name)
    unit_codes, units, unit_text = _util.text_codes(table, "unit")
    _check_one_unit(codes, channels, unit_codes, units, p, row_name)

    out: dict[str, pa.Array | pa.ChunkedArray] = {
        "timestamp": table.column("timestamp"),
        "channel": channel_text,
        "value": table.column("value"),
        "unit": unit_text,
    }
    for name in table.column_names:
        if name not in out:
            out[name] = table.column(name)
    times = _util.column_numpy(table.column("timestamp"))
    in_order = _util.check_series_order(times, codes, len(channels), p, row_name, channels, "channel")
    frame = _util.to_frame(out)
    if not in_order:
        frame = frame.iloc[np.argsort(times, kind="stable")].reset_index(drop=True)
    return frame


def _check_one_unit(codes: np.ndarray, channels: list[str], unit_codes: np.ndarray, units: list[str],
                    path: Path, row_name: _util.RowName) -> None:
    """Refuse a channel whose unit changes inside the file."""
    pair = codes.astype(np.int64) * max(len(units), 1) + unit_codes
    pairs, first = np.unique(pair, return_index=True)
    channel_of = pairs // max(len(units), 1)
    repeated = np.flatnonzero(channel_of[1:] == channel_of[:-1])
    if repeated.size:
        c = int(channel_of[repeated[0]])
        rows = np.sort(first[channel_of == c])
        i, j = int(rows[0]), int(rows[1])
        raise located(path, f"{row_name(j)}: channel {channels[c]!r} has unit {units[unit_codes[j]]!r} "
                            f"but {units[unit_codes[i]]!r} in {row_name(i)} (expected one unit per channel)")


__all__ = ["SLOW_COLUMNS", "read_slow"]
