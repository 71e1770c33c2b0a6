"""Tests of archive reanalysis on Dask (diagnostics.reanalysis, ``beamdiag reanalyze``).

The reference of a cluster run is the serial run on the same data: the records
must be identical, field by field (same code, same partitions, same order).
The reference of the values is analytic: the stored profiles are noiseless-shape
Gaussians of known sigma (noise added with a fixed seed), checked against that sigma.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from diagnostics import pipeline, reanalysis
from diagnostics.cli import main
from diagnostics.errors import InputError
from diagnostics.measurements import Frame, Profile

T0 = pd.Timestamp("2026-11-30T06:00:00Z")


def make_profiles(n, *, seed, t0=T0, n_points=121):
    rng = np.random.default_rng(seed)
    x = np.linspace(-2e-3, 2e-3, n_points)
    out, sigmas = [], []
    for i in range(n):
        s = rng.uniform(1.5e-4, 3.5e-4)
        y = 10.0 + 800.0 * np.exp(-0.5 * ((x - rng.uniform(-2e-4, 2e-4)) / s) ** 2) + rng.normal(0, 4.0, n_points)
        out.append(Profile(device=("WS-01", "WS-02")[i % 2], plane="xy"[i % 2], wire_angle_rad=0.0,
                           timestamp=t0 + pd.Timedelta(30 * i, "s"), position_m=x, signal=y, source="bench"))
        sigmas.append(s)
    return out, sigmas


def make_frames(n, *, seed, t0=T0):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:64, 0:64]
    out = []
    for i in range(n):
        spot = 2500.0 * np.exp(-0.5 * (((xx - 32) / (4 + i % 3)) ** 2 + ((yy - 30) / 3.5) ** 2))
        px = rng.poisson(80.0 + spot).astype(np.uint16)
        out.append(Frame(device="SCR-01", timestamp=t0 + pd.Timedelta(i, "min"), pixels=px,
                         pixel_size_m=(2e-5, 2e-5), bit_depth=12, source="bench"))
    return out


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """40 profiles in 4 stored files and 6 frames in 2 stored files."""
    from diagnostics.store import Store

    root = tmp_path_factory.mktemp("archive") / "store"
    store = Store(root)
    sigmas = {}
    for k in range(4):
        profs, s = make_profiles(10, seed=k, t0=T0 + pd.Timedelta(k, "h"))
        store.write_profiles(profs, sha256=f"{k:x}" * 64, source=f"file{k}")
        sigmas.update({f"{(f'{k:x}' * 64)[:16]}-{i}": v for i, v in enumerate(s)})
    frames = make_frames(6, seed=9)
    store.write_frames(frames[:3], sha256="e" * 64, source="frames-a")
    store.write_frames(frames[3:], sha256="f" * 64, source="frames-b")
    return store, sigmas


def _comparable(records, key):
    frame = reanalysis.records_frame(records, key)
    return frame.drop(columns=[c for c in ("created", "result_version") if c in frame.columns])


def test_plan_groups_ids_by_stored_file_and_covers_each_once(archive):
    store, sigmas = archive
    parts = reanalysis.plan(store, "profiles", max_task_rows=10)
    assert len(parts) == 4 and len({p.file for p in parts}) == 4  # one file of 10 per task
    ids = [i for p in parts for i in p.ids]
    assert sorted(ids) == sorted(sigmas) and len(ids) == len(set(ids))
    small = reanalysis.plan(store, "profiles", max_task_rows=3)
    assert len(small) == 4 * 4 and sorted(i for p in small for i in p.ids) == sorted(ids)
    packed = reanalysis.plan(store, "profiles", max_task_rows=25)  # small files share tasks, whole
    assert [len(p.ids) for p in packed] == [20, 20]
    assert sorted(i for p in packed for i in p.ids) == sorted(ids)
    window = reanalysis.plan(store, "profiles", start=T0 + pd.Timedelta(1, "h"), end=T0 + pd.Timedelta(2, "h"))
    assert sum(len(p.ids) for p in window) == 10
    with pytest.raises(InputError, match="--kind must be one of profiles, frames, scans"):
        reanalysis.plan(store, "bpm")


def test_serial_reanalysis_recovers_the_known_sigmas(archive):
    """Analytic reference: each profile was drawn with a known sigma (noise sigma 4 on
    amplitude 800, so sigma is good to well under 1 %)."""
    store, sigmas = archive
    summary, records = reanalysis.reanalyze(store, kind="profiles", serial=True, write=False, progress=False)
    assert summary.n_records == 40 and summary.n_tasks == 1 and summary.scheduler == "serial"
    got = {r["profile_id"]: r["sigma_m"] for r in records}
    assert got.keys() == sigmas.keys()
    rel = [abs(got[k] / v - 1) for k, v in sigmas.items()]
    assert max(rel) < 0.01


@pytest.mark.slow
def test_local_cluster_of_two_workers_gives_records_identical_to_serial(archive):
    """The acceptance test of the Dask path: LocalCluster(2 processes) == serial, field by field."""
    store, _ = archive
    opts = pipeline.AnalysisOptions(baseline="constant")
    _s1, serial = reanalysis.reanalyze(store, kind="profiles", options=opts, serial=True, write=False,
                                       progress=False, max_task_rows=10)
    summary, dask_records = reanalysis.reanalyze(store, kind="profiles", options=opts, workers=2, write=False,
                                                 progress=False, max_task_rows=10)
    assert summary.scheduler == "local:2" and summary.n_tasks == 4
    assert dask_records == serial  # same order too (task order)
    _f1, serial_frames = reanalysis.reanalyze(store, kind="frames", serial=True, write=False, progress=False,
                                              max_task_rows=2)
    _f2, dask_frames = reanalysis.reanalyze(store, kind="frames", workers=2, write=False, progress=False,
                                            max_task_rows=2)
    pd.testing.assert_frame_equal(_comparable(dask_frames, "frame_id"), _comparable(serial_frames, "frame_id"))


@pytest.mark.slow
def test_external_scheduler_address_is_used(archive, monkeypatch):
    """--scheduler ADDRESS: tasks go to an existing cluster (here a LocalCluster we start);
    a cluster whose workers run another beamdiag version is refused."""
    from distributed import LocalCluster

    import diagnostics

    store, _ = archive
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        summary, records = reanalysis.reanalyze(store, kind="frames", scheduler=cluster.scheduler_address,
                                                write=False, progress=False)
        with monkeypatch.context() as m:
            m.setattr(diagnostics, "__version__", "0.0.0-other")
            with pytest.raises(InputError, match=r"worker tcp://\S+ runs beamdiag \S+, this is 0.0.0-other"):
                reanalysis.reanalyze(store, kind="frames", scheduler=cluster.scheduler_address, write=False,
                                     progress=False)
    assert summary.scheduler == cluster.scheduler_address
    _s, serial = reanalysis.reanalyze(store, kind="frames", serial=True, write=False, progress=False)
    differ = [(a["frame_id"], k, a[k], b.get(k)) for a, b in zip(records, serial, strict=True)
              for k in a if a[k] != b.get(k)]
    assert not differ and len(records) == len(serial) == 6


def test_each_reanalysis_is_a_new_version_and_old_ones_stay(tmp_path):
    from diagnostics.store import Store

    store = Store(tmp_path / "store")
    profs, _ = make_profiles(6, seed=3)
    store.write_profiles(profs, sha256="9" * 64, source="x")
    live = pipeline.analyze_profiles(store)  # the live pipeline's version
    s1, _ = reanalysis.reanalyze(store, kind="profiles", serial=True, progress=False)
    s2, _ = reanalysis.reanalyze(store, kind="profiles", serial=True, progress=False,
                                 options={"baseline": "constant"})
    versions = store.result_versions("profiles")
    assert list(versions["version"]) == [pipeline.default_version(), s1.version, s2.version]
    assert len({pipeline.default_version(), s1.version, s2.version}) == 3
    assert set(store.read_results("profiles")["result_version"]) == {s2.version}  # latest
    old = store.read_results("profiles", version=s1.version)
    assert len(old) == 6 and json.loads(old["options"].iloc[0])["baseline"] == "linear"
    assert len(store.read_results("profiles", version=pipeline.default_version())) == len(live) == 6
    assert json.loads(store.read_results("profiles")["options"].iloc[0])["baseline"] == "constant"


def test_progress_counter_and_final_line_on_stderr(archive, capsys):
    store, _ = archive
    reanalysis.reanalyze(store, kind="profiles", serial=True, write=False, progress=True, max_task_rows=10)
    err = capsys.readouterr().err
    assert "reanalyze profiles: 4/4 tasks" in err and "40 records" in err


def test_cli_serial_json_summary(archive, capsys):
    store, _ = archive
    rc = main(["reanalyze", "--store", str(store.root), "--kind", "profiles", "--serial", "--json",
               "--baseline", "constant", "--window-n-sigma", "3.5"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert out["records"] == 40 and out["tasks"] == 1 and out["scheduler"] == "serial"
    assert out["options"]["baseline"] == "constant" and out["options"]["window_n_sigma"] == 3.5
    assert out["version"] in set(store.result_versions("profiles")["version"])


def test_cli_rejects_a_bad_option_with_one_line(archive, capsys):
    store, _ = archive
    rc = main(["reanalyze", "--store", str(store.root), "--kind", "profiles", "--serial", "--window-n-sigma", "-1"])
    assert rc == 2
    err = capsys.readouterr().err.strip()
    assert "window_n_sigma" in err and len(err.splitlines()) == 1


def test_scans_are_reanalysed_one_task_each(tmp_path):
    from test_pipeline import synthetic_scan

    from diagnostics.store import Store

    store = Store(tmp_path / "store")
    spec, eps = synthetic_scan()
    store.write_scan(spec, sha256="7" * 64, source="qs")
    summary, records = reanalysis.reanalyze(store, kind="scans", serial=True, progress=False,
                                            options={"method": "thick"})
    assert summary.n_tasks == 1 and len(records) == 1
    assert records[0]["x_emittance_m_rad"] == pytest.approx(eps["x"], rel=1e-6)
    assert len(store.read_results("scans", version=summary.version)) == 1


@pytest.mark.slow
def test_identity_holds_for_tasks_large_enough_for_a_threaded_blas(tmp_path):
    """With 1,000-profile tasks the batch fitter's linear algebra is big enough for a
    multi-threaded BLAS to change the summation order; the tasks pin BLAS to one thread,
    so the serial run in this process and the two-worker cluster still agree exactly."""
    from diagnostics.store import Store

    store = Store(tmp_path / "store")
    for k in range(2):
        profs, _ = make_profiles(1000, seed=20 + k, t0=T0 + pd.Timedelta(10 * k, "h"), n_points=200)
        store.write_profiles(profs, sha256=f"{k + 1:x}" * 64, source=f"big{k}")
    _s, serial = reanalysis.reanalyze(store, kind="profiles", serial=True, write=False, progress=False,
                                      max_task_rows=1000)
    summary, clustered = reanalysis.reanalyze(store, kind="profiles", workers=2, write=False, progress=False,
                                              max_task_rows=1000)
    assert summary.n_tasks >= 2 and len(serial) == 2000
    differ = sum(1 for a, b in zip(clustered, serial, strict=True) if a != b)
    assert differ == 0, f"{differ} of {len(serial)} rows differ"
