"""The command line: argv, environment, logging, exit codes (:mod:`.commands`)."""

from fieldprop.cli.commands import main

__all__ = ["main"]
