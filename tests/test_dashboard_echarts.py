"""The ECharts options behind the Shift page's trends (``dashboard/_echarts.py``).

Pure functions of data frames: checked against pandas as the independent
reference for times and reshaping, and against the ECharts option rules that
Streamlit enforces (data frames only in ``dataset.source``, no JavaScript).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

from dashboard import _echarts, _ui
from dashboard.views import shift

T0 = pd.Timestamp("2026-11-30 06:00", tz="UTC")
MS = 1000.0


def ms(ts) -> float:
    return float(_ui.times_ms([ts])[0])


def inline_json(option: dict) -> str:
    """The option as JSON with every dataset frame left out; fails on anything not JSON-clean."""
    def default(obj):
        raise TypeError(f"not JSON: {type(obj).__name__}")

    stripped = {**option, "dataset": [{k: v for k, v in d.items() if k != "source"} for d in option["dataset"]]}
    return json.dumps(stripped, default=default, allow_nan=False)


def check_clean(option: dict) -> None:
    """Frames only in ``dataset.source``; every series reads columns its dataset has; no callbacks."""
    text = inline_json(option)
    assert "function" not in text and "=>" not in text
    for series in option["series"]:
        if "datasetIndex" not in series:
            continue
        frame = option["dataset"][series["datasetIndex"]]["source"]
        assert isinstance(frame, pd.DataFrame)
        for field in series["encode"].values():
            assert field in frame.columns, (series["name"], field)
        template = series.get("tooltip", {}).get("formatter", "")
        for name in re.findall(r"\{@([^}\[]+)\}", template):
            assert name in frame.columns, (series["name"], name)


def test_time_text_is_utc_like_pandas():
    times = pd.DatetimeIndex(["2026-11-30 06:00:00", "2026-11-30 13:59:59.9", "2027-01-01 00:00:01"], tz="UTC")
    t = _ui.times_ms(times)
    expected = [ts.strftime("%Y-%m-%d %H:%M:%S") for ts in times]  # pandas as the reference
    assert list(_echarts.time_text(t)) == expected
    assert list(_echarts.time_text([np.nan, t[0]])) == ["", expected[0]]


def test_events_are_cut_to_the_window():
    window = (ms(T0), ms(T0 + pd.Timedelta(hours=1)))
    events = pd.DataFrame({
        "time": [T0 - pd.Timedelta(minutes=5), T0 + pd.Timedelta(minutes=10), T0 + pd.Timedelta(hours=2),
                 T0 - pd.Timedelta(minutes=30), T0 + pd.Timedelta(minutes=50), T0 + pd.Timedelta(hours=1)],
        "end": [pd.NaT, pd.NaT, pd.NaT, T0 + pd.Timedelta(minutes=3), T0 + pd.Timedelta(minutes=90), pd.NaT],
        "kind": ["step", "step", "scan", "loss", "loss", "step"],
        "label": ["before", "inside", "after", "straddles start", "straddles end", "at the end"],
    })
    points, bands = _echarts.event_frames(events, _ui.times_ms, window)
    assert list(points["label"]) == ["inside"]  # [start, end): the one at the end is out
    assert list(bands["label"]) == ["straddles start", "straddles end"]
    assert bands["t"].iloc[0] == window[0] and bands["t2"].iloc[0] == ms(T0 + pd.Timedelta(minutes=3))
    assert bands["t"].iloc[1] == ms(T0 + pd.Timedelta(minutes=50)) and bands["t2"].iloc[1] == window[1]
    empty_points, empty_bands = _echarts.event_frames(None, _ui.times_ms, window)
    assert empty_points.empty and empty_bands.empty


def test_error_bars_are_vertical_segments_with_gaps():
    t = np.array([1.0, 2.0, 3.0]) * MS
    lo, hi = np.array([0.5, np.nan, 2.5]), np.array([1.5, np.nan, 3.5])
    seg = _echarts.error_segments(t, lo, hi)
    assert len(seg) == 6  # the point without an error has no bar
    assert list(seg["t"].iloc[:2]) == [t[0], t[0]] and list(seg["y"].iloc[:2]) == [0.5, 1.5]
    assert np.isnan(seg["t"].iloc[2]) and np.isnan(seg["y"].iloc[2])
    assert list(seg["y"].iloc[3:5]) == [2.5, 3.5]


def results_frame() -> pd.DataFrame:
    t = _ui.times_ms(T0 + pd.to_timedelta([0, 10, 20, 0, 15], unit="min"))
    return pd.DataFrame({"t": t, "series": ["WS-01 x"] * 3 + ["SCR-01 y"] * 2,
                         "source": ["wire scan"] * 3 + ["screen"] * 2,
                         "value": [150.0, 152.0, 151.0, 300.0, 301.0], "err": [1.0, 1.5, np.nan, np.nan, np.nan],
                         "si": [150e-6, 152e-6, 151e-6, 300e-6, 301e-6], "note": ["σ (m)"] * 5})


def test_results_chart_keeps_every_value_with_its_error_and_si_text():
    data = results_frame()
    window = (ms(T0), ms(T0 + pd.Timedelta(hours=1)))
    events = _echarts.event_frames(pd.DataFrame({"time": [T0 + pd.Timedelta(minutes=5)], "kind": ["step"],
                                                 "label": ["step on 3 BPMs"]}), _ui.times_ms, window)
    option = _echarts.results_chart(data, y_title="σ (µm)", unit="µm", si_unit="m", domain_ms=window,
                                    events=events, event_colours=_ui.EVENT_COLOURS, lines=True)
    check_clean(option)
    assert option["xAxis"]["min"] == window[0] and option["xAxis"]["max"] == window[1] and option["useUTC"]
    markers = [s for s in option["series"] if s.get("tooltip", {}).get("formatter")]
    assert [s["name"] for s in markers] == ["WS-01 x", "SCR-01 y"]
    assert [s["symbol"] for s in markers] == ["circle", "diamond"]
    wire = option["dataset"][markers[0]["datasetIndex"]]["source"]
    assert list(wire["value"]) == [150.0, 152.0, 151.0]
    assert list(wire["text"]) == ["150 ± 1 µm", "152 ± 1.5 µm", "151 µm"]
    assert list(wire["si"]) == ["1.5000e-04 m", "1.5200e-04 m", "1.5100e-04 m"]
    bars = [s for s in option["series"] if s.get("silent") and s["name"] == "WS-01 x"]
    assert len(bars) == 1 and len(option["dataset"][bars[0]["datasetIndex"]]["source"]) == 6  # two bars
    (step,) = [s for s in option["series"] if s["name"] == "step"]
    assert step["markLine"]["data"][0]["xAxis"] == ms(T0 + pd.Timedelta(minutes=5))
    # one colour per series, the same on its markers and its error bars
    assert markers[0]["itemStyle"]["color"] == bars[0]["lineStyle"]["color"] != markers[1]["itemStyle"]["color"]


def test_drift_chart_draws_one_line_per_bpm_and_the_band_of_the_picked_one():
    times = T0 + pd.to_timedelta(np.arange(4) * 2, unit="min")
    bpms = ["BPM-01", "BPM-02", "BPM-03"]
    values = np.arange(12, dtype=float).reshape(4, 3) * 1e-6
    wide = shift.drift_wide(times, bpms, values)
    assert list(wide.columns) == ["t", *bpms]
    np.testing.assert_allclose(wide["BPM-02"], values[:, 1] * 1e6, rtol=1e-6)  # µm, float32
    wide["band lo"], wide["band span"] = np.float32(-1.0), np.float32(2.0)
    window = (ms(times[0]), ms(times[-1] + pd.Timedelta(minutes=2)))
    none = (pd.DataFrame(columns=["t", "kind", "label"]), pd.DataFrame(columns=["t", "kind", "label", "t2"]))
    option = _echarts.drift_chart(wide, bpms, y_title="x drift (µm)", domain_ms=window, events=none,
                                  event_colours=_ui.EVENT_COLOURS, highlight="BPM-03")
    check_clean(option)
    lines = [s for s in option["series"] if "stack" not in s]
    assert [s["encode"]["y"] for s in lines] == bpms
    assert [s["lineStyle"]["color"] for s in lines] == [_echarts.DRIFT_GREY] * 2 + [_echarts.DRIFT_RED]
    band = [s for s in option["series"] if s.get("stack") == "band"]
    assert [s["encode"]["y"] for s in band] == ["band lo", "band span"] and "areaStyle" in band[1]
    # a negative minimum: the span must stack on it, whatever its sign (ECharts' default stacks by sign)
    assert all(s["stackStrategy"] == "all" for s in band)
    assert "legend" not in option  # no events: no legend to read


def test_temperature_band_is_rebuilt_from_min_and_span_like_the_trend():
    t = T0 + pd.to_timedelta([0, 5, 10], unit="min")
    tr = pd.DataFrame({"timestamp": list(t) * 2, "device": ["T-01"] * 3 + ["T-02"] * 3,
                       "value_mean": [20.0, 20.5, 21.0, 30.0, 30.2, 30.4],
                       "value_min": [19.5, 20.0, 20.8, 29.9, 30.0, 30.1],
                       "value_max": [20.4, 21.0, 21.5, 30.1, 30.5, 30.6]}).drop(index=4)  # T-02 misses a bucket
    wide = shift.temperature_wide(tr, ["T-01", "T-02"])
    assert len(wide) == 3
    ref = tr.pivot(index="timestamp", columns="device")  # pandas as the reference
    np.testing.assert_allclose(wide["T-01 lo"] + wide["T-01 span"], ref[("value_max", "T-01")].to_numpy())
    np.testing.assert_allclose(wide["T-02"], ref[("value_mean", "T-02")].to_numpy())
    assert np.isnan(wide["T-02"].iloc[1])  # a missing bucket is a gap, not a made-up value
    window = (ms(t[0]), ms(t[-1]))
    none = (pd.DataFrame(columns=["t", "kind", "label"]), pd.DataFrame(columns=["t", "kind", "label", "t2"]))
    option = _echarts.envelope_chart(wide, ["T-01", "T-02"], y_title="temperature (°C)", unit="°C",
                                     domain_ms=window, events=none, event_colours=_ui.EVENT_COLOURS)
    check_clean(option)
    assert option["tooltip"]["trigger"] == "axis" and option["tooltip"]["valueFormatter"] == "%.4g °C"


@pytest.mark.parametrize(("stored", "shown"), [("degC", "°C"), ("DEGC", "°C"), ("K", "K"), ("Pa", "Pa")])
def test_units_are_shown_the_way_operators_read_them(stored, shown):
    assert _ui.unit_text(stored) == shown


def test_colour_map_keeps_fixed_colours_and_gives_the_rest_distinct_ones():
    colours = _echarts.colour_map(["a", "b", "c"], {"b": "#000000"})
    assert colours["b"] == "#000000"
    assert colours["a"] != colours["c"] and "#000000" not in (colours["a"], colours["c"])
    many = _echarts.colour_map([str(i) for i in range(40)])
    assert len(many) == 40
