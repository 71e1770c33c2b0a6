"""``beamdiag orbit FILE... | --store DIR [--start T --end T] [--json] [--drift-limit-um 10] ...``

Analyse BPM readings: reference orbit, drift and drift rate, jitter, steps,
spectral lines, principal modes, correlation with slow channels (temperatures),
transmission between stations with loss events, and tolerance checks (see
:func:`diagnostics.orbit.analyze_orbit`).  Each FILE is a BPM CSV or Parquet
file; ``--store`` reads the BPM and slow-channel readings of a store instead.
``--slow FILE`` adds slow-channel files to correlate with (FILE mode).

With ``--json`` one JSON object per FILE (or one for the store) is printed on
one line: ``file``, ``start``, ``end``, ``sampling_Hz``, ``nyquist_Hz``,
``bpms`` (name -> {"x": {...}, "y": {...}} with ``mean_m``, ``drift_m``,
``max_abs_drift_m``, ``drift_rate_m_per_h``, ``drift_rate_err_m_per_h``,
``jitter_rms_m``, ``steps``, ``peak_frequency_Hz``, ``flags``, ...),
``steps``, ``modes``, ``correlations``, ``transmission``, ``loss_events``,
``limits``, ``violations``, ``flags``, ``message`` and ``error`` (null, or why
the input could not be analysed).  Without ``--json`` a table in micrometres.
The exit status is 1 when any input failed, after the others were done.

The default limits (drift 10 um, jitter 5 um) are common practice, not a
machine's specification: set them for your beam sizes.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Sequence
from typing import Any

import pandas as pd

from diagnostics.commands._common import emit_json, fmt
from diagnostics.errors import BeamdiagError, InputError

#: Display scale: micrometres per metre.
UM_PER_M = 1e6


def register(subparsers: argparse._SubParsersAction) -> None:
    from diagnostics.orbit import (
        DEFAULT_DRIFT_LIMIT_M,
        DEFAULT_JITTER_LIMIT_M,
        DEFAULT_REFERENCE_MINUTES,
        JITTER_METHODS,
    )

    p = subparsers.add_parser(
        "orbit",
        help="orbit drift, jitter, steps, spectra, modes and transmission from BPM readings",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("files", nargs="*", metavar="FILE", help="BPM readings (CSV or Parquet)")
    p.add_argument("--store", default=None, metavar="DIR", help="read the BPM and slow readings of this store")
    p.add_argument("--start", default=None, metavar="T", help="first time analysed (ISO 8601; naive = UTC)")
    p.add_argument("--end", default=None, metavar="T", help="last time analysed (ISO 8601; naive = UTC)")
    p.add_argument("--slow", action="append", default=[], metavar="FILE",
                   help="slow-channel file to correlate with (FILE mode; repeat for several)")
    p.add_argument("--json", action="store_true", help="print one JSON object per input, one per line")
    p.add_argument("--drift-limit-um", type=_positive_float, default=DEFAULT_DRIFT_LIMIT_M * UM_PER_M,
                   metavar="UM", help="drift limit in micrometres (default %(default)g, common practice)")
    p.add_argument("--jitter-limit-um", type=_positive_float, default=DEFAULT_JITTER_LIMIT_M * UM_PER_M,
                   metavar="UM", help="jitter (rms) limit in micrometres (default %(default)g, common practice)")
    p.add_argument("--reference-minutes", type=_positive_float, default=DEFAULT_REFERENCE_MINUTES,
                   metavar="N", help="reference orbit: the first N minutes (default %(default)g)")
    p.add_argument("--jitter-method", choices=JITTER_METHODS, default=JITTER_METHODS[0],
                   help="how slow drift is removed before the jitter rms (default %(default)s)")
    p.add_argument("--current-channel", action="append", default=[], metavar="NAME", dest="current_channels",
                   help="slow channel measuring the beam current upstream of the first BPM (repeat for several)")
    p.add_argument("--loss-threshold", type=_positive_float, default=0.01, metavar="F",
                   help="fractional transmission drop counted as a loss (default %(default)g)")
    p.set_defaults(func=run)


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"expected a finite number > 0, got {text!r}")
    return value


def _options(args: argparse.Namespace) -> dict[str, Any]:
    return {
        "start": args.start,
        "end": args.end,
        "drift_limit_m": args.drift_limit_um / UM_PER_M,
        "jitter_limit_m": args.jitter_limit_um / UM_PER_M,
        "reference_minutes": args.reference_minutes,
        "jitter_method": args.jitter_method,
        "loss_threshold": args.loss_threshold,
        "current_channels": tuple(args.current_channels),
        "keep_trends": False,
    }


def _failure(source: str, exc: BaseException) -> dict[str, Any]:
    return {"file": source, "start": None, "end": None, "sampling_Hz": None, "nyquist_Hz": None,
            "bpms": {}, "flags": [], "error": str(exc)}


def _read_slow_files(paths: Sequence[str]) -> pd.DataFrame | None:
    if not paths:
        return None
    from diagnostics.readers.slow import read_slow

    return pd.concat([read_slow(p) for p in paths], ignore_index=True)


def run(args: argparse.Namespace) -> int:
    from diagnostics.orbit import analyze_orbit, orbit_record

    if bool(args.files) == bool(args.store):
        raise InputError("orbit: give BPM files or --store DIR (expected exactly one of them)")
    for name in ("start", "end"):
        value = getattr(args, name)
        if value is not None:
            try:
                pd.Timestamp(value)
            except ValueError:
                raise InputError(f"orbit: --{name} {value!r} is not a time (expected ISO 8601)") from None
    options = _options(args)
    failed = 0
    inputs: list[tuple[str, Any]] = []
    if args.store:
        inputs.append((str(args.store), None))
    else:
        slow = None
        try:
            slow = _read_slow_files(args.slow)
        except BeamdiagError as exc:
            raise InputError(str(exc)) from None
        inputs.extend((str(path), slow) for path in args.files)

    for source, slow in inputs:
        try:
            if args.store:
                from diagnostics.store import Store

                store = Store(source, create=False, read_only=True)
                bpm_df = store.read_bpm(start=args.start, end=args.end)
                slow = store.read_slow(start=args.start, end=args.end)
                if bpm_df.empty:
                    raise InputError(f"{source}: no BPM readings in the store for the selected time range")
            else:
                from diagnostics.readers.bpm import read_bpm

                bpm_df = read_bpm(source)
            report = analyze_orbit(bpm_df, slow_df=slow, **options)
        except BeamdiagError as exc:
            failed += 1
            if args.json:
                emit_json(_failure(source, exc))
            else:
                print(f"{source}: error: {exc}")
            continue
        if args.json:
            record = {"file": source, **orbit_record(report), "error": None}
            emit_json(record)
        else:
            print("\n".join(summary_lines(source, report)))
    return 1 if failed else 0


def summary_lines(source: str, report: Any) -> list[str]:
    """The readable table of one report, in micrometres."""
    u = UM_PER_M
    lines = [
        f"{source}: {report.start.isoformat().replace('+00:00', 'Z')} .. "
        f"{report.end.isoformat().replace('+00:00', 'Z')}, {len(report.bpms)} BPMs, "
        f"{report.n_pulses} pulses at {fmt(report.sampling_Hz, 1, 4)} Hz (Nyquist {fmt(report.nyquist_Hz, 1, 4)} Hz)",
        f"  limits: drift {fmt(report.limits.drift_limit_m, u)} um, jitter {fmt(report.limits.jitter_limit_m, u)} um",
        f"  {'bpm':<10} {'pl':<2} {'drift um':>9} {'max|d| um':>9} {'rate um/h':>15} {'jitter um':>13} "
        f"{'steps':>5} {'line Hz':>8} {'amp um':>7}  flags",
    ]
    for s in report.summaries:
        rate = f"{fmt(s.drift_rate_m_per_h, u)} +- {fmt(s.drift_rate_err_m_per_h, u, 2)}"
        jitter = f"{fmt(s.jitter_rms_m, u)} +- {fmt(s.jitter_rms_err_m, u, 1)}"
        lines.append(
            f"  {s.bpm:<10} {s.plane:<2} {fmt(s.drift_m, u):>9} {fmt(s.max_abs_drift_m, u):>9} {rate:>15} "
            f"{jitter:>13} {len(s.steps):>5} {fmt(s.peak_frequency_Hz, 1):>8} {fmt(s.peak_amplitude_m, u):>7}  "
            f"{','.join(s.flags) or '-'}"
        )
    for bpm, plane, step in report.steps:
        lines.append(
            f"  step {bpm} {plane} at {step.time.isoformat().replace('+00:00', 'Z')}: "
            f"{fmt(step.size_m, u)} +- {fmt(step.size_err_m, u, 2)} um"
        )
    for group in report.step_events:
        changes = "; ".join(f"{name} changed by {fmt(change, 1)} {unit}" for name, change, unit in group.slow_changes)
        lines.append(
            f"  step event at {group.time.isoformat().replace('+00:00', 'Z')}: {group.message}"
            + (f" ({changes})" if changes else "")
        )
    for event in report.loss_events:
        lines.append(
            f"  loss {event.upstream} -> {event.downstream} {event.start.isoformat().replace('+00:00', 'Z')} .. "
            f"{event.end.isoformat().replace('+00:00', 'Z')}: {fmt(event.size * 100, 1)} % for {fmt(event.duration_s / 60, 1)} min"
        )
    for mode in report.modes:
        if mode.singular_values_m.size:
            lines.append(
                f"  modes {mode.plane}: first {fmt(mode.singular_values_m[0], u)} um rms "
                f"({fmt(mode.explained_fraction[0] * 100, 1)} %) on {', '.join(mode.mode_bpms[0][:6])}; "
                f"noise floor {fmt(mode.noise_floor_m, u)} um, {mode.n_above_noise} above it"
            )
    best: dict[str, Any] = {}
    for corr in report.correlations:
        if math.isfinite(corr.pearson_r) and (
            corr.channel not in best or abs(corr.pearson_r) > abs(best[corr.channel].pearson_r)
        ):
            best[corr.channel] = corr
    for channel, corr in best.items():
        lines.append(
            f"  strongest with {channel}: {corr.bpm} {corr.plane} {fmt(corr.slope_m_per_unit, u)} "
            f"+- {fmt(corr.slope_err_m_per_unit, u, 2)} um/{corr.unit}, r = {fmt(corr.pearson_r, 1)}, "
            f"lag {fmt(corr.lag_s / 60, 1)} min"
        )
    if report.out_of_limit_bpms:
        lines.append(f"  out of limit: {', '.join(report.out_of_limit_bpms)} ({len(report.violations)} intervals)")
    if report.message:
        lines.append(f"  note: {report.message}")
    return lines
