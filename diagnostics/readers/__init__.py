"""Readers: measurement files in, SI data out.

One module per source, each with its format in its docstring:

============  ==================================  ===========================
kind          reader                              returns
============  ==================================  ===========================
``profiles``  :func:`wire.read_profile`           :class:`~diagnostics.measurements.Profile`
``frames``    :func:`screen.read_frame`           :class:`~diagnostics.measurements.Frame`
``bpm``       :func:`bpm.read_bpm`                DataFrame (BPM table contract)
``slow``      :func:`slow.read_slow`              DataFrame (slow table contract)
``scans``     :func:`scan.read_scan`              :class:`~diagnostics.measurements.ScanSpec`
============  ==================================  ===========================

Every reader raises :class:`~diagnostics.errors.InputError` (one line naming the
file, line/row/field and what was expected) and nothing else for bad input.

Telling inputs apart
--------------------
:func:`detect_kind` names the kind of a path from its suffix and, for tables,
its column names (it never raises).  Some files are parts of another input and
are no input of their own; :func:`is_auxiliary` says so:

* an image's JSON sidecar (``<stem>.json`` next to ``<stem>.png``);
* a dark frame that a sidecar names in ``dark`` (the sidecar sits in the dark
  frame's folder or up to :data:`DARK_SEARCH_LEVELS` - 1 folders above);
* anything inside a scan folder (a folder holding ``scan.json``): the folder is
  the input.

:func:`iter_inputs` walks files and folders and yields only real inputs (scan
folders whole, auxiliary and hidden/temporary files skipped), which is what
ingest should loop over; :func:`read_any` reads one of them.  A JSON file with
no image beside it is neither: :func:`detect_kind` gives ``None`` (a watcher may
see a sidecar before its image arrives, so it should wait for both).
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

from diagnostics.errors import InputError, located
from diagnostics.readers import _util, bpm, scan, screen, slow, wire
from diagnostics.readers.bpm import read_bpm
from diagnostics.readers.scan import read_scan
from diagnostics.readers.screen import IMAGE_SUFFIXES, read_frame
from diagnostics.readers.slow import read_slow
from diagnostics.readers.wire import read_profile

#: Version of the readers' behaviour, recorded by the store's ledger with every
#: input; bump it when a reader accepts, refuses or converts differently.
READER_VERSION = "1"

#: How many folder levels above a dark frame are searched for the sidecar naming it.
DARK_SEARCH_LEVELS = 3

#: The kinds of input, as the store names its datasets.
KINDS = ("profiles", "frames", "bpm", "slow", "scans")

#: The reader of each kind.
READERS: dict[str, Callable[[Path], Any]] = {
    "profiles": read_profile,
    "frames": read_frame,
    "bpm": read_bpm,
    "slow": read_slow,
    "scans": read_scan,
}

#: Suffixes some reader takes; below a folder, other files are skipped.
INPUT_SUFFIXES = (*_util.CSV_SUFFIXES, *_util.PARQUET_SUFFIXES, *IMAGE_SUFFIXES)

#: File-name patterns that are never inputs: hidden, temporary, partial, backups.
IGNORED_PREFIXES = (".", "~")
IGNORED_SUFFIXES = (".tmp", ".part", ".partial", ".swp", ".bak")


def detect_kind(path: str | Path) -> str | None:
    """The kind of input at ``path`` (one of :data:`KINDS`), or ``None``.

    Folders holding ``scan.json`` are ``"scans"``; ``.png``/``.tif``/``.tiff``/
    ``.npy`` are ``"frames"``; a ``.csv``/``.txt``/``.parquet`` table is a profile
    when it starts with ``#`` header lines or has ``position`` and ``signal``
    columns, BPM readings when it has a ``bpm`` column, slow channels when it
    has a ``channel`` column.  Anything else, including JSON files, unreadable
    or empty files, gives ``None``.  Never raises.
    """
    p = Path(path)
    try:
        if p.is_dir():
            return "scans" if scan.is_scan_folder(p) else None
        if not p.is_file():
            return None
        suffix = p.suffix.lower()
        if suffix in IMAGE_SUFFIXES:
            return "frames"
        if suffix in _util.CSV_SUFFIXES:
            head = _util.peek_csv(p, "a table", max_lines=200)
            return "profiles" if head.comments else _kind_from_columns(head.names)
        if suffix in _util.PARQUET_SUFFIXES:
            import pyarrow.parquet as pq

            schema = pq.read_schema(p)
            metadata = {k.lower() for k in (schema.metadata or {})}
            if b"plane" in metadata:
                return "profiles"
            return _kind_from_columns(tuple(schema.names))
    except (InputError, *_util.LIBRARY_ERRORS):
        return None
    return None


def _kind_from_columns(names: tuple[str, ...]) -> str | None:
    lower = {n.strip().lower() for n in names}
    if {"position", "signal"} <= lower:
        return "profiles"
    if "bpm" in lower:
        return "bpm"
    if "channel" in lower:
        return "slow"
    return None


def is_auxiliary(path: str | Path) -> bool:
    """Whether ``path`` is part of another input and must not be ingested alone.

    True for an image's sidecar, for a dark frame named by a sidecar in the same
    folder, and for anything inside a scan folder (see the module docstring).
    """
    p = Path(path)
    if any(scan.is_scan_folder(parent) for parent in p.absolute().parents):
        return True
    if p.is_dir():
        return False
    suffix = p.suffix.lower()
    if suffix == ".json":
        return any(p.with_suffix(s).is_file() or p.with_suffix(s.upper()).is_file() for s in IMAGE_SUFFIXES)
    if suffix in IMAGE_SUFFIXES:
        target = p.resolve()
        folders = [p.parent, *list(p.parent.parents)[: DARK_SEARCH_LEVELS - 1]]
        return any(target in _dark_frames(folder) for folder in folders)
    return False


def _dark_frames(folder: Path) -> set[Path]:
    """Resolved paths that sidecars in ``folder`` name as their dark frame."""
    darks: set[Path] = set()
    try:
        sidecars = [f for f in folder.iterdir() if f.suffix.lower() == ".json" and f.is_file()]
    except OSError:
        return darks
    for sidecar in sidecars:
        try:
            if sidecar.stat().st_size > 1 << 20:
                continue  # not a sidecar
            doc = json.loads(sidecar.read_text(encoding="utf-8-sig"))
            if isinstance(doc, dict) and isinstance(doc.get("dark"), str):
                darks.add(_util.inside(folder, doc["dark"], sidecar, "dark"))
        except (InputError, OSError, ValueError, RecursionError):
            continue  # a broken sidecar is reported when its image is read
    return darks


def _ignored(path: Path) -> bool:
    name = path.name
    return name.startswith(IGNORED_PREFIXES) or name.lower().endswith(IGNORED_SUFFIXES)


def iter_inputs(paths: Iterable[str | Path]) -> Iterator[Path]:
    """The inputs named by ``paths``: files, and files and scan folders below folders.

    A scan folder is yielded whole and not entered.  Below a folder, files are
    yielded in sorted order, skipping hidden and temporary files
    (:data:`IGNORED_PREFIXES`, :data:`IGNORED_SUFFIXES`), files no reader takes
    (not in :data:`INPUT_SUFFIXES`: sidecars, notes) and referenced dark frames.  A path named directly is yielded as it is, unless it is a sidecar or
    dark frame.
    """
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            darks: dict[Path, set[Path]] = {}
            yield from _walk(p, darks)
        elif not is_auxiliary(p):
            yield p


def _walk(folder: Path, darks: dict[Path, set[Path]]) -> Iterator[Path]:
    """Walk ``folder``; ``darks`` caches each visited folder's dark-frame references."""
    if scan.is_scan_folder(folder):
        yield folder
        return
    try:
        children = sorted(folder.iterdir())
    except OSError:
        return
    darks[folder] = _dark_frames(folder)
    for child in children:
        if _ignored(child):
            continue
        if child.is_dir():
            yield from _walk(child, darks)
            continue
        suffix = child.suffix.lower()
        if suffix not in INPUT_SUFFIXES:
            continue  # sidecars, notes, READMEs: no reader takes them
        if suffix in IMAGE_SUFFIXES:
            target = child.resolve()
            # the sidecar naming a dark frame sits in its folder or a folder above
            above = [folder, *list(folder.parents)[: DARK_SEARCH_LEVELS - 1]]
            if any(target in (darks[f] if f in darks else darks.setdefault(f, _dark_frames(f))) for f in above):
                continue
        yield child


