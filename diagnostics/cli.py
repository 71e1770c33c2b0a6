"""The ``beamdiag`` command line.

Each subcommand lives in :mod:`diagnostics.commands` as a module with
``register(subparsers)``, which adds its parser and sets ``func(args) -> int``.
Subcommands are thin: they parse, call one library function per input and
format the answer.  A user mistake (:class:`~diagnostics.errors.InputError`)
prints one line and no traceback.
"""

from __future__ import annotations

import argparse
import importlib
import re
import sys
from collections.abc import Sequence

from diagnostics import SAFETY_NOTE, __version__
from diagnostics.errors import BeamdiagError

#: Subcommands in the order ``--help`` lists them; each is ``diagnostics.commands.<name>``.
COMMANDS = (
    "ingest",
    "profile",
    "image",
    "emittance",
    "orbit",
    "report",
    "watch",
    "compact",
    "reanalyze",
    "demo",
    "dashboard",
)


_ROLE = re.compile(r":(?:func|meth|class|mod|attr|data):`~?([^`]+)`")


def _plain(text: str | None) -> str | None:
    """Docstring markup (``:func:`x```, double back-quotes) as plain text for ``--help``."""
    if not text:
        return text
    return _ROLE.sub(r"\1", text).replace("``", "'")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="beamdiag",
        description="Beam diagnostics analysis: wire scans, screens, BPM orbits, quad-scan emittance.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--version", action="version", version=f"beamdiag {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        try:
            module = importlib.import_module(f"diagnostics.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"diagnostics.commands.{name}":
                raise
            continue  # not built yet
        module.register(subparsers)
    for sub in subparsers.choices.values():
        sub.description = _plain(sub.description)
        sub.epilog = _plain(sub.epilog)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``beamdiag`` with ``argv`` (default ``sys.argv[1:]``); return the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except BeamdiagError as exc:
        print(f"beamdiag {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"beamdiag {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
