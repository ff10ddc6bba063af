"""The command line: :mod:`.entry` (the process: thread defaults, logging,
signals, exit codes), :mod:`.parser` (the grammar and ``--help``) and
:mod:`.commands` (one handler per command). ``entry`` is imported first, so its
thread defaults are in the environment before anything loads NumPy."""

from fieldprop.cli.entry import main

__all__ = ["main"]
