"""ECharts options for the Shift page's trends (``st.echarts_chart``), as plain dicts.

Why ECharts there and not Plotly: the first Plotly chart of a browser session
makes the page fetch and compile a 4.7 MB bundle before it draws anything,
about 1 s of a 2-core machine's main thread; Vega-Lite charts cost as much
again, because Streamlit runs Vega's expressions through an interpreter.
Streamlit's ECharts bundle is 1.2 MB and draws thousands of points on a canvas
without per-point expressions.  Measured with ``bench/bench_dashboard.py``; the
other pages keep Plotly (images, heatmaps, fits).

Conventions:

* Times are numbers, milliseconds since 1970-01-01 UTC, on a ``time`` axis with
  ``useUTC``: the axis reads in UTC like every time on the page.
* Values arrive in display units (µm, mm mrad, °C); charts of individual
  results carry the SI value as text for the tooltip.
* Data go in ``dataset`` entries holding pandas frames, which Streamlit sends as
  Arrow; a frame's NaN arrives as ``null`` and breaks a line.
* No JavaScript: only option values and string templates (Streamlit refuses
  callbacks).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

#: Series colours in order (a qualitative palette; event colours are set apart).
PALETTE = ("#1f77b4", "#2ca02c", "#9467bd", "#8c564b", "#e377c2", "#17becf", "#bcbd22", "#7f7f7f",
           "#aec7e8", "#98df8a", "#c5b0d5", "#c49c94", "#f7b6d2", "#9edae5")
#: The thin lines of every BPM on the drift chart, and the one BPM picked out.
DRIFT_GREY = "#5b7fa6"
DRIFT_RED = "#d62728"


def time_text(t_ms: Any) -> np.ndarray:
    """``YYYY-MM-DD HH:MM:SS`` UTC text of times in ms since the epoch (tooltips)."""
    t = np.asarray(t_ms, dtype=float)
    out = np.full(t.shape, "", dtype=object)
    ok = np.isfinite(t)
    out[ok] = [s.replace("T", " ") for s in np.datetime_as_string(t[ok].astype("int64").astype("datetime64[ms]"),
                                                                    unit="s")]
    return out


def base(*, y_title: str, domain_ms: tuple[float, float], tooltip: str = "item",
         legend: bool = True) -> dict:
    """Axes, grid, zoom and tooltip shared by the trends; the time axis spans ``domain_ms``."""
    option: dict[str, Any] = {
        "useUTC": True,
        "animation": False,
        "grid": {"left": 8, "right": 16, "top": 30, "bottom": 64 if legend else 28, "containLabel": True},
        "xAxis": {"type": "time", "min": float(domain_ms[0]), "max": float(domain_ms[1]),
                  "axisLabel": {"formatter": "{HH}:{mm}", "hideOverlap": True},
                  "splitLine": {"show": True, "lineStyle": {"opacity": 0.4}}},
        # the quantity and unit above the axis, where a long title is never cut off
        "yAxis": {"type": "value", "name": y_title, "nameLocation": "end", "nameGap": 12,
                  "nameTextStyle": {"align": "left"}, "scale": True, "splitLine": {"lineStyle": {"opacity": 0.4}}},
        # wheel or drag on the chart zooms and pans in time; no data are dropped meanwhile
        "dataZoom": [{"type": "inside", "xAxisIndex": 0, "filterMode": "none"}],
        "tooltip": {"trigger": tooltip, "confine": True},
        "dataset": [],
        "series": [],
    }
    if legend:
        option["legend"] = {"type": "scroll", "bottom": 0, "left": 0}
    return option


def add_dataset(option: dict, frame: pd.DataFrame) -> int:
    """Append ``frame`` to the option's datasets; its index for ``datasetIndex``."""
    option["dataset"].append({"source": frame.reset_index(drop=True)})
    return len(option["dataset"]) - 1


