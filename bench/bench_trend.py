"""Benchmark: a trend query over one shift of 100 BPMs at 10 Hz (28.8 M readings).

The readings are generated into a temporary store first (hourly files, as ingest
writes them; not timed).  Then, each in its own process so that its peak memory
is its own:

* ``Store.trend("bpm", ["x_m", "y_m"], bucket="1min", start, end)``: mean, min,
  max, rms and count per BPM and minute in an in-memory DuckDB over the Parquet
  files (48,000 groups), once from the 10-s rollups stored with the readings
  (``method="rollup"``, what ``auto`` picks here) and once from the readings
  themselves (``method="raw"``).  Target: under 1 s on 2 cores, peak memory
  well under the data size.
* the plain reference: ``pandas.read_parquet`` of the same files, then
  ``groupby([bpm, pandas.Grouper(freq="1min")])`` with the same five statistics.

Printed: wall times (first run and best of three), the ratio, and the peak RSS of
each process (``resource.getrusage``) against the size of the data in memory.

Run: ``.venv/bin/python bench/bench_trend.py [--bpms 100] [--hours 8]``
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

START = pd.Timestamp("2026-11-30T06:00:00Z")
RATE_HZ = 10


def generate(store_dir: Path, n_bpms: int, hours: int, seed: int = 3) -> int:
    from diagnostics.store import Store

    store = Store(store_dir)
    rng = np.random.default_rng(seed)
    names = pa.array([f"BPM-{i:03d}" for i in range(1, n_bpms + 1)])
    per_hour = 3600 * RATE_HZ
    total = 0
    for h in range(hours):
        t0 = START.value + h * 3600 * 10**9
        ticks = t0 + np.arange(per_hour, dtype=np.int64) * (10**9 // RATE_HZ)
        n = per_hour * n_bpms
        table = pa.table({
            "timestamp": pa.array(np.repeat(ticks, n_bpms)).cast(pa.timestamp("ns", tz="UTC")),
            "bpm": pa.DictionaryArray.from_arrays(
                pa.array(np.tile(np.arange(n_bpms, dtype=np.int32), per_hour)), names),
            "x_m": rng.normal(0.0, 5e-5, n),
            "y_m": rng.normal(0.0, 8e-5, n),
            "sum": rng.uniform(0.98, 1.02, n),
        })
        store.write_bpm(table, sha256=f"{h:064x}", source=f"generated hour {h}")
        total += n
    return total


def peak_rss_mb() -> float:
    """Peak resident memory of this process (VmHWM; ru_maxrss survives exec on Linux)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_ours(store_dir: Path, hours: int, method: str) -> dict:
    from diagnostics.store import Store

    store = Store(store_dir, read_only=True)
    end = START + pd.Timedelta(hours=hours)
    base = peak_rss_mb()
    times, groups = [], 0
    for _ in range(3):
        t = time.perf_counter()
        df = store.trend("bpm", ["x_m", "y_m"], bucket="1min", start=START, end=end,
                         method=method)
        times.append(time.perf_counter() - t)
        groups = len(df)
    return {"times": times, "groups": groups, "readings": int(df["x_m_count"].sum()),
            "rss_mb": peak_rss_mb(), "import_rss_mb": base}


def run_reference(store_dir: Path, hours: int) -> dict:
    files = sorted(str(p) for p in (store_dir / "bpm").rglob("*.parquet"))
    t = time.perf_counter()
    df = pd.read_parquet(files, columns=["timestamp", "bpm", "x_m", "y_m"])
    end = START + pd.Timedelta(hours=hours)
    df = df[(df["timestamp"] >= START) & (df["timestamp"] < end)]
    for c in ("x_m", "y_m"):
        df[f"{c}_sq"] = df[c] ** 2
    g = df.groupby(["bpm", pd.Grouper(key="timestamp", freq="1min", origin="epoch")])
    out = g.agg(**{f"{c}_{s}": (c, s) for c in ("x_m", "y_m")
                   for s in ("mean", "min", "max", "count")},
                **{f"{c}_ms": (f"{c}_sq", "mean") for c in ("x_m", "y_m")})
    for c in ("x_m", "y_m"):
        out[f"{c}_rms"] = np.sqrt(out.pop(f"{c}_ms"))
    elapsed = time.perf_counter() - t
    return {"times": [elapsed], "groups": len(out), "readings": int(out["x_m_count"].sum()),
            "rss_mb": peak_rss_mb()}


def child(which: str, store_dir: Path, hours: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", which, "--store", str(store_dir),
                          "--hours", str(hours)], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--bpms", type=int, default=100)
    parser.add_argument("--hours", type=int, default=8)
    parser.add_argument("--child", choices=["rollup", "raw", "reference"])
    parser.add_argument("--store")
    args = parser.parse_args()
    if args.child:
        if args.child == "reference":
            print(json.dumps(run_reference(Path(args.store), args.hours)))
        else:
            print(json.dumps(run_ours(Path(args.store), args.hours, args.child)))
        return
    tmp = Path(tempfile.mkdtemp(prefix="bench_trend_"))
    try:
        t = time.perf_counter()
        n = generate(tmp / "store", args.bpms, args.hours)
        disk_mb = sum(p.stat().st_size for p in (tmp / "store").rglob("*.parquet")) / 1e6
        memory_mb = n * (8 + 8 + 8 + 4) / 1e6  # timestamp, x, y and a dictionary code
        print(f"generated {n:,} readings ({args.bpms} BPMs x {RATE_HZ} Hz x {args.hours} h) in "
              f"{time.perf_counter() - t:.1f} s (not timed); {disk_mb:.0f} MB of Parquet, "
              f"about {memory_mb:.0f} MB in memory for the columns queried")
        ref = child("reference", tmp / "store", args.hours)
        for method in ("rollup", "raw"):
            ours = child(method, tmp / "store", args.hours)
            assert ours["readings"] == ref["readings"] == n, (ours, ref)
            assert ours["groups"] == ref["groups"], (ours, ref)
            best = min(ours["times"])
            print(f"Store.trend(method={method!r}) 1-min buckets, {ours['groups']:,} groups: "
                  f"first {ours['times'][0]:.2f} s, best of 3 {best:.2f} s (target < 1 s); peak RSS"
                  f" {ours['rss_mb']:.0f} MB ({ours['import_rss_mb']:.0f} MB after imports)")
            print(f"  ratio reference / beamdiag time: {ref['times'][0] / best:.1f}x; "
                  f"peak memory {ref['rss_mb'] / ours['rss_mb']:.1f}x less")
        print(f"reference pandas.read_parquet + groupby/Grouper: {ref['times'][0]:.2f} s; peak RSS "
              f"{ref['rss_mb']:.0f} MB")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
