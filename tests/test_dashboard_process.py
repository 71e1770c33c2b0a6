"""Stopping ``beamdiag dashboard`` stops the server: no orphan keeps serving."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
import urllib.request

import pytest

from diagnostics.store import Store


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _healthy(port: int) -> bool:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=1) as r:
            return r.read().strip() == b"ok"
    except OSError:
        return False


@pytest.mark.slow
def test_sigterm_to_the_dashboard_command_stops_the_server(tmp_path):
    Store(tmp_path / "store")  # an empty store is enough to serve
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "diagnostics", "dashboard", "--store",
                             str(tmp_path / "store"), "--port", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while not _healthy(port):
            assert proc.poll() is None, "the dashboard exited before serving"
            assert time.monotonic() < deadline, "the dashboard did not answer within 60 s"
            time.sleep(0.3)
        proc.terminate()
        proc.wait(timeout=30)
        assert not _healthy(port), "the server still answers after its command was stopped"
    finally:
        if proc.poll() is None:
            proc.kill()
