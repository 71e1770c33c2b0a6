"""``beamdiag demo --store DIR``: build a store from the invented demo shift.

See :mod:`diagnostics.demo` for the scenario.  The raw inputs stay in
``DIR/raw`` (or ``--raw``), so they can be inspected or ingested again by hand.
``--samples DIR`` writes the small committed sample inputs instead.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from pathlib import Path

from diagnostics import demo
from diagnostics.errors import InputError

#: The store's ledger: a folder holding it is a beamdiag store that ``--force`` may replace.
_STORE_MARKER = "catalog.sqlite"


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "demo",
        help="generate the invented demo shift, ingest it into a store and analyse it",
        description=(
            "Generate one 8-hour shift of the invented 'Kestrel Bay test linac' (24 BPMs at 10 Hz, "
            "wire scans, screen frames, two quad scans), ingest it into the store DIR and run the "
            "analyses. The raw input files are kept in DIR/raw (or --raw); truth.json there holds "
            "the true values behind them. The same seed always gives the same data."
        ),
    )
    parser.add_argument("--store", metavar="DIR", help="the store folder to build")
    parser.add_argument(
        "--seed",
        type=int,
        default=demo.DEFAULT_SEED,
        metavar="N",
        help=f"noise seed (default {demo.DEFAULT_SEED})",
    )
    parser.add_argument(
        "--raw", metavar="DIR", help="where to keep the raw inputs (default STORE/raw)"
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="replace an existing store (only a folder that looks like a store is removed)",
    )
    parser.add_argument(
        "--start",
        metavar="HH:MM",
        help="generate only from this time of the shift (UTC; default 06:00)",
    )
    parser.add_argument(
        "--hours",
        type=float,
        metavar="H",
        help="generate only this many hours (default the whole 8-hour shift)",
    )
    parser.add_argument(
        "--no-analysis", action="store_true", help="generate and ingest only, skip the analyses"
    )
    parser.add_argument(
        "--samples",
        metavar="DIR",
        help="write the small sample inputs (as committed in sample_data/) into DIR and exit",
    )
    parser.set_defaults(func=run)


def _looks_like_store(path: Path) -> bool:
    """A beamdiag store (it has the ledger), or what a demo run left before the store existed."""
    names = {p.name for p in path.iterdir()}
    return _STORE_MARKER in names or names == {"raw"}


def run(args: argparse.Namespace) -> int:
    if args.samples:
        files = demo.write_samples(args.samples, seed=args.seed)
        print(f"wrote {len(files)} sample files into {args.samples}")
        return 0
    if not args.store:
        raise InputError("demo: --store DIR is required (or --samples DIR)")
    store = Path(args.store)
    if store.exists() and not store.is_dir():
        raise InputError(f"{store}: --store expected a folder, found a file")
    if store.is_dir() and any(store.iterdir()):
        if not args.force:
            raise InputError(f"{store}: --store is not empty (use --force to replace a demo store)")
        if not _looks_like_store(store):
            raise InputError(
                f"{store}: --force refused: the folder holds files that are not a beamdiag store"
            )
        shutil.rmtree(store)
    clock = time.perf_counter()
    summary = demo.build_demo_store(
        store,
        raw_dir=args.raw,
        seed=args.seed,
        start=args.start,
        hours=args.hours,
        analyse=not args.no_analysis,
        progress=lambda line: print(line, flush=True),
    )
    if summary.analysis is not None:
        for kind in getattr(summary.analysis, "kinds", ()):
            print(
                f"  {kind.kind}: {kind.analysed} results, {kind.flagged} flagged, {kind.failed} failed"
            )
    quarantined = summary.ingest.quarantined
    for outcome in quarantined:
        print(f"  quarantined {outcome.path}: {outcome.message}", file=sys.stderr)
    print(
        f"demo store ready in {summary.store_root} (raw inputs in {summary.raw_dir}); "
        f"elapsed {time.perf_counter() - clock:.1f} s"
    )
    return 1 if quarantined else 0
