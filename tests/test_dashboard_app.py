"""The dashboard through Streamlit's AppTest, on a small demo store and on an empty one.

Every page must run without an exception on both stores, and show the safety
note.  Key numbers are checked against the library computed independently in
the test (``orbit.analyze_orbit``, ``emittance.analyze_scan``,
``images.analyze_image``, ``profiles.analyze_profile``) and against the stored
results; each page has one interaction test.  The server command and the
shipped config are checked against Streamlit's own option registry.
"""

from __future__ import annotations

import math
import re
import time
import tomllib
from pathlib import Path

import pandas as pd
import pytest
from streamlit.testing.v1 import AppTest

from diagnostics import SAFETY_NOTE
from diagnostics.cli import main as cli_main
from diagnostics.commands import dashboard as dash_cmd

REPO = Path(__file__).resolve().parents[1]
APP = REPO / "dashboard" / "app.py"
CONFIG = REPO / "dashboard" / ".streamlit" / "config.toml"
PAGES = ("views/shift.py", "views/quad_scan.py", "views/profiles.py", "views/orbit.py", "views/handover.py")

#: Demo excerpt for the tests: 08:14-08:32 UTC holds the 08:15 quad scan on Q-05 with WS-02 and the 08:30 wire scans.
DEMO_START, DEMO_HOURS = "08:14", 0.3

#: Longest wait for the orbit analysis the pages run on a worker thread, seconds.
ORBIT_WAIT_S = 90.0


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="session")
def demo_store(tmp_path_factory) -> Path:
    """A small demo store (24 minutes of the invented shift), built once per session."""
    from diagnostics.demo import build_demo_store

    root = tmp_path_factory.mktemp("dash") / "store"
    build_demo_store(root, start=DEMO_START, hours=DEMO_HOURS)
    return root


@pytest.fixture(scope="session")
def empty_store(tmp_path_factory) -> Path:
    """A store with a catalog and nothing in it."""
    from diagnostics.store import Store

    root = tmp_path_factory.mktemp("dash") / "empty"
    Store(root)
    return root


def app_for(monkeypatch, store: Path | None, page: str | None = None) -> AppTest:
    """Run the app (and switch to ``page``) with ``BEAMDIAG_STORE`` set to ``store``."""
    if store is None:
        monkeypatch.delenv("BEAMDIAG_STORE", raising=False)
    else:
        monkeypatch.setenv("BEAMDIAG_STORE", str(store))
    at = AppTest.from_file(str(APP), default_timeout=120)
    at.run()
    if page is not None:
        at.switch_page(page).run()
    return at


def settle(at: AppTest) -> AppTest:
    """Rerun until no panel waits for the orbit analysis any more."""
    deadline = time.monotonic() + ORBIT_WAIT_S
    while time.monotonic() < deadline:
        waiting = any("Analysing the orbit" in i.value for i in at.info) or any(m.value == "…" for m in at.metric)
        if not waiting:
            return at
        time.sleep(0.5)
        at.run()
    raise AssertionError("the orbit analysis did not finish in time")


def metric(at: AppTest, label: str):
    found = [m for m in at.metric if m.label == label]
    assert found, f"no metric {label!r}; have {[m.label for m in at.metric]}"
    return found[0]


def with_pm(at: AppTest, label: str) -> str:
    """A headline value with its uncertainty as shown: ``'1.204 ± 0.014 mm mrad'``."""
    m = metric(at, label)
    return f"{m.value} {m.delta}" if m.delta else m.value


def fact(at: AppTest, label: str) -> str:
    """The value of a small fact (label and value as two HTML lines in one markdown)."""
    for md in at.markdown:
        m = re.search(rf">{re.escape(label)}</div><div[^>]*>([^<]*)</div>", md.value)
        if m:
            return m.group(1)
    raise AssertionError(f"no fact {label!r}")


def captions(at: AppTest) -> str:
    return "\n".join(c.value for c in at.caption)