def event_frames(events: pd.DataFrame | None, times_ms,
                 domain_ms: tuple[float, float]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Point events (``t``) and interval events (``t`` .. ``t2``) inside ``domain_ms``, bands cut to it."""
    cols = ["t", "kind", "label"]
    if events is None or events.empty:
        return pd.DataFrame(columns=cols), pd.DataFrame(columns=[*cols, "t2"])
    t = np.asarray(times_ms(events["time"]), dtype=float)
    end = events["end"] if "end" in events else pd.Series(pd.NaT, index=events.index)
    t2 = np.asarray(times_ms(end), dtype=float)
    band = np.isfinite(t2)
    lo, hi = domain_ms
    keep = np.where(band, (t2 >= lo) & (t < hi), (t >= lo) & (t < hi))
    frame = pd.DataFrame({"t": np.where(band, np.maximum(t, lo), t), "kind": events["kind"].astype(str).to_numpy(),
                          "label": events["label"].astype(str).to_numpy(), "t2": np.minimum(t2, hi)})
    return (frame.loc[~band & keep, cols].reset_index(drop=True),
            frame.loc[band & keep].reset_index(drop=True))


def add_events(option: dict, events: tuple[pd.DataFrame, pd.DataFrame], colours: Mapping[str, str]) -> list[str]:
    """One legend entry per event kind: dotted vertical lines at its times, light bands for intervals.

    Returns the kinds marked, in order.
    """
    points, bands = events
    kinds = list(dict.fromkeys([*points["kind"], *bands["kind"]]))
    for kind in kinds:
        colour = colours.get(kind, "#7f7f7f")
        series: dict[str, Any] = paint({"type": "line", "name": kind, "data": [], "symbol": "none",
                                        "lineStyle": {"type": "dotted"}}, colour)
        p = points[points["kind"] == kind]
        if len(p):
            series["markLine"] = {"symbol": "none", "animation": False, "label": {"show": False},
                                  "lineStyle": {"type": "dotted", "color": colour, "width": 1.2},
                                  "tooltip": {"formatter": "{b}"},
                                  "data": [{"xAxis": float(t), "name": f"{label} · {text} UTC"}
                                           for t, label, text in zip(p["t"], p["label"], time_text(p["t"]),
                                                                     strict=True)]}
        b = bands[bands["kind"] == kind]
        if len(b):
            series["markArea"] = {"silent": False, "itemStyle": {"color": colour, "opacity": 0.15},
                                  "label": {"show": False},
                                  "tooltip": {"formatter": "{b}"},
                                  "data": [[{"xAxis": float(t0), "name": f"{label} · {text} UTC"},
                                            {"xAxis": float(t1)}]
                                           for t0, t1, label, text in zip(b["t"], b["t2"], b["label"],
                                                                          time_text(b["t"]), strict=True)]}
        option["series"].append(series)
    return kinds


def paint(series: dict, colour: str) -> dict:
    """``series`` drawn in ``colour``: its markers, line and area (keeps other style keys)."""
    for part in ("itemStyle", "lineStyle"):
        series[part] = {**series.get(part, {}), "color": colour}
    if "areaStyle" in series:
        series["areaStyle"] = {**series["areaStyle"], "color": colour}
    return series


def finish(option: dict) -> dict:
    """Turn each series' ``color`` shorthand into explicit marker, line and area colours."""
    for series in option["series"]:
        if "color" in series:
            paint(series, series.pop("color"))
    return option


def colour_map(names: Sequence[str], fixed: Mapping[str, str] | None = None) -> dict[str, str]:
    """A colour per series name: ``fixed`` first, then the palette in order."""
    fixed = dict(fixed or {})
    rest = iter(PALETTE * (1 + len(names) // len(PALETTE)))
    return {n: fixed[n] if n in fixed else next(rest) for n in names}


def error_segments(t: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> pd.DataFrame:
    """Vertical error bars as one broken line: (t, lo), (t, hi), gap, ... (NaN where no error)."""
    ok = np.isfinite(lo) & np.isfinite(hi) & np.isfinite(t)
    t, lo, hi = t[ok], lo[ok], hi[ok]
    xs = np.column_stack([t, t, np.full(t.size, np.nan)]).reshape(-1)
    ys = np.column_stack([lo, hi, np.full(t.size, np.nan)]).reshape(-1)
    return pd.DataFrame({"t": xs, "y": ys})


def band_series(name: str, index: int, lo: str, span: str, *, stack: str, colour: str, opacity: float) -> list[dict]:
    """A min/max band from dataset ``index``: an invisible line at column ``lo``, column ``span`` stacked on it.

    ``stackStrategy: "all"``: ECharts otherwise stacks a positive span only on the
    positive part of the stack, so a band with a negative minimum would start at 0.
    """
    common = {"type": "line", "name": name, "datasetIndex": index, "stack": stack, "stackStrategy": "all",
              "symbol": "none", "lineStyle": {"opacity": 0}, "silent": True, "tooltip": {"show": False},
              "color": colour}
    return [{**common, "encode": {"x": "t", "y": lo}},
            {**common, "encode": {"x": "t", "y": span}, "areaStyle": {"opacity": opacity}}]


def results_chart(data: pd.DataFrame, *, y_title: str, unit: str, si_unit: str, domain_ms: tuple[float, float],
                  events: tuple[pd.DataFrame, pd.DataFrame], event_colours: Mapping[str, str],
                  lines: bool = False, fixed_colours: Mapping[str, str] | None = None) -> dict:
    """Individual results over time: a marker per result with its error bar.

    ``data`` columns: ``t`` (ms), ``series`` (legend entry), ``source`` (marker:
    ``"screen"`` diamonds, anything else circles), ``value`` and ``err``
    (display units; ``err`` may be NaN), ``si`` (the value in SI) and ``note``.
    ``lines`` joins each series' markers in time order.
    """
    option = base(y_title=y_title, domain_ms=domain_ms)
    names = list(dict.fromkeys(data["series"]))
    colours = colour_map(names, fixed_colours)
    for name in names:
        grp = data[data["series"] == name].sort_values("t", kind="stable")
        t, value = grp["t"].to_numpy(float), grp["value"].to_numpy(float)
        err = grp["err"].to_numpy(float)
        frame = pd.DataFrame({
            "t": t, "value": value,
            "text": [f"{v:.4g} ± {e:.2g} {unit}" if np.isfinite(e) else f"{v:.4g} {unit}"
                     for v, e in zip(value, err, strict=True)],
            "si": [f"{s:.4e} {si_unit}" for s in grp["si"].to_numpy(float)],
            "time": time_text(t), "note": grp["note"].astype(str).to_numpy()})
        index = add_dataset(option, frame)
        screen = bool((grp["source"] == "screen").all())
        option["series"].append({
            "type": "line" if lines else "scatter", "name": name, "datasetIndex": index,
            "encode": {"x": "t", "y": "value"}, "color": colours[name],
            "symbol": "diamond" if screen else "circle", "symbolSize": 7 if screen else 8,
            **({"showSymbol": True, "lineStyle": {"width": 1, "opacity": 0.6}} if lines else {}),
            "tooltip": {"formatter": "{a}<br/>{@time} UTC<br/><b>{@text}</b><br/>SI: {@si}<br/>{@note}"}})
        bars = error_segments(t, value - err, value + err)
        if len(bars):
            option["series"].append({
                "type": "line", "name": name, "datasetIndex": add_dataset(option, bars),
                "encode": {"x": "t", "y": "y"}, "color": colours[name], "symbol": "none", "silent": True,
                "lineStyle": {"width": 1}, "tooltip": {"show": False}, "connectNulls": False})
    add_events(option, events, event_colours)
    return finish(option)


def envelope_chart(wide: pd.DataFrame, channels: Sequence[str], *, y_title: str, unit: str,
                   domain_ms: tuple[float, float], events: tuple[pd.DataFrame, pd.DataFrame],
                   event_colours: Mapping[str, str]) -> dict:
    """Decimated channels on common buckets: each bucket's mean as a line, its min/max as a band.

    ``wide`` columns: ``t`` (ms) and, per channel ``c``, ``c`` (mean),
    ``c lo`` (min) and ``c span`` (max − min), in display units.
    """
    option = base(y_title=y_title, domain_ms=domain_ms, tooltip="axis")
    option["tooltip"]["valueFormatter"] = f"%.4g {unit}"
    index = add_dataset(option, wide)
    colours = colour_map(list(channels))
    for ch in channels:
        option["series"].extend(band_series(ch, index, f"{ch} lo", f"{ch} span", stack=f"band {ch}",
                                            colour=colours[ch], opacity=0.25))
        option["series"].append({"type": "line", "name": ch, "datasetIndex": index, "encode": {"x": "t", "y": ch},
                                 "symbol": "none", "lineStyle": {"width": 1.5}, "color": colours[ch]})
    add_events(option, events, event_colours)
    return finish(option)


def drift_chart(wide: pd.DataFrame, bpms: Sequence[str], *, y_title: str, domain_ms: tuple[float, float],
                events: tuple[pd.DataFrame, pd.DataFrame], event_colours: Mapping[str, str],
                highlight: str | None = None) -> dict:
    """Every BPM's drift as a thin grey line; ``highlight`` in red over the min/max band of its readings.

    ``wide`` columns: ``t`` (ms), one column per BPM (display units, NaN breaks
    the line) and, for ``highlight``, ``band lo`` and ``band span``.
    """
    option = base(y_title=y_title, domain_ms=domain_ms, legend=False)
    index = add_dataset(option, wide)
    for bpm in bpms:
        mine = bpm == highlight
        option["series"].append({
            "type": "line", "name": bpm, "datasetIndex": index, "encode": {"x": "t", "y": bpm},
            "symbol": "circle", "showSymbol": False, "symbolSize": 4, "connectNulls": False,
            "color": DRIFT_RED if mine else DRIFT_GREY, "z": 3 if mine else 2,
            "lineStyle": {"width": 1.6 if mine else 0.8, "opacity": 1.0 if mine else 0.55},
            "tooltip": {"valueFormatter": "%.1f µm"}})
    if highlight is not None and "band lo" in wide:
        option["series"].extend(band_series(f"{highlight} min/max", index, "band lo", "band span", stack="band",
                                            colour=DRIFT_RED, opacity=0.2))
    kinds = add_events(option, events, event_colours)
    if kinds:  # the only legend here: which event is which (the BPMs are named in the caption)
        option["legend"] = {"type": "scroll", "bottom": 0, "left": 0, "data": kinds}
        option["grid"]["bottom"] = 56
    return finish(option)
