"""beamdiag dashboard: the Streamlit entry script.

It only routes: each page is a file in ``views/`` (file pages, so that
``AppTest.switch_page`` can reach them), and the first page, Shift, is served
at ``/``.  The store folder comes from ``--store DIR`` after ``--`` on the
``streamlit run`` command line, or from ``$BEAMDIAG_STORE``; ``beamdiag
dashboard --store DIR`` sets both.
"""

from __future__ import annotations

import sys
from pathlib import Path

import streamlit as st

HERE = Path(__file__).resolve().parent
if str(HERE.parent) not in sys.path:  # started by hand from a source tree
    sys.path.insert(0, str(HERE.parent))

from dashboard import _data, _ui  # noqa: E402

st.set_page_config(page_title="beamdiag", layout="wide", initial_sidebar_state="expanded")

PAGES = [
    st.Page(HERE / "views" / "shift.py", title="Shift", icon=":material/monitor_heart:", default=True),
    st.Page(HERE / "views" / "quad_scan.py", title="Quad scan", icon=":material/stacked_line_chart:",
            url_path="quad-scan"),
    st.Page(HERE / "views" / "profiles.py", title="Profiles and screens", icon=":material/blur_on:",
            url_path="profiles"),
    st.Page(HERE / "views" / "orbit.py", title="Orbit", icon=":material/timeline:", url_path="orbit"),
    st.Page(HERE / "views" / "handover.py", title="Handover", icon=":material/assignment:",
            url_path="handover"),
]

page = st.navigation(PAGES, position="sidebar", expanded=True)
_ui.sidebar()
page.run()
_ui.footer()
_data.freeze_heap_once()
