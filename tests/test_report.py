"""The shift handover report: numbers from the library, a page that needs no network.

The store is filled from the demo scenario (diagnostics.demo) around its 10:42
orbit step and 11:20-11:35 transmission loss, plus the 08:15 quad scan; the
references are the library's own results read back independently (stored
scan results, diagnostics.orbit.analyze_orbit on the same readings) and the
scenario's true values (truth.json).
"""

from __future__ import annotations

import json
import math
from html.parser import HTMLParser
from types import SimpleNamespace

import pandas as pd
import pytest

from diagnostics import SAFETY_NOTE, demo, report
from diagnostics.cli import main
from diagnostics.errors import InputError

store_mod = pytest.importorskip("diagnostics.store")
pipeline = pytest.importorskip("diagnostics.pipeline")
orbit = pytest.importorskip("diagnostics.orbit")

START = pd.Timestamp("2026-11-30T10:30Z")
END = pd.Timestamp("2026-11-30T11:45Z")


class _Page(HTMLParser):
    """Collects tags, attributes and script bodies of a page."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.scripts: list[str] = []
        self._in_script = False
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"
        if self._in_script:
            self.scripts.append("")

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_script = False

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data
        else:
            self.text.append(data)


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    parser.close()
    return parser


@pytest.fixture(scope="module")
def filled(tmp_path_factory):
    """A store with 10:30-11:45 of BPM (2 Hz), slow and wire data, 6 frames and the Q-05 scan."""
    root = tmp_path_factory.mktemp("report")
    raw = root / "raw"
    a = demo.generate_raw(
        raw / "shift", start="10:30", hours=1.25, bpm_rate_Hz=2.0, sources=("bpm", "slow", "wire")
    )
    frames = demo.generate_raw(
        raw / "frames", start="10:30", hours=0.1, frame_shape=(240, 320), sources=("screens",)
    )
    b = demo.generate_raw(raw / "scan", start="08:15", hours=0.1, sources=("scans",))
    store = store_mod.Store(root / "store")
    ingest = store.ingest_many([*a.inputs, *frames.inputs, *b.inputs], progress=False)
    assert not ingest.quarantined, [o.message for o in ingest.quarantined]
    pipeline.analyze_store(store)
    return SimpleNamespace(store=store, truth=json.loads(a.truth_file.read_text()))


@pytest.fixture(scope="module")
def built(filled):
    """The report of 08:00-11:45 (the scan, the step and the loss are all inside)."""
    rep = report.build_report(
        filled.store, start="2026-11-30T08:00Z", end=END, notes="HC-08 moved <on request> & logged"
    )
    return rep, report.render_html(rep)


# --------------------------------------------------------------------------- numbers


def test_report_has_no_left_out_sections(built):
    rep, _ = built
    assert rep.problems == ()
    assert not rep.empty
    assert rep.title == "Shift handover 2026-11-30 08:00:00 – 2026-11-30 11:45:00 UTC"


def test_emittance_headline_is_the_latest_stored_scan_result(filled, built):
    """The headline equals the stored scan result, which is close to the scenario's truth.

    Truth: normalised 1.2 / 0.9 mm mrad; 26 shots with 1.5 % size jitter give a
    statistical error of about 1-2 %, so 5 % is a safe bound (common practice).
    """
    rep, _ = built
    scans = filled.store.read_results("scans", start="2026-11-30T08:00Z", end=END)
    latest = scans.sort_values("timestamp").iloc[-1]
    for plane, truth in (("x", 1.2e-6), ("y", 0.9e-6)):
        h = rep.headline(f"emittance_{plane}")
        assert h.value == latest[f"{plane}_norm_emittance_m_rad"]
        assert h.value == pytest.approx(truth, rel=0.05)
        assert "mm mrad" in h.text and "Q-05" in h.detail
        assert rep.emittance[plane]["scan_name"] == latest["scan_name"]


def test_orbit_headlines_match_an_independent_orbit_analysis(filled, built):
    """Worst drift, steps, limit and loss events equal analyze_orbit on the same readings."""
    rep, _ = built
    t0 = pd.Timestamp("2026-11-30T08:00Z")
    bpm = filled.store.read_bpm(start=t0, end=END)
    slow = filled.store.read_slow(start=t0, end=END)
    ref = orbit.analyze_orbit(bpm, slow_df=slow)
    worst = max(ref.summaries, key=lambda s: s.max_abs_drift_m)
    h = rep.headline("worst_drift")
    assert h.value == pytest.approx(worst.max_abs_drift_m, rel=1e-12)
    assert h.text.startswith(f"{worst.bpm} {worst.plane}:")
    assert len(rep.loss_events) == len(ref.loss_events)
    assert rep.headline("losses").value == len(ref.loss_events)
    assert sum(len(e.bpms) for e in rep.step_events) == len(ref.steps)
    assert rep.headline("out_of_limit").value == len(report.merge_violations(ref.violations))
    assert rep.counts["bpm"] == len(bpm)


def test_step_and_loss_events_are_the_scenario_events(built):
    """The demo's corrector step (10:42, BPM-09 onward, 35 um) and loss (BPM-15/16, 2 %)."""
    rep, _ = built
    step = max(rep.step_events, key=lambda e: len(e.bpms))
    assert step.plane == "x"
    assert abs((step.time - pd.Timestamp("2026-11-30T10:42Z")).total_seconds()) <= 1.0
    assert step.bpms[0] == "BPM-09"
    assert "BPM-08" not in step.bpms
    assert abs(step.largest_m) == pytest.approx(35e-6, abs=3e-6)
    (loss,) = [e for e in rep.loss_events if (e.upstream, e.downstream) == ("BPM-15", "BPM-16")]
    assert loss.size == pytest.approx(0.02, abs=0.002)
    assert abs((loss.start - pd.Timestamp("2026-11-30T11:20Z")).total_seconds()) <= 60
    assert abs((loss.end - pd.Timestamp("2026-11-30T11:35Z")).total_seconds()) <= 60


