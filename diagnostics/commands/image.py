"""``beamdiag image FILE... [--json] [--fit-2d] [--method M]``

Measure the beam spot on screen images: dark or border background, hot-pixel
removal, automatic ROI, centroid, sizes, x-y moment and tilt from moments in an
iterated window, projections, optional rotated 2D Gaussian fit, saturation and
clipping checks (see :func:`diagnostics.images.analyze_image`).  Each FILE is
an image (PNG, TIFF or .npy with its JSON sidecar) or a folder whose images are
taken in sorted order (dark frames named by sidecars are skipped).

With ``--json`` one JSON object per input is printed on one line: ``file``,
``device``, ``timestamp``, ``centroid_x_m``, ``centroid_y_m``, ``sigma_x_m``,
``sigma_y_m``, ``sigma_xy_m2``, ``tilt_rad``, the other fields of the result
(projections and the 2D fit nested), ``flags``, ``message`` and ``error`` (null,
or why the input could not be read).  Without ``--json`` an aligned table with
positions in mm and sizes in micrometres.  The exit status is 1 when any input
failed, after the others were done.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

from diagnostics.commands._common import analyse_each
from diagnostics.commands.profile import expand, length, table
from diagnostics.errors import BeamdiagError

KIND = "frames"


def register(subparsers: argparse._SubParsersAction) -> None:
    from diagnostics.images import IMAGE_METHODS

    p = subparsers.add_parser(
        "image",
        help="measure beam spots on screen images (centroid, sizes, tilt, quality flags)",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("files", nargs="+", metavar="FILE", help="images (PNG, TIFF, .npy with a JSON sidecar) or folders")
    p.add_argument("--json", action="store_true", help="print one JSON object per input, one per line")
    p.add_argument("--fit-2d", action="store_true", help="also fit a rotated 2D Gaussian")
    p.add_argument("--method", choices=IMAGE_METHODS, default=IMAGE_METHODS[0],
                   help="source of the headline centroid and sizes (default %(default)s)")
    p.set_defaults(func=run)


def analyse(path: Path, args: argparse.Namespace) -> dict[str, Any]:
    """Read and analyse one image; the JSON record (``error`` set on failure)."""
    from diagnostics.images import analyze_image
    from diagnostics.readers import read_frame
    from diagnostics.results import to_record

    try:
        frame = read_frame(path)
        res = analyze_image(
            frame.pixels, pixel_size_m=frame.pixel_size_m, dark=frame.dark, bit_depth=frame.bit_depth,
            roi=frame.roi, fit_2d=args.fit_2d, method=args.method,
        )
    except BeamdiagError as exc:
        return {"file": str(path), "device": None, "timestamp": None, "flags": [], "error": str(exc)}
    return to_record(res, file=str(path), device=frame.device, timestamp=frame.timestamp,
                     pixel_size_m=list(frame.pixel_size_m), error=None)


def run(args: argparse.Namespace) -> int:
    records, failed = analyse_each(expand(args.files, KIND), lambda path: analyse(path, args),
                                   json_lines=args.json, command="image")
    if not args.json:
        rows = []
        for rec in records:
            tilt = rec["tilt_rad"]
            rows.append([
                Path(rec["file"]).name, rec["device"] or "-",
                "-" if rec["centroid_x_m"] is None else f"{rec['centroid_x_m'] * 1e3:.3f} mm",
                "-" if rec["centroid_y_m"] is None else f"{rec['centroid_y_m'] * 1e3:.3f} mm",
                length(rec["sigma_x_m"]), length(rec["sigma_y_m"]),
                "-" if tilt is None else f"{math.degrees(tilt):.1f} deg",
                ",".join(rec["flags"]) or "ok",
            ])
        if rows:
            print(table(rows, ["file", "device", "x", "y", "sigma_x", "sigma_y", "tilt", "flags"], n_text=2))
    return 1 if failed else 0
