"""``beamdiag ingest PATH... --store DIR [--json]``: store measurement files.

Files and folders (recursively) go through :meth:`diagnostics.store.Store.ingest_many`:
a folder with ``scan.json`` is one scan; image sidecars and the dark frames they
name are part of their image.  Good inputs are stored, inputs stored before are
skipped as duplicates, bad inputs are copied to the store's quarantine with the
reason.  The exit status is 1 when anything was quarantined (after storing all
the good inputs), 0 otherwise.
"""

from __future__ import annotations

import argparse
import sys

from diagnostics.commands._common import emit_json


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "ingest",
        help="store measurement files (profiles, images, BPM, slow channels, scans)",
        description=(
            "Store measurement files in a beamdiag store. Folders are read recursively; a folder"
            " with scan.json is one scan; an image's JSON sidecar and the dark frame it names go"
            " with the image. Files stored before (same bytes) are skipped as duplicates; files"
            " that cannot be read are copied to STORE/quarantine/ with the reason, and the"
            " originals are never moved or changed. Exit status 1 when anything was quarantined"
            " (after storing all the good files)."),
    )
    p.add_argument("paths", nargs="+", metavar="PATH", help="files or folders (recursive)")
    p.add_argument("--store", required=True, metavar="DIR", help="the store folder (created if missing)")
    p.add_argument("--json", action="store_true",
                   help="print one JSON object per input, one per line")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from diagnostics.errors import StoreError
    from diagnostics.store import Store

    store = Store(args.store)
    try:
        summary = store.ingest_many(args.paths)
    except OSError as exc:  # the store's disk, not an input, failed: stop with one line
        raise StoreError(f"{store.root}: cannot write to the store: {exc}") from exc
    if args.json:
        for o in summary.outcomes:
            record = {"file": o.path, "kind": o.kind, "status": o.status, "sha256": o.sha256,
                      "rows": o.rows, "outputs": list(o.outputs)}
            if o.status == "quarantined":
                record["error"] = o.message
            emit_json(record)
        print(summary.line(), file=sys.stderr)
    else:
        print(f"stored {len(summary.stored)} ({summary.rows} rows)")
        print(f"skipped as duplicate {len(summary.duplicates)}")
        print(f"quarantined {len(summary.quarantined)}")
        for o in summary.quarantined:
            print(f"  {o.message}")
        print(f"store: {store.root}")
    return 1 if summary.quarantined else 0
