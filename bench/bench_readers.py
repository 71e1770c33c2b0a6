"""Reader throughput: BPM readings (the big one), and per-file cost of profiles and frames.

Run ``.venv/bin/python bench/bench_readers.py [rows]`` (default 6.9 M rows: 24 BPMs
at 10 Hz for 8 hours).  It writes a long-form BPM CSV in a temporary folder, then
times :func:`diagnostics.readers.read_bpm` against a plain pandas reference
(``pandas.read_csv`` + ``pandas.to_datetime(format="ISO8601")`` + the mm -> m
conversion, no validation) in the same run, and prints readings per second and
the ratio.  Small-file costs compare ``read_profile`` with ``numpy.loadtxt`` and
``read_frame`` with Pillow + ``json``.  Timings on a shared machine are
provisional; the ratios are what to compare.
"""

from __future__ import annotations

import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pcsv
from PIL import Image

from diagnostics.readers import read_bpm, read_frame, read_profile

N_BPM = 24


def write_bpm_csv(path: Path, rows: int) -> None:
    """A seeded long-form BPM file: every BPM once per 100 ms, times in ISO 8601 with Z."""
    n_t = -(-rows // N_BPM)
    times = pd.Timestamp("2026-11-30T06:00:00Z") + pd.to_timedelta(np.arange(n_t) * 100, unit="ms")
    stamps = pa.array(times.strftime("%Y-%m-%dT%H:%M:%S.%fZ").to_numpy(dtype=object), pa.string())
    index = np.repeat(np.arange(n_t, dtype=np.int32), N_BPM)[:rows]
    names = pa.array([f"BPM-{i:02d}" for i in range(1, N_BPM + 1)])
    codes = np.tile(np.arange(N_BPM, dtype=np.int32), n_t)[:rows]
    rng = np.random.default_rng(20261130)
    table = pa.table({
        "timestamp": pa.DictionaryArray.from_arrays(index, stamps).cast(pa.string()),
        "bpm": pa.DictionaryArray.from_arrays(codes, names).cast(pa.string()),
        "x_mm": np.round(rng.normal(0.0, 0.05, rows), 5),
        "y_mm": np.round(rng.normal(0.0, 0.05, rows), 5),
        "sum": np.round(rng.normal(1.0, 0.01, rows), 4),
    })
    pcsv.write_csv(table, path, write_options=pcsv.WriteOptions(quoting_style="none"))


def plain_pandas(path: Path) -> pd.DataFrame:
    """The plain reference: pandas' C parser, ISO 8601 times, mm -> m; no checks."""
    df = pd.read_csv(path, dtype={"bpm": str, "x_mm": np.float64, "y_mm": np.float64, "sum": np.float64})
    df["timestamp"] = pd.to_datetime(df["timestamp"], format="ISO8601", utc=True)
    df["x_m"] = df.pop("x_mm") * 1e-3
    df["y_m"] = df.pop("y_mm") * 1e-3
    return df


def best_of(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv: list[str]) -> int:
    rows = int(float(argv[0])) if argv else 6_900_000
    with tempfile.TemporaryDirectory(prefix="bench_readers_") as tmp:
        folder = Path(tmp)
        path = folder / "bpm.csv"
        t0 = time.perf_counter()
        write_bpm_csv(path, rows)
        print(f"wrote {rows:,} BPM readings ({path.stat().st_size / 1e6:.0f} MB) in {time.perf_counter() - t0:.1f} s")

        df = read_bpm(path)
        assert len(df) == rows
        ours = best_of(lambda: read_bpm(path), 2)
        ref = best_of(lambda: plain_pandas(path), 1)
        print(f"read_bpm      : {ours:6.2f} s  {rows / ours / 1e6:5.2f} M readings/s (validated, SI, UTC)")
        print(f"plain pandas  : {ref:6.2f} s  {rows / ref / 1e6:5.2f} M readings/s (no checks)")
        print(f"ratio         : read_bpm is {ref / ours:.2f}x the speed of the plain reference")

        # small files: the per-file cost an inbox of wire scans and camera frames pays
        xs = np.linspace(-3, 3, 400)
        profile = folder / "WS-02_0815.csv"
        profile.write_text("# plane: x\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n"
                           + "".join(f"{x:.5f},{np.exp(-x * x / 2):.6f}\n" for x in xs))
        n = 200
        ours = best_of(lambda: [read_profile(profile) for _ in range(n)], 2) / n
        ref = best_of(lambda: [np.loadtxt(profile, delimiter=",", skiprows=3) for _ in range(n)], 2) / n
        print(f"read_profile  : {ours * 1e3:6.2f} ms/file vs numpy.loadtxt {ref * 1e3:6.2f} ms/file "
              f"(ratio {ref / ours:.2f})")

        image = folder / "SCR-02_0815.png"
        Image.fromarray(np.random.default_rng(1).integers(0, 4096, (1024, 1280)).astype(np.uint16)).save(image)
        sidecar = {"device": "SCR-02", "timestamp": "2026-11-30T08:15:00Z", "pixel_size_m": 2.5e-5, "bit_depth": 12}
        image.with_suffix(".json").write_text(json.dumps(sidecar))

        def plain_frame():
            with Image.open(image) as im:
                pixels = np.asarray(im)
            return pixels, json.loads(image.with_suffix(".json").read_text())

        n = 20
        ours = best_of(lambda: [read_frame(image) for _ in range(n)], 2) / n
        ref = best_of(lambda: [plain_frame() for _ in range(n)], 2) / n
        print(f"read_frame    : {ours * 1e3:6.2f} ms/frame (1280x1024 16-bit PNG) vs Pillow+json "
              f"{ref * 1e3:6.2f} ms/frame (ratio {ref / ours:.2f})")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
