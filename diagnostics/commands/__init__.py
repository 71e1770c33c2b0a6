"""One module per ``beamdiag`` subcommand; see :mod:`diagnostics.cli`."""