def test_last_data_is_what_the_store_says(filled, built):
    rep, _ = built
    assert rep.last_data == filled.store.last_seen()
    newest = max(t for t in rep.last_data.values() if t is not None)
    assert rep.headline("last_data").value == pytest.approx(newest.value / 1e9)


def test_sizes_table_lists_the_wire_scanners_and_screens(built):
    rep, _ = built
    sizes = rep.table("sizes").frame
    assert {"WS-01", "WS-02", "SCR-01", "SCR-02", "SCR-03"} <= set(sizes["monitor"])


# --------------------------------------------------------------------------- the page


def test_page_is_self_contained_and_parses(built):
    """No script src, no stylesheet link, no URL attribute; plotly.js inlined exactly once."""
    from plotly.offline import get_plotlyjs

    rep, page = built
    parsed = _parse(page)
    names = [t for t, _ in parsed.tags]
    assert names[:2] == ["html", "head"] and "body" in names and "title" in names
    for tag, attrs in parsed.tags:
        assert not (tag == "script" and "src" in attrs), attrs
        assert tag != "link", attrs
        for key in ("src", "href", "data", "action", "srcset"):
            value = (attrs.get(key) or "").strip().lower()
            assert not value.startswith(("http:", "https:", "//", "ftp:")), (tag, attrs)
    assert "@import" not in page and "url(http" not in page
    bundle_head = get_plotlyjs()[:500]
    assert page.count(bundle_head) == 1
    figures = [
        a for t, a in parsed.tags if t == "div" and (a.get("class") or "") == "plotly-graph-div"
    ]
    assert len(figures) == len(rep.figures) >= 4


def test_page_shows_the_headline_numbers_and_the_safety_note(built):
    rep, page = built
    text = " ".join(_parse(page).text)
    for h in rep.headlines:
        assert h.text in text, h.key
    assert SAFETY_NOTE in text
    # notes are shown escaped, never as markup
    assert "HC-08 moved <on request> & logged" in text
    assert "<on request>" not in page


def test_page_is_deterministic_apart_from_the_generation_time(filled):
    a = report.build_report(filled.store, start=START, end=END)
    b = report.build_report(filled.store, start=START, end=END)
    a_page = report.render_html(a).replace(str(a.generated.strftime("%Y-%m-%d %H:%M:%S")), "T")
    b_page = report.render_html(b).replace(str(b.generated.strftime("%Y-%m-%d %H:%M:%S")), "T")
    assert a_page == b_page


