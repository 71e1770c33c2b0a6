"""Start Streamlit with the dashboard's libraries already imported.

``python -m streamlit run app.py`` imports the libraries a page needs only when
the first browser session runs the script, so the first operator to open the
dashboard after a start waits for pandas, DuckDB, plotly and the analysis
modules to load (about 1-2 s on 2 cores).  This launcher imports them in the
server process before Streamlit starts; the sessions' scripts run in the same
process and find them loaded.  ``beamdiag dashboard`` runs
``python dashboard/serve.py run dashboard/app.py --server.address ...``; the
arguments are Streamlit's own.
"""

from __future__ import annotations

import importlib
import sys
from pathlib import Path

#: Imported before the server starts (third-party first, then the library).
WARM_MODULES = (
    "pandas", "pyarrow.parquet", "duckdb", "plotly.graph_objects", "plotly.express",
    "diagnostics.store", "diagnostics.orbit", "diagnostics.emittance", "diagnostics.images",
    "diagnostics.profiles", "diagnostics.report", "diagnostics.service",
)


def main(argv: list[str] | None = None) -> int:
    repo = Path(__file__).resolve().parents[1]
    if str(repo) not in sys.path:  # started from a source tree
        sys.path.insert(0, str(repo))
    for name in WARM_MODULES:
        importlib.import_module(name)
    from streamlit.web import cli

    sys.argv = ["streamlit", *(sys.argv[1:] if argv is None else argv)]
    return cli.main()


if __name__ == "__main__":
    sys.exit(main())
