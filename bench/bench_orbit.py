"""Benchmark: the whole orbit analysis of one demo-sized shift.

24 BPMs at 10 Hz for 8 h (6.9 M readings), synthesised here with a seeded
generator: temperature-driven drift, a step, a vibration line, jitter and a
transmission drop.  Times :func:`diagnostics.orbit.analyze_orbit` and, in the
same run, a plain pandas implementation of the same core computations
(pivot_table, rolling, groupby, per-column loops), and prints the ratio.  When
:mod:`diagnostics.store` exists, reading the shift back from a store is timed too.

Run: ``.venv/bin/python bench/bench_orbit.py [--hours 8] [--repeat 1]``.
"""

from __future__ import annotations

import argparse
import tempfile
import time

import numpy as np
import pandas as pd

from diagnostics.orbit import analyze_orbit

N_BPMS = 24
RATE_HZ = 10.0
START = pd.Timestamp("2026-11-30T06:00:00Z")


def synthetic_shift(hours: float = 8.0, *, seed: int = 7) -> tuple[pd.DataFrame, pd.DataFrame]:
    """A seeded Kestrel Bay test linac shift: (bpm table, slow table)."""
    rng = np.random.default_rng(seed)
    n_t = int(hours * 3600 * RATE_HZ)
    t_s = np.arange(n_t) / RATE_HZ
    bpms = np.array([f"BPM-{i:02d}" for i in range(1, N_BPMS + 1)])
    # tunnel temperature: a 0.4 degC swing over the shift
    temp = 22.0 + 0.2 * np.sin(2 * np.pi * t_s / (hours * 3600) - np.pi / 2)
    gain = rng.uniform(-30e-6, 30e-6, N_BPMS)  # m per degC
    x = 1e-4 * rng.standard_normal(N_BPMS) + np.outer(temp - temp[0], gain)
    y = 1e-4 * rng.standard_normal(N_BPMS) + np.outer(temp - temp[0], 0.5 * gain)
    x += rng.normal(0, 3e-6, (n_t, N_BPMS))
    y += rng.normal(0, 2e-6, (n_t, N_BPMS))
    step_at = int(4.7 * 3600 * RATE_HZ)
    x[step_at:, 8:] += 35e-6
    x[:, [4, 5]] += 8e-6 * np.sin(2 * np.pi * 1.8 * t_s)[:, None]
    total = 1.0 + 0.002 * rng.standard_normal((n_t, N_BPMS))
    lo, hi = int(5.33 * 3600 * RATE_HZ), int(5.58 * 3600 * RATE_HZ)
    total[lo:hi, 15:] *= 0.98
    times = START + pd.to_timedelta(np.round(t_s * 1e9).astype(np.int64), unit="ns")
    bpm_df = pd.DataFrame(
        {
            "timestamp": np.repeat(times, N_BPMS),
            "bpm": pd.Categorical(np.tile(bpms, n_t)),
            "x_m": x.ravel(),
            "y_m": y.ravel(),
            "sum": total.ravel(),
        }
    )
    slow_t = np.arange(0, n_t, int(60 * RATE_HZ))
    slow_df = pd.DataFrame(
        {
            "timestamp": times[slow_t],
            "channel": "T-01",
            "value": temp[slow_t] + rng.normal(0, 0.005, slow_t.size),
            "unit": "degC",
        }
    )
    return bpm_df, slow_df


def plain_pandas(bpm_df: pd.DataFrame, slow_df: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """The same core computations written the plain pandas way (the reference)."""
    from scipy import signal, stats

    wide_x = bpm_df.pivot_table(index="timestamp", columns="bpm", values="x_m", observed=True)
    wide_y = bpm_df.pivot_table(index="timestamp", columns="bpm", values="y_m", observed=True)
    wide_s = bpm_df.pivot_table(index="timestamp", columns="bpm", values="sum", observed=True)
    out = {}
    for plane, wide in (("x", wide_x), ("y", wide_y)):
        ref = wide[wide.index < wide.index[0] + pd.Timedelta("10min")].mean()
        minute = wide.resample("1min").mean() - ref
        hours = (minute.index - minute.index[0]).total_seconds() / 3600
        rates = {c: stats.theilslopes(minute[c].to_numpy(), hours)[0] for c in minute}
        resid = wide - wide.rolling(51, center=True, min_periods=2).mean()
        jitter = resid.std()
        tens = wide.resample("10s").mean()
        # step statistic: difference of 5-min means either side of each boundary
        step = (tens[::-1].rolling(30).mean()[::-1].shift(-1) - tens.rolling(30).mean()).abs().max()
        _, psd = signal.welch(wide.to_numpy(), fs=10.0, nperseg=1024, axis=0)
        modes = np.linalg.svd((resid.dropna() - resid.mean()).to_numpy(), compute_uv=False)
        temp = slow_df.set_index("timestamp")["value"].resample("1min").mean()
        corr = minute.apply(lambda col, temp=temp: col.corr(temp))
        out[plane] = pd.DataFrame({"rate": rates, "jitter": jitter, "step": step, "corr": corr})
        out[plane + "_extra"] = pd.DataFrame({"psd": psd.max(axis=0)}), modes
    ratio = wide_s.resample("10s").mean()
    out["transmission"] = ratio.iloc[:, 1:].to_numpy() / ratio.iloc[:, :-1].to_numpy()
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=8.0)
    parser.add_argument("--repeat", type=int, default=2, help="runs of analyze_orbit; the best is reported")
    args = parser.parse_args()
    t0 = time.perf_counter()
    bpm_df, slow_df = synthetic_shift(args.hours)
    print(f"synthesised {len(bpm_df):,} readings in {time.perf_counter() - t0:.1f} s")

    best = np.inf
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        report = analyze_orbit(bpm_df, slow_df=slow_df)
        best = min(best, time.perf_counter() - t0)
    print(f"analyze_orbit: {best:.2f} s for {report.n_readings:,} readings "
          f"({report.n_readings / best / 1e6:.1f} M readings/s; target < 5 s)")
    steps = report.steps
    print(f"  sampling {report.sampling_Hz:.3f} Hz, {len(steps)} steps, "
          f"{len(report.loss_events)} loss events, {len(report.violations)} limit intervals")

    t0 = time.perf_counter()
    plain_pandas(bpm_df, slow_df)
    plain = time.perf_counter() - t0
    print(f"plain pandas reference: {plain:.2f} s -> ratio plain / analyze_orbit = {plain / best:.1f}x")

    try:
        from diagnostics.store import Store
    except ImportError:
        print("diagnostics.store not available: store read not timed")
        return
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(tmp)
        t0 = time.perf_counter()
        store.write_bpm(bpm_df.assign(bpm=bpm_df["bpm"].astype(str)), sha256="0" * 64, source="bench")
        print(f"store write: {time.perf_counter() - t0:.2f} s")
        t0 = time.perf_counter()
        back = store.read_bpm()
        read = time.perf_counter() - t0
        t0 = time.perf_counter()
        analyze_orbit(back, slow_df=slow_df)
        both = time.perf_counter() - t0
        print(f"store read_bpm: {read:.2f} s ({len(back):,} rows); analyze_orbit on it: {both:.2f} s; "
              f"read + analyse = {read + both:.2f} s")


if __name__ == "__main__":
    main()