# --------------------------------------------------------------------------- empty states


def test_empty_window_gives_a_helpful_page(filled):
    rep = report.build_report(filled.store, start="2025-01-01T00:00Z", end="2025-01-01T08:00Z")
    assert rep.empty and rep.problems == ()
    assert rep.headline("emittance_x").value is None
    assert "no quad scan" in rep.headline("emittance_x").text
    assert rep.headline("worst_drift").text == "no BPM readings in this window"
    page = report.render_html(rep)
    text = " ".join(_parse(page).text)
    assert "No measurements between 2025-01-01 00:00:00 and 2025-01-01 08:00:00 UTC" in text
    assert "bpm: 2026-11-30 10:30:00" in text  # what the store does hold
    assert "<script" not in page  # no figures, so no plotly.js either
    assert SAFETY_NOTE in text


def test_empty_store_says_how_to_fill_it(tmp_path):
    store = store_mod.Store(tmp_path / "empty")
    rep = report.build_report(store, start="2026-11-30T06:00Z", end="2026-11-30T14:00Z")
    assert rep.empty
    text = " ".join(_parse(report.render_html(rep)).text)
    assert "holds no measurements yet" in text and "beamdiag ingest" in text


def test_bad_windows_raise_one_line_input_errors(filled):
    with pytest.raises(InputError, match="must be after start"):
        report.build_report(filled.store, start=END, end=START)
    with pytest.raises(InputError, match="expected an ISO 8601 time"):
        report.build_report(filled.store, start="yesterday-ish", end=END)


# --------------------------------------------------------------------------- pure helpers


def _step(t: str, size: float):
    return orbit.Step(time=pd.Timestamp(t), size_m=size, size_err_m=1e-7)


def test_group_steps_joins_close_steps_of_one_plane_only():
    """Exact case: three x steps within 0.2 s are one event; a y step and a later x step are apart."""
    steps = [
        ("BPM-10", "x", _step("2026-11-30T10:42:00.1Z", 20e-6)),
        ("BPM-09", "x", _step("2026-11-30T10:42:00Z", 35e-6)),
        ("BPM-11", "x", _step("2026-11-30T10:41:59.9Z", -30e-6)),
        ("BPM-11", "y", _step("2026-11-30T10:42:00Z", 5e-6)),
        ("BPM-03", "x", _step("2026-11-30T12:00:00Z", 8e-6)),
    ]
    order = [f"BPM-{i:02d}" for i in range(1, 25)]
    events = report.group_steps(steps, order)
    assert [(e.plane, e.bpms) for e in events] == [
        ("x", ("BPM-09", "BPM-10", "BPM-11")),
        ("y", ("BPM-11",)),
        ("x", ("BPM-03",)),
    ]
    assert events[0].largest_bpm == "BPM-09" and events[0].largest_m == 35e-6
    assert events[0].time == pd.Timestamp("2026-11-30T10:42:00Z")


def test_merge_violations_joins_touching_intervals():
    def v(bpm, a, b, worst):
        return orbit.LimitViolation(
            bpm=bpm,
            plane="x",
            quantity="drift",
            start=pd.Timestamp(a),
            end=pd.Timestamp(b),
            worst_m=worst,
            limit_m=10e-6,
        )

    merged = report.merge_violations(
        [
            v("BPM-09", "2026-11-30T10:43Z", "2026-11-30T10:44Z", 20e-6),
            v("BPM-09", "2026-11-30T10:42Z", "2026-11-30T10:43Z", 35e-6),
            v("BPM-09", "2026-11-30T10:50Z", "2026-11-30T10:51Z", 12e-6),
            v("BPM-10", "2026-11-30T10:42Z", "2026-11-30T10:43Z", 15e-6),
        ]
    )
    assert [(e.bpm, str(e.start.time()), str(e.end.time()), e.worst_m) for e in merged] == [
        ("BPM-09", "10:42:00", "10:44:00", 35e-6),
        ("BPM-10", "10:42:00", "10:43:00", 15e-6),
        ("BPM-09", "10:50:00", "10:51:00", 12e-6),
    ]