def read_any(path: str | Path) -> tuple[str, Any]:
    """Detect the kind of ``path`` and read it: ``(kind, data)``.

    Raises
    ------
    diagnostics.errors.InputError
        When the kind cannot be told, or the reader refuses the file.
    """
    p = Path(path)
    kind = detect_kind(p)
    if kind is None:
        if p.is_file() and p.suffix.lower() in (*_util.CSV_SUFFIXES, *_util.PARQUET_SUFFIXES):
            _util.require_file(p, "a table")
            raise located(p, "cannot tell the kind of table (expected '#' header lines or columns "
                             "position,signal for a profile, a 'bpm' column, or a 'channel' column)")
        if p.is_dir():
            raise located(p, f"folder without {scan.MANIFEST} (expected a scan folder)")
        if not p.exists():
            raise located(p, "file not found")
        raise located(p, "unknown kind of file (expected .csv, .parquet, .png, .tif, .tiff, .npy or a scan folder)")
    return kind, READERS[kind](p)


__all__ = [
    "DARK_SEARCH_LEVELS",
    "INPUT_SUFFIXES",
    "KINDS",
    "READERS",
    "READER_VERSION",
    "bpm",
    "detect_kind",
    "is_auxiliary",
    "iter_inputs",
    "read_any",
    "read_bpm",
    "read_frame",
    "read_profile",
    "read_scan",
    "read_slow",
    "scan",
    "screen",
    "slow",
    "wire",
]
