"""Benchmark: archive reanalysis of 20,000 stored wire profiles on Dask.

Prints
* the serial throughput (profiles per second) of ``reanalyze(..., serial=True)``,
  which runs the batch fitter (``profiles.fit_profiles_batch``) inside each task,
  and its ratio against a plain reference: a loop of ``profiles.analyze_profile``
  over the same profiles, timed on the first 2,000 and scaled;
* the wall time on a ``distributed.LocalCluster`` of 1 and of 2 single-threaded
  worker processes, and the speed-up 2 workers / 1 worker (target >= 1.6x).

The store is generated in a temporary folder first (not timed): 20 stored files
of 1,000 profiles of 200 points, Gaussian beams with noise.  Cluster start-up is
not timed (the workers import the analysis modules first).  Run:  .venv/bin/python bench/bench_reanalysis.py
"""

from __future__ import annotations

import importlib
import logging
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

N_PROFILES = 20_000
PER_FILE = 1_000
T0 = pd.Timestamp("2026-11-30T06:00:00Z")  # time of the first stored profile
N_POINTS = 200
N_REFERENCE = 2_000


def build_store(root: Path):
    from diagnostics.measurements import Profile
    from diagnostics.store import Store

    store = Store(root)
    rng = np.random.default_rng(20261130)
    x = np.linspace(-3e-3, 3e-3, N_POINTS)
    t0 = T0
    for f in range(N_PROFILES // PER_FILE):
        sig = rng.uniform(1.5e-4, 4e-4, PER_FILE)
        cen = rng.uniform(-5e-4, 5e-4, PER_FILE)
        amp = rng.uniform(300, 1500, PER_FILE)
        signals = 20 + amp[:, None] * np.exp(-0.5 * ((x[None, :] - cen[:, None]) / sig[:, None]) ** 2)
        signals += rng.normal(0, 5.0, signals.shape)
        profs = [Profile(device=("WS-01", "WS-02")[i % 2], plane="xy"[i % 2], wire_angle_rad=0.0,
                         timestamp=t0 + pd.Timedelta(f * PER_FILE + i, "s"), position_m=x, signal=signals[i],
                         source="bench") for i in range(PER_FILE)]
        store.write_profiles(profs, sha256=f"{f:064x}", source=f"bench-{f}")
    return store


def main() -> int:
    logging.getLogger("distributed").setLevel(logging.WARNING)
    from distributed import Client, LocalCluster

    from diagnostics import pipeline, profiles, reanalysis

    load_at_start = os.getloadavg()[0]  # other work on the machine, before ours starts
    # the workers import the package afresh: an edit of its sources during the run would show
    code_mtimes = {p: p.stat().st_mtime_ns for p in Path(pipeline.__file__).parent.glob("*.py")}
    with tempfile.TemporaryDirectory() as tmp:
        t = time.perf_counter()
        store = build_store(Path(tmp) / "store")
        print(f"built a store of {N_PROFILES} profiles in {N_PROFILES // PER_FILE} files "
              f"({time.perf_counter() - t:.1f} s, not timed below)")

        # plain reference: one analyze_profile call per profile, on the first N_REFERENCE
        items = pipeline.profile_items(store)[:N_REFERENCE]
        t = time.perf_counter()
        for _pid, prof, _extra in items:
            profiles.analyze_profile(prof.position_m, prof.signal)
        ref_rate = N_REFERENCE / (time.perf_counter() - t)

        t = time.perf_counter()
        summary, records = reanalysis.reanalyze(store, kind="profiles", serial=True, write=False, progress=False)
        serial_s = time.perf_counter() - t
        serial_rate = summary.n_records / serial_s
        batch_share = sum(r.get("fitter") == "batch" for r in records) / len(records)
        print(f"serial reanalysis: {summary.n_records} profiles in {serial_s:.2f} s = {serial_rate:,.0f} profiles/s "
              f"({batch_share:.1%} by the batch fitter, {summary.n_tasks} tasks)")
        print(f"plain reference (analyze_profile loop, {N_REFERENCE} profiles): {ref_rate:,.0f} profiles/s; "
              f"ratio serial/reference = {serial_rate / ref_rate:.1f}x")

        walls = {}
        for n in (1, 2):
            with LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
                    Client(cluster) as client:
                # warm-up: workers up, connected, the analysis modules imported and run once
                # (a standing cluster is warm; its first task pays imports and first calls)
                client.run(importlib.import_module, "diagnostics.reanalysis")
                client.run(importlib.import_module, "diagnostics.store")
                reanalysis.reanalyze(store, kind="profiles", end=T0 + pd.Timedelta(n * PER_FILE, "s"),
                                     client=client, write=False, progress=False)
                t = time.perf_counter()
                s, recs = reanalysis.reanalyze(store, kind="profiles", client=client,
                                               write=False, progress=False)
                walls[n] = time.perf_counter() - t
                if recs != records:
                    changed = [p.name for p, m in code_mtimes.items() if p.stat().st_mtime_ns != m]
                    differ = sum(a != b for a, b in zip(recs, records, strict=True))
                    raise SystemExit(f"{differ} cluster rows differ from the serial run"
                                     + (f" (source files changed during the run: {changed})" if changed else ""))
            print(f"LocalCluster {n} worker(s): {walls[n]:.2f} s = {N_PROFILES / walls[n]:,.0f} profiles/s "
                  f"(records identical to serial)")
        busy = load_at_start > 0.5 * (os.cpu_count() or 1)
        print(f"speed-up 2 workers / 1 worker = {walls[1] / walls[2]:.2f}x (target >= 1.6x); load average "
              f"{load_at_start:.1f} on {os.cpu_count()} cores before the run"
              + ("  <- the machine was busy: rerun when quiet" if busy else ""))

        t = time.perf_counter()
        path_count = len(store.write_results("profiles", records, options=pipeline.AnalysisOptions().to_dict(),
                                             version="bench").name) and 1
        print(f"writing the {len(records)} result rows as one new version: {time.perf_counter() - t:.2f} s "
              f"({path_count} file)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
