"""Quad scan: one scan's emittance reconstruction, re-run with other options.

σ² against the scanned strength per plane with the fit and its ±1σ band, the
reconstructed phase-space ellipse beside the design one, and the result table
with uncertainties and flags.  The fit is :func:`diagnostics.emittance.analyze_scan`
on the stored scan; the plot data come from :func:`diagnostics.emittance.scan_plot_data`.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import streamlit as st

from dashboard import _data, _ui
from diagnostics.results import to_record

#: Options offered for a re-run, with their defaults (names as analyze_scan takes them).
DEFAULT_OPTIONS = {"method": "thick", "bootstrap": 0, "profile_model": "gaussian", "size_source": "fit",
                   "resolution_m": None}

#: Rows of the result table: (label, field, scale, display unit).
TABLE_ROWS = (
    ("normalised emittance", "norm_emittance_m_rad", 1e6, "mm mrad"),
    ("geometric emittance", "emittance_m_rad", 1e9, "nm rad"),
    ("β", "beta_m", 1.0, "m"),
    ("α", "alpha", 1.0, ""),
    ("mismatch B_mag", "bmag", 1.0, ""),
    ("reduced χ²", "chi2_red", 1.0, ""),
    ("condition number", "cond", 1.0, ""),
)

PLANE_COLOURS = {"x": "#1f77b4", "y": "#d62728"}


def scan_label(row: pd.Series) -> str:
    state = "" if bool(row.get("complete", True)) else " · still filling"
    return (f"{_ui.fmt_time(row['timestamp'])[:16]} · {row['name']} ({row.get('magnet') or '?'} → "
            f"{row.get('monitor') or '?'}, {row.get('n_steps')} steps){state}")


def options_widgets(spec, scan_id: str) -> dict:
    """Re-run options, drawn in a form so a change runs one fit, not several."""
    emittance = _data.library("emittance")
    methods = tuple(getattr(emittance, "EMITTANCE_METHODS", ("thick", "thin")))
    sources = tuple(getattr(emittance, "SIZE_SOURCES", ("fit", "rms")))
    try:
        models = tuple(_data.library("profiles").PROFILE_MODELS)
    except (_data.Unavailable, AttributeError):
        models = ("gaussian",)
    file_res = [m.resolution_m for m in spec.monitors if m.resolution_m]
    with st.form("scan_options", border=True):
        c = st.columns(5)
        method = c[0].radio("Method", methods, horizontal=True, key="scan_method",
                            help="thick: transfer-matrix least squares; thin: thin-lens parabola")
        bootstrap = c[1].number_input("Bootstrap samples", 0, 2000, step=100, key="scan_bootstrap",
                                      help="0 = uncertainty from the fit covariance only")
        model = c[2].selectbox("Profile model", models, key="scan_model")
        source = c[3].selectbox("Size from", sources, key="scan_size_source",
                                help="fit: fitted σ of each profile/image; rms: windowed rms")
        res_um = c[4].number_input("Monitor resolution (µm)", 0.0, 1000.0,
                                   value=float(file_res[0] * 1e6) if file_res else 0.0, step=1.0,
                                   key=f"scan_resolution_um_{scan_id}",
                                   help="Subtracted in quadrature; the scan file's value by default")
        st.form_submit_button("Re-run fit", type="primary")
    options = {"method": method, "bootstrap": int(bootstrap), "profile_model": model, "size_source": source}
    if not file_res or abs(res_um - file_res[0] * 1e6) > 1e-9:
        options["resolution_m"] = res_um * 1e-6
    return options


def sigma2_plot(data: dict, plane: str) -> go.Figure:
    p = data["planes"][plane]
    setting = np.asarray(p["setting"], float)
    s2 = np.asarray(p["sigma2_m2"], float) * 1e6  # m² -> mm²
    err = np.asarray(p["sigma2_err_m2"], float) * 1e6
    used = np.asarray(p["used"], bool)
    fig = go.Figure()
    colour = PLANE_COLOURS[plane]
    if p.get("band_lo_m2") is not None:
        g = np.asarray(p["grid"], float)
        fig.add_trace(go.Scatter(x=np.concatenate([g, g[::-1]]),
                                 y=np.concatenate([np.asarray(p["band_hi_m2"]), np.asarray(p["band_lo_m2"])[::-1]]) * 1e6,
                                 fill="toself", fillcolor=colour, opacity=0.2, line=dict(width=0),
                                 hoverinfo="skip", name="±1σ band"))
    if p.get("fit_sigma2_m2") is not None:
        fig.add_trace(go.Scatter(x=p["grid"], y=np.asarray(p["fit_sigma2_m2"], float) * 1e6, mode="lines",
                                 line=dict(color=colour, width=2), name="fit"))
    fig.add_trace(go.Scatter(x=setting[used], y=s2[used], mode="markers", name="measured",
                             marker=dict(color=colour, size=8),
                             error_y=dict(array=err[used], visible=True),
                             hovertemplate="k=%{x:.3f}<br>σ²=%{y:.4g} mm²<extra></extra>"))
    if (~used).any():
        fig.add_trace(go.Scatter(x=setting[~used], y=s2[~used], mode="markers", name="not used",
                                 marker=dict(color="#7f7f7f", size=8, symbol="x")))
    name = data.get("setting_name", "k1_per_m2")
    x_title = {"k1_per_m2": "quadrupole strength k₁ (1/m²)", "field_T": "solenoid field (T)"}.get(name, name)
    _ui.base_layout(fig, title=f"Plane {plane}: σ² against strength", height=360,
                    y_title="σ² (mm²)", x_title=x_title)
    fig.update_layout(hovermode="closest")
    return fig


def ellipse_plot(data: dict, plane: str) -> go.Figure:
    ell = data["planes"][plane]["ellipse"]
    fig = go.Figure()
    if ell.get("design"):
        fig.add_trace(go.Scatter(x=np.asarray(ell["design"]["x_m"]) * 1e3, y=np.asarray(ell["design"]["xp_rad"]) * 1e3,
                                 mode="lines", name="design", line=dict(color="#7f7f7f", dash="dash")))
    if ell.get("measured"):
        fig.add_trace(go.Scatter(x=np.asarray(ell["measured"]["x_m"]) * 1e3,
                                 y=np.asarray(ell["measured"]["xp_rad"]) * 1e3, mode="lines",
                                 name="measured", line=dict(color=PLANE_COLOURS[plane], width=2)))
    _ui.base_layout(fig, title=f"Phase space {plane} at the {data.get('reference_point', 'reference point')}",
                    height=360, x_title=f"{plane} (mm)", y_title=f"{plane}′ (mrad)")
    fig.update_layout(hovermode="closest")
    return fig


def result_table(result) -> pd.DataFrame:
    rows = []
    for label, field, scale, unit in TABLE_ROWS:
        row = {"quantity": label, "unit": unit}
        for plane in ("x", "y"):
            pr = getattr(result, plane)
            value = getattr(pr, field, None)
            err_field = {"norm_emittance_m_rad": "norm_emittance_err_m_rad", "emittance_m_rad": "emittance_err_m_rad",
                         "beta_m": "beta_err_m", "alpha": "alpha_err", "bmag": "bmag_err"}.get(field)
            err = getattr(pr, err_field, None) if err_field else None
            row[plane] = _ui.fmt_pm(value, err, scale) if err_field else _ui.fmt_num(value, scale, 4)
            row[f"{plane} (SI)"] = "–" if value is None else f"{value:.6g}"
        rows.append(row)
    rows.append({"quantity": "settings / shots", "unit": "",
                 **{p: f"{getattr(result, p).n_settings} / {getattr(result, p).n_points}" for p in ("x", "y")},
                 **{f"{p} (SI)": "" for p in ("x", "y")}})
    rows.append({"quantity": "flags", "unit": "",  # the plane's own, then the whole scan's
                 **{p: _ui.flags_text(tuple(dict.fromkeys(getattr(result, p).flags + tuple(result.flags))))
                    for p in ("x", "y")},
                 **{f"{p} (SI)": "" for p in ("x", "y")}})
    return pd.DataFrame(rows, columns=["quantity", "x", "y", "unit", "x (SI)", "y (SI)"])


def csv_table(result) -> str:
    """One row per plane, SI columns, for the CSV download."""
    rows = []
    for plane in ("x", "y"):
        rec = to_record(getattr(result, plane))
        flat = {k: v for k, v in rec.items() if not isinstance(v, (dict, list))}
        flat["flags"] = ";".join(getattr(result, plane).flags)
        rows.append({"scan": result.name, "timestamp": _ui.fmt_time(result.timestamp), **flat})
    buf = io.StringIO()
    pd.DataFrame(rows).to_csv(buf, index=False)
    return buf.getvalue()


def main() -> None:
    st.title("Quad scan")
    ctx = _ui.page_store()
    if ctx is None:
        return
    root, stamp = ctx
    try:
        scans = _data.list_scans(root, stamp)
    except Exception as exc:  # the store cannot list scans
        _ui.unavailable(exc)
        return
    if scans.empty:
        _ui.empty_state("No quad scans in the store yet. A scan is a folder with a `scan.json`.")
        return
    scans = scans.sort_values("timestamp", ascending=False).reset_index(drop=True)
    labels = {row["scan_id"]: scan_label(row) for _, row in scans.iterrows()}
    scan_id = st.selectbox("Scan", list(labels), format_func=labels.get, key="scan_choice")
    row = scans[scans["scan_id"] == scan_id].iloc[0]
    try:
        spec = _data.load_scan(root, stamp, scan_id)
    except Exception as exc:
        st.error(f"Cannot load scan {row['name']}: {type(exc).__name__}: {exc}")
        return
    options = options_widgets(spec, scan_id)
    try:
        result, data = _data.analyze_scan(root, stamp, scan_id, tuple(sorted(options.items())))
    except Exception as exc:  # a user option the analysis rejects
        st.error(f"The fit could not run with these options: {type(exc).__name__}: {exc}")
        return
    flags = tuple(dict.fromkeys(tuple(result.flags) + result.x.flags + result.y.flags))
    if "provisional" in flags:
        st.warning("Provisional result: the scan is still being recorded "
                   f"({len(spec.steps)} of {spec.expected_steps or '?'} steps).", icon=":material/hourglass_top:")

    cols = st.columns(4)
    for col, plane in zip(cols[:2], ("x", "y"), strict=True):
        pr = getattr(result, plane)
        with col:
            _ui.big_pm(f"Emittance {plane} (norm.)", pr.norm_emittance_m_rad, pr.norm_emittance_err_m_rad,
                       1e6, "mm mrad", help=f"{pr.norm_emittance_m_rad!r} ± {pr.norm_emittance_err_m_rad!r} m rad",
                           sub=("⚠ " + ", ".join(pr.flags)) if pr.flags else "no flags")
    for col, plane in zip(cols[2:], ("x", "y"), strict=True):
        pr = getattr(result, plane)
        with col:
            _ui.big_number(f"β{plane} (m) / α{plane}",
                           f"{_ui.fmt_num(pr.beta_m, 1, 3)} / {_ui.fmt_num(pr.alpha, 1, 3)}",
                           sub=f"B_mag {_ui.fmt_num(pr.bmag, 1, 3)}" if pr.bmag is not None else "no design optics")

    left, right = st.columns(2)
    for col, plane in zip((left, right), ("x", "y"), strict=True):
        with col:
            _ui.plot(sigma2_plot(data, plane), key=f"scan_sigma2_{plane}")
            _ui.plot(ellipse_plot(data, plane), key=f"scan_ellipse_{plane}")
    st.subheader("Result")
    st.dataframe(result_table(result), hide_index=True)
    for plane in ("x", "y"):
        msg = getattr(result, plane).message
        if msg:
            st.caption(f"{plane}: {msg}")
    if result.message:
        st.caption(result.message)
    if flags:
        with st.expander("What the flags mean"):
            st.markdown(_ui.flag_help(flags))
    record = to_record(result)
    c1, c2, _ = st.columns([1, 1, 4])
    c1.download_button("Download JSON", json.dumps(record, indent=1, allow_nan=False),
                       file_name=f"{row['name']}_emittance.json", mime="application/json", key="dl_json")
    c2.download_button("Download CSV", csv_table(result), file_name=f"{row['name']}_emittance.csv",
                       mime="text/csv", key="dl_csv")


_ui.guard(main, what="This page")
