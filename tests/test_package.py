"""The package imports, the CLI answers, and the safety note is where it must be."""

from __future__ import annotations

import subprocess
import sys

import diagnostics
from diagnostics.cli import main


def test_package_imports_and_has_version():
    assert isinstance(diagnostics.__version__, str) and diagnostics.__version__


def test_help_works_in_process(capsys):
    try:
        main(["--help"])
    except SystemExit as exc:
        assert exc.code == 0
    out = capsys.readouterr().out
    assert "beamdiag" in out
    assert "analysis aid" in out


def test_help_works_as_console_command():
    proc = subprocess.run(
        [sys.executable, "-m", "diagnostics", "--help"], capture_output=True, text=True, timeout=60
    )
    assert proc.returncode == 0, proc.stderr
    assert "usage: beamdiag" in proc.stdout
