"""Benchmark: ingest throughput of the store.

1. BPM readings of one demo-sized shift (24 BPMs x 10 Hz x 8 h = 6.9 M readings)
   as eight hourly CSV files, through ``Store.ingest_many`` (read, validate,
   convert to SI, hash, write Parquet atomically, record in the catalog), in
   readings per second, against plain ``pandas.read_csv`` + ``DataFrame.to_parquet``
   of the same files in the same run.  Target >= 1.5 M readings/s on 2 cores.
2. Screen images: 20 PNGs of 1920x1200 at 16 bits with JSON sidecars, in frames
   per second, against Pillow decoding + one ``pyarrow.parquet.write_table`` per
   frame of the raw bytes.

The inputs are generated in a temporary folder first; generation is not timed.

Run: ``.venv/bin/python bench/bench_ingest.py [--hours 8] [--frames 20]``
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
from PIL import Image

from diagnostics.store import Store

N_BPMS = 24
RATE_HZ = 10


def make_bpm_csvs(folder: Path, hours: float, seed: int = 1) -> int:
    """Hourly long-form CSV files: timestamp, bpm, x_mm, y_mm, sum; returns the reading count."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    t0 = np.datetime64("2026-11-30T06:00:00", "ns")
    names = np.array([f"BPM-{i:02d}" for i in range(1, N_BPMS + 1)])
    total = 0
    per_file = int(3600 * RATE_HZ)
    n_files = int(np.ceil(hours))
    for h in range(n_files):
        n_times = min(per_file, int(round(hours * 3600 * RATE_HZ)) - h * per_file)
        ticks = t0 + np.timedelta64(h * 3600, "s") + (np.arange(n_times) * 100_000_000).astype(
            "timedelta64[ns]")
        stamps = np.char.add(np.datetime_as_string(ticks, unit="ms"), "Z")
        n = n_times * N_BPMS
        table = pa.table({
            "timestamp": pa.array(np.repeat(stamps, N_BPMS)),
            "bpm": pa.array(np.tile(names, n_times)),
            "x_mm": pa.array(np.round(rng.normal(0, 0.05, n), 5)),
            "y_mm": pa.array(np.round(rng.normal(0, 0.08, n), 5)),
            "sum": pa.array(np.round(rng.uniform(0.98, 1.02, n), 4)),
        })
        pcsv.write_csv(table, folder / f"bpm_{h:02d}.csv")
        total += n
    return total


def make_pngs(folder: Path, n: int, seed: int = 2) -> None:
    """16-bit 1920x1200 PNGs of a Gaussian spot with Poisson noise, 12-bit values."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    rows, cols = 1200, 1920
    y, x = np.mgrid[0:rows, 0:cols]
    for i in range(n):
        spot = 3000 * np.exp(-((x - 960 - i) ** 2 / (2 * 80.0**2) + (y - 600) ** 2 / (2 * 50.0**2)))
        pixels = np.clip(rng.poisson(spot + 50), 0, 4095).astype(np.uint16)
        Image.fromarray(pixels).save(folder / f"SCR-01_{i:03d}.png", compress_level=1)
        t = (pd.Timestamp("2026-11-30T06:00:00Z") + pd.Timedelta(minutes=i)).isoformat()
        (folder / f"SCR-01_{i:03d}.json").write_text(json.dumps(
            {"device": "SCR-01", "timestamp": t, "pixel_size_m": [2e-5, 2e-5], "bit_depth": 12}))


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def bench_bpm(tmp: Path, hours: float) -> None:
    raw = tmp / "bpm_csv"
    t = time.perf_counter()
    n = make_bpm_csvs(raw, hours)
    size_mb = sum(p.stat().st_size for p in raw.iterdir()) / 1e6
    print(f"generated {n:,} BPM readings in {len(list(raw.iterdir()))} CSV files "
          f"({size_mb:.0f} MB) in {time.perf_counter() - t:.1f} s (not timed)")

    store = Store(tmp / "store")
    t = time.perf_counter()
    summary = store.ingest_many([raw], progress=False)
    ours = time.perf_counter() - t
    assert summary.rows == n and not summary.quarantined, summary.line()

    ref_dir = tmp / "ref"
    ref_dir.mkdir()
    t = time.perf_counter()
    for p in sorted(raw.iterdir()):
        df = pd.read_csv(p)
        df.to_parquet(ref_dir / (p.stem + ".parquet"))
    ref = time.perf_counter() - t

    t = time.perf_counter()
    for p in sorted(raw.iterdir()):  # the same work as ours, written plainly
        df = pd.read_csv(p)
        df["timestamp"] = pd.to_datetime(df["timestamp"], format="ISO8601", utc=True)
        df["x_m"], df["y_m"] = df.pop("x_mm") * 1e-3, df.pop("y_mm") * 1e-3
        df.to_parquet(ref_dir / (p.stem + "_si.parquet"))
    ref_si = time.perf_counter() - t

    print(f"BPM ingest (beamdiag Store.ingest_many): {ours:.2f} s, {n / ours / 1e6:.2f} M readings/s")
    print(f"BPM reference (pandas.read_csv + to_parquet, no validation): {ref:.2f} s, "
          f"{n / ref / 1e6:.2f} M readings/s")
    print(f"ratio beamdiag / reference throughput: {ref / ours:.2f}x  "
          f"(target >= 1.5 M readings/s; goal 3 M/s)")
    print(f"BPM reference with the same conversions (to_datetime ISO 8601 UTC, mm -> m): "
          f"{ref_si:.2f} s, {n / ref_si / 1e6:.2f} M readings/s; ratio {ref_si / ours:.2f}x")
    t = time.perf_counter()
    again = store.ingest_many([raw], progress=False)
    print(f"repeat ingest of the same files (all duplicates by SHA-256): "
          f"{time.perf_counter() - t:.2f} s, {len(again.duplicates)} duplicates")


def bench_frames(tmp: Path, n_frames: int) -> None:
    raw = tmp / "png"
    t = time.perf_counter()
    make_pngs(raw, n_frames)
    print(f"generated {n_frames} 1920x1200 16-bit PNGs in {time.perf_counter() - t:.1f} s "
          "(not timed)")
    store = Store(tmp / "store_frames")
    t = time.perf_counter()
    summary = store.ingest_many([raw], progress=False)
    ours = time.perf_counter() - t
    assert len(summary.stored) == n_frames, summary.line()

    ref_dir = tmp / "ref_frames"
    ref_dir.mkdir()
    t = time.perf_counter()
    for p in sorted(raw.glob("*.png")):
        pixels = np.asarray(Image.open(p))
        pq.write_table(pa.table({"pixels": [pixels.tobytes()]}), ref_dir / (p.stem + ".parquet"))
    ref = time.perf_counter() - t
    print(f"image ingest (beamdiag): {ours:.2f} s, {n_frames / ours:.1f} frames/s")
    print(f"image reference (Pillow decode + write_table of the raw bytes): {ref:.2f} s, "
          f"{n_frames / ref:.1f} frames/s")
    print(f"ratio beamdiag / reference throughput: {ref / ours:.2f}x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--hours", type=float, default=8.0)
    parser.add_argument("--frames", type=int, default=20)
    args = parser.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="bench_ingest_"))
    try:
        if args.hours > 0:
            bench_bpm(tmp, args.hours)
        if args.frames > 0:
            bench_frames(tmp, args.frames)
        print(f"peak RSS {peak_rss_mb():.0f} MB")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
