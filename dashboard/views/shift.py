"""Shift: the state of the beam over the shift at a glance.

Headline numbers first (latest emittance per plane, worst orbit drift, steps,
out-of-limit events), then where the data stands (last reading per source, the
watch service), then the trends with events marked.  While ``beamdiag watch``
writes a fresh heartbeat, the live panels rerun on their own.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import streamlit as st

from dashboard import _data, _echarts, _ui

#: Refresh intervals of the live panels while the watch service runs, seconds.
LIVE_HEADLINE_S = 10
LIVE_TRENDS_S = 60
#: How often the page looks for an orbit analysis that is still running, seconds.
POLL_S = 2
#: On a session's first visit the trends follow the headline after this pause, seconds:
#: the browser paints the numbers before it spends its time drawing charts.
CHARTS_AFTER_S = 0.3
#: Session flag: this session has had its headline drawn, so trends come in the same run.
CHARTS_KEY = "_shift_charts"
#: Largest number of buckets in the drift plot (24 BPMs x 2 planes of lines): a half-width
#: chart is about 700 px wide, so 240 buckets (2 min on a shift) keep a point per 3 px.
DRIFT_POINTS = 240
#: Largest number of buckets per temperature channel (same reasoning).
TEMPERATURE_POINTS = 300

#: Raw kinds shown under "last data", with operator names.
SOURCES = {"bpm": "BPMs", "slow": "Slow channels", "profiles": "Wire scans", "frames": "Screens",
           "scans": "Quad scans"}


def latest_scan_result(root: str, stamp: str, window: _data.Window) -> pd.Series | None:
    """The newest stored scan result up to the window's end."""
    res = _data.results(root, stamp, "scans")
    if res.empty or "timestamp" not in res:
        return None
    res = res[pd.to_datetime(res["timestamp"], utc=True) < window.end]
    return None if res.empty else res.iloc[-1]


def worst_drift(report) -> object | None:
    """The BPM-plane summary with the largest |drift| in the report."""
    summaries = [s for s in report.summaries if _ui.finite(s.max_abs_drift_m)]
    return max(summaries, key=lambda s: abs(s.max_abs_drift_m)) if summaries else None


def step_events(report) -> tuple:
    """The report's step events (steps at one time across BPMs), newest library first."""
    return tuple(getattr(report, "step_events", ()) or ())


