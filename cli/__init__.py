"""Command-line layer of fieldfix (installed as fieldfix_cli)."""
