"""Shared page furniture: sidebar, safety footer, empty states, the time window
picker, display units and small plotting helpers.

Values arrive in SI; they are scaled to the units operators read (mm, µm,
mm mrad) only here, at the display edge, and tables keep the SI column next to
the display column.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import streamlit as st

from dashboard import _data
from diagnostics import SAFETY_NOTE, __version__

#: Display scale factors from SI.
MM_PER_M = 1e3
UM_PER_M = 1e6
#: 1 mm mrad = 1e-6 m rad.
MM_MRAD_PER_M_RAD = 1e6

#: Window presets offered by the picker: label -> duration (None = all data).
WINDOW_PRESETS: dict[str, pd.Timedelta | None] = {
    "Last shift (8 h)": pd.Timedelta(hours=8),
    "Last 2 h": pd.Timedelta(hours=2),
    "Last 30 min": pd.Timedelta(minutes=30),
    "All data": None,
    "Custom": None,
}
DEFAULT_PRESET = "Last shift (8 h)"

#: Colours for events marked on trends (plain names, one per event kind).
EVENT_COLOURS = {"step": "#d62728", "loss": "#ff7f0e", "scan": "#2ca02c", "out_of_limit": "#9467bd"}

PLOT_CONFIG = {"displaylogo": False, "modeBarButtonsToRemove": ["sendDataToCloud"]}


# --------------------------------------------------------------------------- frame of every page


def sidebar() -> None:
    """Store location and version in the sidebar, with the safety note."""
    root = _data.store_root()
    with st.sidebar:
        st.caption(f"Store: `{root}`" if root else "Store: not set")
        st.caption(f"beamdiag {__version__} · read-only view")
        st.caption(f"⚠️ {SAFETY_NOTE}")


def footer() -> None:
    """The safety note at the bottom of every page."""
    st.divider()
    st.caption(f"⚠️ {SAFETY_NOTE}")


EMPTY_HELP = (
    "To fill a store, ingest measurement files with `beamdiag ingest --store DIR FILES...` "
    "(or leave `beamdiag watch --store DIR INBOX` running), or build the invented demo "
    "shift with `beamdiag demo --store DIR`; then start the dashboard with "
    "`beamdiag dashboard --store DIR`."
)


def empty_state(what: str) -> None:
    """A friendly note that there is nothing to show yet, and how to get data in."""
    st.info(f"{what}\n\n{EMPTY_HELP}", icon=":material/inbox:")


def unavailable(exc: Exception) -> None:
    """A library piece or the store is missing: say so instead of a traceback."""
    st.warning(f"{exc}", icon=":material/construction:")


def guard(draw, *args, what: str = "This panel", **kwargs):
    """Draw one panel; if it fails, say so in one line and keep the rest of the page.

    A store that cannot answer one query (or a library piece that is missing)
    then costs one panel, not the page.  Streamlit's own rerun/stop signals are
    ``BaseException``s and pass through.
    """
    try:
        return draw(*args, **kwargs)
    except _data.Unavailable as exc:
        unavailable(exc)
    except Exception as exc:  # noqa: BLE001 - shown to the operator, the page goes on
        text = " ".join(str(exc).split())
        st.error(f"{what} could not be drawn: {type(exc).__name__}: {text[:300]}",
                 icon=":material/error:")
    return None


def page_store() -> tuple[str, str] | None:
    """``(root, stamp)`` of the store, or ``None`` after showing why there is none."""
    root = _data.store_root()
    if root is None:
        st.info(f"No store given.\n\n{EMPTY_HELP}", icon=":material/inbox:")
        return None
    try:
        _data.open_store(root)
    except _data.Unavailable as exc:
        unavailable(exc)
        return None
    return str(root), _data.stamp(root)


# --------------------------------------------------------------------------- time window


def default_window(span: tuple[pd.Timestamp, pd.Timestamp], preset: str = DEFAULT_PRESET) -> _data.Window:
    """The window a preset means for data spanning ``span`` (the end is the last data seen)."""
    first, last = span
    end = last + pd.Timedelta(microseconds=1)  # windows are half-open; include the last reading
    length = WINDOW_PRESETS.get(preset)
    start = first if length is None else max(first, end - length)
    return _data.Window(start, end)


def current_window(root: str, stamp: str, *, key: str = "window") -> _data.Window | None:
    """The window the picker's choice means now, without drawing any widget.

    A live fragment calls this on each tick, so a preset window ("last 8 h")
    follows the newest data while a custom window stays where it was put.
    """
    span = _data.data_range(root, stamp)
    if span is None:
        return None
    preset = st.session_state.get(f"{key}_preset", st.session_state.get(f"_{key}_preset", DEFAULT_PRESET))
    if preset != "Custom":
        return default_window(span, preset)
    base = default_window(span)
    start = st.session_state.get(f"{key}_start", st.session_state.get(f"_{key}_start"))
    end = st.session_state.get(f"{key}_end", st.session_state.get(f"_{key}_end"))
    if start is None or end is None or _data.utc(end) <= _data.utc(start):
        return base
    return _data.Window(_data.utc(start), _data.utc(end))


def page_window(title: str, empty_message: str = "The store holds no measurements yet."
                ) -> tuple[str, str, _data.Window] | None:
    """A page's title, store and time window: ``(root, stamp, window)``.

    ``None`` when there is nothing to show; the page has then already shown why
    (no store, or the empty state with ``empty_message``).
    """
    st.title(title)
    ctx = page_store()
    if ctx is None:
        return None
    root, stamp = ctx
    window = window_picker(root, stamp)
    if window is None:
        empty_state(empty_message)
        return None
    return root, stamp, window


def window_picker(root: str, stamp: str, *, key: str = "window") -> _data.Window | None:
    """Pick the time window; shared by every page through ``st.session_state``.

    Defaults to the last 8-hour shift of the data in the store.  Returns
    ``None`` when the store holds no timed data.
    """
    span = _data.data_range(root, stamp)
    if span is None:
        return None
    preset_key, start_key, end_key = f"{key}_preset", f"{key}_start", f"{key}_end"
    base = default_window(span)
    # Widget state is dropped when a page does not draw the widget, so the choice
    # is kept in a shadow key and put back before the widget is drawn again.
    defaults = {preset_key: DEFAULT_PRESET, start_key: base.start.tz_localize(None).to_pydatetime(),
                end_key: base.end.tz_localize(None).to_pydatetime()}
    for k, default in defaults.items():
        if k not in st.session_state:
            st.session_state[k] = st.session_state.get(f"_{k}", default)
    cols = st.columns([2, 2, 2, 3])
    preset = cols[0].selectbox("Time window", list(WINDOW_PRESETS), key=preset_key,
                               help="Presets end at the newest data in the store; times are UTC.")
    if preset == "Custom":
        step = pd.Timedelta(minutes=15).to_pytimedelta()
        cols[1].datetime_input("From (UTC)", key=start_key, format="YYYY-MM-DD", step=step)
        cols[2].datetime_input("To (UTC)", key=end_key, format="YYYY-MM-DD", step=step)
        if st.session_state[end_key] is not None and st.session_state[start_key] is not None and \
                _data.utc(st.session_state[end_key]) <= _data.utc(st.session_state[start_key]):
            st.warning("The window ends before it starts; showing the last shift instead.")
    for k in defaults:
        st.session_state[f"_{k}"] = st.session_state[k]
    window = current_window(root, stamp, key=key)
    cols[3].caption(f"Data in store: {fmt_time(span[0])} → {fmt_time(span[1])}  \n"
                    f"Showing: **{fmt_time(window.start)} → {fmt_time(window.end)}**")
    return window


# --------------------------------------------------------------------------- numbers


def finite(value: Any) -> bool:
    try:
        return value is not None and math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def fmt_num(value: Any, scale: float = 1.0, digits: int = 3) -> str:
    """``value * scale`` with ``digits`` significant digits, '–' when missing."""
    if not finite(value):
        return "–"
    return f"{float(value) * scale:.{digits}g}"


def pm_parts(value: Any, err: Any, scale: float = 1.0, unit: str = "", digits: int = 3) -> tuple[str, str]:
    """``("2.31", "± 0.05 mm mrad")``: the uncertainty rounded, the value to the same decimal.

    The uncertainty keeps two significant digits when its leading two digits
    are below 35 and one otherwise (the rounding rule of the Particle Data
    Group, Review of Particle Physics, "Introduction": rounding of errors).
    Without an uncertainty the value gets ``digits`` significant digits and
    the second part is the unit alone.
    """
    if not finite(value):
        return "–", unit
    v = float(value) * scale
    if finite(err) and float(err) > 0:
        e = float(err) * scale
        exponent = int(math.floor(math.log10(abs(e))))
        leading = int(abs(e) / 10 ** (exponent - 1))  # first two significant digits, 10..99
        sig = 2 if leading < 35 else 1
        decimals = max(0, sig - 1 - exponent)
        return f"{v:.{decimals}f}", f"± {round(e, decimals):.{decimals}f} {unit}".strip()
    return f"{v:.{digits}g}", unit


def fmt_pm(value: Any, err: Any, scale: float = 1.0, unit: str = "", digits: int = 3) -> str:
    """``'2.31 ± 0.05 mm mrad'`` (see :func:`pm_parts` for the rounding)."""
    text, rest = pm_parts(value, err, scale, unit, digits)
    return text if text == "–" else f"{text} {rest}".strip()


#: Unit names as stored (ASCII, as the channel files give them) -> as operators read them.
UNIT_TEXT = {"degc": "°C", "deg c": "°C", "°c": "°C", "c": "°C", "degk": "K", "k": "K", "um": "µm"}
#: Units (as shown) that make a slow channel a temperature.
TEMPERATURE_UNITS = ("°C", "K")


def unit_text(unit: Any) -> str:
    """A stored unit name the way it is shown (``degC`` -> ``°C``); unknown names unchanged."""
    return UNIT_TEXT.get(str(unit).strip().lower(), str(unit))


def fmt_time(ts: Any) -> str:
    """``2026-11-30 13:59:58 UTC``; '–' when missing."""
    if ts is None or (isinstance(ts, float) and math.isnan(ts)) or ts is pd.NaT:
        return "–"
    try:
        return _data.utc(ts).strftime("%Y-%m-%d %H:%M:%S UTC")
    except (TypeError, ValueError):
        return str(ts)


def fmt_age(ts: Any, now: pd.Timestamp | None = None) -> str:
    """How long ago, in two units at most ('1 d 11 h ago', '3 min ago')."""
    if ts is None or ts is pd.NaT:
        return "never"
    now = now or pd.Timestamp.now(tz="UTC")
    s = (now - _data.utc(ts)).total_seconds()
    if s < 0:
        return "in the future"
    if s < 60:
        return f"{s:.0f} s ago"
    if s < 3600:
        return f"{s // 60:.0f} min ago"
    if s < 86400:
        return f"{s // 3600:.0f} h {s % 3600 // 60:.0f} min ago"
    return f"{s // 86400:.0f} d {s % 86400 // 3600:.0f} h ago"


def flags_text(flags: Any) -> str:
    """Flags as ``'clipped, low_signal'``; accepts a tuple, list or JSON text."""
    return ", ".join(parse_flags(flags)) or "none"


def parse_flags(flags: Any) -> tuple[str, ...]:
    if flags is None:
        return ()
    if isinstance(flags, str):
        text = flags.strip()
        if text.startswith("["):
            import json

            try:
                return tuple(str(f) for f in json.loads(text))
            except ValueError:
                pass
        return tuple(f.strip() for f in text.split(",") if f.strip())
    if isinstance(flags, Iterable):
        return tuple(str(f) for f in flags)
    return ()


def flag_help(flags: Sequence[str]) -> str:
    """Each flag with its meaning from ``diagnostics.results.FLAGS``."""
    from diagnostics.results import FLAGS

    return "\n".join(f"- **{f}**: {FLAGS.get(f, 'no description')}" for f in flags)


# --------------------------------------------------------------------------- plots


def base_layout(fig: go.Figure, *, title: str | None = None, height: int = 320,
                y_title: str | None = None, x_title: str | None = None) -> go.Figure:
    """Common layout: the title on top, the legend in one row under it, tight margins."""
    top = 80 if title else 40
    fig.update_layout(height=height, margin=dict(l=10, r=10, t=top, b=10),
                      title=dict(text=title, y=0.99, yanchor="top", x=0.0, xanchor="left",
                                 font=dict(size=15)) if title else None,
                      legend=dict(orientation="h", yanchor="bottom", y=1.0, x=0),
                      hovermode="x unified")
    if y_title:
        fig.update_yaxes(title=y_title)
    if x_title:
        fig.update_xaxes(title=x_title)
    return fig


def times(values: Any) -> np.ndarray:
    """Times as ISO 8601 text (UTC, no offset) for a plotly time axis.

    Plotly serialises datetime objects one by one; text goes through its JSON
    encoder in one piece, which keeps a figure of thousands of points cheap.
    """
    idx = pd.DatetimeIndex(pd.to_datetime(values, utc=True))
    return np.datetime_as_string(idx.tz_convert("UTC").tz_localize(None).to_numpy(dtype="datetime64[ms]"),
                                 unit="ms")


def times_ms(values: Any) -> np.ndarray:
    """Times as milliseconds since 1970-01-01 UTC (float64, NaN for a missing time).

    A plotly date axis takes numbers as milliseconds since the epoch, and a
    numeric numpy array goes to the browser as one binary (base64) block: about
    11 bytes a point instead of 26 for ISO text.  The axis must then be told it
    is a date axis (``fig.update_xaxes(type="date")``), which
    :func:`add_envelope` and :func:`date_axes` do.
    """
    idx = pd.DatetimeIndex(pd.to_datetime(values, utc=True))
    out = idx.as_unit("ms").asi8.astype(np.float64)
    out[np.asarray(idx.isna())] = np.nan
    return out


def date_axes(fig: go.Figure) -> go.Figure:
    """Every x axis of ``fig`` a date axis (needed for :func:`times_ms` values)."""
    return fig.update_xaxes(type="date")


def add_envelope(fig: go.Figure, t: Any, mean: Any, lo: Any, hi: Any, *, name: str,
                 colour: str | None = None, scale: float = 1.0, unit: str = "",
                 row: int | None = None, col: int | None = None, showlegend: bool = True) -> None:
    """One decimated series: the bucket mean as a line and its min/max as a band."""
    t = times_ms(t)
    kw = {} if row is None else {"row": row, "col": col}
    group = name
    # float32 values: binary blocks half the size, still 7 digits for the hover text
    fig.add_trace(go.Scatter(x=np.concatenate([t, t[::-1]]),
                             y=(np.concatenate([np.asarray(hi, float), np.asarray(lo, float)[::-1]])
                                * scale).astype(np.float32),
                             fill="toself", line=dict(width=0), opacity=0.25, hoverinfo="skip",
                             fillcolor=colour, legendgroup=group, showlegend=False, name=f"{name} min/max"),
                  **kw)
    fig.add_trace(go.Scatter(x=t, y=(np.asarray(mean, float) * scale).astype(np.float32), mode="lines",
                             name=name,
                             line=dict(width=1.5, color=colour), legendgroup=group, showlegend=showlegend,
                             hovertemplate=f"%{{y:.4g}} {unit}<extra>{name}</extra>"),
                  **kw)
    date_axes(fig)


def mark_events(fig: go.Figure, events: pd.DataFrame | None) -> None:
    """Mark events on a time axis: a dotted line at ``time``, or a band to ``end``.

    ``events`` has columns ``time``, ``kind`` (a key of :data:`EVENT_COLOURS`),
    ``label`` and optionally ``end``.
    """
    if events is None or events.empty:
        return
    # shapes as plain dicts in one layout update: add_vline per event is slow on subplots
    shapes = []
    for _, ev in events.iterrows():
        colour = EVENT_COLOURS.get(str(ev.get("kind")), "#7f7f7f")
        t = times([ev["time"]])[0]
        end = ev.get("end")
        if end is not None and not pd.isna(end):
            shapes.append(dict(type="rect", xref="x", yref="paper", x0=t, x1=times([end])[0], y0=0, y1=1,
                               fillcolor=colour, opacity=0.15, line=dict(width=0), layer="below"))
        else:
            shapes.append(dict(type="line", xref="x", yref="paper", x0=t, x1=t, y0=0, y1=1,
                               line=dict(color=colour, width=1, dash="dot")))
    fig.update_layout(shapes=list(fig.layout.shapes) + shapes)
    # one empty trace per kind so the legend explains the marks
    for kind in events["kind"].drop_duplicates():
        fig.add_trace(go.Scatter(x=[None], y=[None], mode="lines", name=f"{kind}",
                                 line=dict(color=EVENT_COLOURS.get(str(kind), "#7f7f7f"), dash="dot")))


def plot(fig: go.Figure, *, key: str | None = None) -> None:
    st.plotly_chart(fig, key=key, config=PLOT_CONFIG, theme="streamlit")


def big_number(label: str, value: str, *, help: str | None = None, sub: str | None = None,
               pm: str | None = None) -> None:
    """A headline number in a bordered card.

    ``value`` is drawn biggest; ``pm`` (the uncertainty and unit, e.g.
    ``"± 0.011 mm mrad"``) sits right under it in smaller grey type so a long
    value is never cut off; ``sub`` is a one-line note.
    """
    with st.container(border=True):
        st.metric(label, value, delta=pm, delta_color="off", delta_arrow="off", help=help)
        st.caption(sub or "\u00a0")


def big_pm(label: str, value: Any, err: Any, scale: float, unit: str, **kwargs) -> None:
    """:func:`big_number` of a value with its uncertainty (PDG rounding)."""
    text, rest = pm_parts(value, err, scale, unit)
    big_number(label, text, pm=rest, **kwargs)


def small_fact(label: str, value: str, *, help: str | None = None) -> None:
    """A secondary fact: smaller than a headline number, never cut off."""
    st.markdown(f"<div style='font-size:0.8rem;opacity:0.7'>{html.escape(label)}</div>"
                f"<div style='font-size:1.05rem;font-weight:600'>{html.escape(value)}</div>",
                unsafe_allow_html=True, help=help)


#: How often a page waiting for the orbit analysis looks again, seconds.
ORBIT_POLL_S = 2


def orbit_report_or_wait(root: str, stamp: str, window: _data.Window):
    """The window's orbit report; while it is computed, a note that reruns the page when it is in.

    Returns the report, a stand-in of an overlapping window while updating
    (with a note), or ``None`` while nothing is ready yet.
    """
    answer = _data.orbit_report(root, stamp, window.key)  # an analysis that raised raises here
    if answer.ready:
        return answer.report

    def poll() -> None:
        if _data.orbit_report(root, stamp, window.key).ready:
            st.rerun()
        if answer.updating:
            st.caption("Updating the orbit analysis for the new window …")
        else:
            st.info("Analysing the orbit of this window (all BPM readings) … the page fills in "
                    "when it is done.", icon=":material/hourglass_top:")

    st.fragment(poll, run_every=ORBIT_POLL_S)()
    return answer.report
