"""``python -m fieldfix_cli`` runs the fieldfix command."""

from fieldfix_cli.main import entry

entry()
