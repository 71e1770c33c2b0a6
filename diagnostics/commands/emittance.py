"""``beamdiag emittance DIR... [--json] [--method thick|thin] [--bootstrap N] [--resolution-m R] [--store STORE]``

Fit the emittance and Twiss parameters of quad scans, solenoid scans and
multi-monitor measurements.  Each DIR is a scan folder (with ``scan.json``), or a
folder whose sub-folders are scan folders.  With ``--json`` one JSON object per
scan folder is printed on one line: ``file`` (the folder), ``name``, ``kind``,
``x`` and ``y`` (emittance_m_rad, emittance_err_m_rad, norm_emittance_m_rad,
norm_emittance_err_m_rad, beta_m, beta_err_m, alpha, alpha_err, bmag, flags,
message, ...), ``steps`` (per-step sizes used), ``flags``, ``message`` and
``error`` (null, or why the folder could not be analysed).  Without ``--json``
a summary in mm mrad (1 mm mrad = 1e-6 m rad) and metres.  ``--store`` also
records each result in the store's ``scans`` results.  The exit status is 1
when any folder failed, after the others were done.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Any

from diagnostics.commands._common import emit_json
from diagnostics.errors import BeamdiagError
from diagnostics.results import to_record

#: Keys of each plane in the JSON output, in this order.
PLANE_KEYS = (
    "emittance_m_rad",
    "emittance_err_m_rad",
    "norm_emittance_m_rad",
    "norm_emittance_err_m_rad",
    "beta_m",
    "beta_err_m",
    "alpha",
    "alpha_err",
    "gamma_per_m",
    "sigma11_m2",
    "sigma12_m",
    "sigma22",
    "bmag",
    "bmag_err",
    "mismatch_factor",
    "chi2_red",
    "dof",
    "cond",
    "n_points",
    "n_settings",
    "weights",
    "chromatic_bias",
    "thin_lens",
    "bootstrap",
    "reference_point",
    "flags",
    "message",
)
#: Display scale: 1 mm mrad = 1e-6 m rad.
MM_MRAD_PER_M_RAD = 1e6


def register(subparsers: argparse._SubParsersAction) -> None:
    from diagnostics.emittance import EMITTANCE_METHODS

    p = subparsers.add_parser(
        "emittance",
        help="emittance and Twiss parameters of quad scans, solenoid scans and multi-monitor sets",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("folders", nargs="+", metavar="DIR", help="scan folders, or folders holding scan folders")
    p.add_argument("--json", action="store_true", help="print one JSON object per scan folder, one per line")
    p.add_argument("--method", choices=EMITTANCE_METHODS, default="thick",
                   help="quadrupole model: thick hard-edge lens (default) or thin lens")
    p.add_argument("--bootstrap", type=_non_negative_int, default=0, metavar="N",
                   help="bootstrap samples for the uncertainty (default 0: covariance only)")
    p.add_argument("--resolution-m", type=_non_negative_float, default=None, metavar="R",
                   help="monitor resolution in metres, overriding the scan file's")
    p.add_argument("--seed", type=int, default=0, help="bootstrap random seed (default 0)")
    p.add_argument("--store", default=None, metavar="STORE", help="also record the results in this store")
    p.set_defaults(func=run)


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a number >= 0, got {value}")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of metres, got {text!r}") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"expected a finite number >= 0, got {text!r}")
    return value


def scan_folders(paths: list[str]) -> list[Path]:
    """Each named scan folder, or the scan folders directly inside a named folder (sorted)."""
    from diagnostics.readers.scan import is_scan_folder

    out: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir() and not is_scan_folder(path):
            inner = sorted(p for p in path.iterdir() if is_scan_folder(p) and not p.name.startswith("."))
            out.extend(inner or [path])  # an empty folder stays, and fails with the reader's message
        else:
            out.append(path)
    return out


def record_of(folder: Path, result: Any) -> dict[str, Any]:
    """The JSON object of one analysed folder."""
    full = to_record(result)
    record: dict[str, Any] = {"file": str(folder), "name": result.name, "kind": result.kind, "timestamp": full.get("timestamp")}
    for plane in ("x", "y"):
        record[plane] = {key: full[plane].get(key) for key in PLANE_KEYS}
    record["steps"] = full["steps"]
    record["kinematics"] = full["kinematics"]
    record["options"] = full["options"]
    record["flags"] = full["flags"]
    record["message"] = full["message"]
    record["error"] = None
    return record


def fmt(value: float | None, scale: float = 1.0, digits: int = 3) -> str:
    """``value * scale`` with ``digits`` significant digits, trailing zeros kept; '-' when missing."""
    if value is None or not math.isfinite(value):
        return "-"
    return f"{value * scale:#.{digits}g}".rstrip(".")


def _summary_lines(folder: Path, result: Any) -> list[str]:
    lines = [f"{folder}: {result.name or '-'} ({result.kind}, {len(result.steps)} steps)"]
    for plane in (result.x, result.y):
        s = MM_MRAD_PER_M_RAD
        text = (
            f"  {plane.plane}: emittance {fmt(plane.emittance_m_rad, s, 4)} +- {fmt(plane.emittance_err_m_rad, s, 2)} mm mrad"
            f", normalised {fmt(plane.norm_emittance_m_rad, s, 4)} +- {fmt(plane.norm_emittance_err_m_rad, s, 2)} mm mrad"
            f", beta {fmt(plane.beta_m, 1, 4)} +- {fmt(plane.beta_err_m, 1, 2)} m"
            f", alpha {fmt(plane.alpha, 1, 4)} +- {fmt(plane.alpha_err, 1, 2)}"
        )
        if plane.bmag is not None:
            text += f", B_mag {fmt(plane.bmag, 1, 4)}"
        lines.append(text)
        if plane.flags:
            lines.append(f"     flags: {', '.join(plane.flags)}")
        if plane.message:
            lines.append(f"     {plane.message}")
    lines.append(f"  at the {result.x.reference_point}")
    return lines


def run(args: argparse.Namespace) -> int:
    from diagnostics.emittance import analyze_scan
    from diagnostics.readers.scan import read_scan

    failed = 0
    stored: list[tuple[Any, Any]] = []
    for folder in scan_folders(args.folders):
        try:
            spec = read_scan(folder)
            result = analyze_scan(
                spec, method=args.method, bootstrap=args.bootstrap, resolution_m=args.resolution_m, seed=args.seed
            )
        except BeamdiagError as exc:
            failed += 1
            message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            if args.json:
                emit_json({"file": str(folder), "name": None, "kind": None, "x": None, "y": None, "steps": [],
                           "flags": [], "message": "", "error": message})
            else:
                print(f"{folder}: error: {message}", file=sys.stderr)
            continue
        stored.append((spec, result))
        if args.json:
            emit_json(record_of(folder, result))
        else:
            print("\n".join(_summary_lines(folder, result)))
    if args.store and stored:
        _store_results(args, stored)
    return 1 if failed else 0


def _store_results(args: argparse.Namespace, stored: list[tuple[Any, Any]]) -> None:
    """Record the results as rows of the store's ``scans`` results (the pipeline's row layout)."""
    from diagnostics.pipeline import scan_record
    from diagnostics.store import Store

    records = [scan_record(None, spec, result, provisional=not spec.complete) for spec, result in stored]
    options = {"method": args.method, "bootstrap": args.bootstrap, "resolution_m": args.resolution_m,
               "seed": args.seed, "source": "beamdiag emittance"}
    path = Store(args.store).write_results("scans", records, options=options)
    print(f"stored {len(records)} result(s): {path}", file=sys.stderr)
