"""The shift handover report: what the beam did between two times, on one page.

:func:`build_report` gathers, for a time window, everything an operator hands
over at the end of a shift, using only library calls:

* the latest quad-scan emittance per plane (stored ``scans`` results);
* the orbit over the window from :func:`diagnostics.orbit.analyze_orbit` on the
  stored BPM readings (and slow channels): the BPM that drifted most, orbit
  steps grouped into events, out-of-tolerance intervals, transmission-loss
  events, correlations with slow channels;
* beam sizes from the stored ``profiles`` and ``frames`` results;
* when each source last delivered data (:meth:`Store.last_seen`).

:func:`render_html` turns the :class:`Report` into one self-contained HTML page:
the plotly.js library is inlined once, nothing is fetched from the network, so
the file can be mailed or archived and opened anywhere.  The page carries the
safety note of :data:`diagnostics.SAFETY_NOTE`.

Values inside the :class:`Report` are SI (m, rad, s) like the rest of the
library; tables and headline texts are formatted for people (um, mm mrad,
UTC clock times).  A section that cannot be built (missing data, an analysis
that raised) is left out with the reason in :attr:`Report.problems`, so one
bad input never costs the whole report.
"""

from __future__ import annotations

import html
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from diagnostics import SAFETY_NOTE, __version__
from diagnostics.errors import InputError
from diagnostics.orbit import LimitViolation as LimitEvent  # a merged run of intervals, same fields

#: Keys of the tables a report can hold, in page order (see :meth:`Report.table`).
REPORT_TABLES = ("emittance", "orbit", "steps", "limits", "losses", "correlations", "sizes", "data")

#: Steps in different BPMs closer in time than this belong to one event, s.
STEP_GROUP_S = 30.0

#: How many BPMs the drift plot shows per plane (the largest drifts).
N_DRIFT_TRACES = 4

_UM = 1e6  # m -> um for display
_MM_MRAD = 1e6  # m rad -> mm mrad for display


# --------------------------------------------------------------------------- data classes


@dataclass(frozen=True)
class Headline:
    """One headline number of the report.

    Attributes
    ----------
    key : str
        Stable identifier (``emittance_x``, ``emittance_y``, ``worst_drift``,
        ``steps``, ``out_of_limit``, ``losses``, ``last_data``).
    label : str
        What it is, for people.
    value : float or None
        The number in SI (m, m rad), a count, or for ``last_data`` the newest
        time as Unix epoch seconds; ``None`` when there is none.
    text : str
        The value formatted for display (with its unit), or the empty-state text.
    detail : str
        Where it comes from / what else to know.
    flags : tuple of str
        Quality flags of the underlying result.
    """

    key: str
    label: str
    value: float | None
    text: str
    detail: str = ""
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class StepEvent:
    """Orbit steps in several BPMs at (nearly) the same time, in one plane.

    ``time`` is the time of the largest step; ``bpms`` in line order; ``largest_m`` the
    step of largest magnitude (signed, m) and ``largest_bpm`` where it was.
    """

    time: pd.Timestamp
    plane: str
    bpms: tuple[str, ...]
    largest_m: float
    largest_err_m: float
    largest_bpm: str


@dataclass(frozen=True, eq=False)
class ReportTable:
    """A display table: ``frame`` has ready-to-show text/number columns with units in the headers."""

    key: str
    title: str
    frame: pd.DataFrame
    note: str = ""


@dataclass(frozen=True, eq=False)
class ReportFigure:
    """A plotly figure of one section."""

    key: str
    title: str
    figure: Any


@dataclass(frozen=True, eq=False)
class Report:
    """The shift handover report of one time window.

    Attributes
    ----------
    start, end : pandas.Timestamp
        The window, UTC, ``[start, end)``.
    store : str
        The store's folder.
    notes : str
        Free text of the operator handing over.
    headlines : tuple of Headline
    tables : tuple of ReportTable
    figures : tuple of ReportFigure
    emittance : mapping plane -> dict
        The latest valid scan result per plane (SI keys: ``norm_emittance_m_rad``,
        ``norm_emittance_err_m_rad``, ``beta_m``, ``alpha``, ``bmag``, ``scan_name``,
        ``timestamp``, ``flags``).
    orbit : diagnostics.orbit.OrbitReport or None
        The orbit analysis of the window, when there were BPM readings.
    step_events, limit_events : tuple
    loss_events : tuple of diagnostics.orbit.LossEvent
    last_data : mapping kind -> pandas.Timestamp or None
        Last data time per source kind in the whole store.
    data_range : mapping kind -> (first, last) or None
        What the store holds per kind (used by the empty state).
    counts : mapping kind -> int
        Items of each kind found in the window.
    empty : bool
        True when the window holds no data at all.
    problems : tuple of str
        Sections left out, with the reason.
    generated : pandas.Timestamp
        When the report was built (UTC).
    code_version : str
    """

    start: pd.Timestamp
    end: pd.Timestamp
    store: str
    notes: str
    headlines: tuple[Headline, ...]
    tables: tuple[ReportTable, ...]
    figures: tuple[ReportFigure, ...]
    emittance: Mapping[str, Mapping[str, Any]]
    orbit: Any
    step_events: tuple[StepEvent, ...]
    limit_events: tuple[LimitEvent, ...]
    loss_events: tuple[Any, ...]
    last_data: Mapping[str, pd.Timestamp | None]
    data_range: Mapping[str, tuple[pd.Timestamp, pd.Timestamp] | None]
    counts: Mapping[str, int]
    empty: bool
    problems: tuple[str, ...] = ()
    generated: pd.Timestamp | None = None
    code_version: str = __version__

    @property
    def title(self) -> str:
        """``Shift handover <start> – <end> UTC``, the page title."""
        return f"Shift handover {_clock(self.start, date=True)} – {_clock(self.end, date=True)} UTC"

    def headline(self, key: str) -> Headline:
        """The headline with ``key``."""
        for item in self.headlines:
            if item.key == key:
                return item
        raise KeyError(key)

    def table(self, key: str) -> ReportTable:
        """The table with ``key``."""
        for item in self.tables:
            if item.key == key:
                return item
        raise KeyError(key)


