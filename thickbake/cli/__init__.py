"""The command line: the only layer that parses arguments, prints or exits."""

from thickbake.cli.main import main

__all__ = ["main"]
