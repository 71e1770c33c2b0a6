"""``beamdiag report --store DIR --start T --end T --out FILE.html``: the shift handover page.

See :mod:`diagnostics.report`.  Without ``--start``/``--end`` the window is the
last 8 hours of data in the store.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import pandas as pd

from diagnostics import report as report_lib
from diagnostics.errors import InputError

#: Default window length when ``--start`` is not given (one shift).
DEFAULT_HOURS = 8.0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "report",
        help="write the shift handover report (one self-contained HTML page)",
        description=(
            "Build the shift handover report of the store DIR for [START, END): latest emittance, "
            "orbit drift, steps, out-of-tolerance and transmission-loss events, beam sizes, and when "
            "each source last sent data. The page needs no network. Times are ISO 8601; without a "
            "zone they are UTC. Default window: the last 8 hours of data."
        ),
    )
    parser.add_argument("--store", required=True, metavar="DIR", help="the store folder")
    parser.add_argument("--start", metavar="T", help="window start, e.g. 2026-11-30T06:00Z")
    parser.add_argument("--end", metavar="T", help="window end (exclusive), e.g. 2026-11-30T14:00Z")
    parser.add_argument("--out", required=True, metavar="FILE.html", help="where to write the page")
    parser.add_argument(
        "--notes", default="", metavar="TEXT", help="handover notes shown on the page"
    )
    parser.add_argument(
        "--notes-file", metavar="FILE", help="read the handover notes from a text file instead"
    )
    parser.set_defaults(func=run)


def _window(store, start: str | None, end: str | None) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The window asked for, filling a missing end with the last data and a missing start with end - 8 h."""
    if end is None:
        last = [t for t in store.last_seen().values() if t is not None]
        if not last and start is None:
            raise InputError(f"{store.root}: the store holds no data; give --start and --end")
        end_ts = (max(last) + pd.Timedelta(1, "ns")).ceil("min") if last else None
    else:
        end_ts = report_lib.parse_time(end, "--end")
    start_ts = report_lib.parse_time(start, "--start") if start is not None else None
    if end_ts is None:
        end_ts = start_ts + pd.Timedelta(hours=DEFAULT_HOURS)
    if start_ts is None:
        start_ts = end_ts - pd.Timedelta(hours=DEFAULT_HOURS)
    return start_ts, end_ts


def run(args: argparse.Namespace) -> int:
    from diagnostics.store import Store

    root = Path(args.store)
    if not root.is_dir():
        raise InputError(f"{root}: --store expected an existing store folder")
    notes = args.notes
    if args.notes_file:
        try:
            notes = Path(args.notes_file).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(
                f"{args.notes_file}: --notes-file could not be read as UTF-8 text ({exc})"
            ) from None
    store = Store(root, create=False, read_only=True)
    start, end = _window(store, args.start, args.end)
    report = report_lib.build_report(store, start=start, end=end, notes=notes)
    page = report_lib.render_html(report)
    out = Path(args.out)
    if out.parent and not out.parent.exists():
        raise InputError(f"{out}: --out folder {out.parent} does not exist")
    tmp = out.with_name(f".{out.name}.tmp")
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, out)  # a reader never sees half a page
    print(f"handover report {start.isoformat()} to {end.isoformat()} written to {out}")
    if report.empty:
        print("  no measurements in this window (the page says what the store holds)")
    for h in report.headlines:
        print(f"  {h.label}: {h.text}")
    for problem in report.problems:
        print(f"  left out: {problem}")
    return 0