# --------------------------------------------------------------------------- small helpers


def parse_time(value: Any, what: str) -> pd.Timestamp:
    """A time argument as a UTC timestamp (naive means UTC)."""
    try:
        ts = pd.Timestamp(value)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"report {what} {value!r}: expected an ISO 8601 time such as 2026-11-30T06:00Z"
        ) from exc
    if pd.isna(ts):
        raise InputError(
            f"report {what} {value!r}: expected an ISO 8601 time such as 2026-11-30T06:00Z"
        )
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")


def _flags(value: Any) -> tuple[str, ...]:
    """Flags as stored (JSON text, list, array or missing) -> tuple of str."""
    if value is None:
        return ()
    if isinstance(value, str):
        text = value.strip()
        if not text:
            return ()
        try:
            value = json.loads(text)
        except json.JSONDecodeError:
            return tuple(f for f in text.split(",") if f)
    if isinstance(value, float) and math.isnan(value):
        return ()
    return tuple(str(f) for f in value)


def _num(value: Any) -> float | None:
    """A finite float, or None."""
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _clock(ts: Any, *, date: bool = False) -> str:
    """``HH:MM:SS`` UTC (with the date when asked), '-' when missing."""
    if ts is None or (isinstance(ts, float) and math.isnan(ts)) or pd.isna(ts):
        return "-"
    t = pd.Timestamp(ts)
    t = t.tz_localize("UTC") if t.tzinfo is None else t.tz_convert("UTC")
    return t.strftime("%Y-%m-%d %H:%M:%S" if date else "%H:%M:%S")


def _fmt(value: float | None, scale: float = 1.0, digits: int = 3) -> str:
    if value is None or not math.isfinite(value):
        return "-"
    return f"{value * scale:.{digits}g}"


def _pm(value: float | None, err: float | None, scale: float, unit: str) -> str:
    """``value ± err unit`` with the error to two significant digits."""
    if value is None:
        return "-"
    if err is None or err <= 0:
        return f"{value * scale:.3g} {unit}"
    e = err * scale
    decimals = max(0, 1 - int(math.floor(math.log10(e))))
    return f"{value * scale:.{decimals}f} ± {e:.{decimals}f} {unit}"


# --------------------------------------------------------------------------- pure summaries


def group_steps(
    steps: Sequence[tuple[str, str, Any]],
    bpm_order: Sequence[str],
    *,
    within_s: float = STEP_GROUP_S,
) -> tuple[StepEvent, ...]:
    """Group per-BPM steps of one plane that happen within ``within_s`` of each other.

    Parameters
    ----------
    steps : sequence of (bpm, plane, Step)
        As :attr:`diagnostics.orbit.OrbitReport.steps` gives them.
    bpm_order : sequence of str
        Line order of the BPMs.
    within_s : float
        Largest gap between consecutive step times of one event, s.

    Returns
    -------
    tuple of StepEvent, by time.
    """
    order = {b: i for i, b in enumerate(bpm_order)}
    events: list[StepEvent] = []
    for plane in sorted({p for _, p, _ in steps}):
        items = sorted((s for s in steps if s[1] == plane), key=lambda s: s[2].time)
        group: list[tuple[str, str, Any]] = []
        for item in items + [None]:  # a sentinel closes the last group
            if group and (
                item is None or (item[2].time - group[-1][2].time).total_seconds() > within_s
            ):
                big = max(group, key=lambda s: abs(s[2].size_m))
                events.append(
                    StepEvent(
                        time=big[2].time,
                        plane=plane,
                        bpms=tuple(
                            sorted({s[0] for s in group}, key=lambda b: order.get(b, len(order)))
                        ),
                        largest_m=float(big[2].size_m),
                        largest_err_m=float(big[2].size_err_m),
                        largest_bpm=big[0],
                    )
                )
                group = []
            if item is not None:
                group.append(item)
    return tuple(sorted(events, key=lambda e: (e.time, e.plane)))


def merge_violations(violations: Sequence[Any]) -> tuple[LimitEvent, ...]:
    """Merge back-to-back limit intervals of the same BPM, plane and quantity.

    Intervals that touch or overlap (``next.start <= current.end``) become one
    :class:`LimitEvent` with the worst value of its parts.
    """
    out: list[LimitEvent] = []
    key = lambda v: (v.bpm, v.plane, v.quantity, v.start)  # noqa: E731
    current: LimitEvent | None = None
    for v in sorted(violations, key=key):
        if (
            current is not None
            and (current.bpm, current.plane, current.quantity) == (v.bpm, v.plane, v.quantity)
            and v.start <= current.end
        ):
            current = LimitEvent(
                current.bpm,
                current.plane,
                current.quantity,
                current.start,
                max(current.end, v.end),
                max(current.worst_m, v.worst_m),
                v.limit_m,
            )
            continue
        if current is not None:
            out.append(current)
        current = LimitEvent(
            v.bpm, v.plane, v.quantity, v.start, v.end, float(v.worst_m), float(v.limit_m)
        )
    if current is not None:
        out.append(current)
    return tuple(sorted(out, key=lambda e: (e.start, e.bpm, e.plane)))


