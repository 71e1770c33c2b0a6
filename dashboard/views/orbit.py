"""Orbit: where the beam went over the window, BPM by BPM.

Drift heatmap (BPM × time) and per-BPM drift traces with steps and limits
marked, from :func:`diagnostics.orbit.analyze_orbit` and decimated trends;
jitter spectra of one BPM (:func:`diagnostics.orbit.bpm_spectrum`), the
principal modes of the shot-to-shot motion, and drift against temperature
(the report's slow-channel correlations).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import streamlit as st
from plotly.subplots import make_subplots

from dashboard import _data, _ui

#: Largest number of buckets in the per-BPM trace.
TRACE_POINTS = 1500


@st.cache_data(ttl=_data.TTL_S, max_entries=16, show_spinner="Computing the spectrum ...")
def spectrum_of(root: str, stamp: str, window: tuple[str, str], bpm: str, plane: str):
    """``orbit.bpm_spectrum`` of one BPM plane over the window (reads that BPM only)."""
    orbit = _data.library("orbit")
    readings = _data.read_bpm(root, stamp, window, (bpm,))
    if readings.empty:
        return None
    return orbit.bpm_spectrum(readings, bpm, plane)


def summary_table(report) -> pd.DataFrame:
    rows = []
    for s in report.summaries:
        rows.append({
            "BPM": s.bpm, "plane": s.plane,
            "max |drift| (µm)": s.max_abs_drift_m * _ui.UM_PER_M,
            "drift at end (µm)": s.drift_m * _ui.UM_PER_M,
            "drift rate (µm/h)": s.drift_rate_m_per_h * _ui.UM_PER_M,
            "jitter rms (µm)": s.jitter_rms_m * _ui.UM_PER_M,
            "steps": len(s.steps),
            "peak line (Hz)": s.peak_frequency_Hz,
            "out of limit": s.out_of_limit,
            "flags": ", ".join(s.flags),
            "max_abs_drift_m": s.max_abs_drift_m,
            "jitter_rms_m": s.jitter_rms_m,
        })
    return pd.DataFrame(rows)


def heatmap(report, plane: str) -> go.Figure:
    tr = report.trends
    z = (tr.drift_x_m if plane == "x" else tr.drift_y_m).T * _ui.UM_PER_M
    lim = float(np.nanmax(np.abs(z))) if np.isfinite(z).any() else 1.0
    fig = go.Figure(go.Heatmap(z=z, x=_ui.times(tr.times), y=list(tr.bpms), colorscale="RdBu_r", zmid=0.0,
                               zmin=-lim, zmax=lim, colorbar=dict(title="µm"),
                               hovertemplate="%{y} %{x}<br>%{z:.1f} µm<extra></extra>"))
    fig.update_yaxes(autorange="reversed", title="BPM (beam direction ↓)")
    _ui.base_layout(fig, title=f"Drift from the reference orbit, plane {plane}", height=520)
    fig.update_layout(hovermode="closest")
    return fig


def trace(root: str, stamp: str, window: _data.Window, report, bpm: str, plane: str) -> go.Figure | None:
    bucket = _data.bucket_for(window.duration_s, max_points=TRACE_POINTS)
    drift = _data.drift_trend(root, stamp, window.key, bucket)
    if drift is None:
        return None
    times, bpms, dx, dy, tr = drift
    j = bpms.index(bpm)
    values = (dx if plane == "x" else dy)[:, j]
    sub = tr[tr["device"] == bpm].set_index("timestamp")
    offset = sub[f"{plane}_m_mean"].reindex(times).to_numpy() - values
    fig = go.Figure()
    _ui.add_envelope(fig, times, values, sub[f"{plane}_m_min"].reindex(times).to_numpy() - offset,
                     sub[f"{plane}_m_max"].reindex(times).to_numpy() - offset, name=f"{bpm} {plane}",
                     colour="#1f77b4", scale=_ui.UM_PER_M, unit="µm")
    if report is not None:
        limit = report.limits.drift_limit_m * _ui.UM_PER_M
        for sign in (1, -1):
            fig.add_hline(y=sign * limit, line=dict(color="#9467bd", width=1, dash="dash"))
        steps = report.summary(bpm, plane).steps if bpm in report.bpms else ()
        events = pd.DataFrame([{"time": s.time, "kind": "step", "label": f"{s.size_m * 1e6:.1f} µm"}
                               for s in steps], columns=["time", "kind", "label"])
        _ui.mark_events(fig, events)
        for s in steps:
            fig.add_annotation(x=_ui.times([s.time])[0], y=1.0, yref="paper", showarrow=False,
                               text=f"step {s.size_m * _ui.UM_PER_M:+.1f} ± {s.size_err_m * _ui.UM_PER_M:.1f} µm",
                               font=dict(color="#d62728"), yanchor="bottom")
    _ui.base_layout(fig, title=f"{bpm} {plane}: drift ({bucket} buckets, min/max band)", height=360,
                    y_title="drift (µm)")
    return fig


def spectrum_figure(spec, bpm: str, plane: str) -> go.Figure:
    amp = np.asarray(spec.amplitude_m)
    amp = amp[:, 0] if amp.ndim == 2 else amp
    fig = go.Figure(go.Scatter(x=spec.frequency_Hz, y=amp * _ui.UM_PER_M, mode="lines", name="amplitude",
                               hovertemplate="%{x:.3f} Hz<br>%{y:.3g} µm<extra></extra>"))
    for line in (spec.lines[0] if spec.lines else ()):
        fig.add_annotation(x=line.frequency_Hz, y=line.amplitude_m * _ui.UM_PER_M, showarrow=True,
                           text=f"{line.frequency_Hz:.2f} Hz, {line.amplitude_m * _ui.UM_PER_M:.2g} µm"
                                + (f" (alias of {line.alias_of_Hz:g} Hz)" if line.alias_of_Hz else ""))
    _ui.base_layout(fig, title=f"{bpm} {plane}: amplitude spectrum (Nyquist {spec.nyquist_Hz:g} Hz, "
                               f"resolution {spec.resolution_Hz:.3g} Hz)", height=340,
                    x_title="frequency (Hz)", y_title="amplitude (µm)")
    fig.update_yaxes(type="log")
    fig.update_layout(hovermode="closest")
    return fig


def modes_figure(modes) -> go.Figure:
    n_show = min(3, len(modes.singular_values_m))
    fig = make_subplots(rows=1, cols=2, column_widths=[0.35, 0.65],
                        subplot_titles=("rms motion per mode (µm)", "BPM pattern of the first modes"))
    sv = np.asarray(modes.singular_values_m) * _ui.UM_PER_M
    fig.add_trace(go.Bar(x=np.arange(1, sv.size + 1), y=sv, name="modes", marker_color="#1f77b4",
                         showlegend=False), row=1, col=1)
    lo, hi = (v * _ui.UM_PER_M for v in modes.noise_band_m)
    fig.add_hrect(y0=lo, y1=hi, fillcolor="#7f7f7f", opacity=0.2, line_width=0, row=1, col=1)
    for k in range(n_show):
        fig.add_trace(go.Scatter(x=list(modes.bpms), y=modes.spatial_modes[k], mode="lines+markers",
                                 name=f"mode {k + 1} ({modes.explained_fraction[k] * 100:.0f} %)"), row=1, col=2)
    fig.update_yaxes(type="log", row=1, col=1)
    _ui.base_layout(fig, height=340)
    fig.update_layout(hovermode="closest")
    return fig


def correlation_table(report) -> pd.DataFrame:
    rows = [{"BPM": c.bpm, "plane": c.plane, "channel": c.channel,
             "slope (µm per unit)": c.slope_m_per_unit * _ui.UM_PER_M,
             "± (µm per unit)": c.slope_err_m_per_unit * _ui.UM_PER_M,
             "unit": c.unit, "Pearson r": c.pearson_r, "lag (min)": c.lag_s / 60.0,
             "points": c.n_points, "flags": ", ".join(c.flags), "slope_m_per_unit": c.slope_m_per_unit}
            for c in report.correlations]
    df = pd.DataFrame(rows)
    if not df.empty:
        df = df.reindex(df["Pearson r"].abs().sort_values(ascending=False).index)
    return df


def drift_vs_channel(root: str, stamp: str, window: _data.Window, report, bpm: str, plane: str,
                     channel: str) -> go.Figure | None:
    """Drift of one BPM plane against one slow channel, on the report's buckets."""
    tr = report.trends
    if tr is None or bpm not in tr.bpms:
        return None
    j = tr.bpms.index(bpm)
    drift = pd.Series((tr.drift_x_m if plane == "x" else tr.drift_y_m)[:, j], index=tr.times)
    bucket = pd.Timedelta(tr.times[1] - tr.times[0]) if len(tr.times) > 1 else pd.Timedelta("1min")
    slow = _data.trend(root, stamp, "slow", ("value",), window.key,
                       f"{int(bucket.total_seconds())}s", (channel,))
    if slow.empty:
        return None
    values = slow.set_index("timestamp")["value_mean"].reindex(drift.index)
    ok = np.isfinite(values.to_numpy()) & np.isfinite(drift.to_numpy())
    fig = go.Figure(go.Scatter(x=values[ok], y=drift[ok] * _ui.UM_PER_M, mode="markers",
                               marker=dict(size=5, color=(drift.index[ok] - drift.index[0]).total_seconds() / 3600,
                                           colorscale="viridis", colorbar=dict(title="h")),
                               hovertemplate="%{x:.3f}<br>%{y:.1f} µm<extra></extra>"))
    _ui.base_layout(fig, title=f"{bpm} {plane} drift against {channel} (colour: hours into the window)",
                    height=360, x_title=channel, y_title="drift (µm)")
    fig.update_layout(hovermode="closest")
    return fig


