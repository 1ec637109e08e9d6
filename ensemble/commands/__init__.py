"""Command-line commands, one module each (see :mod:`ensemble.cli`)."""