def latest_emittance(scans: pd.DataFrame) -> dict[str, dict[str, Any]]:
    """The latest scan result per plane with a finite normalised emittance.

    ``scans`` is a stored ``scans`` result table (one row per scan with ``x_*`` and
    ``y_*`` columns).  Provisional fits of unfinished scans are skipped.
    """
    out: dict[str, dict[str, Any]] = {}
    if scans is None or scans.empty:
        return out
    rows = scans.sort_values("timestamp")
    if "provisional" in rows.columns:
        rows = rows[~rows["provisional"].fillna(False).astype(bool)]
    for plane in ("x", "y"):
        col = f"{plane}_norm_emittance_m_rad"
        if col not in rows.columns:
            continue
        good = rows[pd.to_numeric(rows[col], errors="coerce").notna()]
        if good.empty:
            continue
        r = good.iloc[-1]
        out[plane] = {
            "norm_emittance_m_rad": _num(r[col]),
            "norm_emittance_err_m_rad": _num(r.get(f"{plane}_norm_emittance_err_m_rad")),
            "emittance_m_rad": _num(r.get(f"{plane}_emittance_m_rad")),
            "beta_m": _num(r.get(f"{plane}_beta_m")),
            "alpha": _num(r.get(f"{plane}_alpha")),
            "bmag": _num(r.get(f"{plane}_bmag")),
            "scan_name": str(r.get("scan_name", "")),
            "magnet": r.get("magnet"),
            "monitor": r.get("monitor"),
            "timestamp": pd.Timestamp(r["timestamp"]),
            "flags": _flags(r.get(f"{plane}_flags")),
            "message": str(r.get(f"{plane}_message") or ""),
        }
    return out


def _failed_scans(scans: pd.DataFrame, plane: str, after: pd.Timestamp | None) -> list[str]:
    """Notes on scans (after ``after``) that gave no value in ``plane``, newest first."""
    col = f"{plane}_norm_emittance_m_rad"
    if scans.empty or "timestamp" not in scans.columns:
        return []
    rows = scans.sort_values("timestamp", ascending=False)
    if after is not None:
        rows = rows[rows["timestamp"] > after]
    notes = []
    for _, r in rows.iterrows():
        if col in rows.columns and _num(r[col]) is not None:
            continue
        why = str(r.get(f"{plane}_message") or r.get("message") or "no value")
        notes.append(
            f"{r.get('scan_name', 'a scan')} at {_clock(r['timestamp'])} gave no value: {why}"
        )
    return notes[:2]


def worst_drift(orbit_report: Any) -> Any:
    """The BPM-plane summary with the largest ``max_abs_drift_m`` (None when there is none)."""
    best = None
    for s in getattr(orbit_report, "summaries", ()):
        if _num(s.max_abs_drift_m) is None:
            continue
        if best is None or s.max_abs_drift_m > best.max_abs_drift_m:
            best = s
    return best


# --------------------------------------------------------------------------- tables


def _emittance_table(scans: pd.DataFrame) -> pd.DataFrame:
    rows = []
    for _, r in scans.sort_values("timestamp").iterrows():
        row = {
            "time (UTC)": _clock(r["timestamp"]),
            "scan": r.get("scan_name", ""),
            "magnet": r.get("magnet") or "-",
            "monitor": r.get("monitor") or "-",
        }
        for p in ("x", "y"):
            row[f"εn {p} (mm mrad)"] = _pm(
                _num(r.get(f"{p}_norm_emittance_m_rad")),
                _num(r.get(f"{p}_norm_emittance_err_m_rad")),
                _MM_MRAD,
                "",
            ).strip()
            row[f"β {p} (m)"] = _fmt(_num(r.get(f"{p}_beta_m")))
            row[f"α {p}"] = _fmt(_num(r.get(f"{p}_alpha")))
            row[f"Bmag {p}"] = _fmt(_num(r.get(f"{p}_bmag")), digits=4)
        flags = _flags(r.get("flags"))
        row["flags"] = ", ".join(flags) or "ok"
        row["message"] = str(r.get("message") or "")
        rows.append(row)
    return pd.DataFrame(rows)


def _orbit_table(report: Any) -> pd.DataFrame:
    rows = []
    for s in report.summaries:
        rows.append(
            {
                "BPM": s.bpm,
                "plane": s.plane,
                "drift at end (µm)": _fmt(_num(s.drift_m), _UM),
                "max |drift| (µm)": _fmt(_num(s.max_abs_drift_m), _UM),
                "drift rate (µm/h)": _pm(
                    _num(s.drift_rate_m_per_h), _num(s.drift_rate_err_m_per_h), _UM, ""
                ).strip(),
                "jitter rms (µm)": _fmt(_num(s.jitter_rms_m), _UM),
                "steps": len(s.steps),
                "line (Hz)": _fmt(_num(s.peak_frequency_Hz)),
                "line amplitude (µm)": _fmt(_num(s.peak_amplitude_m), _UM),
                "flags": ", ".join(s.flags) or "ok",
            }
        )
    return pd.DataFrame(rows)


def _steps_table(events: Sequence[StepEvent]) -> pd.DataFrame:
    return pd.DataFrame(
        [
            {
                "time (UTC)": _clock(e.time),
                "plane": e.plane,
                "BPMs": f"{e.bpms[0]} … {e.bpms[-1]} ({len(e.bpms)})"
                if len(e.bpms) > 2
                else ", ".join(e.bpms),
                "largest step (µm)": _pm(e.largest_m, e.largest_err_m, _UM, "").strip(),
                "at": e.largest_bpm,
            }
            for e in events
        ],
        columns=["time (UTC)", "plane", "BPMs", "largest step (µm)", "at"],
    )


def _limits_table(events: Sequence[LimitEvent]) -> pd.DataFrame:
    return pd.DataFrame(
        [
            {
                "BPM": e.bpm,
                "plane": e.plane,
                "quantity": e.quantity,
                "from (UTC)": _clock(e.start),
                "to (UTC)": _clock(e.end),
                "worst (µm)": _fmt(e.worst_m, _UM),
                "limit (µm)": _fmt(e.limit_m, _UM),
            }
            for e in events
        ],
        columns=["BPM", "plane", "quantity", "from (UTC)", "to (UTC)", "worst (µm)", "limit (µm)"],
    )


def _loss_table(events: Sequence[Any]) -> pd.DataFrame:
    return pd.DataFrame(
        [
            {
                "between": f"{e.upstream} → {e.downstream}",
                "from (UTC)": _clock(e.start),
                "to (UTC)": _clock(e.end),
                "duration (min)": _fmt(e.duration_s / 60.0),
                "loss (%)": _pm(e.size, e.size_err, 100.0, "").strip(),
            }
            for e in events
        ],
        columns=["between", "from (UTC)", "to (UTC)", "duration (min)", "loss (%)"],
    )