def shown_window(at: AppTest) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The window the picker says it shows."""
    m = re.search(r"Showing: \*\*(.+?) UTC → (.+?) UTC\*\*", captions(at))
    assert m, "window caption missing"
    return pd.Timestamp(m.group(1), tz="UTC"), pd.Timestamp(m.group(2), tz="UTC")


def number(text: str) -> float:
    return float(re.match(r"\s*([-+0-9.]+)", text).group(1))


# --------------------------------------------------------------------------- command and config


def test_command_line_carries_every_safe_option_and_binds_loopback(tmp_path):
    """Each option passed is one Streamlit 1.67 knows (its config registry is the reference)."""
    from streamlit import config

    cmd = dash_cmd.streamlit_command(tmp_path)
    assert cmd[1:3] == [str(dash_cmd.SERVE_PATH), "run"] and cmd[3] == str(dash_cmd.APP_PATH)
    pairs = dict(zip(cmd[4::2], cmd[5::2], strict=False))
    assert pairs["--server.address"] == "127.0.0.1"
    expected = {
        "server.headless": "true", "browser.gatherUsageStats": "false", "client.showErrorDetails": "type",
        "client.toolbarMode": "viewer", "server.fileWatcherType": "none", "server.runOnSave": "false",
        "server.maxUploadSize": "50", "server.enableXsrfProtection": "true", "server.enableCORS": "true",
        "server.enableStaticServing": "false",
    }
    for name, value in expected.items():
        assert pairs[f"--{name}"] == value
    for name, _ in dash_cmd.SAFE_OPTIONS:
        config.get_option(name)  # raises for an option Streamlit does not have
    assert cmd[-3:] == ["--", "--store", str(tmp_path.resolve())]


def test_shipped_config_matches_the_command_options():
    cfg = tomllib.loads(CONFIG.read_text(encoding="utf-8"))
    assert cfg["server"]["address"] == "127.0.0.1"
    for name, value in dash_cmd.SAFE_OPTIONS:
        section, key = name.split(".")
        assert str(cfg[section][key]).lower() == value, name


def test_cli_dashboard_rejects_a_missing_store_in_one_line(tmp_path, capsys):
    status = cli_main(["dashboard", "--store", str(tmp_path / "nowhere")])
    err = capsys.readouterr().err.strip()
    assert status == 2
    assert len(err.splitlines()) == 1 and "nowhere" in err and "store folder not found" in err


def test_dashboard_url_brackets_ipv6():
    assert dash_cmd.dashboard_url("127.0.0.1", 8501) == "http://127.0.0.1:8501/"
    assert dash_cmd.dashboard_url("::1", 8502) == "http://[::1]:8502/"


# --------------------------------------------------------------------------- helpers


def test_store_root_from_arguments_then_environment(monkeypatch, tmp_path):
    from dashboard import _data

    monkeypatch.setenv("BEAMDIAG_STORE", str(tmp_path / "env"))
    assert _data.store_root(["--store", str(tmp_path / "arg")]) == (tmp_path / "arg").resolve()
    assert _data.store_root([f"--store={tmp_path / 'eq'}"]) == (tmp_path / "eq").resolve()
    assert _data.store_root([]) == (tmp_path / "env").resolve()
    monkeypatch.delenv("BEAMDIAG_STORE")
    assert _data.store_root([]) is None


@pytest.mark.parametrize("hours", [0.1, 0.5, 2, 8, 24, 24 * 7])
def test_trend_bucket_keeps_series_under_the_point_budget(hours):
    from dashboard import _data

    bucket = _data.bucket_for(hours * 3600)
    seconds = pd.Timedelta(bucket).total_seconds()
    assert hours * 3600 / seconds <= _data.MAX_POINTS
    finer = [s for _, s in _data.BUCKETS if s < seconds]
    assert not finer or hours * 3600 / finer[-1] > _data.MAX_POINTS  # the finest that fits


@pytest.mark.parametrize(("value", "err", "text"), [
    (420.431, 0.091, "420.43 ± 0.09"),     # leading digits 91 >= 35: one significant digit
    (1.204, 0.014, "1.204 ± 0.014"),       # 14 < 35: two
    (0.9101, 0.0072, "0.910 ± 0.007"),
    (211.39, 0.43, "211.4 ± 0.4"),
    (5.0, None, "5"),
])
def test_value_with_uncertainty_follows_the_pdg_rounding_rule(value, err, text):
    """Particle Data Group, Review of Particle Physics, Introduction (rounding of errors)."""
    from dashboard import _ui

    assert _ui.fmt_pm(value, err) == text


def test_heartbeat_is_fresh_only_when_running_and_recent():
    from dashboard import _data

    now = pd.Timestamp("2026-11-30T10:00:00Z")
    beat = {"time": "2026-11-30T09:59:30Z", "state": "running", "interval_s": 5}
    assert _data.heartbeat_is_fresh(beat, now=now)
    assert not _data.heartbeat_is_fresh({**beat, "state": "stopped"}, now=now)
    assert not _data.heartbeat_is_fresh({**beat, "time": "2026-11-30T09:50:00Z"}, now=now)
    assert _data.heartbeat_is_fresh({**beat, "time": "2026-11-30T09:50:00Z", "interval_s": 300}, now=now)
    assert not _data.heartbeat_is_fresh(None, now=now)


# --------------------------------------------------------------------------- empty and missing stores


@pytest.mark.parametrize("page", PAGES)
def test_every_page_has_an_empty_state_on_an_empty_store(monkeypatch, empty_store, page):
    at = app_for(monkeypatch, empty_store, page)
    assert not at.exception and not at.error
    text = "\n".join(i.value for i in at.info)
    assert "beamdiag demo --store" in text and "beamdiag ingest" in text
    assert SAFETY_NOTE in captions(at)


@pytest.mark.parametrize("page", PAGES)
def test_every_page_explains_a_missing_store(monkeypatch, tmp_path, page):
    at = app_for(monkeypatch, None, page)
    assert not at.exception
    assert any("No store given" in i.value for i in at.info)
    at = app_for(monkeypatch, tmp_path / "nowhere", page)
    assert not at.exception
    assert any("store folder not found" in w.value for w in at.warning)


# --------------------------------------------------------------------------- demo store


def window_report(store: Path, start, end):
    """The reference: orbit.analyze_orbit on the window's readings, as the test computes it."""
    from diagnostics import orbit
    from diagnostics.store import Store

    s = Store(store, read_only=True)
    bpm = s.read_bpm(start=start, end=end)
    slow = s.read_slow(start=start, end=end)
    return orbit.analyze_orbit(bpm, slow_df=slow if len(slow) else None)


