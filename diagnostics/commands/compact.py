"""``beamdiag compact --store DIR [--kind K] [--date D] [--json]``: merge small files.

Each partition (kind and date) with several small Parquet files is merged into
one file; readers never see a reading twice or half (see
:meth:`diagnostics.store.Store.compact`).  Queries over compacted partitions
are several times faster.
"""

from __future__ import annotations

import argparse

from diagnostics.commands._common import emit_json


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "compact",
        help="merge the small Parquet files of each store partition",
        description=(
            "Merge the small Parquet files of each store partition (kind and date) into one"
            " file. Readers using the store never see a reading twice or half while this runs;"
            " queries over merged partitions are several times faster."),
    )
    p.add_argument("--store", required=True, metavar="DIR", help="the store folder")
    p.add_argument("--kind", action="append", metavar="KIND", dest="kinds",
                   help="only this kind (bpm, slow, profiles, frames, scans, rollup/bpm,"
                        " rollup/slow, results/<kind>); repeat for several")
    p.add_argument("--date", action="append", metavar="YYYY-MM-DD", dest="dates",
                   help="only this partition date; repeat for several")
    p.add_argument("--json", action="store_true", help="print one JSON object per merge")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from diagnostics.store import Store

    store = Store(args.store, create=False)
    summary = store.compact(kinds=args.kinds, dates=args.dates)
    if args.json:
        for part in summary.partitions:
            emit_json({"kind": part.kind, "date": part.date, "inputs": part.inputs,
                       "rows": part.rows, "output": part.output})
    else:
        for part in summary.partitions:
            print(f"{part.kind} {part.date}: {part.inputs} files -> 1 ({part.rows} rows)")
        print(summary.line())
    return 0
