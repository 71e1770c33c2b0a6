"""``beamdiag profile FILE... [--json] [--model M] [--baseline B]``

Fit wire-scanner profiles: Gaussian (or core-plus-halo or super-Gaussian) on a
constant or linear baseline, model-free rms inside an iterated window, FWHM and
quality flags (see :func:`diagnostics.profiles.analyze_profile`).  Each FILE is
a profile CSV or Parquet file, or a folder whose profile files are taken in
sorted order.

With ``--json`` one JSON object per input is printed on one line: ``file``,
``device``, ``plane``, ``wire_angle_rad``, ``timestamp``, ``centroid_m``,
``sigma_m``, ``sigma_err_m``, ``rms_m``, ``fwhm_m``, the other fields of the
result, ``flags``, ``message`` and ``error`` (null, or why the input could not be
read).  Without ``--json`` an aligned table with sizes in micrometres (mm from
10 mm up).  The exit status is 1 when any input failed, after the others were
done.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from diagnostics.commands._common import analyse_each
from diagnostics.errors import BeamdiagError

KIND = "profiles"


def register(subparsers: argparse._SubParsersAction) -> None:
    from diagnostics.profiles import BASELINES, PROFILE_MODELS

    p = subparsers.add_parser(
        "profile",
        help="fit wire-scanner profiles (size, centroid, rms, FWHM, quality flags)",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("files", nargs="+", metavar="FILE", help="profile files (CSV or Parquet) or folders")
    p.add_argument("--json", action="store_true", help="print one JSON object per input, one per line")
    p.add_argument("--model", choices=PROFILE_MODELS, default=PROFILE_MODELS[0],
                   help="profile shape to fit (default %(default)s)")
    p.add_argument("--baseline", choices=BASELINES, default="linear",
                   help="baseline under the peak (default %(default)s)")
    p.set_defaults(func=run)


def expand(paths: list[str], kind: str) -> list[Path]:
    """Named files as given; below folders, the inputs of ``kind`` (sorted)."""
    from diagnostics.readers import detect_kind, iter_inputs

    out: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            out.extend(q for q in iter_inputs([p]) if detect_kind(q) == kind)
        else:
            out.append(p)
    return out


def analyse(path: Path, args: argparse.Namespace) -> dict[str, Any]:
    """Read and analyse one profile file; the JSON record (``error`` set on failure)."""
    from diagnostics.profiles import analyze_profile
    from diagnostics.readers import read_profile
    from diagnostics.results import to_record

    try:
        prof = read_profile(path)
        res = analyze_profile(prof.position_m, prof.signal, model=args.model, baseline=args.baseline)
    except BeamdiagError as exc:
        return {"file": str(path), "device": None, "plane": None, "timestamp": None, "flags": [], "error": str(exc)}
    return to_record(
        res, file=str(path), device=prof.device, plane=prof.plane, wire_angle_rad=prof.wire_angle_rad,
        timestamp=prof.timestamp, error=None,
    )


def length(value: float | None) -> str:
    """A length for the table: micrometres, or millimetres from 10 mm up."""
    if value is None:
        return "-"
    if abs(value) >= 1e-2:
        return f"{value * 1e3:.3f} mm"
    return f"{value * 1e6:.1f} um"


def table(rows: list[list[str]], header: list[str], n_text: int = 3) -> str:
    """Columns padded to their widest cell (the first ``n_text`` left-aligned, the rest right)."""
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(len(header))]
    lines = []
    for r in [header, *rows]:
        cells = [c.ljust(w) if i < n_text else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths, strict=True))]
        lines.append("  ".join(cells).rstrip())
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    records, failed = analyse_each(expand(args.files, KIND), lambda path: analyse(path, args),
                                   json_lines=args.json, command="profile")
    if not args.json:
        rows = []
        for rec in records:
            sig = length(rec["sigma_m"])
            if rec["sigma_err_m"] is not None and rec["sigma_m"] is not None:
                sig += f" +- {length(rec['sigma_err_m']).split()[0]}"
            rows.append([
                Path(rec["file"]).name, rec["device"] or "-", rec["plane"] or "-",
                length(rec["centroid_m"]), sig, length(rec["rms_m"]), length(rec["fwhm_m"]),
                f"{rec['snr']:.3g}" if rec.get("snr") is not None else "-",
                ",".join(rec["flags"]) or "ok",
            ])
        if rows:
            print(table(rows, ["file", "device", "plane", "centroid", "sigma", "rms", "fwhm", "snr", "flags"]))
    return 1 if failed else 0