def worst(report):
    return max(report.summaries, key=lambda s: abs(s.max_abs_drift_m))


@pytest.mark.parametrize("page", PAGES)
def test_every_page_runs_on_the_demo_store(monkeypatch, demo_store, page):
    at = settle(app_for(monkeypatch, demo_store, page))
    assert not at.exception, [e.value for e in at.exception]
    assert not at.error, [e.value for e in at.error]
    assert SAFETY_NOTE in captions(at)


def test_shift_headline_matches_the_orbit_analysis_and_stored_emittance(monkeypatch, demo_store):
    from diagnostics.store import Store

    at = settle(app_for(monkeypatch, demo_store))
    assert not at.exception
    start, end = shown_window(at)
    ref = window_report(demo_store, start, end + pd.Timedelta(seconds=1))
    w = worst(ref)
    m = metric(at, "Worst orbit drift")
    assert m.value == f"{w.max_abs_drift_m * 1e6:.1f} µm"
    assert f"{w.bpm} {w.plane}" in captions(at)
    assert metric(at, "Orbit steps").value == str(len(ref.step_events))
    assert metric(at, "Out-of-limit events").value == str(len(ref.violations))
    # emittance: the newest stored scan result, in mm mrad
    scans = Store(demo_store, read_only=True).read_results("scans")
    latest = scans.iloc[-1]
    shown = with_pm(at, "Emittance x (norm.)")
    assert shown.endswith("mm mrad")
    assert math.isclose(number(shown), latest["x_norm_emittance_m_rad"] * 1e6,
                        abs_tol=latest["x_norm_emittance_err_m_rad"] * 1e6)


def test_shift_window_change_recomputes_the_headline(monkeypatch, demo_store):
    at = settle(app_for(monkeypatch, demo_store))
    full = shown_window(at)
    at.selectbox(key="window_preset").select("Last 30 min").run()
    at = settle(at)
    assert not at.exception
    start, end = shown_window(at)
    assert end == full[1] and (end - start) <= pd.Timedelta(minutes=30, seconds=1)
    ref = window_report(demo_store, start, end + pd.Timedelta(seconds=1))
    assert metric(at, "Worst orbit drift").value == f"{worst(ref).max_abs_drift_m * 1e6:.1f} µm"


def test_shift_goes_live_with_a_fresh_heartbeat(monkeypatch, demo_store):
    from diagnostics import service

    path = service.heartbeat_path(demo_store)
    service.write_json_atomic(path, {"time": pd.Timestamp.now(tz="UTC").isoformat(), "state": "running",
                                     "interval_s": 2.0, "pending": 0, "lag_s": 0.0})
    try:
        at = settle(app_for(monkeypatch, demo_store))
        assert "Live: the watch service is running" in captions(at)
        assert fact(at, "Watch service") == "running"
    finally:
        path.unlink()
    at = settle(app_for(monkeypatch, demo_store))
    assert "Live:" not in captions(at)
    assert fact(at, "Watch service") == "not running"


