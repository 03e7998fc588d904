"""Subcommands of the `isoclay` command, one module each (add_parser, run)."""
