"""Profiles and screens: browse screen frames and wire scans over time.

A frame is drawn with a colour scale (16-bit safe: plotly heatmap with zmin/zmax,
binned for display only), its analysis window (ROI) and the fitted 1σ and 2σ
ellipses from :func:`diagnostics.images.analyze_image` /
:func:`diagnostics.images.ellipse_points`, with its x and y projections and
their fits.  A wire profile is drawn with its fit
(:func:`diagnostics.profiles.model_curve`) and the residuals.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import streamlit as st
from plotly.subplots import make_subplots
from skimage.transform import downscale_local_mean

from dashboard import _data, _ui

#: Longest side of a frame as sent to the browser, pixels (binned above it).
DISPLAY_MAX_SIDE = 640

#: Colour scales offered for frames (perceptually uniform ones first).
COLOUR_SCALES = ("viridis", "inferno", "cividis", "gray")

CONTRAST = ("1st-99.9th percentile", "full sensor range")


@st.cache_data(ttl=_data.TTL_S, max_entries=16, show_spinner="Analysing the frame ...")
def frame_analysis(root: str, stamp: str, frame_id: str):
    """The frame, ``images.analyze_image`` of it, and its 1σ/2σ ellipses (metres)."""
    images = _data.library("images")
    frame = _data.read_frame(root, stamp, frame_id)
    result = images.analyze_image(frame.pixels, pixel_size_m=frame.pixel_size_m, dark=frame.dark,
                                  bit_depth=frame.bit_depth, roi=frame.roi)
    ellipses = {n: images.ellipse_points(result, n_sigma=n) for n in (1.0, 2.0)}
    return frame, result, ellipses


@st.cache_data(ttl=_data.TTL_S, max_entries=32, show_spinner="Fitting the profile ...")
def profile_analysis(root: str, stamp: str, profile_id: str, model: str):
    """The profile, ``profiles.analyze_profile`` of it, and the fitted curve on its points."""
    profiles = _data.library("profiles")
    prof = _data.read_profile(root, stamp, profile_id)
    result = profiles.analyze_profile(prof.position_m, prof.signal, model=model)
    return prof, result, profiles.model_curve(result, prof.position_m)


def pick_time(label: str, index: pd.DataFrame, key: str) -> str:
    """A time slider over the rows of ``index`` (sorted by time); returns the chosen id."""
    index = index.sort_values("timestamp").reset_index(drop=True)
    times = [_ui.fmt_time(t)[11:19] for t in index["timestamp"]]
    options = list(range(len(index)))
    if len(options) == 1:
        st.caption(f"{label}: {times[0]} (the only one in the window)")
        return str(index["id"].iloc[0])
    pos = st.select_slider(label, options=options, value=options[-1], format_func=lambda i: times[i],
                           key=key)
    return str(index["id"].iloc[pos])


def frame_figure(frame, result, ellipses, *, colour_scale: str, contrast: str) -> go.Figure:
    pixels = np.asarray(frame.pixels, dtype=float)
    if frame.dark is not None:
        shown = "dark-subtracted"
        pixels = pixels - np.asarray(frame.dark, dtype=float)
    else:
        shown = "raw"
    b = max(1, math.ceil(max(pixels.shape) / DISPLAY_MAX_SIDE))
    binned = downscale_local_mean(pixels, (b, b)) if b > 1 else pixels
    px, py = frame.pixel_size_m
    x_mm = (np.arange(binned.shape[1]) * b + (b - 1) / 2) * px * 1e3
    y_mm = (np.arange(binned.shape[0]) * b + (b - 1) / 2) * py * 1e3
    if contrast == "full sensor range":
        zmin, zmax = 0.0, float(2 ** (frame.bit_depth or 16) - 1)
    else:
        zmin, zmax = (float(v) for v in np.nanpercentile(binned, [1.0, 99.9]))
    fig = go.Figure(go.Heatmap(z=binned, x=x_mm, y=y_mm, zmin=zmin, zmax=zmax, colorscale=colour_scale,
                               colorbar=dict(title="counts"),
                               hovertemplate="x %{x:.3f} mm<br>y %{y:.3f} mm<br>%{z:.0f} counts<extra></extra>"))
    if result.roi is not None:
        x0, y0, x1, y1 = result.roi
        fig.add_shape(type="rect", x0=x0 * px * 1e3, x1=x1 * px * 1e3, y0=y0 * py * 1e3, y1=y1 * py * 1e3,
                      line=dict(color="white", width=1, dash="dash"))
    for n, (ex, ey) in ellipses.items():
        if np.isfinite(ex).any():
            fig.add_trace(go.Scatter(x=ex * 1e3, y=ey * 1e3, mode="lines", name=f"{n:g}σ ellipse",
                                     line=dict(color="#ff4136" if n == 1 else "#ffdc00", width=1.5)))
    _ui.base_layout(fig, title=f"{frame.device} {_ui.fmt_time(frame.timestamp)} · {shown}"
                               + (f" · binned {b}×{b}" if b > 1 else ""), height=560,
                    x_title="x (mm, columns)", y_title="y (mm, rows)")
    fig.update_yaxes(autorange="reversed", scaleanchor="x")
    fig.update_layout(hovermode="closest")
    return fig


def projection_figure(result, frame, plane: str) -> go.Figure | None:
    """A projection's fit over the data, from the image analysis's profile result."""
    pr = getattr(result, f"projection_{plane}", None)
    if pr is None:
        return None
    x0, y0, x1, y1 = result.roi
    pixels = np.asarray(frame.pixels, dtype=float)
    if frame.dark is not None:
        pixels = pixels - np.asarray(frame.dark, dtype=float)
    # the analysis fits projections of the window after dark and pedestal subtraction
    window = pixels[y0:y1, x0:x1] - (result.background if math.isfinite(result.background) else 0.0)
    px, py = frame.pixel_size_m
    if plane == "x":
        pos = (np.arange(x0, x1)) * px
        signal = window.sum(axis=0)
    else:
        pos = (np.arange(y0, y1)) * py
        signal = window.sum(axis=1)
    model = _data.library("profiles").model_curve(pr, pos)
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=pos * 1e3, y=signal, mode="markers", marker=dict(size=4), name="projection"))
    if np.isfinite(model).any():
        fig.add_trace(go.Scatter(x=pos * 1e3, y=model, mode="lines", name=f"{pr.model} fit"))
    _ui.base_layout(fig, title=f"{plane} projection: σ = {_ui.fmt_pm(pr.sigma_m, pr.sigma_err_m, 1e6, 'µm')}",
                    height=260, x_title=f"{plane} (mm)", y_title="summed counts")
    fig.update_layout(hovermode="closest")
    return fig


def screens(root: str, stamp: str, window: _data.Window) -> None:
    index = _data.frame_index(root, stamp, window.key)
    if index.empty:
        _ui.empty_state("No screen images in this window.")
        return
    devices = sorted(index["device"].unique())
    c = st.columns([1, 3, 1, 1])
    device = c[0].selectbox("Screen", devices, key="frame_device")
    sub = index[index["device"] == device]
    if "scan" in sub:
        with c[0]:
            in_scans = st.checkbox("Include scan steps", value=False, key="frame_scans")
        if not in_scans and sub["scan"].isna().any():
            sub = sub[sub["scan"].isna()]
    with c[1]:
        frame_id = pick_time("Frame time (UTC)", sub, key=f"frame_time_{device}")
    colour_scale = c[2].selectbox("Colour scale", COLOUR_SCALES, key="frame_colours")
    contrast = c[3].selectbox("Contrast", CONTRAST, key="frame_contrast")
    try:
        frame, result, ellipses = frame_analysis(root, stamp, frame_id)
    except _data.Unavailable as exc:
        _ui.unavailable(exc)
        return
    cols = st.columns(4)
    with cols[0]:
        _ui.big_pm("σx", result.sigma_x_m, result.sigma_x_err_m, 1e6, "µm",
                       help=f"{result.sigma_x_m!r} m ({result.method})")
    with cols[1]:
        _ui.big_pm("σy", result.sigma_y_m, result.sigma_y_err_m, 1e6, "µm",
                       help=f"{result.sigma_y_m!r} m ({result.method})")
    with cols[2]:
        _ui.big_number("Tilt", f"{_ui.fmt_num(math.degrees(result.tilt_rad), 1, 3)}°",
                       help=f"{result.tilt_rad!r} rad", sub="major axis from +x toward +y")
    with cols[3]:
        _ui.big_number("Centroid x / y (mm)", f"{_ui.fmt_num(result.centroid_x_m, 1e3, 3)} / "
                                              f"{_ui.fmt_num(result.centroid_y_m, 1e3, 3)}",
                       sub=("⚠ " + ", ".join(result.flags)) if result.flags else f"SNR {result.snr:.0f}")
    left, right = st.columns([3, 2])
    with left:
        _ui.plot(frame_figure(frame, result, ellipses, colour_scale=colour_scale, contrast=contrast),
                 key="frame_image")
    with right:
        for plane in ("x", "y"):
            fig = projection_figure(result, frame, plane)
            if fig is not None:
                _ui.plot(fig, key=f"frame_proj_{plane}")
        if result.message:
            st.caption(result.message)
        if result.flags:
            st.markdown(_ui.flag_help(result.flags))


def wire_scans(root: str, stamp: str, window: _data.Window) -> None:
    index = _data.profile_index(root, stamp, window.key)
    if index.empty:
        _ui.empty_state("No wire scans in this window.")
        return
    c = st.columns([1, 1, 3, 1])
    device = c[0].selectbox("Wire scanner", sorted(index["device"].unique()), key="wire_device")
    planes = sorted(index.loc[index["device"] == device, "plane"].unique())
    plane = c[1].selectbox("Plane", planes, key="wire_plane")
    sub = index[(index["device"] == device) & (index["plane"] == plane)]
    if "scan" in sub and sub["scan"].isna().any():
        sub = sub[sub["scan"].isna()]
    with c[2]:
        profile_id = pick_time("Scan time (UTC)", sub, key=f"wire_time_{device}_{plane}")
    models = tuple(getattr(_data.library("profiles"), "PROFILE_MODELS", ("gaussian",)))
    model = c[3].selectbox("Model", models, key="wire_model")
    prof, result, curve = profile_analysis(root, stamp, profile_id, model)
    cols = st.columns(4)
    with cols[0]:
        _ui.big_pm(f"σ{plane} ({result.model})", result.sigma_m, result.sigma_err_m, 1e6, "µm",
                       help=f"{result.sigma_m!r} m")
    with cols[1]:
        _ui.big_pm("rms (windowed)", result.rms_m, result.rms_err_m, 1e6, "µm",
                       help=f"{result.rms_m!r} m, window ±{result.window_n_sigma:g} rms")
    with cols[2]:
        _ui.big_pm("Centroid", result.centroid_m, result.centroid_err_m, 1e3, "mm")
    with cols[3]:
        _ui.big_number("Reduced χ² / SNR", f"{_ui.fmt_num(result.chi2_red, 1, 3)} / {_ui.fmt_num(result.snr, 1, 3)}",
                       sub=("⚠ " + ", ".join(result.flags)) if result.flags else "no flags")
    x_mm = np.asarray(prof.position_m) * 1e3
    fig = make_subplots(rows=2, cols=1, shared_xaxes=True, row_heights=[0.72, 0.28], vertical_spacing=0.05)
    fig.add_trace(go.Scatter(x=x_mm, y=prof.signal, mode="markers", marker=dict(size=5), name="signal"),
                  row=1, col=1)
    if np.isfinite(curve).any():
        fig.add_trace(go.Scatter(x=x_mm, y=curve, mode="lines", name=f"{result.model} fit",
                                 line=dict(width=2)), row=1, col=1)
        fig.add_trace(go.Scatter(x=x_mm, y=np.asarray(prof.signal) - curve, mode="markers",
                                 marker=dict(size=4), name="residual"), row=2, col=1)
        fig.add_hline(y=0, line=dict(color="#7f7f7f", width=1), row=2, col=1)
    _ui.base_layout(fig, title=f"{prof.device} {prof.plane} · {_ui.fmt_time(prof.timestamp)}", height=480)
    fig.update_layout(hovermode="closest")
    fig.update_xaxes(title=f"{plane} (mm)", row=2, col=1)
    fig.update_yaxes(title="signal", row=1, col=1)
    fig.update_yaxes(title="residual", row=2, col=1)
    _ui.plot(fig, key="wire_profile")
    if result.message:
        st.caption(result.message)


def main() -> None:
    page = _ui.page_window("Profiles and screens")
    if page is None:
        return
    root, stamp, window = page
    tab_screens, tab_wires = st.tabs(["Screens", "Wire scans"])
    with tab_screens:
        screens(root, stamp, window)
    with tab_wires:
        wire_scans(root, stamp, window)


_ui.guard(main, what="This page")