def test_quad_scan_page_shows_the_library_fit_and_reruns_with_another_method(monkeypatch, demo_store):
    from dashboard import _ui
    from diagnostics import emittance
    from diagnostics.store import Store

    store = Store(demo_store, read_only=True)
    scan_id = store.list_scans()["scan_id"].iloc[-1]
    spec = store.load_scan(scan_id)
    at = app_for(monkeypatch, demo_store, "views/quad_scan.py")
    assert not at.exception
    ref = emittance.analyze_scan(spec)
    assert with_pm(at, "Emittance x (norm.)") == _ui.fmt_pm(
        ref.x.norm_emittance_m_rad, ref.x.norm_emittance_err_m_rad, 1e6, "mm mrad")
    assert len(at.get("download_button")) == 2
    at.radio(key="scan_method").set_value("thin")
    at.button[0].click().run()  # the form's "Re-run fit"
    assert not at.exception
    thin = emittance.analyze_scan(spec, method="thin")
    assert with_pm(at, "Emittance y (norm.)") == _ui.fmt_pm(
        thin.y.norm_emittance_m_rad, thin.y.norm_emittance_err_m_rad, 1e6, "mm mrad")


def test_profiles_page_shows_the_image_analysis_of_the_chosen_frame(monkeypatch, demo_store):
    from dashboard import _ui
    from diagnostics import images
    from diagnostics.store import Store

    store = Store(demo_store, read_only=True)
    at = app_for(monkeypatch, demo_store, "views/profiles.py")
    assert not at.exception
    device = at.selectbox(key="frame_device").value
    index = store.frame_index(devices=[device])
    index = index[index["scan"].isna()].sort_values("timestamp")
    slider = at.select_slider(key=f"frame_time_{device}")
    slider.set_value(0).run()  # the first frame of the window
    assert not at.exception
    frame = store.read_frame(index["id"].iloc[0])
    ref = images.analyze_image(frame.pixels, pixel_size_m=frame.pixel_size_m, dark=frame.dark,
                               bit_depth=frame.bit_depth, roi=frame.roi)
    assert with_pm(at, "σx") == _ui.fmt_pm(ref.sigma_x_m, ref.sigma_x_err_m, 1e6, "µm")
    assert with_pm(at, "σy") == _ui.fmt_pm(ref.sigma_y_m, ref.sigma_y_err_m, 1e6, "µm")


def test_profiles_page_wire_fit_matches_analyze_profile(monkeypatch, demo_store):
    from dashboard import _ui
    from diagnostics import profiles
    from diagnostics.store import Store

    store = Store(demo_store, read_only=True)
    at = app_for(monkeypatch, demo_store, "views/profiles.py")
    device, plane = at.selectbox(key="wire_device").value, at.selectbox(key="wire_plane").value
    index = store.profile_index(devices=[device])
    index = index[(index["plane"] == plane) & index["scan"].isna()].sort_values("timestamp")
    prof = store.read_profile(index["id"].iloc[-1])  # the slider starts at the newest
    ref = profiles.analyze_profile(prof.position_m, prof.signal)
    assert with_pm(at, f"σ{plane} (gaussian)") == _ui.fmt_pm(ref.sigma_m, ref.sigma_err_m, 1e6, "µm")


def test_orbit_page_matches_the_analysis_and_follows_the_bpm_choice(monkeypatch, demo_store):
    at = settle(app_for(monkeypatch, demo_store, "views/orbit.py"))
    assert not at.exception
    start, end = shown_window(at)
    ref = window_report(demo_store, start, end + pd.Timedelta(seconds=1))
    w = worst(ref)
    assert metric(at, "Worst drift").value == f"{w.max_abs_drift_m * 1e6:.1f} µm"
    assert at.selectbox(key="orbit_bpm").value == w.bpm
    other = next(b for b in ref.bpms if b != w.bpm)
    at.radio(key="orbit_plane").set_value("y")
    at.selectbox(key="orbit_bpm").select(other).run()
    assert not at.exception
    assert at.selectbox(key="orbit_bpm").value == other


