"""The dashboard in a real browser: headless Chromium driven by Playwright.

``beamdiag dashboard`` is started on a free loopback port on a small demo
store; the test waits for ``/_stcore/health``, opens every page, checks the
headline text an operator would look for, prints how long the first render of
the Shift page and a window change took (the timing budgets are checked by
bench/bench_dashboard.py on the whole demo shift), and saves screenshots to ``tests/screenshots/``
(git-ignored) for a person to look at.

Chromium is Debian's ``/usr/bin/chromium`` (never ``playwright install``).
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM = Path("/usr/bin/chromium")
REPO = Path(__file__).resolve().parents[1]
SHOTS = REPO / "tests" / "screenshots"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]

#: Pages by URL path (the default page is served at "/") and the text each must show.
PAGES = {
    "": ("shift", ("Worst orbit drift", "Emittance x (norm.)", "Orbit drift per BPM")),
    "quad-scan": ("quad_scan", ("Emittance x (norm.)", "Re-run fit", "Download JSON")),
    "profiles": ("profiles", ("Screens", "Wire scans", "Colour scale")),
    "orbit": ("orbit", ("Worst drift", "Drift from the reference orbit")),
    "handover": ("handover", ("Notes for the next shift", "Download the report")),
}

if not CHROMIUM.exists():
    pytest.skip("Debian chromium is not installed at /usr/bin/chromium (apt-get install chromium)",
                allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api")


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    from diagnostics.demo import build_demo_store

    root = tmp_path_factory.mktemp("browser") / "store"
    build_demo_store(root, start="08:10", hours=0.75)  # holds the 08:15 quad scan
    return root


@pytest.fixture(scope="module")
def server(store, tmp_path_factory):
    """``beamdiag dashboard`` on a free port; yields its base URL."""
    port = free_port()
    log = tmp_path_factory.mktemp("browser") / "server.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "diagnostics", "dashboard", "--store", str(store), "--port", str(port)],
            stdout=out, stderr=subprocess.STDOUT, cwd=str(REPO), env={**os.environ},
        )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                with urllib.request.urlopen(f"{base}/_stcore/health", timeout=2) as resp:
                    if resp.read().strip() == b"ok":
                        break
            except OSError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"dashboard did not start: {log.read_text(errors='replace')[-2000:]}")
            time.sleep(0.3)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture(scope="module")
def browser():
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True)
        try:
            yield b
        finally:
            b.close()


#: The Shift page's trends (ECharts) and the other pages' charts (Plotly).
SHIFT_CHART = '[data-testid="stEChartsChart"]'
#: At least ``n`` charts of either kind drawn (their canvas or SVG is in the page).
CHARTS_DRAWN = """(n) => [...document.querySelectorAll('[data-testid="stEChartsChart"], [data-testid="stPlotlyChart"]')]
    .filter(e => e.querySelector('canvas, .main-svg')).length >= n"""


def wait_headline(page, timeout_s: float = 60.0) -> None:
    """Wait until the Shift headline has its orbit numbers (no '…' placeholder left)."""
    page.wait_for_selector('[data-testid="stMetric"]', timeout=timeout_s * 1000)
    page.wait_for_function(
        """() => {
            const m = [...document.querySelectorAll('[data-testid="stMetric"]')];
            return m.length >= 5 && !m.some(e => e.innerText.includes('…'));
        }""", timeout=timeout_s * 1000)


def test_server_binds_loopback_only(server):
    port = int(server.rsplit(":", 1)[1])
    host = socket.gethostbyname(socket.gethostname())
    if host.startswith("127."):
        pytest.skip("this machine has no non-loopback address to try")
    with socket.socket() as s:
        s.settimeout(1)
        assert s.connect_ex((host, port)) != 0, "the dashboard answers on a non-loopback address"


def test_every_page_renders_its_headline_in_chromium(server, browser):
    SHOTS.mkdir(parents=True, exist_ok=True)
    context = browser.new_context(viewport={"width": 1600, "height": 1000})
    page = context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda exc: errors.append(str(exc)))
    try:
        # first render of the Shift page: navigation to headline numbers shown (orbit included)
        t0 = time.perf_counter()
        page.goto(server + "/", wait_until="domcontentloaded")
        page.wait_for_selector('[data-testid="stMetric"]', timeout=60_000)
        first_metric_s = time.perf_counter() - t0
        wait_headline(page)
        headline_s = time.perf_counter() - t0
        page.wait_for_function(CHARTS_DRAWN, arg=1, timeout=60_000)
        print(f"\nShift first render: metrics {first_metric_s:.2f} s, orbit headline {headline_s:.2f} s")
        for path, (name, texts) in PAGES.items():
            if path:
                page.goto(f"{server}/{path}", wait_until="domcontentloaded")
            for text in texts:
                page.get_by_text(text, exact=False).first.wait_for(timeout=60_000)
            if name == "shift":
                wait_headline(page)
            page.wait_for_timeout(1500)  # let the charts draw
            assert page.locator('[data-testid="stException"]').count() == 0, f"exception on {name}"
            assert page.get_by_text("not a machine-protection", exact=False).count() >= 1
            page.screenshot(path=str(SHOTS / f"{name}.png"), full_page=True)
            if name == "shift":  # the trends below the fold: drift, temperatures
                page.wait_for_function(CHARTS_DRAWN, arg=5, timeout=60_000)  # sizes, emittance, drift x/y, temps
                page.locator(SHIFT_CHART).last.scroll_into_view_if_needed()
                page.wait_for_timeout(500)
                page.screenshot(path=str(SHOTS / "shift_trends.png"))
        assert not errors, errors
    finally:
        context.close()


def test_window_change_updates_the_shift_page_quickly(server, browser):
    context = browser.new_context(viewport={"width": 1600, "height": 1000})
    page = context.new_page()
    try:
        page.goto(server + "/", wait_until="domcontentloaded")
        wait_headline(page)
        # a window change on a drawn page: the charts follow the headline in a second run
        page.wait_for_function(CHARTS_DRAWN, arg=5, timeout=60_000)
        page.wait_for_timeout(1000)
        caption = page.get_by_text("Showing:", exact=False).first
        before = caption.inner_text()
        t0 = time.perf_counter()
        page.get_by_test_id("stSelectbox").first.click()
        page.get_by_role("option", name="Last 30 min").click()
        page.wait_for_function(
            """(b) => [...document.querySelectorAll('[data-testid="stCaptionContainer"]')]
                .some(e => e.innerText.includes('Showing:') && e.innerText !== b)
              && document.querySelectorAll('[data-stale="true"]').length === 0""", arg=before,
            timeout=60_000)
        change_s = time.perf_counter() - t0
        wait_headline(page)
        settled_s = time.perf_counter() - t0
        print(f"\nWindow change: window shown {change_s:.2f} s, orbit headline {settled_s:.2f} s")
        page.screenshot(path=str(SHOTS / "shift_30min.png"), full_page=True)
    finally:
        context.close()


def test_shift_page_follows_new_data_while_the_watch_service_runs(server, store, browser):
    """With a fresh heartbeat the live panels rerun on their own and pick up new readings."""
    import uuid

    import pandas as pd

    from diagnostics import service
    from diagnostics.store import Store

    beat = service.heartbeat_path(store)
    service.write_json_atomic(beat, {"time": pd.Timestamp.now(tz="UTC").isoformat(), "state": "running",
                                     "interval_s": 2.0, "pending": 0, "lag_s": 0.0})
    context = browser.new_context(viewport={"width": 1600, "height": 1000})
    page = context.new_page()
    try:
        page.goto(server + "/", wait_until="domcontentloaded")
        wait_headline(page)
        page.get_by_text("Live: the watch service is running", exact=False).first.wait_for(timeout=30_000)
        fact = page.get_by_text("Last: BPMs", exact=True).first.locator("xpath=following-sibling::div[1]")
        before = fact.inner_text()
        # one more minute of readings lands in the store, as the watch service would write it
        s = Store(store)
        last = s.time_range("bpm")[1]
        recent = s.read_bpm(start=last - pd.Timedelta(seconds=59))
        recent["timestamp"] = recent["timestamp"] + pd.Timedelta(minutes=1)
        s.write_bpm(recent, sha256=uuid.uuid4().hex * 2, source="live-test")
        service.write_json_atomic(beat, {"time": pd.Timestamp.now(tz="UTC").isoformat(), "state": "running",
                                         "interval_s": 2.0, "pending": 0, "lag_s": 0.0})
        page.wait_for_function("(args) => { const [el, b] = args; return el.innerText !== b; }",
                               arg=[fact.element_handle(), before], timeout=60_000)
        after = fact.inner_text()
        assert pd.Timestamp(after, tz="UTC") > pd.Timestamp(before, tz="UTC")
        page.screenshot(path=str(SHOTS / "shift_live.png"), full_page=True)
    finally:
        context.close()
        beat.unlink(missing_ok=True)
