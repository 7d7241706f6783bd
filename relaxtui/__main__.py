"""``python -m relaxtui`` runs the command line."""

from relaxtui.cli import entry

entry()