def headline(root: str, waiting: bool = False, live: bool = False) -> None:
    stamp = _data.stamp(root)
    window = _ui.current_window(root, stamp)
    if window is None:
        return
    if live:
        st.caption(f"● Live: the watch service is running; numbers refresh every {LIVE_HEADLINE_S} s "
                   f"(data up to {_ui.fmt_time(window.end)[11:19]} UTC), trends every {LIVE_TRENDS_S} s.")
    cols = st.columns(5)
    row = latest_scan_result(root, stamp, window)
    for col, plane in zip(cols[:2], ("x", "y"), strict=True):
        with col:
            if row is None:
                _ui.big_number(f"Emittance {plane} (norm.)", "–", sub="no quad scan yet")
                continue
            value, err = row.get(f"{plane}_norm_emittance_m_rad"), row.get(f"{plane}_norm_emittance_err_m_rad")
            geo, geo_err = row.get(f"{plane}_emittance_m_rad"), row.get(f"{plane}_emittance_err_m_rad")
            flags = _ui.parse_flags(row.get(f"{plane}_flags")) + _ui.parse_flags(row.get("flags"))
            flags = tuple(dict.fromkeys(flags))
            _ui.big_pm(
                f"Emittance {plane} (norm.)", value, err, _ui.MM_MRAD_PER_M_RAD, "mm mrad",
                help=(f"Normalised rms emittance {value!r} m rad ± {err!r}; geometric "
                      f"{_ui.fmt_pm(geo, geo_err, 1e9, 'nm rad')}. Scan {row.get('scan_name')}."),
                sub=f"{row.get('scan_name', '')} · {_ui.fmt_time(row.get('timestamp'))[11:16]}"
                    + (f" · ⚠ {', '.join(flags)}" if flags else ""),
            )
    failed = False
    try:
        answer = _data.orbit_report(root, stamp, window.key, start=not waiting)
    except Exception as exc:  # noqa: BLE001 - the analysis failed: say so, keep the page
        st.error(f"The orbit analysis of this window failed: {type(exc).__name__}: "
                 f"{' '.join(str(exc).split())[:300]}", icon=":material/error:")
        answer, failed = _data.OrbitAnswer(True, None), True
    if waiting and answer.ready:
        st.rerun()  # the analysis has arrived: redraw the whole page with it
    report = answer.report
    if report is None:
        note = ("analysing the orbit …" if not answer.ready else
                "orbit analysis failed" if failed else "no BPM readings in the window")
        for col, label in zip(cols[2:], ("Worst orbit drift", "Orbit steps", "Out-of-limit events"), strict=True):
            with col:
                _ui.big_number(label, "…" if not answer.ready else "–", sub=note)
    else:
        worst = worst_drift(report)
        stale = " · updating …" if answer.updating else ""
        with cols[2]:
            if worst is None:
                _ui.big_number("Worst orbit drift", "–", sub="no drift measured")
            else:
                _ui.big_number("Worst orbit drift", f"{worst.max_abs_drift_m * _ui.UM_PER_M:.1f} µm",
                               help=f"Largest |bucket mean − reference| = {worst.max_abs_drift_m!r} m; "
                                    f"limit {report.limits.drift_limit_m * _ui.UM_PER_M:g} µm.",
                               sub=f"{worst.bpm} {worst.plane} · limit "
                                   f"{report.limits.drift_limit_m * _ui.UM_PER_M:g} µm{stale}")
        with cols[3]:
            events = step_events(report)
            first = f", first {_ui.fmt_time(events[0].time)[11:19]}" if events else ""
            n_bpms = len({b for e in events for b in e.bpms})
            _ui.big_number("Orbit steps", f"{len(events)}",
                           help="Sudden orbit changes: steps found on one or more BPMs at the same time "
                                f"count once ({len(report.steps)} BPM-plane steps in all).",
                           sub=(f"on {n_bpms} BPMs{first}" if events else "none in the window") + stale)
        with cols[4]:
            losses = len(report.loss_events)
            _ui.big_number("Out-of-limit events", f"{len(report.violations)}",
                           help="Intervals in which a BPM plane exceeded the drift or jitter limit.",
                           sub=f"{len(report.out_of_limit_bpms)} BPMs · {losses} beam-loss event"
                               f"{'' if losses == 1 else 's'}{stale}")
    _ui.guard(status, root, stamp, what="The data status")


def status(root: str, stamp: str) -> None:
    """Last data per source, the watch service and quarantined inputs (second row, smaller)."""
    seen = _data.last_seen(root, stamp)
    cols = st.columns(len(SOURCES) + 2)
    for col, (kind, label) in zip(cols, SOURCES.items(), strict=False):
        ts = seen.get(kind)
        with col:
            _ui.small_fact(f"Last: {label}", _ui.fmt_time(ts)[:16] if ts is not None else "never",
                           help=f"Newest {kind} timestamp in the store, UTC ({_ui.fmt_age(ts)}).")
    beat = _data.heartbeat(root)
    with cols[-2]:
        if beat is None:
            _ui.small_fact("Watch service", "not running", help="No heartbeat file from `beamdiag watch`.")
        else:
            fresh = _data.heartbeat_is_fresh(beat)
            state = str(beat.get("state", "?"))
            _ui.small_fact("Watch service", state if fresh else f"{state} (stale)",
                           help=(f"Heartbeat {_ui.fmt_time(_data.heartbeat_time(beat))}; "
                                 f"pending {beat.get('pending')}, lag {beat.get('lag_s')} s, "
                                 f"stored {beat.get('stored')}, quarantined {beat.get('quarantined')}."))
    with cols[-1]:
        _ui.small_fact("Quarantined inputs", f"{_data.quarantine_count(root, stamp)}",
                       help="Input files the store rejected (see `beamdiag ingest` output).")


