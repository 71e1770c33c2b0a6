"""Exceptions and warnings of beamdiag.

``InputError`` is what a user mistake raises: its message is one line that names
the file, the field (or line) and what was expected, and the CLI prints it
without a traceback.  Analysis routines do not raise for bad data; they return a
result flagged with the reason (see :mod:`diagnostics.results`).
"""

from __future__ import annotations


class BeamdiagError(Exception):
    """Base class of every error beamdiag raises on purpose."""


class InputError(BeamdiagError, ValueError):
    """An input file or argument cannot be used.

    The message names the file, the field or line, and what was expected, e.g.
    ``"run3/bpm.csv: column 'x_mm' has text in row 12: 'abc' (expected a number)"``.
    """


class StoreError(BeamdiagError):
    """The store is missing, unreadable or in an unexpected state."""


class BeamdiagWarning(UserWarning):
    """Warning category for beamdiag (filter it with ``-W ignore::...``)."""


def located(path: object, message: str) -> InputError:
    """Build an :class:`InputError` whose message starts with the file's name."""
    return InputError(f"{path}: {message}")
