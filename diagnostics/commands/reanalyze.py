"""``beamdiag reanalyze --store DIR --kind KIND``: redo an analysis over the archive on Dask."""

from __future__ import annotations

import argparse

from diagnostics import pipeline, reanalysis
from diagnostics.commands._common import emit_json


def register(subparsers: argparse._SubParsersAction) -> None:
    defaults = pipeline.AnalysisOptions()
    parser = subparsers.add_parser(
        "reanalyze",
        help="rerun an analysis over stored raw data as a new result version (on Dask)",
        description=(
            "Rerun the profile, image or scan analysis over the stored raw data of a time window and "
            "write the rows as a new result version; earlier versions are kept. Runs on a local Dask "
            "cluster of --workers processes, on an existing cluster (--scheduler), or in this process "
            "(--serial); all three give the same rows."
        ),
    )
    parser.add_argument("--store", required=True, metavar="DIR", help="the store folder")
    parser.add_argument("--kind", required=True, choices=reanalysis.REANALYSIS_KINDS)
    parser.add_argument("--start", metavar="T", help="start of the window (ISO 8601; naive means UTC)")
    parser.add_argument("--end", metavar="T", help="end of the window (exclusive)")
    parser.add_argument("--model", choices=pipeline.PROFILE_MODELS, default=defaults.model,
                        help=f"profile model (default {defaults.model})")
    parser.add_argument("--baseline", choices=pipeline.PROFILE_BASELINES, default=defaults.baseline,
                        help=f"profile baseline (default {defaults.baseline})")
    parser.add_argument("--window-n-sigma", type=float, default=defaults.window_n_sigma, metavar="N",
                        help=f"rms window half-width in sigma (default {defaults.window_n_sigma:g})")
    parser.add_argument("--method", choices=pipeline.EMITTANCE_METHODS, default=defaults.method,
                        help=f"emittance method (default {defaults.method})")
    parser.add_argument("--bootstrap", type=int, default=defaults.bootstrap, metavar="N",
                        help="bootstrap samples for the emittance uncertainty (default 0)")
    parser.add_argument("--fitter", choices=pipeline.PROFILE_FITTERS, default=defaults.fitter,
                        help=f"profile fitter (default {defaults.fitter})")
    parser.add_argument("--scheduler", metavar="ADDRESS", help="an existing Dask scheduler, e.g. tcp://host:8786")
    parser.add_argument("--workers", type=int, default=2, metavar="N",
                        help="worker processes of the local Dask cluster (default 2)")
    parser.add_argument("--serial", action="store_true", help="run in this process, without Dask")
    parser.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from diagnostics.store import Store

    options = pipeline.AnalysisOptions(
        model=args.model, baseline=args.baseline, window_n_sigma=args.window_n_sigma,
        method=args.method, bootstrap=args.bootstrap, fitter=args.fitter,
    )
    store = Store(args.store, create=False)
    summary, _records = reanalysis.reanalyze(
        store, kind=args.kind, start=args.start, end=args.end, options=options,
        scheduler=args.scheduler, workers=args.workers, serial=args.serial,
    )
    if args.json:
        emit_json({
            "store": str(store.root), "kind": summary.kind, "version": summary.version,
            "options": dict(summary.options), "tasks": summary.n_tasks, "records": summary.n_records,
            "flagged": summary.n_flagged, "failed": summary.n_failed, "elapsed_s": summary.elapsed_s,
            "scheduler": summary.scheduler, "paths": list(summary.paths),
        })
    else:
        print(
            f"reanalyzed {summary.n_records} {summary.kind} in {summary.n_tasks} task(s) on {summary.scheduler} "
            f"in {summary.elapsed_s:.1f} s -> version {summary.version} "
            f"({summary.n_flagged} flagged, {summary.n_failed} failed)"
        )
    return 0