def events_of(root: str, stamp: str, window: _data.Window, report) -> pd.DataFrame:
    """Steps (one line per distinct time), beam-loss events and scans, for marking trends."""
    rows = []
    if report is not None:
        for ev in step_events(report):
            rows.append({"time": ev.time, "kind": "step", "label": f"step on {len(ev.bpms)} BPMs"})
        for ev in report.loss_events:
            rows.append({"time": ev.start, "end": ev.end, "kind": "loss",
                         "label": f"loss {ev.upstream}→{ev.downstream}"})
    try:
        scans = _data.list_scans(root, stamp)
    except Exception:  # no scans table yet
        scans = pd.DataFrame()
    for _, sc in scans.iterrows():
        t = _data.utc(sc["timestamp"])
        if window.start <= t < window.end:
            rows.append({"time": t, "kind": "scan", "label": f"scan {sc['name']}"})
    return pd.DataFrame(rows, columns=["time", "end", "kind", "label"])


def trends_later(root: str) -> None:
    """The trends' place on a session's first visit: empty now, the whole page again shortly.

    Runs inside a fragment with ``run_every`` = :data:`CHARTS_AFTER_S`.  The
    first (inline) run only marks the session; the timed run then reruns the
    page, which draws the trends at once and stops the timer.
    """
    if not st.session_state.get(CHARTS_KEY):
        st.session_state[CHARTS_KEY] = True
        st.caption("Drawing the trends …")
        return
    st.rerun(scope="app")


def trends(root: str) -> None:
    stamp = _data.stamp(root)
    window = _ui.current_window(root, stamp)
    if window is None:
        return
    try:
        report = _data.orbit_report(root, stamp, window.key, start=False).report
    except Exception:  # noqa: BLE001 - reported by the headline; trends go on without it
        report = None
    events = _ui.guard(events_of, root, stamp, window, report, what="The event list")
    left, right = st.columns(2)
    with left:
        _ui.guard(beam_sizes, root, stamp, window, events, what="Beam sizes")
    with right:
        _ui.guard(emittance_trend, root, stamp, window, events, what="Emittance")
    left, right = st.columns(2)
    with left:
        _ui.guard(orbit_drift, root, stamp, window, report, events, what="Orbit drift")
    with right:
        _ui.guard(temperatures, root, stamp, window, events, what="Temperatures")


def not_in_scans(results: pd.DataFrame) -> pd.DataFrame:
    """Result rows of routine measurements: scan steps (sizes varied on purpose) left out."""
    if results.empty or "scan" not in results:
        return results
    return results[results["scan"].isna()]


def chart(option: dict, *, key: str, height: int) -> None:
    """Draw a trend with ECharts (see :mod:`dashboard._echarts` for why not Plotly here)."""
    st.echarts_chart(option, height=height, key=key, theme="streamlit")


def span_ms(window: _data.Window) -> tuple[float, float]:
    """The window in ms since the epoch: every trend's time axis spans it exactly."""
    start, end = _ui.times_ms([window.start, window.end])
    return float(start), float(end)