def _correlation_table(report: Any, n: int = 8) -> pd.DataFrame:
    """The strongest slow-channel correlation of each BPM plane, the top ``n`` by |r|."""
    best: dict[tuple[str, str], Any] = {}
    for c in getattr(report, "correlations", ()):
        r = _num(c.pearson_r)
        if r is None:
            continue
        key = (c.bpm, c.plane)
        if key not in best or abs(r) > abs(best[key].pearson_r):
            best[key] = c
    top = sorted(best.values(), key=lambda c: -abs(c.pearson_r))[:n]
    return pd.DataFrame(
        [
            {
                "BPM": c.bpm,
                "plane": c.plane,
                "channel": c.channel,
                f"slope (µm per {c.unit or 'unit'})": _pm(
                    _num(c.slope_m_per_unit), _num(c.slope_err_m_per_unit), _UM, ""
                ).strip(),
                "lag (min)": _fmt(lag / 60.0 if (lag := _num(c.lag_s)) is not None else None),
                "r": _fmt(_num(c.pearson_r)),
            }
            for c in top
        ]
    )


def _sizes_table(profiles: pd.DataFrame, frames: pd.DataFrame) -> pd.DataFrame:
    """Routine beam sizes per monitor and plane (scan steps excluded)."""
    rows = []
    if profiles is not None and not profiles.empty:
        routine = profiles[profiles["scan"].isna()] if "scan" in profiles.columns else profiles
        for (device, plane), g in routine.groupby(["device", "plane"], sort=True):
            rows.append(_size_row(device, plane, g, "sigma_m"))
    if frames is not None and not frames.empty:
        routine = frames[frames["scan"].isna()] if "scan" in frames.columns else frames
        for device, g in routine.groupby("device", sort=True):
            for plane in ("x", "y"):
                rows.append(_size_row(device, plane, g, f"sigma_{plane}_m"))
    return pd.DataFrame(
        rows,
        columns=[
            "monitor",
            "plane",
            "n",
            "latest (UTC)",
            "latest σ (µm)",
            "mean σ (µm)",
            "min σ (µm)",
            "max σ (µm)",
            "flagged",
        ],
    )


def _size_row(device: str, plane: str, g: pd.DataFrame, column: str) -> dict[str, Any]:
    g = g.sort_values("timestamp")
    values = pd.to_numeric(g[column], errors="coerce")
    flagged = int(sum(bool(_flags(f)) for f in g["flags"])) if "flags" in g.columns else 0
    finite = values.dropna()
    return {
        "monitor": device,
        "plane": plane,
        "n": len(g),
        "latest (UTC)": _clock(g["timestamp"].iloc[-1]),
        "latest σ (µm)": _fmt(_num(finite.iloc[-1]) if len(finite) else None, _UM),
        "mean σ (µm)": _fmt(_num(finite.mean()) if len(finite) else None, _UM),
        "min σ (µm)": _fmt(_num(finite.min()) if len(finite) else None, _UM),
        "max σ (µm)": _fmt(_num(finite.max()) if len(finite) else None, _UM),
        "flagged": flagged,
    }


def _data_table(
    last: Mapping[str, Any], ranges: Mapping[str, Any], counts: Mapping[str, int], end: pd.Timestamp
) -> pd.DataFrame:
    rows = []
    for kind in sorted(set(last) | set(counts)):
        span = ranges.get(kind)
        t = last.get(kind)
        behind = "-"
        if t is not None and not pd.isna(t):
            gap = (end - pd.Timestamp(t)).total_seconds()
            behind = f"{gap / 60.0:.0f} min" if gap >= 0 else "after the window"
        rows.append(
            {
                "source": kind,
                "in window": counts.get(kind, 0),
                "last data in store (UTC)": _clock(t, date=True),
                "before window end": behind,
                "store holds from (UTC)": _clock(span[0], date=True) if span else "-",
            }
        )
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------- figures


def _layout(fig: Any, title: str, y_title: str) -> Any:
    fig.update_layout(
        title=title,
        template="plotly_white",
        height=360,
        margin={"l": 60, "r": 20, "t": 50, "b": 40},
        legend={"orientation": "h", "y": -0.2},
        yaxis_title=y_title,
        xaxis_title="time (UTC)",
    )
    return fig


def _drift_figure(report: Any) -> Any:
    import plotly.graph_objects as go
    from plotly.subplots import make_subplots

    trends = report.trends
    fig = make_subplots(
        rows=2, cols=1, shared_xaxes=True, subplot_titles=("x", "y"), vertical_spacing=0.12
    )
    times = pd.DatetimeIndex(trends.times).tz_convert("UTC").tz_localize(None)
    for row, plane, data in ((1, "x", trends.drift_x_m), (2, "y", trends.drift_y_m)):
        peaks = (
            np.nanmax(np.abs(data), axis=0)
            if data.size and np.isfinite(data).any()
            else np.zeros(len(trends.bpms))
        )
        peaks = np.where(np.isfinite(peaks), peaks, -1.0)
        for j in np.argsort(-peaks)[:N_DRIFT_TRACES]:
            fig.add_trace(
                go.Scatter(
                    x=times, y=data[:, j] * _UM, mode="lines", name=f"{trends.bpms[j]} {plane}"
                ),
                row=row,
                col=1,
            )
        fig.update_yaxes(title_text="drift (µm)", row=row, col=1)
    fig.update_layout(
        title=f"Orbit drift from the reference, the {N_DRIFT_TRACES} largest per plane",
        template="plotly_white",
        height=520,
        margin={"l": 60, "r": 20, "t": 60, "b": 40},
        legend={"orientation": "h", "y": -0.12},
    )
    return fig