def main() -> None:
    page = _ui.page_window("Orbit")
    if page is None:
        return
    root, stamp, window = page
    report = _ui.orbit_report_or_wait(root, stamp, window)
    if report is None:
        if _data.orbit_report(root, stamp, window.key).ready:
            _ui.empty_state("No BPM readings in this window.")
        return
    table = summary_table(report)
    worst = table.loc[table["max_abs_drift_m"].abs().idxmax()] if len(table) else None
    jit = table.loc[table["jitter_rms_m"].idxmax()] if len(table) else None
    cols = st.columns(5)
    with cols[0]:
        _ui.big_number("Worst drift", f"{worst['max |drift| (µm)']:.1f} µm" if worst is not None else "–",
                       sub=f"{worst['BPM']} {worst['plane']}" if worst is not None else None,
                       help=f"{worst['max_abs_drift_m']!r} m" if worst is not None else None)
    with cols[1]:
        _ui.big_number("Largest jitter", f"{jit['jitter rms (µm)']:.2f} µm" if jit is not None else "–",
                       sub=f"{jit['BPM']} {jit['plane']} (rms)" if jit is not None else None)
    with cols[2]:
        events = tuple(getattr(report, "step_events", ()) or ())
        _ui.big_number("Steps", f"{len(events)}",
                       sub="; ".join(f"{_ui.fmt_time(e.time)[11:19]} on {len(e.bpms)} BPMs" for e in events[:2])
                           or "none",
                       help="; ".join(e.message for e in events if e.message) or None)
    with cols[3]:
        _ui.big_number("Out-of-limit events", f"{len(report.violations)}",
                       sub=f"drift limit {report.limits.drift_limit_m * _ui.UM_PER_M:g} µm, jitter "
                           f"{report.limits.jitter_limit_m * _ui.UM_PER_M:g} µm")
    with cols[4]:
        losses = report.loss_events
        _ui.big_number("Beam-loss events", f"{len(losses)}",
                       sub="; ".join(f"{e.upstream}→{e.downstream} {e.size * 100:.1f} % at "
                                     f"{_ui.fmt_time(e.start)[11:16]}" for e in losses[:2]) or "none")
    if report.message:
        st.caption(f"Analysis notes: {report.message}")

    plane = st.radio("Plane", ("x", "y"), horizontal=True, key="orbit_plane")
    if report.trends is not None:
        _ui.plot(heatmap(report, plane), key="orbit_heatmap")

    c1, c2 = st.columns([1, 3])
    bpms = list(report.bpms)
    default = bpms.index(worst["BPM"]) if worst is not None and worst["BPM"] in bpms else 0
    bpm = c1.selectbox("BPM", bpms, index=default, key="orbit_bpm")
    fig = trace(root, stamp, window, report, bpm, plane)
    if fig is not None:
        _ui.plot(fig, key="orbit_trace")

    tab_spec, tab_modes, tab_temp, tab_table = st.tabs(
        ["Jitter spectrum", "Principal modes", "Drift vs temperature", "All BPMs"])
    with tab_spec:
        spec = spectrum_of(root, stamp, window.key, bpm, plane)
        if spec is None:
            st.caption("No readings of this BPM in the window.")
        else:
            _ui.plot(spectrum_figure(spec, bpm, plane), key="orbit_spectrum")
    with tab_modes:
        modes = next((m for m in report.modes if m.plane == plane), None)
        if modes is None or len(modes.singular_values_m) == 0:
            st.caption("No mode analysis for this plane.")
        else:
            _ui.plot(modes_figure(modes), key="orbit_modes")
            st.caption(f"{modes.n_above_noise} modes above the noise band (grey); noise floor "
                       f"{modes.noise_floor_m * _ui.UM_PER_M:.2f} µm per reading. {modes.message}")
    with tab_temp:
        corr = correlation_table(report)
        if corr.empty:
            st.caption("No slow channels to correlate with in this window.")
        else:
            mine = corr[(corr["BPM"] == bpm) & (corr["plane"] == plane)]
            channels = list(dict.fromkeys(mine["channel"])) or list(dict.fromkeys(corr["channel"]))
            channel = st.selectbox("Channel", channels, key="orbit_channel")
            fig = drift_vs_channel(root, stamp, window, report, bpm, plane, channel)
            if fig is not None:
                _ui.plot(fig, key="orbit_vs_channel")
            st.dataframe(corr.drop(columns=["slope_m_per_unit"]).head(48), hide_index=True,
                         column_config={"slope (µm per unit)": st.column_config.NumberColumn(format="%.2f"),
                                        "± (µm per unit)": st.column_config.NumberColumn(format="%.2f"),
                                        "Pearson r": st.column_config.NumberColumn(format="%.3f"),
                                        "lag (min)": st.column_config.NumberColumn(format="%.1f")})
    with tab_table:
        st.dataframe(table, hide_index=True,
                     column_config={c: st.column_config.NumberColumn(format="%.2f") for c in
                                    ("max |drift| (µm)", "drift at end (µm)", "drift rate (µm/h)",
                                     "jitter rms (µm)", "peak line (Hz)")})


_ui.guard(main, what="This page")
