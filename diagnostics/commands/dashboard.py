"""``beamdiag dashboard``: serve the Streamlit dashboard on a store.

The dashboard is started as ``python dashboard/serve.py run dashboard/app.py``
(Streamlit's own ``run``, after the launcher has imported the libraries the pages
need, so the first session does not wait for them) with
the store in the environment variable ``BEAMDIAG_STORE`` and a fixed set of
server options chosen for a shared control-room network: bound to the loopback
interface unless told otherwise, no usage statistics, error types only (no
tracebacks in the browser), XSRF and CORS protection on, no static file serving,
no file watcher and a small upload limit.  Put it behind an authenticating
reverse proxy with TLS before exposing it to other hosts (docs/dashboard.md).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from pathlib import Path

from diagnostics.errors import InputError

#: The Streamlit entry script.
APP_PATH = Path(__file__).resolve().parents[2] / "dashboard" / "app.py"

#: The launcher that imports the pages' libraries, then hands over to Streamlit.
SERVE_PATH = APP_PATH.parent / "serve.py"
#: Environment variable through which the dashboard learns the store folder.
STORE_ENV = "BEAMDIAG_STORE"

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8501

#: Server options passed on every start (each checked against ``streamlit config show``).
SAFE_OPTIONS: tuple[tuple[str, str], ...] = (
    ("server.headless", "true"),
    ("browser.gatherUsageStats", "false"),
    ("client.showErrorDetails", "type"),
    ("client.toolbarMode", "viewer"),
    ("server.fileWatcherType", "none"),
    ("server.runOnSave", "false"),
    ("server.maxUploadSize", "50"),
    ("server.enableXsrfProtection", "true"),
    ("server.enableCORS", "true"),
    ("server.enableStaticServing", "false"),
    ("server.maxCacheDataSize", "1gb"),
)


def streamlit_command(store: str | Path, *, host: str = DEFAULT_HOST, port: int = DEFAULT_PORT) -> list[str]:
    """The command line that serves the dashboard on ``store``.

    Parameters
    ----------
    store : str or Path
        Store folder (passed again after ``--`` for people reading ``ps``).
    host, port : str, int
        Interface and TCP port to bind; ``127.0.0.1`` keeps it on this machine.

    Returns
    -------
    list of str
        ``[python, SERVE, run, APP, --server.address, HOST, ...]``.
    """
    cmd = [sys.executable, str(SERVE_PATH), "run", str(APP_PATH),
           "--server.address", str(host), "--server.port", str(int(port))]
    for name, value in SAFE_OPTIONS:
        cmd += [f"--{name}", value]
    return cmd + ["--", "--store", str(Path(store).resolve())]


def dashboard_url(host: str, port: int) -> str:
    """The address to open in a browser (IPv6 literals in brackets)."""
    shown = f"[{host}]" if ":" in host and not host.startswith("[") else host
    return f"http://{shown}:{int(port)}/"


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "dashboard",
        help="serve the dashboard (Shift, Quad scan, Profiles and screens, Orbit, Handover)",
        description="Serve the Streamlit dashboard on a store, read-only, bound to 127.0.0.1 by default.",
    )
    parser.add_argument("--store", default=os.environ.get(STORE_ENV), metavar="DIR",
                        help=f"store folder (default: ${STORE_ENV})")
    parser.add_argument("--host", default=DEFAULT_HOST,
                        help="interface to bind (default 127.0.0.1; expose only behind a reverse proxy)")
    parser.add_argument("--port", type=int, default=DEFAULT_PORT, help="TCP port (default 8501)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    if not args.store:
        raise InputError(f"--store: no store folder given (expected --store DIR or ${STORE_ENV})")
    store = Path(args.store)
    if not store.is_dir():
        raise InputError(f"{store}: store folder not found (expected a folder made by "
                         "'beamdiag ingest' or 'beamdiag demo --store DIR')")
    if not 0 < args.port < 65536:
        raise InputError(f"--port: {args.port} is not a TCP port (expected 1-65535)")
    cmd = streamlit_command(store, host=args.host, port=args.port)
    env = {**os.environ, STORE_ENV: str(store.resolve())}
    print(f"beamdiag dashboard: serving {store.resolve()} at {dashboard_url(args.host, args.port)}",
          flush=True)
    if os.name == "posix":
        # become the server: SIGTERM, SIGKILL and Ctrl-C (systemd, a test, an
        # operator) then reach Streamlit itself and never leave an orphan serving
        os.execve(cmd[0], cmd, env)
    proc = subprocess.Popen(cmd, env=env)  # pragma: no cover - not POSIX
    try:
        return proc.wait()
    except KeyboardInterrupt:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
        raise