def _transmission_figure(report: Any) -> Any | None:
    import plotly.graph_objects as go

    trends = report.trends
    data = trends.transmission
    if data.size == 0 or not np.isfinite(data).any():
        return None
    times = pd.DatetimeIndex(trends.times).tz_convert("UTC").tz_localize(None)
    lows = np.nanmin(data, axis=0)
    lows = np.where(np.isfinite(lows), lows, np.inf)
    fig = go.Figure()
    for j in np.argsort(lows)[:3]:
        name = f"{trends.bpms[j]} → {trends.bpms[j + 1]}"
        fig.add_trace(go.Scatter(x=times, y=(data[:, j] - 1.0) * 100.0, mode="lines", name=name))
    return _layout(fig, "Relative transmission change, the 3 lowest station pairs", "change (%)")


def _emittance_figure(scans: pd.DataFrame) -> Any | None:
    import plotly.graph_objects as go

    fig = go.Figure()
    any_point = False
    for plane, symbol in (("x", "circle"), ("y", "square")):
        col = f"{plane}_norm_emittance_m_rad"
        if col not in scans.columns:
            continue
        v = pd.to_numeric(scans[col], errors="coerce")
        e = pd.to_numeric(scans.get(f"{plane}_norm_emittance_err_m_rad"), errors="coerce")
        ok = v.notna()
        if not ok.any():
            continue
        any_point = True
        t = pd.DatetimeIndex(scans.loc[ok, "timestamp"]).tz_convert("UTC").tz_localize(None)
        fig.add_trace(
            go.Scatter(
                x=t,
                y=v[ok] * _MM_MRAD,
                mode="markers",
                name=f"εn {plane}",
                marker={"symbol": symbol, "size": 9},
                error_y={
                    "type": "data",
                    "array": (e[ok].fillna(0) * _MM_MRAD).to_numpy(),
                    "visible": True,
                },
                text=scans.loc[ok, "scan_name"],
                hovertemplate="%{text}<br>%{y:.3f} mm mrad<extra></extra>",
            )
        )
    return (
        _layout(fig, "Normalised emittance of the quad scans", "εn (mm mrad)")
        if any_point
        else None
    )


def _sizes_figure(profiles: pd.DataFrame, frames: pd.DataFrame) -> Any | None:
    import plotly.graph_objects as go

    fig = go.Figure()
    if profiles is not None and not profiles.empty:
        routine = profiles[profiles["scan"].isna()] if "scan" in profiles.columns else profiles
        for (device, plane), g in routine.groupby(["device", "plane"], sort=True):
            t = pd.DatetimeIndex(g["timestamp"]).tz_convert("UTC").tz_localize(None)
            fig.add_trace(
                go.Scatter(
                    x=t,
                    y=pd.to_numeric(g["sigma_m"], errors="coerce") * _UM,
                    mode="lines+markers",
                    name=f"{device} {plane}",
                )
            )
    if frames is not None and not frames.empty:
        routine = frames[frames["scan"].isna()] if "scan" in frames.columns else frames
        for device, g in routine.groupby("device", sort=True):
            t = pd.DatetimeIndex(g["timestamp"]).tz_convert("UTC").tz_localize(None)
            for plane in ("x", "y"):
                fig.add_trace(
                    go.Scatter(
                        x=t,
                        y=pd.to_numeric(g[f"sigma_{plane}_m"], errors="coerce") * _UM,
                        mode="lines",
                        name=f"{device} {plane}",
                    )
                )
    return (
        _layout(fig, "Beam sizes (rms) at the wire scanners and screens", "σ (µm)")
        if fig.data
        else None
    )


def _slow_figures(trend: pd.DataFrame, units: Mapping[str, str]) -> list[ReportFigure]:
    import plotly.graph_objects as go

    out = []
    by_unit: dict[str, list[str]] = {}
    for channel in sorted(trend["device"].unique()):
        by_unit.setdefault(units.get(channel, ""), []).append(channel)
    for unit, channels in sorted(by_unit.items()):
        fig = go.Figure()
        for channel in channels:
            g = trend[trend["device"] == channel]
            t = pd.DatetimeIndex(g["timestamp"]).tz_convert("UTC").tz_localize(None)
            fig.add_trace(go.Scatter(x=t, y=g["value_mean"], mode="lines", name=channel))
        label = unit or "value"
        out.append(
            ReportFigure(
                f"slow_{label}",
                f"Slow channels ({label})",
                _layout(fig, f"Slow channels in {label} (1-minute means)", label),
            )
        )
    return out


# --------------------------------------------------------------------------- the report


def _safe(problems: list[str], what: str, fn: Any, default: Any = None) -> Any:
    """Run one section; on failure note the reason and go on with ``default``.

    A handover report must come out even when one source is broken, so any
    exception of a section is turned into a line of :attr:`Report.problems`.
    """
    try:
        return fn()
    except Exception as exc:  # noqa: BLE001 - reported in the page, see the docstring
        problems.append(f"{what}: {type(exc).__name__}: {exc}")
        return default


def _orbit_section(
    store: Any, t0: pd.Timestamp, t1: pd.Timestamp, slow: pd.DataFrame, problems: list[str]
) -> tuple[Any, int]:
    """Orbit analysis of the window's BPM readings: ``(OrbitReport or None, n_readings)``.

    The readings themselves (millions of rows for a shift) are not kept.
    """
    from diagnostics import orbit

    bpm = _safe(problems, "BPM readings", lambda: store.read_bpm(start=t0, end=t1), pd.DataFrame())
    if not isinstance(bpm, pd.DataFrame) or bpm.empty:
        return None, 0
    result = _safe(
        problems,
        "orbit analysis",
        lambda: orbit.analyze_orbit(bpm, slow_df=slow if len(slow) else None),
    )
    return result, len(bpm)


