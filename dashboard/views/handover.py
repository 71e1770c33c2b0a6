"""Handover: the shift report for the next crew.

The report is :func:`diagnostics.report.build_report` over the chosen window
with the operator's notes, previewed as :func:`diagnostics.report.render_html`
renders it and offered as an HTML download.  The preview sits in an iframe
loaded from a ``data:`` URL, so the report's styles and any text in it stay
apart from the dashboard (an opaque origin: no access to the page).
"""

from __future__ import annotations

import base64

import streamlit as st

from dashboard import _data, _ui

#: Longest notes accepted, characters.
MAX_NOTES = 5000

#: Height of the report preview, pixels.
PREVIEW_HEIGHT = 900


@st.cache_data(ttl=_data.TTL_S, max_entries=16, show_spinner="Writing the report ...")
def report_html(root: str, stamp: str, window: tuple[str, str], notes: str) -> tuple[str, str]:
    """``(html, title)`` of the shift report over ``window`` with ``notes``."""
    report = _data.library("report")
    start, end = window
    rep = report.build_report(_data.open_store(root), start=start, end=end, notes=notes)
    title = str(getattr(rep, "title", "") or "shift report")
    return report.render_html(rep), title


def file_name(window: _data.Window) -> str:
    return f"handover_{window.start.strftime('%Y%m%dT%H%MZ')}_{window.end.strftime('%Y%m%dT%H%MZ')}.html"


def main() -> None:
    st.title("Handover")
    ctx = _ui.page_store()
    if ctx is None:
        return
    root, stamp = ctx
    window = _ui.window_picker(root, stamp)
    if window is None:
        _ui.empty_state("The store holds no measurements yet, so there is no shift to report.")
        return
    with st.form("handover_notes", border=False):
        notes = st.text_area("Notes for the next shift", key="handover_notes_text", max_chars=MAX_NOTES,
                             height=140, placeholder="What happened, what was changed, what to watch …")
        st.form_submit_button("Update report", type="primary")
    try:
        html, _title = report_html(root, stamp, window.key, notes.strip())
    except _data.Unavailable as exc:
        _ui.unavailable(exc)
        return
    st.download_button("Download the report (HTML)", html, file_name=file_name(window), mime="text/html",
                       key="handover_download", type="primary", icon=":material/download:")
    encoded = base64.b64encode(html.encode("utf-8")).decode("ascii")
    st.iframe(f"data:text/html;charset=utf-8;base64,{encoded}", height=PREVIEW_HEIGHT)


_ui.guard(main, what="This page")
