"""Subcommands beyond check and explain; see cli.COMMANDS."""
