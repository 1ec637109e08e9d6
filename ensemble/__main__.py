"""``python -m ensemble`` runs the command line."""

from .cli import entry

entry()