def test_handover_notes_reach_the_downloaded_report(monkeypatch, demo_store):
    pytest.importorskip("diagnostics.report", reason="the shift report module is not built yet")
    at = app_for(monkeypatch, demo_store, "views/handover.py")
    assert not at.exception
    note = "Q-05 scan repeated; watch BPM-09 after the corrector change <b>&</b>"
    at.text_area(key="handover_notes_text").input(note)
    at.button[0].click().run()
    assert not at.exception
    srcdoc = next(e for e in at.get("iframe")).proto.srcdoc
    # the notes arrive HTML-escaped: the preview runs the report's scripts, never the operator's
    assert "Q-05 scan repeated; watch BPM-09 after the corrector change &lt;b&gt;&amp;&lt;/b&gt;" in srcdoc
    assert "<b>&</b>" not in srcdoc


# --------------------------------------------------------------------------- safety of the data access


def test_the_dashboard_opens_the_store_read_only(demo_store):
    from dashboard import _data
    from diagnostics.errors import StoreError

    store = _data.open_store(demo_store)
    assert store.read_only
    with pytest.raises(StoreError):
        store.write_results("scans", [{"scan_id": "x", "timestamp": "2026-11-30T08:00:00Z"}])


def test_data_caches_are_bounded_in_memory_and_never_pickled_to_disk():
    """Every st.cache_data loader has a ttl and max_entries and no persist (ECOSYSTEM.md section 8)."""
    import inspect

    from streamlit.runtime.caching.cache_utils import CachedFunc

    from dashboard import _data
    from dashboard.views import __path__ as views_path  # noqa: F401  (namespace of the page files)

    cached = [obj for _, obj in inspect.getmembers(_data) if isinstance(obj, CachedFunc)]
    data_loaders = [c for c in cached if hasattr(c._info, "persist")]
    assert len(data_loaders) >= 10
    for c in data_loaders:
        assert c._info.persist is None, c._info.func.__name__
        assert c._info.ttl and c._info.max_entries, c._info.func.__name__
    # the page files cache the same way (read as text: importing a page would run it)
    for page in PAGES:
        text = (APP.parent / page).read_text(encoding="utf-8")
        for call in re.findall(r"@st\.cache_data\(([^)]*)\)", text):
            assert "ttl=" in call and "max_entries=" in call and "persist" not in call, (page, call)


def test_a_scan_still_filling_shows_a_provisional_result(monkeypatch, demo_store, tmp_path):
    """A scan folder with fewer steps than its expected_steps is shown with the provisional flag."""
    import json
    import shutil

    from diagnostics.store import Store

    source = next((demo_store / "raw" / "scans").iterdir())
    folder = tmp_path / "filling" / source.name
    shutil.copytree(source, folder)
    spec = json.loads((folder / "scan.json").read_text(encoding="utf-8"))
    spec["steps"] = spec["steps"][: len(spec["steps"]) - 6]
    (folder / "scan.json").write_text(json.dumps(spec), encoding="utf-8")
    store = Store(tmp_path / "store")
    outcome = store.ingest(folder)
    assert outcome.status == "stored", outcome.message
    at = app_for(monkeypatch, tmp_path / "store", "views/quad_scan.py")
    assert not at.exception and not at.error
    assert any("Provisional result" in w.value for w in at.warning)
    table = at.dataframe[0].value
    flags = table.loc[table["quantity"] == "flags", ["x", "y"]].iloc[0]
    assert all("provisional" in f for f in flags)


def test_a_failing_orbit_analysis_costs_its_numbers_not_the_page(monkeypatch, demo_store):
    from dashboard import _data

    def broken(root, start, end):
        raise RuntimeError("readings unreadable")

    monkeypatch.setattr(_data, "_orbit_job", broken)
    _data.orbit_jobs().__init__()  # forget finished analyses of earlier tests
    at = settle(app_for(monkeypatch, demo_store))
    assert not at.exception
    assert any("orbit analysis of this window failed: RuntimeError: readings unreadable" in e.value
               for e in at.error)
    assert metric(at, "Worst orbit drift").value == "–"
    assert metric(at, "Emittance x (norm.)").value != "–"  # the rest of the headline is there
    _data.orbit_jobs().__init__()


# --------------------------------------------------------------------------- speed: what goes to the browser


def chart_specs(at: AppTest) -> dict[str, dict]:
    """The Shift page's ECharts options as sent to the browser, by element key."""
    import json

    return {c.proto.id.rsplit("-", 1)[-1]: json.loads(c.proto.spec) for c in at.get("echarts_chart")}