def test_latest_emittance_skips_provisional_and_missing_values():
    scans = pd.DataFrame(
        {
            "timestamp": pd.to_datetime(
                ["2026-11-30T08:15Z", "2026-11-30T12:30Z", "2026-11-30T13:00Z"]
            ),
            "scan_name": ["a", "b", "c"],
            "provisional": [False, False, True],
            "x_norm_emittance_m_rad": [1.1e-6, math.nan, 1.5e-6],
            "y_norm_emittance_m_rad": [0.8e-6, 0.95e-6, 0.7e-6],
            "x_flags": ["[]", '["unphysical"]', "[]"],
            "y_flags": ["[]", '["poor_fit"]', "[]"],
        }
    )
    latest = report.latest_emittance(scans)
    assert latest["x"]["scan_name"] == "a" and latest["x"]["norm_emittance_m_rad"] == 1.1e-6
    assert latest["y"]["scan_name"] == "b" and latest["y"]["flags"] == ("poor_fit",)


# --------------------------------------------------------------------------- CLI


def test_cli_writes_the_page(filled, tmp_path, capsys):
    out = tmp_path / "handover.html"
    code = main(
        [
            "report",
            "--store",
            str(filled.store.root),
            "--start",
            "2026-11-30T10:30",
            "--end",
            "2026-11-30T11:45",
            "--out",
            str(out),
            "--notes",
            "quiet shift",
        ]
    )
    assert code == 0
    page = out.read_text(encoding="utf-8")
    assert "quiet shift" in page and "Shift handover report" in page
    printed = capsys.readouterr().out
    assert "Largest orbit drift" in printed


def test_cli_default_window_is_the_last_8_hours_of_data(filled, tmp_path, capsys):
    out = tmp_path / "last.html"
    assert main(["report", "--store", str(filled.store.root), "--out", str(out)]) == 0
    assert "2026-11-30T03:45:00+00:00 to 2026-11-30T11:45:00+00:00" in capsys.readouterr().out


def test_cli_refuses_a_missing_store(tmp_path, capsys):
    code = main(["report", "--store", str(tmp_path / "nope"), "--out", str(tmp_path / "x.html")])
    assert code == 2
    assert "expected an existing store folder" in capsys.readouterr().err


class _FakeStore:
    """The few store reads build_report makes, over fixed tables (no files)."""

    root = "fake-store"

    def __init__(self, scans: pd.DataFrame) -> None:
        self._scans = scans

    def last_seen(self):
        return {"scans": self._scans["timestamp"].max()}

    def time_range(self, kind):
        return None

    def read_results(self, kind, *, start=None, end=None, version="latest"):
        return self._scans if kind == "scans" else pd.DataFrame()

    def read_bpm(self, *, start=None, end=None):
        return pd.DataFrame()

    def read_slow(self, *, start=None, end=None):
        return pd.DataFrame()


def test_a_later_failed_scan_is_named_next_to_the_last_good_value():
    scans = pd.DataFrame(
        {
            "timestamp": pd.to_datetime(["2026-11-30T08:15Z", "2026-11-30T12:30Z"]),
            "scan_name": ["good scan", "bad scan"],
            "x_norm_emittance_m_rad": [1.2e-6, math.nan],
            "x_norm_emittance_err_m_rad": [0.01e-6, math.nan],
            "x_message": ["", "det(sigma) <= 0"],
            "y_norm_emittance_m_rad": [math.nan, math.nan],
            "y_message": ["waist not crossed", "det(sigma) <= 0"],
        }
    )
    rep = report.build_report(_FakeStore(scans), start="2026-11-30T06:00Z", end="2026-11-30T14:00Z")
    x, y = rep.headline("emittance_x"), rep.headline("emittance_y")
    assert x.value == 1.2e-6 and x.text == "1.200 ± 0.010 mm mrad"
    assert "bad scan at 12:30:00 gave no value: det(sigma) <= 0" in x.detail
    assert y.value is None and y.text == "no valid value in this window"
    assert "good scan at 08:15:00 gave no value: waist not crossed" in y.detail
    assert rep.headline("worst_drift").text == "no BPM readings in this window"
    assert rep.problems == ()