def build_report(store: Any, *, start: Any, end: Any, notes: str = "") -> Report:
    """Build the shift handover report of ``[start, end)`` from a store.

    Parameters
    ----------
    store : diagnostics.store.Store
        Where the raw data and the analysis results are.
    start, end : time-like
        The window (anything :class:`pandas.Timestamp` takes; naive means UTC).
    notes : str
        The operator's free-text notes, shown verbatim (escaped) on the page.

    Returns
    -------
    Report

    Raises
    ------
    diagnostics.errors.InputError
        When ``start``/``end`` are not times or ``end`` is not after ``start``.
    """
    t0, t1 = parse_time(start, "start"), parse_time(end, "end")
    if t1 <= t0:
        raise InputError(
            f"report window: end {t1.isoformat()} must be after start {t0.isoformat()}"
        )
    problems: list[str] = []
    headlines: list[Headline] = []
    tables: list[ReportTable] = []
    figures: list[ReportFigure] = []
    counts: dict[str, int] = {}

    last = _safe(problems, "last data per source", store.last_seen, {}) or {}
    ranges: dict[str, Any] = {}
    for kind in ("bpm", "slow", "profiles", "frames", "scans"):
        ranges[kind] = _safe(problems, f"time range of {kind}", lambda k=kind: store.time_range(k))

    # ---------------------------------------------------------------- emittance
    scans = _safe(
        problems,
        "scan results",
        lambda: store.read_results("scans", start=t0, end=t1),
        pd.DataFrame(),
    )
    scans = scans if isinstance(scans, pd.DataFrame) else pd.DataFrame()
    counts["scans"] = len(scans)
    emittance = latest_emittance(scans) if not scans.empty else {}
    for plane in ("x", "y"):
        e = emittance.get(plane)
        if e is None:
            headlines.append(
                Headline(
                    f"emittance_{plane}",
                    f"Latest emittance {plane} (normalised)",
                    None,
                    "no quad scan in this window"
                    if scans.empty
                    else "no valid value in this window",
                    "; ".join(_failed_scans(scans, plane, None)),
                )
            )
            continue
        bmag = f", Bmag {e['bmag']:.3f}" if e["bmag"] is not None else ""
        later = "".join(f"; {note}" for note in _failed_scans(scans, plane, e["timestamp"]))
        headlines.append(
            Headline(
                f"emittance_{plane}",
                f"Latest emittance {plane} (normalised)",
                e["norm_emittance_m_rad"],
                _pm(e["norm_emittance_m_rad"], e["norm_emittance_err_m_rad"], _MM_MRAD, "mm mrad"),
                f"{e['scan_name']} at {_clock(e['timestamp'])} UTC; β {_fmt(e['beta_m'])} m, α {_fmt(e['alpha'])}{bmag}{later}",
                e["flags"],
            )
        )
    if not scans.empty:
        tables.append(
            ReportTable(
                "emittance",
                "Quad scans",
                _emittance_table(scans),
                "εn: normalised rms emittance; β, α at the reconstruction point; "
                "Bmag: mismatch to the design optics (1 = matched).",
            )
        )
        fig = _safe(problems, "emittance plot", lambda: _emittance_figure(scans))
        if fig is not None:
            figures.append(ReportFigure("emittance", "Emittance", fig))

    # ---------------------------------------------------------------- orbit
    slow = _safe(
        problems, "slow channels", lambda: store.read_slow(start=t0, end=t1), pd.DataFrame()
    )
    slow = slow if isinstance(slow, pd.DataFrame) else pd.DataFrame()
    counts["slow"] = len(slow)
    orbit_report, counts["bpm"] = _orbit_section(store, t0, t1, slow, problems)
    step_events: tuple[StepEvent, ...] = ()
    limit_events: tuple[LimitEvent, ...] = ()
    loss_events: tuple[Any, ...] = ()
    if orbit_report is not None:
        step_events = group_steps(orbit_report.steps, orbit_report.bpms)
        limit_events = merge_violations(orbit_report.violations)
        loss_events = tuple(orbit_report.loss_events)
        w = worst_drift(orbit_report)
        if w is None:
            headlines.append(
                Headline("worst_drift", "Largest orbit drift", None, "no drift computed")
            )
        else:
            steps_note = f"; includes {len(w.steps)} step(s)" if w.steps else ""
            headlines.append(
                Headline(
                    "worst_drift",
                    "Largest orbit drift",
                    float(w.max_abs_drift_m),
                    f"{w.bpm} {w.plane}: {_fmt(w.max_abs_drift_m, _UM)} µm",
                    f"drift at the end {_fmt(w.drift_m, _UM)} µm, rate "
                    f"{_pm(_num(w.drift_rate_m_per_h), _num(w.drift_rate_err_m_per_h), _UM, 'µm/h')}"
                    f"{steps_note}; reference: {_clock(orbit_report.reference.start)}–"
                    f"{_clock(orbit_report.reference.end)} UTC",
                    tuple(w.flags),
                )
            )
        if step_events:
            text = f"{len(step_events)} event(s)"
            detail = "; ".join(
                f"{_clock(e.time)} {e.plane}: {len(e.bpms)} BPM(s) from {e.bpms[0]}, largest "
                f"{_fmt(e.largest_m, _UM)} µm at {e.largest_bpm}"
                for e in step_events[:4]
            )
            headlines.append(
                Headline("steps", "Orbit steps", float(len(step_events)), text, detail)
            )
        else:
            headlines.append(
                Headline("steps", "Orbit steps", 0.0, "none", "no step found in any BPM")
            )
        bpms_out = sorted({e.bpm for e in limit_events}, key=lambda b: orbit_report.bpms.index(b))
        headlines.append(
            Headline(
                "out_of_limit",
                "Out-of-tolerance events",
                float(len(limit_events)),
                f"{len(limit_events)} event(s)" if limit_events else "none",
                (
                    f"{len(bpms_out)} BPM(s): {', '.join(bpms_out[:8])}{' …' if len(bpms_out) > 8 else ''}; "
                    f"limits: drift {_fmt(orbit_report.limits.drift_limit_m, _UM)} µm, "
                    f"jitter {_fmt(orbit_report.limits.jitter_limit_m, _UM)} µm"
                )
                if limit_events
                else f"drift within {_fmt(orbit_report.limits.drift_limit_m, _UM)} µm and jitter within "
                f"{_fmt(orbit_report.limits.jitter_limit_m, _UM)} µm everywhere",
            )
        )
        headlines.append(
            Headline(
                "losses",
                "Transmission-loss events",
                float(len(loss_events)),
                f"{len(loss_events)} event(s)" if loss_events else "none",
                "; ".join(
                    f"{e.upstream}→{e.downstream} {_clock(e.start)}–{_clock(e.end)}: "
                    f"{_pm(e.size, e.size_err, 100.0, '%')}"
                    for e in loss_events[:4]
                )
                or "transmission steady between all stations",
            )
        )
        tables.append(
            ReportTable(
                "orbit",
                "Orbit per BPM",
                _orbit_table(orbit_report),
                f"Drift relative to the reference orbit of "
                f"{_clock(orbit_report.reference.start)}–{_clock(orbit_report.reference.end)} UTC; "
                f"{orbit_report.n_pulses:,} pulses at {orbit_report.sampling_Hz:.3g} Hz.",
            )
        )
        tables.append(
            ReportTable(
                "steps",
                "Orbit step events",
                _steps_table(step_events),
                f"Steps in several BPMs within {STEP_GROUP_S:g} s are one event.",
            )
        )
        tables.append(
            ReportTable(
                "limits",
                "Out-of-tolerance intervals",
                _limits_table(limit_events),
                "Back-to-back intervals of one BPM plane are merged.",
            )
        )
        tables.append(ReportTable("losses", "Transmission-loss events", _loss_table(loss_events)))
        corr = _correlation_table(orbit_report)
        if not corr.empty:
            tables.append(
                ReportTable(
                    "correlations",
                    "Drift vs slow channels (strongest per BPM plane)",
                    corr,
                    "Positive lag: the orbit follows the channel.",
                )
            )
        if orbit_report.trends is not None:
            fig = _safe(problems, "drift plot", lambda: _drift_figure(orbit_report))
            if fig is not None:
                figures.append(ReportFigure("drift", "Orbit drift", fig))
            fig = _safe(problems, "transmission plot", lambda: _transmission_figure(orbit_report))
            if fig is not None:
                figures.append(ReportFigure("transmission", "Transmission", fig))
    else:
        for key, label in (
            ("worst_drift", "Largest orbit drift"),
            ("steps", "Orbit steps"),
            ("out_of_limit", "Out-of-tolerance events"),
            ("losses", "Transmission-loss events"),
        ):
            headlines.append(Headline(key, label, None, "no BPM readings in this window"))

    # ---------------------------------------------------------------- sizes
    profiles = _safe(
        problems,
        "profile results",
        lambda: store.read_results("profiles", start=t0, end=t1),
        pd.DataFrame(),
    )
    frames = _safe(
        problems,
        "frame results",
        lambda: store.read_results("frames", start=t0, end=t1),
        pd.DataFrame(),
    )
    profiles = profiles if isinstance(profiles, pd.DataFrame) else pd.DataFrame()
    frames = frames if isinstance(frames, pd.DataFrame) else pd.DataFrame()
    counts["profiles"] = len(profiles)
    counts["frames"] = len(frames)
    if len(profiles) or len(frames):
        sizes = _safe(problems, "size table", lambda: _sizes_table(profiles, frames))
        if sizes is not None and not sizes.empty:
            tables.append(
                ReportTable(
                    "sizes", "Beam sizes (routine measurements, scan steps excluded)", sizes
                )
            )
        fig = _safe(problems, "size plot", lambda: _sizes_figure(profiles, frames))
        if fig is not None:
            figures.append(ReportFigure("sizes", "Beam sizes", fig))

    # ---------------------------------------------------------------- slow channels
    if len(slow):
        units = slow.groupby("channel")["unit"].first().to_dict()
        trend = _safe(
            problems,
            "slow-channel trend",
            lambda: store.trend("slow", "value", bucket="1min", start=t0, end=t1),
        )
        if trend is not None and len(trend):
            figures.extend(
                _safe(problems, "slow-channel plots", lambda: _slow_figures(trend, units), []) or []
            )

    # ---------------------------------------------------------------- data
    in_window = {k: counts.get(k, 0) for k in ("bpm", "slow", "profiles", "frames", "scans")}
    empty = not any(in_window.values())
    last_clean = {k: (pd.Timestamp(v) if v is not None else None) for k, v in dict(last).items()}
    seen = {k: v for k, v in sorted(last_clean.items()) if v is not None}
    newest = max(seen.values()) if seen else None
    headlines.append(
        Headline(
            "last_data",
            "Last data per source",
            float(newest.value) / 1e9 if newest is not None else None,
            f"{_clock(newest, date=True)} UTC" if newest is not None else "store is empty",
            "; ".join(f"{k} {_clock(v)}" for k, v in seen.items()) + " (whole store, UTC)"
            if seen
            else "nothing has been ingested yet",
        )
    )
    tables.append(
        ReportTable(
            "data",
            "Data sources",
            _data_table(last_clean, ranges, in_window, t1),
            "Counts: BPM and slow-channel readings, analysed profiles, frames and scans.",
        )
    )
    return Report(
        start=t0,
        end=t1,
        store=str(getattr(store, "root", "")),
        notes=str(notes or ""),
        headlines=tuple(headlines),
        tables=tuple(tables),
        figures=tuple(figures),
        emittance=emittance,
        orbit=orbit_report,
        step_events=step_events,
        limit_events=limit_events,
        loss_events=loss_events,
        last_data=last_clean,
        data_range=ranges,
        counts=in_window,
        empty=empty,
        problems=tuple(problems),
        generated=pd.Timestamp.now(tz="UTC").floor("s"),
    )