def chart_tables(at: AppTest, key: str) -> list[pd.DataFrame]:
    """The Arrow tables sent with the chart ``key``, in the order of its ``dataset`` list."""
    import pyarrow as pa

    (element,) = [c for c in at.get("echarts_chart") if c.proto.id.endswith("-" + key)]
    tables = {d.name: pa.ipc.open_stream(d.data.data).read_all().to_pandas() for d in element.proto.datasets}
    return [tables[entry["source"]["name"]] for entry in chart_specs(at)[key]["dataset"]]


def test_shift_headline_is_sent_before_the_charts_on_a_first_visit(monkeypatch, demo_store):
    at = app_for(monkeypatch, demo_store)
    assert not at.exception
    assert metric(at, "Emittance x (norm.)").value != "–"
    assert "Drawing the trends" in captions(at)
    assert not chart_specs(at)  # the first run carries the numbers only
    at.run()  # the run the page's timer asks for
    assert "Drawing the trends" not in captions(at)
    assert {"Beam sizes", "Emittance", "Orbit drift per BPM", "Temperatures"} <= {s.value for s in at.subheader}
    assert {"shift_sizes", "shift_orbit_x", "shift_orbit_y", "shift_temps"} <= set(chart_specs(at))


def test_shift_drift_chart_is_decimated_and_sent_as_arrow(monkeypatch, demo_store):
    """Long series leave the server as bucket means (and min/max) in Arrow tables, not inline JSON.

    Each plane is one table of at most ``DRIFT_POINTS`` buckets with a column per
    BPM; every BPM is one line series reading its column, and the time axis spans
    exactly the window shown.
    """
    from dashboard.views import shift
    from diagnostics.store import Store

    at = app_for(monkeypatch, demo_store)
    at.run()
    specs = chart_specs(at)
    start, end = shown_window(at)  # (the caption gives whole seconds)
    n_bpms = Store(demo_store, read_only=True).read_bpm()["bpm"].nunique()
    second = pd.Timedelta(seconds=1)
    for plane in ("x", "y"):
        key = f"shift_orbit_{plane}"
        option = specs[key]
        (table,) = chart_tables(at, key)
        assert len(table) <= shift.DRIFT_POINTS
        bpm_lines = [s for s in option["series"] if s.get("datasetIndex") == 0 and "stack" not in s]
        assert len(bpm_lines) == n_bpms
        assert {s["encode"]["y"] for s in bpm_lines} <= set(table.columns)
        for series in option["series"]:
            assert "data" not in series or series["data"] == []  # no values inline
        axis = option["xAxis"]
        assert axis["type"] == "time" and option["useUTC"] is True
        axis_start, axis_end = (pd.Timestamp(axis[k], unit="ms", tz="UTC") for k in ("min", "max"))
        assert abs(axis_start - start) < second and abs(axis_end - end) < second
        t = pd.to_datetime(table["t"], unit="ms", utc=True)  # the buckets lie on the axis
        assert t.min() >= axis_start.floor("min") and t.max() <= axis_end


def test_shift_warms_the_other_preset_windows_so_a_change_reads_no_trends(monkeypatch, demo_store):
    import streamlit as st

    from dashboard import _data, _ui
    from diagnostics.store import Store

    # the 24-minute test store makes every preset the whole store: add a shorter one
    monkeypatch.setitem(_ui.WINDOW_PRESETS, "Last 10 min", pd.Timedelta(minutes=10))
    st.cache_data.clear()
    _data._warmed.clear()
    at = app_for(monkeypatch, demo_store)
    at.run()  # the run that draws the charts hands the other presets to the warming thread
    _data._WARM_POOL.submit(lambda: None).result(timeout=60)  # the pool is FIFO: warming is done

    def no_store_reads(self, *args, **kwargs):
        raise AssertionError("the store was asked for a trend of a warmed window")

    monkeypatch.setattr(Store, "trend", no_store_reads)  # (the orbit worker reads raw readings, no trends)
    at.selectbox(key="window_preset").select("Last 10 min").run()
    assert not at.exception
    assert not at.error, [e.value for e in at.error]
    start, end = shown_window(at)
    assert end - start <= pd.Timedelta(minutes=10, seconds=1)
    assert {"shift_orbit_x", "shift_temps"} <= set(chart_specs(at))