def marks(events: pd.DataFrame, window: _data.Window) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The events to mark on a trend of ``window`` (lines and bands, cut to the window)."""
    return _echarts.event_frames(events, _ui.times_ms, span_ms(window))


def size_points(prof: pd.DataFrame, frames: pd.DataFrame) -> pd.DataFrame:
    """Routine beam-size results as chart rows: wire-scan sigma with error, screen projections."""
    parts = []
    if not prof.empty and "sigma_m" in prof:
        err = prof["sigma_err_m"] if "sigma_err_m" in prof else pd.Series(np.nan, index=prof.index)
        parts.append(pd.DataFrame({
            "t": _ui.times_ms(prof["timestamp"]), "series": (prof["device"].astype(str) + " " + prof["plane"].astype(str)),
            "source": "wire scan", "value": prof["sigma_m"].to_numpy(float) * _ui.UM_PER_M,
            "err": err.to_numpy(float) * _ui.UM_PER_M, "si": prof["sigma_m"].to_numpy(float),
            "note": "wire scan"}))
    for plane in ("x", "y"):
        col = f"projection_{plane}_sigma_m"
        if frames.empty or col not in frames:
            continue
        parts.append(pd.DataFrame({
            "t": _ui.times_ms(frames["timestamp"]), "series": frames["device"].astype(str) + f" {plane}",
            "source": "screen", "value": frames[col].to_numpy(float) * _ui.UM_PER_M, "err": np.nan,
            "si": frames[col].to_numpy(float), "note": "screen, projection"}))
    if not parts:
        return pd.DataFrame(columns=["t", "series", "source", "value", "err", "si", "note"])
    out = pd.concat(parts, ignore_index=True)
    return out[np.isfinite(out["value"])].sort_values(["series", "t"], kind="stable").reset_index(drop=True)


def beam_sizes(root: str, stamp: str, window: _data.Window, events: pd.DataFrame) -> None:
    prof = not_in_scans(_data.results(root, stamp, "profiles", window.key))
    try:
        frames = _data.results(root, stamp, "frames", window.key)
    except Exception as exc:  # noqa: BLE001 - one result kind unreadable: show the others
        frames = pd.DataFrame()
        st.caption(f"Screen sizes not shown: the stored screen results cannot be read "
                   f"({type(exc).__name__}).")
    data = size_points(prof, not_in_scans(frames))
    st.subheader("Beam sizes")
    if data.empty:
        st.caption("No analysed wire scans or screen images in the window.")
        return
    chart(_echarts.results_chart(data, y_title="rms size σ (µm)", unit="µm", si_unit="m", lines=True,
                                 domain_ms=span_ms(window), events=marks(events, window),
                                 event_colours=_ui.EVENT_COLOURS),
          key="shift_sizes", height=360)


def emittance_points(res: pd.DataFrame) -> pd.DataFrame:
    """Quad-scan results as chart rows, one per plane and scan (mm mrad, SI alongside)."""
    parts = []
    for plane in ("x", "y"):
        col = f"{plane}_norm_emittance_m_rad"
        if col not in res:
            continue
        err = res.get(f"{plane}_norm_emittance_err_m_rad", pd.Series(np.nan, index=res.index))
        value = res[col].to_numpy(float)
        parts.append(pd.DataFrame({
            "t": _ui.times_ms(res["timestamp"]), "series": f"ε{plane} (norm.)", "source": "quad scan",
            "value": value * _ui.MM_MRAD_PER_M_RAD, "err": err.to_numpy(float) * _ui.MM_MRAD_PER_M_RAD,
            "si": value, "note": res.get("scan_name", pd.Series("", index=res.index)).astype(str).to_numpy()}))
    out = pd.concat(parts, ignore_index=True)
    return out[np.isfinite(out["value"])].reset_index(drop=True)


def emittance_trend(root: str, stamp: str, window: _data.Window, events: pd.DataFrame) -> None:
    st.subheader("Emittance")
    res = _data.results(root, stamp, "scans", window.key)
    if res.empty or "x_norm_emittance_m_rad" not in res:
        st.caption("No quad-scan results in the window.")
        return
    data = emittance_points(res)
    if data.empty:
        st.caption("The quad-scan results in the window hold no emittance (every fit failed).")
        return
    chart(_echarts.results_chart(data, y_title="normalised emittance (mm mrad)", unit="mm mrad", si_unit="m rad",
                                 domain_ms=span_ms(window), events=marks(events, window),
                                 event_colours=_ui.EVENT_COLOURS,
                                 fixed_colours={"εx (norm.)": "#1f77b4", "εy (norm.)": "#d62728"}),
          key="shift_emittance", height=360)


def drift_wide(times, bpms, values: np.ndarray) -> pd.DataFrame:
    """Drift per bucket (rows) and BPM (columns), µm as float32, times in ms."""
    frame = pd.DataFrame((values * _ui.UM_PER_M).astype(np.float32), columns=list(bpms))
    frame.insert(0, "t", _ui.times_ms(times))
    return frame


def orbit_drift(root: str, stamp: str, window: _data.Window, report, events: pd.DataFrame) -> None:
    st.subheader("Orbit drift per BPM")
    bucket = _data.bucket_for(window.duration_s, max_points=DRIFT_POINTS)
    drift = _data.drift_trend(root, stamp, window.key, bucket)
    if drift is None:
        st.caption("No BPM readings in the window.")
        return
    times, bpms, dx, dy, tr = drift
    worst = worst_drift(report) if report is not None else None
    if worst is None:  # until the analysis is in, highlight the largest drift on the plot
        both = np.abs(np.stack([dx, dy]))
        if np.isfinite(both).any():
            p, _, j = np.unravel_index(np.nanargmax(both), both.shape)
            highlight = (bpms[j], "xy"[p])
        else:
            highlight = None
    else:
        highlight = (worst.bpm, worst.plane)
    ev = marks(events, window)
    for plane, values in (("x", dx), ("y", dy)):
        pick = highlight[0] if highlight is not None and highlight[1] == plane else None
        wide = drift_wide(times, bpms, values)
        if pick is not None:
            j = bpms.index(pick)
            # the band is the min/max of the raw readings in each bucket, on the drift's offset
            sub = tr[tr["device"] == pick].set_index("timestamp")
            offset = sub[f"{plane}_m_mean"].reindex(times).to_numpy() - values[:, j]
            lo = (sub[f"{plane}_m_min"].reindex(times).to_numpy() - offset) * _ui.UM_PER_M
            hi = (sub[f"{plane}_m_max"].reindex(times).to_numpy() - offset) * _ui.UM_PER_M
            wide["band lo"], wide["band span"] = lo.astype(np.float32), (hi - lo).astype(np.float32)
        chart(_echarts.drift_chart(wide, bpms, y_title=f"{plane} drift (µm)", domain_ms=span_ms(window),
                                   events=ev, event_colours=_ui.EVENT_COLOURS, highlight=pick),
              key=f"shift_orbit_{plane}", height=230)
    st.caption(f"{len(bpms)} BPMs, {bucket} bucket means minus the reference orbit (first "
               f"{_data.library('orbit').DEFAULT_REFERENCE_MINUTES:g} min)"
               + (f"; {highlight[0]} {highlight[1]}, the largest drift, in red with the min/max of its readings"
                  if highlight is not None else "") + ".")


def temperature_channels(slow: pd.DataFrame) -> tuple[pd.Series, tuple[str, ...]]:
    """The unit of each slow channel, and the channels whose unit is a temperature."""
    units = slow.groupby("channel", sort=True)["unit"].first()
    return units, tuple(ch for ch, u in units.items() if _ui.unit_text(u) in _ui.TEMPERATURE_UNITS)


def temperature_trend(root: str, stamp: str, window: _data.Window, temps: tuple[str, ...]) -> pd.DataFrame:
    return _data.trend(root, stamp, "slow", ("value",), window.key,
                       _data.bucket_for(window.duration_s, max_points=TEMPERATURE_POINTS), temps)


def temperatures(root: str, stamp: str, window: _data.Window, events: pd.DataFrame) -> None:
    st.subheader("Temperatures")
    slow = _data.read_slow(root, stamp, window.key)
    if slow.empty:
        st.caption("No slow-channel readings in the window.")
        return
    units, temps = temperature_channels(slow)
    if not temps:
        st.caption("No temperature channels in the window.")
        return
    tr = temperature_trend(root, stamp, window, temps)
    by_unit = units.loc[list(temps)].astype(str)
    unit = _ui.unit_text(by_unit.iloc[0])
    shown = [ch for ch in temps if by_unit[ch] == by_unit.iloc[0]]  # one axis: the channels in the first unit
    tr = tr[tr["device"].isin(shown)]
    wide = temperature_wide(tr, shown)
    chart(_echarts.envelope_chart(wide, shown, y_title=f"temperature ({unit})", unit=unit,
                                  domain_ms=span_ms(window), events=marks(events, window),
                                  event_colours=_ui.EVENT_COLOURS),
          key="shift_temps", height=420)
    if len(shown) < len(temps):
        st.caption(f"Channels in other units not shown here: {', '.join(c for c in temps if c not in shown)}.")


def temperature_wide(tr: pd.DataFrame, channels) -> pd.DataFrame:
    """Bucket mean, min and max-min per channel as columns on the common time buckets."""
    wide = tr.pivot_table(index="timestamp", columns="device", values=["value_mean", "value_min", "value_max"],
                          aggfunc="first", dropna=False).sort_index()
    out = pd.DataFrame({"t": _ui.times_ms(wide.index)})
    for ch in channels:
        mean, lo, hi = (wide[(col, ch)].to_numpy(float) if (col, ch) in wide else np.full(len(wide), np.nan)
                        for col in ("value_mean", "value_min", "value_max"))
        out[ch], out[f"{ch} lo"], out[f"{ch} span"] = mean, lo, hi - lo
    return out


def warm_window(root: str, stamp: str, window: _data.Window) -> None:
    """Fill the caches of every query the trends of ``window`` make (no drawing)."""
    for kind in ("profiles", "frames", "scans"):
        _data.results(root, stamp, kind, window.key)
    _data.drift_trend(root, stamp, window.key, _data.bucket_for(window.duration_s, max_points=DRIFT_POINTS))
    slow = _data.read_slow(root, stamp, window.key)
    if not slow.empty:
        _, temps = temperature_channels(slow)
        if temps:
            temperature_trend(root, stamp, window, temps)


def warm_other_windows(root: str, stamp: str, window: _data.Window) -> None:
    """Start filling the caches of the other preset windows of fixed length, in the background.

    ("All data" is left out: on a store of many weeks it is the one costly to read ahead.)
    """
    span = _data.data_range(root, stamp)
    if span is None:
        return
    others = {w.key: w for preset, length in _ui.WINDOW_PRESETS.items() if length is not None
              for w in [_ui.default_window(span, preset)] if w.key != window.key}
    _data.prewarm(("shift", root, stamp), [(warm_window, (root, stamp, w)) for w in others.values()])


def main() -> None:
    page = _ui.page_window("Shift")
    if page is None:
        return
    root, stamp, window = page
    beat = _data.heartbeat(root)
    live = _data.heartbeat_is_fresh(beat)
    # the orbit analysis of a new window starts after the first render, not during it
    try:
        waiting = not _data.orbit_report(root, stamp, window.key, start=False).ready
    except Exception:  # noqa: BLE001 - a failed analysis: the headline says so
        waiting = False
    every = POLL_S if waiting else (LIVE_HEADLINE_S if live else None)
    st.fragment(headline, run_every=every)(root, waiting, live)
    st.divider()
    charts = bool(st.session_state.get(CHARTS_KEY))
    if charts:
        st.fragment(trends, run_every=LIVE_TRENDS_S if live else None)(root)
    else:  # headline first: the charts arrive in a second run
        st.fragment(trends_later, run_every=CHARTS_AFTER_S)(root)
    if waiting:  # at the end of the run; the worker pauses first so the run's elements go out
        try:
            _data.orbit_report(root, stamp, window.key)
        except Exception:  # noqa: BLE001, S110 - it failed meanwhile: the headline's next poll says so
            pass
    if charts and not live:  # (while new data arrive, the store stamp and so the keys move on)
        warm_other_windows(root, stamp, window)


_ui.guard(main, what="This page")