# --------------------------------------------------------------------------- HTML


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;margin:0;color:#1b1f24;background:#f6f7f9}
header,main,footer{max-width:1180px;margin:0 auto;padding:0 20px}
header{padding-top:18px}
h1{font-size:1.6em;margin:0.2em 0}
h2{font-size:1.2em;margin:1.4em 0 0.4em;border-bottom:1px solid #ccd;padding-bottom:4px}
.meta{color:#555;font-size:0.92em}
.safety{background:#fff4d6;border:1px solid #e0b44c;padding:8px 12px;border-radius:4px;margin:12px 0;font-size:0.92em}
.problems{background:#fde8e8;border:1px solid #d66;padding:8px 12px;border-radius:4px}
.empty{background:#e8f1fd;border:1px solid #6a9ad6;padding:12px 16px;border-radius:4px}
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(260px,1fr));gap:10px}
.card{background:#fff;border:1px solid #d8dce3;border-radius:6px;padding:10px 12px}
.card .label{font-size:0.85em;color:#555}
.card .value{font-size:1.35em;font-weight:600;margin:4px 0}
.card .detail{font-size:0.82em;color:#444}
.flag{display:inline-block;background:#fde2c4;color:#7a3e00;border-radius:3px;padding:0 5px;margin-right:4px;font-size:0.8em}
table{border-collapse:collapse;background:#fff;font-size:0.86em;margin:6px 0;width:100%}
th,td{border:1px solid #d8dce3;padding:3px 6px;text-align:left;vertical-align:top}
th{background:#eef0f4}
.note{font-size:0.85em;color:#555;margin:2px 0 8px}
.notes{white-space:pre-wrap;background:#fff;border:1px solid #d8dce3;border-radius:4px;padding:8px 12px}
.figure{background:#fff;border:1px solid #d8dce3;border-radius:6px;margin:10px 0;padding:4px}
footer{font-size:0.8em;color:#666;padding:20px}
"""


def _esc(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _table_html(table: ReportTable) -> str:
    parts = [f'<h3 id="table-{_esc(table.key)}">{_esc(table.title)}</h3>']
    if table.frame.empty:
        parts.append('<p class="note">none in this window</p>')
    else:
        head = "".join(f"<th>{_esc(c)}</th>" for c in table.frame.columns)
        body = "".join(
            "<tr>" + "".join(f"<td>{_esc(v)}</td>" for v in row) + "</tr>"
            for row in table.frame.itertuples(index=False, name=None)
        )
        parts.append(f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")
    if table.note:
        parts.append(f'<p class="note">{_esc(table.note)}</p>')
    return "\n".join(parts)


def _card_html(h: Headline) -> str:
    flags = "".join(f'<span class="flag">{_esc(f)}</span>' for f in h.flags)
    return (
        f'<div class="card" data-key="{_esc(h.key)}"><div class="label">{_esc(h.label)}</div>'
        f'<div class="value">{_esc(h.text)}</div><div class="detail">{flags}{_esc(h.detail)}</div></div>'
    )


def _empty_html(report: Report) -> str:
    lines = []
    for kind, span in report.data_range.items():
        if span:
            lines.append(
                f"<li>{_esc(kind)}: {_esc(_clock(span[0], date=True))} to {_esc(_clock(span[1], date=True))} UTC</li>"
            )
    held = (
        "<p>The store holds:</p><ul>"
        + "".join(lines)
        + "</ul><p>Choose a window that overlaps these times.</p>"
        if lines
        else "<p>The store holds no measurements yet: ingest files with <code>beamdiag ingest</code>, "
        "or build the demo store with <code>beamdiag demo --store DIR</code>.</p>"
    )
    return (
        f'<div class="empty"><strong>No measurements between {_esc(_clock(report.start, date=True))} and '
        f"{_esc(_clock(report.end, date=True))} UTC.</strong>{held}</div>"
    )


def render_html(report: Report) -> str:
    """The report as one self-contained HTML page (plotly.js inlined once, no network).

    Parameters
    ----------
    report : Report

    Returns
    -------
    str
        A complete HTML document.
    """
    from plotly.offline import get_plotlyjs

    title = report.title
    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc(title)}</title>",
        f"<style>{_CSS}</style>",
    ]
    if report.figures:
        # plotly.js inlined once for every figure below; figures use include_plotlyjs=False
        out.append('<script type="text/javascript">' + get_plotlyjs() + "</script>")
    out.append("</head><body><header>")
    out.append(
        f'<h1>Shift handover report</h1><p class="meta">{_esc(title)} · store {_esc(report.store)} · '
        f"generated {_esc(_clock(report.generated, date=True))} UTC · beamdiag {_esc(report.code_version)}</p>"
    )
    out.append(
        f'<div class="safety" role="note"><strong>Safety.</strong> {_esc(SAFETY_NOTE)}</div>'
    )
    out.append("</header><main>")
    if report.empty:
        out.append(_empty_html(report))
    if report.notes.strip():
        out.append(f'<h2>Notes from the shift</h2><div class="notes">{_esc(report.notes)}</div>')
    out.append('<h2>Headline numbers</h2><div class="cards">')
    out.extend(_card_html(h) for h in report.headlines)
    out.append("</div>")
    if report.problems:
        items = "".join(f"<li>{_esc(p)}</li>" for p in report.problems)
        out.append(f'<h2>Sections left out</h2><div class="problems"><ul>{items}</ul></div>')
    if report.figures:
        out.append("<h2>Plots</h2>")
        config = {"displaylogo": False, "responsive": True}
        for fig in report.figures:
            div = fig.figure.to_html(
                full_html=False,
                include_plotlyjs=False,
                config=config,
                div_id=f"fig-{fig.key}",
                default_height="auto",
            )
            out.append(f'<div class="figure" id="figure-{_esc(fig.key)}">{div}</div>')
    if report.tables:
        out.append("<h2>Tables</h2>")
        out.extend(_table_html(t) for t in report.tables)
    out.append("</main>")
    out.append(f"<footer>{_esc(SAFETY_NOTE)}</footer></body></html>")
    return "\n".join(out) + "\n"


__all__ = [
    "REPORT_TABLES",
    "Headline",
    "LimitEvent",
    "Report",
    "ReportFigure",
    "ReportTable",
    "StepEvent",
    "build_report",
    "group_steps",
    "latest_emittance",
    "merge_violations",
    "parse_time",
    "render_html",
    "worst_drift",
]
