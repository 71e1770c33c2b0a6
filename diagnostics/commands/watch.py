"""``beamdiag watch INBOX --store DIR``: the inbox service (see :mod:`diagnostics.service`)."""

from __future__ import annotations

import argparse

from diagnostics import service
from diagnostics.errors import InputError
from diagnostics.pipeline import AnalysisOptions


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "watch",
        help="take new files from an inbox into the store and analyse them, until stopped",
        description=(
            "Watch INBOX: every file or scan folder that lands there is stored, analysed and moved "
            "to INBOX/done/ (or deleted with --delete); rejected inputs go to INBOX/quarantined/. "
            "Producers should write NAME.part and rename it when whole. Stops cleanly on SIGTERM or "
            "Ctrl-C after the input in hand."
        ),
    )
    parser.add_argument("inbox", metavar="INBOX", help="the inbox folder (created if missing)")
    parser.add_argument("--store", required=True, metavar="DIR", help="the store folder")
    parser.add_argument("--interval", type=float, default=2.0, metavar="S",
                        help="seconds between inbox scans (default 2)")
    parser.add_argument("--stable-seconds", type=float, default=4.0, metavar="S",
                        help="a file not renamed into place is taken when unchanged this long (default 4)")
    parser.add_argument("--delete", action="store_true", help="delete inputs once stored instead of keeping them in done/")
    parser.add_argument("--events", action="store_true",
                        help="also wake up on file-system events (needs watchdog; scans stay the source of truth)")
    parser.add_argument("--once", action="store_true", help="handle what is ready now, then exit")
    parser.add_argument("--orbit-every", type=float, default=600.0, metavar="S",
                        help="seconds between orbit summaries, 0 to disable (default 600)")
    parser.add_argument("--orbit-interval", default="10min", metavar="SPAN",
                        help="span of each orbit summary, e.g. 10min or 1h (default 10min)")
    parser.add_argument("--sidecar-wait", type=float, default=10.0, metavar="S",
                        help="how long an image waits for its JSON sidecar before it is judged alone (default 10)")
    parser.add_argument("--compact-every", type=float, default=3600.0, metavar="S",
                        help="seconds between store compactions, 0 to disable (default 3600)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from diagnostics.store import Store

    try:
        config = service.WatchConfig(
            interval_s=args.interval, stable_seconds=args.stable_seconds, delete=args.delete,
            events=args.events, orbit_every_s=args.orbit_every, orbit_interval=args.orbit_interval,
            compact_every_s=args.compact_every, sidecar_wait_s=args.sidecar_wait, options=AnalysisOptions(),
        )
    except ValueError as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(f"watch: --orbit-interval: {exc}") from None
    store = Store(args.store)
    svc = service.WatchService(args.inbox, store, config)
    svc.install_signal_handlers()
    return svc.run(once=args.once)
