"""The analysis pipeline: run the library's analyses over stored raw data.

The store holds raw measurements; this module reads them back, runs the pure
analysis functions (:func:`diagnostics.profiles.analyze_profile`,
:func:`diagnostics.images.analyze_image`, :func:`diagnostics.emittance.analyze_scan`,
:func:`diagnostics.orbit.analyze_orbit`) and writes flat result records with
:meth:`diagnostics.store.Store.write_results`.  It is used by the demo, by the
live service (``beamdiag watch``) and by archive reanalysis
(``beamdiag reanalyze``).

Result kinds and their keys
---------------------------
``profiles``
    one row per stored profile, keyed by ``profile_id``;
``frames``
    one row per stored screen image, keyed by ``frame_id``;
``scans``
    one row per scan, keyed by ``scan_id`` (plus ``scan_name``), with the x and
    y plane results flattened into ``x_*`` and ``y_*`` columns and a
    ``provisional`` column (True for a fit of a scan still being recorded);
``orbit``
    one row per time interval, BPM and plane, keyed by
    (``interval_start``, ``bpm``, ``plane``).

Every row also carries the analysis options (JSON text), the code version and a
result-set version id (added by the store).  The default version id is a hash of
the options and the code version, so analysing the same raw row twice with the
same options gives the same key and the same values: the pipeline is
idempotent per (raw id, options, version).  Nothing time-dependent goes into a
record, so a repeated write produces identical rows.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from diagnostics import __version__
from diagnostics import emittance as _emittance
from diagnostics import profiles as _profiles
from diagnostics.errors import InputError
from diagnostics.results import merge_flags, to_record

#: Result kinds the pipeline writes, in the order :func:`analyze_store` runs them.
PIPELINE_KINDS = ("profiles", "frames", "scans", "orbit")

#: Profile models offered by :func:`diagnostics.profiles.analyze_profile`.
PROFILE_MODELS = _profiles.PROFILE_MODELS

#: Baselines of the profile fit.
PROFILE_BASELINES = _profiles.BASELINES

#: Emittance reconstruction methods of :func:`diagnostics.emittance.analyze_scan`.
EMITTANCE_METHODS = _emittance.EMITTANCE_METHODS

#: How profiles are fitted: ``single`` calls ``analyze_profile`` per profile,
#: ``batch`` uses ``fit_profiles_batch`` on all same-length profiles of one stored
#: file at once (Gaussian model only), ``auto`` uses ``batch`` for the Gaussian
#: model and gives any profile the batch could not fit a second try with the single
#: fitter, and uses ``single`` for the other models.
PROFILE_FITTERS = ("auto", "single", "batch")


@dataclass(frozen=True)
class AnalysisOptions:
    """Options of one analysis run; part of every result row and of its version id.

    Attributes
    ----------
    model : str
        Profile model, one of :data:`PROFILE_MODELS`.
    baseline : str
        Profile baseline, one of :data:`PROFILE_BASELINES`.
    window_n_sigma : float
        Half-width of the rms window in sigma (profiles and images).
    method : str
        Emittance method, one of :data:`EMITTANCE_METHODS`.
    bootstrap : int
        Bootstrap samples for the emittance uncertainty (0: covariance only).
    seed : int
        Seed of the bootstrap's random generator, so a rerun gives the same rows.
    fitter : str
        Profile fitter, one of :data:`PROFILE_FITTERS`.
    """

    model: str = "gaussian"
    baseline: str = "linear"
    window_n_sigma: float = 4.0
    method: str = "thick"
    bootstrap: int = 0
    seed: int = 0
    fitter: str = "auto"

    def __post_init__(self) -> None:
        _check_choice("model", self.model, PROFILE_MODELS)
        _check_choice("baseline", self.baseline, PROFILE_BASELINES)
        _check_choice("method", self.method, EMITTANCE_METHODS)
        _check_choice("fitter", self.fitter, PROFILE_FITTERS)
        if not (isinstance(self.window_n_sigma, (int, float)) and math.isfinite(self.window_n_sigma)
                and self.window_n_sigma > 0):
            raise InputError(f"analysis options: window_n_sigma must be a positive number, got {self.window_n_sigma!r}")
        if not isinstance(self.bootstrap, int) or self.bootstrap < 0:
            raise InputError(f"analysis options: bootstrap must be a whole number >= 0, got {self.bootstrap!r}")
        if not isinstance(self.seed, int) or self.seed < 0:
            raise InputError(f"analysis options: seed must be a whole number >= 0, got {self.seed!r}")
        if self.fitter == "batch" and self.model != "gaussian":
            raise InputError(f"analysis options: fitter 'batch' supports model 'gaussian' only, got model {self.model!r}")
        object.__setattr__(self, "window_n_sigma", float(self.window_n_sigma))

    def to_dict(self) -> dict[str, Any]:
        """The options as a plain dict (JSON-safe)."""
        return dataclasses.asdict(self)

    def to_json(self) -> str:
        """Canonical JSON text (sorted keys, no spaces): the same options give the same text."""
        return json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))

    @classmethod
    def from_mapping(cls, mapping: AnalysisOptions | Mapping[str, Any] | None) -> AnalysisOptions:
        """Build options from a mapping (e.g. parsed JSON); unknown keys raise InputError."""
        if mapping is None:
            return cls()
        if isinstance(mapping, AnalysisOptions):
            return mapping
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(mapping) - known)
        if unknown:
            raise InputError(
                f"analysis options: unknown key {unknown[0]!r} (expected one of {', '.join(sorted(known))})"
            )
        return cls(**dict(mapping))


def _check_choice(name: str, value: object, choices: tuple[str, ...]) -> None:
    if value not in choices:
        raise InputError(f"analysis options: {name} must be one of {', '.join(choices)}, got {value!r}")


def default_version(options: AnalysisOptions | None = None) -> str:
    """Deterministic result-set version id: a hash of the options and the code version.

    The live service, the demo and :func:`analyze_store` use it, so repeating an
    analysis with the same options and code writes the same version id.
    """
    options = options or AnalysisOptions()
    digest = hashlib.sha256(f"{options.to_json()}|{__version__}".encode()).hexdigest()
    return f"a{digest[:15]}"


def new_version(options: AnalysisOptions | None = None, *, now: pd.Timestamp | None = None) -> str:
    """A fresh result-set version id: a hash of options, code version and the time.

    Used by reanalysis, which must never overwrite an earlier result set.
    """
    options = options or AnalysisOptions()
    now = pd.Timestamp.now(tz="UTC") if now is None else pd.Timestamp(now)
    digest = hashlib.sha256(f"{options.to_json()}|{__version__}|{now.isoformat()}".encode()).hexdigest()
    return f"r{digest[:15]}"


@dataclass(frozen=True)
class KindSummary:
    """What one result kind's analysis did.

    ``analysed`` rows written, ``flagged`` of them with any flag, ``failed`` of them
    flagged ``fit_failed``.
    """

    kind: str
    analysed: int = 0
    flagged: int = 0
    failed: int = 0
    message: str = ""


@dataclass(frozen=True)
class PipelineSummary:
    """Outcome of :func:`analyze_store`: one :class:`KindSummary` per result kind run."""

    kinds: tuple[KindSummary, ...]
    version: str
    options: Mapping[str, Any]
    elapsed_s: float
    flags: tuple[str, ...] = ()
    message: str = ""

    @property
    def analysed(self) -> int:
        """Total number of result rows written."""
        return sum(k.analysed for k in self.kinds)

    def for_kind(self, kind: str) -> KindSummary | None:
        """The summary of one kind, or None when it was not run."""
        return next((k for k in self.kinds if k.kind == kind), None)


# --------------------------------------------------------------------------------------
# Record builders: pure functions, arrays and results in, flat JSON-safe dicts out.
# --------------------------------------------------------------------------------------


def _iso(ts: Any) -> str | None:
    if ts is None or (isinstance(ts, float) and math.isnan(ts)):
        return None
    try:
        t = pd.Timestamp(ts)
    except (TypeError, ValueError):
        return str(ts)
    if pd.isna(t):
        return None
    if t.tzinfo is None:
        t = t.tz_localize("UTC")
    return t.tz_convert("UTC").isoformat().replace("+00:00", "Z")


def _clean(value: Any) -> Any:
    """Missing values (None, NaN, pandas NA) become None; numpy scalars become Python ones."""
    if value is None:
        return None
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        return value
    if isinstance(value, np.generic):
        return value.item()
    return value


def profile_record(profile_id: str, profile: Any, result: Any, *, scan: Any = None, step: Any = None,
                   fitter: str = "single") -> dict[str, Any]:
    """Flat result row of one analysed profile, keyed by ``profile_id``."""
    return to_record(
        result,
        profile_id=str(profile_id),
        device=profile.device,
        plane=profile.plane,
        timestamp=_iso(profile.timestamp),
        source=profile.source,
        scan=_clean(scan),
        step=_clean(step),
        fitter=fitter,
    )


def frame_record(frame_id: str, frame: Any, result: Any, *, scan: Any = None, step: Any = None) -> dict[str, Any]:
    """Flat result row of one analysed screen image, keyed by ``frame_id``."""
    record = to_record(
        result,
        frame_id=str(frame_id),
        device=frame.device,
        timestamp=_iso(frame.timestamp),
        source=frame.source,
        scan=_clean(scan),
        step=_clean(step),
    )
    for plane in ("x", "y"):
        # keep the projections' headline numbers as columns; the full nested results
        # stay in projection_x / projection_y (JSON text in the store)
        proj = record.get(f"projection_{plane}")
        if isinstance(proj, Mapping):
            record[f"projection_{plane}_sigma_m"] = proj.get("sigma_m")
            record[f"projection_{plane}_centroid_m"] = proj.get("centroid_m")
    return record


def scan_record(scan_id: str | None, spec: Any, result: Any, *, provisional: bool) -> dict[str, Any]:
    """Flat result row of one scan: the x and y plane results flattened to ``x_*``/``y_*``.

    A provisional fit (``provisional=True``, the scan still being recorded) carries
    the ``provisional`` flag whether or not the emittance code set it.
    """
    nested = to_record(result)
    record: dict[str, Any] = {
        "scan_id": scan_id,
        "scan_key": provisional_scan_id(spec),
        "scan_name": spec.name,
        "timestamp": _iso(spec.timestamp),
        "scan_kind": spec.kind,
        "magnet": spec.magnet.name if spec.magnet is not None else None,
        "monitor": ",".join(m.name for m in spec.monitors),
        "n_steps": len(spec.steps),
        "expected_steps": spec.expected_steps,
        "complete": bool(spec.complete),
        "provisional": bool(provisional),
        "folder": spec.folder,
    }
    for key, value in nested.items():
        if key in ("x", "y") and isinstance(value, Mapping):
            for sub, subvalue in value.items():
                record[f"{key}_{sub}"] = subvalue
        elif key in ("name", "timestamp", "kind"):
            continue  # already above under unambiguous names
        else:
            record[key] = value
    flags = tuple(record.get("flags") or ())
    if provisional:
        flags = merge_flags(flags, ("provisional",))
    record["flags"] = list(flags)
    return record


def failed_record(key: str, key_value: str | None, *, reason: str, **extra: Any) -> dict[str, Any]:
    """A row for a raw item the analysis could not handle: flagged ``fit_failed`` with the reason."""
    record: dict[str, Any] = {key: key_value}
    record.update({k: _clean(v) for k, v in extra.items()})
    record["flags"] = ["fit_failed"]
    record["message"] = reason
    return record


# --------------------------------------------------------------------------------------
# Analysis of in-memory raw items (no store): used by the pipeline, the service and
# the reanalysis tasks, so every path runs the same code.
# --------------------------------------------------------------------------------------


def analyze_profile_items(items: Sequence[tuple[str, Any, Mapping[str, Any]]],
                          options: AnalysisOptions | None = None) -> list[dict[str, Any]]:
    """Analyse ``(profile_id, Profile, extra)`` items; one record per item, in order.

    ``extra`` holds the raw row's ``scan`` and ``step`` (or nothing).  With the
    batch fitter, profiles with the same number of points are fitted together.
    """
    options = options or AnalysisOptions()
    profiles = _profiles
    use_batch = options.fitter == "batch" or (
        options.fitter == "auto" and options.model == "gaussian" and hasattr(profiles, "fit_profiles_batch")
    )
    records: list[dict[str, Any] | None] = [None] * len(items)
    if use_batch and items:
        by_length: dict[int, list[int]] = {}
        for i, (_pid, prof, _extra) in enumerate(items):
            by_length.setdefault(len(prof.position_m), []).append(i)
        for idx in by_length.values():
            positions = np.stack([np.asarray(items[i][1].position_m, dtype=float) for i in idx])
            signals = np.stack([np.asarray(items[i][1].signal, dtype=float) for i in idx])
            try:
                results = profiles.fit_profiles_batch(positions, signals, baseline=options.baseline,
                                                      window_n_sigma=options.window_n_sigma)
            except (ValueError, FloatingPointError, np.linalg.LinAlgError, RuntimeError) as exc:
                results = [None] * len(idx)  # type: ignore[list-item]
                reason = f"batch fit raised {type(exc).__name__}: {exc}"
            for i, res in zip(idx, results, strict=True):
                pid, prof, extra = items[i]
                if res is None:
                    records[i] = failed_record("profile_id", pid, reason=reason, device=prof.device,
                                               plane=prof.plane, timestamp=_iso(prof.timestamp),
                                               source=prof.source, **extra)
                elif options.fitter == "auto" and "fit_failed" in res.flags:
                    records[i] = None  # refitted one by one below
                else:
                    records[i] = profile_record(pid, prof, res, fitter="batch", **extra)
        # "auto": a profile the batch could not fit gets the single fitter's own try
        # (its start values and stopping rule differ); the row says which fitter it got
        for i, (pid, prof, extra) in enumerate(items):
            if records[i] is None:
                records[i] = _single_profile_record(pid, prof, extra, options)
    else:
        for i, (pid, prof, extra) in enumerate(items):
            records[i] = _single_profile_record(pid, prof, extra, options)
    return [r for r in records if r is not None]


def _single_profile_record(pid: str, prof: Any, extra: Mapping[str, Any], options: AnalysisOptions) -> dict:
    try:
        res = _profiles.analyze_profile(
            prof.position_m, prof.signal, model=options.model, baseline=options.baseline,
            window_n_sigma=options.window_n_sigma,
        )
    except (ValueError, FloatingPointError, np.linalg.LinAlgError, RuntimeError) as exc:
        return failed_record("profile_id", pid, reason=f"analysis raised {type(exc).__name__}: {exc}",
                             device=prof.device, plane=prof.plane, timestamp=_iso(prof.timestamp),
                             source=prof.source, **extra)
    return profile_record(pid, prof, res, fitter="single", **extra)


def analyze_frame_items(items: Sequence[tuple[str, Any, Mapping[str, Any]]],
                        options: AnalysisOptions | None = None) -> list[dict[str, Any]]:
    """Analyse ``(frame_id, Frame, extra)`` items with :func:`diagnostics.images.analyze_image`."""
    from diagnostics import images

    options = options or AnalysisOptions()
    out = []
    for fid, frame, extra in items:
        try:
            res = images.analyze_image(
                frame.pixels, pixel_size_m=frame.pixel_size_m, dark=frame.dark,
                bit_depth=frame.bit_depth, roi=frame.roi, window_n_sigma=options.window_n_sigma,
            )
        except (ValueError, FloatingPointError, np.linalg.LinAlgError, RuntimeError) as exc:
            out.append(failed_record("frame_id", fid, reason=f"analysis raised {type(exc).__name__}: {exc}",
                                     device=frame.device, timestamp=_iso(frame.timestamp),
                                     source=frame.source, **extra))
            continue
        out.append(frame_record(fid, frame, res, **extra))
    return out


def analyze_scan_spec(scan_id: str | None, spec: Any, options: AnalysisOptions | None = None, *,
                      provisional: bool | None = None) -> dict[str, Any]:
    """Fit one scan with :func:`diagnostics.emittance.analyze_scan`; one flattened record.

    ``provisional`` defaults to ``not spec.complete``.
    """
    emittance = _emittance
    options = options or AnalysisOptions()
    provisional = (not spec.complete) if provisional is None else provisional
    try:
        res = emittance.analyze_scan(spec, method=options.method, bootstrap=options.bootstrap,
                                     profile_model=options.model, seed=options.seed)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError, RuntimeError) as exc:
        rec = failed_record("scan_id", scan_id, reason=f"analysis raised {type(exc).__name__}: {exc}",
                            scan_name=spec.name, timestamp=_iso(spec.timestamp), n_steps=len(spec.steps),
                            complete=bool(spec.complete), provisional=bool(provisional))
        if provisional:
            rec["flags"] = list(merge_flags(rec["flags"], ("provisional",)))
        return rec
    return scan_record(scan_id, spec, res, provisional=provisional)


# --------------------------------------------------------------------------------------
# Store access: raw rows in, results out.
# --------------------------------------------------------------------------------------


def _write(store: Any, kind: str, records: Sequence[dict], options: AnalysisOptions, version: str,
           write: bool) -> tuple[str, ...]:
    if not write or not records:
        return ()
    path = store.write_results(kind, list(records), options=options.to_dict(), version=version)
    return (str(path),) if path is not None else ()


def _summarise(kind: str, records: Sequence[Mapping[str, Any]], message: str = "") -> KindSummary:
    flagged = sum(1 for r in records if r.get("flags"))
    failed = sum(1 for r in records if "fit_failed" in (r.get("flags") or ()))
    return KindSummary(kind, analysed=len(records), flagged=flagged, failed=failed, message=message)


def _extra(row: Mapping[str, Any]) -> dict[str, Any]:
    return {"scan": _clean(row.get("scan")), "step": _clean(row.get("step"))}


#: Span of one read when frames are analysed over a long window (bounds memory:
#: an hour of one-per-minute 640x480 frames is about 20 MB of pixels).
FRAME_READ_SPAN = pd.Timedelta("1h")


def _stored_items(store: Any, kind: str, *, ids: Iterable[str] | None, start: Any, end: Any,
                  devices: Sequence[str] | None, scan: str | None = None) -> list[tuple[str, Any, dict[str, Any]]]:
    """Index rows and domain objects of one window, paired (both are sorted by time, id)."""
    index_of = store.profile_index if kind == "profiles" else store.frame_index
    read = store.read_profiles if kind == "profiles" else store.read_frames
    wanted = None if ids is None else {str(i) for i in ids}
    for _attempt in range(5):
        index = index_of(start=start, end=end, devices=devices, scan=scan)
        objects = read(start=start, end=end, devices=devices, scan=scan)
        if len(index) == len(objects):
            break
        # the live service stored more between the two reads: read the window again
    else:
        raise RuntimeError(f"{kind}: the store kept changing while reading {start}..{end}")
    items = []
    for row, obj in zip(index.to_dict("records"), objects, strict=True):
        if wanted is None or str(row["id"]) in wanted:
            items.append((str(row["id"]), obj, _extra(row)))
    return items


def _windows(store: Any, kind: str, start: Any, end: Any, span: pd.Timedelta) -> list[tuple[Any, Any]]:
    """``[start, end)`` cut into pieces of ``span`` (the stored time range when open)."""
    rng = store.time_range(kind)
    if rng is None:
        return []
    t0 = rng[0] if start is None else max(_utc(start), rng[0])
    t1 = (rng[1] + pd.Timedelta(1, "ns")) if end is None else min(_utc(end), rng[1] + pd.Timedelta(1, "ns"))
    out = []
    while t0 < t1:
        out.append((t0, min(t0 + span, t1)))
        t0 = t0 + span
    return out


def profile_items(store: Any, *, ids: Iterable[str] | None = None, start: Any = None, end: Any = None,
                  devices: Sequence[str] | None = None) -> list[tuple[str, Any, dict[str, Any]]]:
    """``(profile_id, Profile, {"scan", "step"})`` for stored profiles of a window (optionally by id)."""
    return _stored_items(store, "profiles", ids=ids, start=start, end=end, devices=devices)


def frame_items(store: Any, *, ids: Iterable[str] | None = None, start: Any = None, end: Any = None,
                devices: Sequence[str] | None = None) -> list[tuple[str, Any, dict[str, Any]]]:
    """``(frame_id, Frame, {"scan", "step"})`` for stored frames of a window (optionally by id)."""
    return _stored_items(store, "frames", ids=ids, start=start, end=end, devices=devices)


def analyze_profiles(store: Any, *, ids: Iterable[str] | None = None, start: Any = None, end: Any = None,
                     devices: Sequence[str] | None = None, options: AnalysisOptions | Mapping | None = None,
                     version: str | None = None, write: bool = True) -> list[dict[str, Any]]:
    """Analyse stored profiles of a time window (optionally only ``ids``) and write their rows.

    Parameters
    ----------
    store : diagnostics.store.Store
    ids : iterable of str, optional
        Profile ids (``Store.profile_index()["id"]``); default all in the window.
    start, end : anything ``pandas.Timestamp`` takes, optional
        Time window ``[start, end)`` (naive means UTC); default everything.
    devices : sequence of str, optional
    options : AnalysisOptions or mapping, optional
    version : str, optional
        Result-set version id; default :func:`default_version` of the options.
    write : bool
        Write the rows to the store (``results/profiles``).

    Returns
    -------
    list of dict
        The result rows, one per profile, in stored order (time, id).
    """
    options = AnalysisOptions.from_mapping(options)
    items = profile_items(store, ids=ids, start=start, end=end, devices=devices)
    records = analyze_profile_items(items, options)
    _write(store, "profiles", records, options, version or default_version(options), write)
    return records


def analyze_frames(store: Any, *, ids: Iterable[str] | None = None, start: Any = None, end: Any = None,
                   devices: Sequence[str] | None = None, options: AnalysisOptions | Mapping | None = None,
                   version: str | None = None, write: bool = True) -> list[dict[str, Any]]:
    """Analyse stored screen images of a time window and write their rows (``results/frames``).

    Parameters are those of :func:`analyze_profiles`.  The window is read an hour
    (:data:`FRAME_READ_SPAN`) at a time and each hour's rows are written as they
    are done, so memory stays bounded on a long archive.
    """
    options = AnalysisOptions.from_mapping(options)
    version = version or default_version(options)
    records: list[dict[str, Any]] = []
    for t0, t1 in _windows(store, "frames", start, end, FRAME_READ_SPAN):
        items = frame_items(store, ids=ids, start=t0, end=t1, devices=devices)
        chunk = analyze_frame_items(items, options)
        _write(store, "frames", chunk, options, version, write)
        records.extend(chunk)
    return records


def _scan_table(store: Any, start: Any, end: Any) -> pd.DataFrame:
    scans = store.list_scans()
    if scans is None or len(scans) == 0:
        return pd.DataFrame(columns=["id", "name", "timestamp"])
    scans = scans.copy()
    if "timestamp" in scans.columns and (start is not None or end is not None):
        ts = pd.to_datetime(scans["timestamp"], utc=True)
        keep = pd.Series(True, index=scans.index)
        if start is not None:
            keep &= ts >= _utc(start)
        if end is not None:
            keep &= ts < _utc(end)
        scans = scans[keep]
    return scans


def _scan_id_column(scans: pd.DataFrame) -> str:
    for name in ("scan_id", "id", "scan"):
        if name in scans.columns:
            return name
    raise KeyError("list_scans() has no id column")


def analyze_scans(store: Any, *, ids: Iterable[str] | None = None, start: Any = None, end: Any = None,
                  options: AnalysisOptions | Mapping | None = None, version: str | None = None,
                  write: bool = True) -> list[dict[str, Any]]:
    """Fit stored scans (by scan ``ids`` or names, or time window) and write one row per scan.

    Scans stored before they were complete give provisional rows (``provisional``
    True and the ``provisional`` flag).  Rows go to ``results/scans``.
    """
    options = AnalysisOptions.from_mapping(options)
    if ids is not None:
        wanted = [str(i) for i in ids]
    else:
        scans = _scan_table(store, start, end)
        wanted = [str(v) for v in scans[_scan_id_column(scans)]] if len(scans) else []
    records = []
    for scan_id in wanted:
        spec = store.load_scan(scan_id)
        records.append(analyze_scan_spec(scan_id, spec, options))
    _write(store, "scans", records, options, version or default_version(options), write)
    return records


def _utc(value: Any) -> pd.Timestamp:
    t = pd.Timestamp(value)
    return t.tz_localize("UTC") if t.tzinfo is None else t.tz_convert("UTC")


def orbit_records(report: Any, *, interval_start: pd.Timestamp, interval_end: pd.Timestamp,
                  complete: bool) -> list[dict[str, Any]]:
    """One flat row per BPM and plane from an :class:`diagnostics.orbit.OrbitReport`."""
    summaries = _bpm_summaries(report)
    rows = []
    for summary in summaries:
        record = to_record(
            summary,
            interval_start=_iso(interval_start),
            interval_end=_iso(interval_end),
            timestamp=_iso(interval_start),
            interval_complete=bool(complete),
            n_readings=getattr(report, "n_readings", None),
            sampling_Hz=getattr(report, "sampling_Hz", None),
        )
        rows.append(record)
    return rows


def _bpm_summaries(report: Any) -> list[Any]:
    """The per-BPM, per-plane summaries of an orbit report, whatever container holds them."""
    for name in ("summaries", "bpm_planes", "bpms", "planes"):
        value = getattr(report, name, None)
        if value is None:
            continue
        if isinstance(value, Mapping):
            out: list[Any] = []
            for item in value.values():
                if isinstance(item, Mapping):
                    out.extend(item.values())
                elif isinstance(item, (list, tuple)):
                    out.extend(item)
                else:
                    out.append(item)
            return out
        return list(value)
    raise AttributeError("orbit report has no per-BPM summaries")


def orbit_intervals(start: pd.Timestamp, end: pd.Timestamp, interval: str) -> list[tuple[pd.Timestamp, pd.Timestamp]]:
    """Aligned intervals ``[t, t + interval)`` covering ``[start, end)`` (floored to ``interval``)."""
    step = pd.Timedelta(interval)
    if step <= pd.Timedelta(0):
        raise InputError(f"orbit interval: must be positive, got {interval!r}")
    t = _utc(start).floor(step)
    end = _utc(end)
    out = []
    while t < end:
        out.append((t, t + step))
        t = t + step
    return out


def summarize_orbit(store: Any, start: Any = None, end: Any = None, interval: str = "1h", *,
                    options: AnalysisOptions | Mapping | None = None, version: str | None = None,
                    write: bool = True, now: Any = None) -> list[dict[str, Any]]:
    """Orbit summary per interval and BPM: :func:`diagnostics.orbit.analyze_orbit` on each interval.

    Parameters
    ----------
    store : diagnostics.store.Store
    start, end : optional
        Window; default the BPM data's time range.
    interval : str
        Interval length (pandas offset text, e.g. ``"10min"``, ``"1h"``); intervals
        are aligned to multiples of it.
    now : optional
        Data time taken as "now": an interval ending after it is marked
        ``interval_complete=False`` (default: the last BPM reading).

    Returns
    -------
    list of dict
        One row per interval, BPM and plane (``results/orbit``).
    """
    from diagnostics import orbit

    options = AnalysisOptions.from_mapping(options)
    if start is None or end is None:
        span = store.time_range("bpm")
        if span is None:
            return []
        start = span[0] if start is None else start
        end = (span[1] + pd.Timedelta(1, "ns")) if end is None else end
    span = store.time_range("bpm")
    last = _utc(now) if now is not None else (span[1] if span is not None else _utc(end))
    records: list[dict[str, Any]] = []
    for t0, t1 in orbit_intervals(_utc(start), _utc(end), interval):
        bpm = store.read_bpm(start=t0, end=t1)
        if len(bpm) == 0:
            continue
        try:
            slow = store.read_slow(start=t0, end=t1)
        except (AttributeError, FileNotFoundError):
            slow = None
        if slow is not None and len(slow) == 0:
            slow = None
        report = orbit.analyze_orbit(bpm, slow_df=slow, keep_trends=False)
        records.extend(orbit_records(report, interval_start=t0, interval_end=t1, complete=bool(t1 <= last)))
    _write(store, "orbit", records, options, version or default_version(options), write)
    return records


def provisional_scan_id(spec: Any) -> str:
    """The id a scan will have in the store, known before it is stored.

    It is :func:`diagnostics.store.scan_id_of` (from the scan's name and start
    time, which do not change while steps are added), so the provisional rows of a
    scan still being recorded and its final row share ``scan_id``, and "the latest
    row per scan" is the final one once the scan is complete.
    """
    from diagnostics.store import scan_id_of

    return scan_id_of(spec)


#: Raw kinds whose rows get a per-item analysis as soon as they are stored.
PER_ITEM_KINDS = ("profiles", "frames", "scans")


def _existing_keys(store: Any, kind: str, key: str, version: str, start: Any, end: Any) -> set[str]:
    """Keys of rows already stored for ``version`` in a window (empty when none)."""
    versions = store.result_versions(kind)
    if version not in set(versions.get("version", ())):
        return set()
    table = store.read_results(kind, start=start, end=end, version=version)
    if key not in table.columns:
        return set()
    return set(table[key].astype(str))


def _read_input(path: str) -> tuple[str, Any]:
    from diagnostics import readers

    return readers.read_any(path)


def ingested_items(store: Any, kind: str, outcomes: Sequence[Any]) -> list[tuple[str, Any, dict[str, Any]]]:
    """``(id, object, extra)`` for the profiles or frames that ingest outcomes stored.

    The objects are read again from the inputs with the same readers the store
    used (the store's round trip is bit-identical), which costs a few ms,
    whereas finding one row among thousands of small stored files costs far
    more; the ids come from the store's index over the batch's time window,
    matched on the input's sha256.
    """
    objects: dict[str, list[Any]] = {}
    for outcome in outcomes:
        _kind, obj = _read_input(outcome.path)
        objects.setdefault(outcome.sha256, []).extend(obj if isinstance(obj, list) else [obj])
    if not objects:
        return []
    times = [_utc(o.timestamp) for objs in objects.values() for o in objs]
    index_of = store.profile_index if kind == "profiles" else store.frame_index
    index = index_of(start=min(times), end=max(times) + pd.Timedelta(1, "ns"))
    index = index[index["sha256"].isin(list(objects))]
    rows_of: dict[str, list[tuple[str, Any, Any]]] = {}
    for row in index[["sha256", "id", "scan", "step"]].itertuples(index=False):
        rows_of.setdefault(row.sha256, []).append((str(row.id), row.scan, row.step))
    items: list[tuple[str, Any, dict[str, Any]]] = []
    for sha, objs in objects.items():
        rows = rows_of.get(sha, [])
        if len(rows) != len(objs):
            raise RuntimeError(f"{kind}: {len(objs)} item(s) read from the input of sha256 {sha[:16]} but "
                               f"{len(rows)} found in the store")
        # the store numbers an input's items in reading order (<sha16>-<i>)
        rows.sort(key=lambda r: _item_number(r[0]))
        items.extend((rid, o, {"scan": _clean(scan), "step": _clean(step)})
                     for (rid, scan, step), o in zip(rows, objs, strict=True))
    return items


def _item_number(item_id: str) -> int:
    tail = item_id.rsplit("-", 1)[-1]
    return int(tail) if tail.isdigit() else 0


def analyze_ingested(store: Any, outcomes: Sequence[Any], *, options: AnalysisOptions | Mapping | None = None,
                     version: str | None = None, skip_existing: bool = False) -> int:
    """Analyse what the given ingest outcomes stored, write the rows; return how many were written.

    Used by the live service after each batch of ingests, while the inputs are
    still in its work folder.  Outcomes whose status is ``stored`` or
    ``duplicate`` and whose kind is profiles, frames or scans are analysed (a
    duplicate again too, because a crash may have come between its ingest and
    its results).  With ``skip_existing``, rows whose key is already among the
    results of ``version`` are left out (the restart path: exactly-once results).
    One result file per kind is written for the whole batch.
    """
    options = AnalysisOptions.from_mapping(options)
    version = version or default_version(options)
    by_kind: dict[str, list[Any]] = {}
    for outcome in outcomes:
        kind = getattr(outcome, "kind", None)
        if getattr(outcome, "status", None) in ("stored", "duplicate") and kind in PER_ITEM_KINDS:
            by_kind.setdefault(kind, []).append(outcome)
    written = 0
    for kind, group in by_kind.items():
        if kind == "scans":
            key = "scan_id"
            records = []
            step_records: dict[str, list[dict[str, Any]]] = {"profiles": [], "frames": []}
            for outcome in group:
                for scan_id in scan_ids_of_outcome(store, outcome):
                    records.append(analyze_scan_spec(scan_id, store.load_scan(scan_id), options, provisional=False))
                    # the steps' own profiles and images get their rows too, as in analyze_store
                    step_records["profiles"] += analyze_profile_items(
                        _stored_items(store, "profiles", ids=None, start=None, end=None, devices=None,
                                      scan=scan_id), options)
                    step_records["frames"] += analyze_frame_items(
                        _stored_items(store, "frames", ids=None, start=None, end=None, devices=None,
                                      scan=scan_id), options)
            for step_kind, rows in step_records.items():
                step_key = "profile_id" if step_kind == "profiles" else "frame_id"
                if skip_existing and rows:
                    times = [pd.Timestamp(r["timestamp"]) for r in rows if r.get("timestamp")]
                    have = _existing_keys(store, step_kind, step_key, version, min(times),
                                          max(times) + pd.Timedelta(1, "ns")) if times else set()
                    rows = [r for r in rows if str(r.get(step_key)) not in have]
                _write(store, step_kind, rows, options, version, True)
                written += len(rows)
        else:
            key = "profile_id" if kind == "profiles" else "frame_id"
            items = ingested_items(store, kind, group)
            records = (analyze_profile_items if kind == "profiles" else analyze_frame_items)(items, options)
        if skip_existing and records:
            times = [pd.Timestamp(r["timestamp"]) for r in records if r.get("timestamp")]
            if times:
                have = _existing_keys(store, kind, key, version, min(times), max(times) + pd.Timedelta(1, "ns"))
                records = [r for r in records if str(r.get(key)) not in have]
        _write(store, kind, records, options, version, True)
        written += len(records)
    return written


def scan_ids_of_outcome(store: Any, outcome: Any) -> list[str]:
    """Scan ids stored by one ingest outcome of a scan folder (matched on its sha256)."""
    scans = store.list_scans()
    if len(scans) == 0:
        return []
    col = _scan_id_column(scans)
    return [str(v) for v in scans.loc[scans["sha256"] == outcome.sha256, col]]


def analyze_store(store: Any, *, kinds: Sequence[str] = PIPELINE_KINDS, start: Any = None, end: Any = None,
                  options: AnalysisOptions | Mapping | None = None, version: str | None = None,
                  orbit_interval: str = "1h") -> PipelineSummary:
    """Run every selected analysis over the stored raw data and write the results.

    Parameters
    ----------
    store : diagnostics.store.Store
    kinds : sequence of str
        Result kinds to produce, from :data:`PIPELINE_KINDS`.
    start, end : optional
        Time window of the raw data (naive means UTC); default everything.
    options : AnalysisOptions or mapping, optional
    version : str, optional
        Result-set version id (default :func:`default_version`).
    orbit_interval : str
        Interval of the orbit summary.

    Returns
    -------
    PipelineSummary
    """
    for kind in kinds:
        if kind not in PIPELINE_KINDS:
            raise InputError(f"analysis kinds: {kind!r} is not one of {', '.join(PIPELINE_KINDS)}")
    options = AnalysisOptions.from_mapping(options)
    version = version or default_version(options)
    t_start = time.perf_counter()
    runners: dict[str, Callable[[], list[dict[str, Any]]]] = {
        "profiles": lambda: analyze_profiles(store, start=start, end=end, options=options, version=version),
        "frames": lambda: analyze_frames(store, start=start, end=end, options=options, version=version),
        "scans": lambda: analyze_scans(store, start=start, end=end, options=options, version=version),
        "orbit": lambda: summarize_orbit(store, start, end, orbit_interval, options=options, version=version),
    }
    summaries = []
    for kind in kinds:
        records = runners[kind]()
        summaries.append(_summarise(kind, records))
    return PipelineSummary(
        kinds=tuple(summaries), version=version, options=options.to_dict(),
        elapsed_s=time.perf_counter() - t_start,
    )


__all__ = [
    "EMITTANCE_METHODS",
    "PIPELINE_KINDS",
    "PROFILE_BASELINES",
    "PROFILE_FITTERS",
    "PROFILE_MODELS",
    "AnalysisOptions",
    "KindSummary",
    "PipelineSummary",
    "analyze_frame_items",
    "analyze_frames",
    "analyze_profile_items",
    "analyze_profiles",
    "analyze_scan_spec",
    "analyze_scans",
    "analyze_store",
    "default_version",
    "frame_record",
    "new_version",
    "orbit_intervals",
    "orbit_records",
    "profile_record",
    "scan_record",
    "summarize_orbit",
]
