"""The command line: argument parsing, printing and exit codes, one module per command."""

from .program import entry, main

__all__ = ["entry", "main"]
