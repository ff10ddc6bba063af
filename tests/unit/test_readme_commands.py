"""The README's command table against the parser: every command the parser
has is in the table, and each row names exactly the long options its command
takes (so that a flag added or renamed shows in both). No PySCF."""

import argparse
import re
from pathlib import Path

from fieldprop.cli.parser import build_parser

README = Path(__file__).resolve().parents[2] / "README.md"


def _parser_options() -> dict[str, set[str]]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {name: {o for a in p._actions for o in a.option_strings
                   if o.startswith("--") and o != "--help"}
            for name, p in sub.choices.items()}


def _readme_rows() -> dict[str, set[str]]:
    rows = {}
    for line in README.read_text(encoding="utf-8").splitlines():
        m = re.match(r"\| `fieldprop (\w+) ([^`]*)` \|", line)
        if m:
            rows[m.group(1)] = set(re.findall(r"--[a-z][a-z-]*", m.group(2)))
    return rows


def test_the_readme_command_table_names_every_command_and_option():
    parser, readme = _parser_options(), _readme_rows()
    assert set(readme) == set(parser)
    for command, options in parser.items():
        assert readme[command] == options, (command, sorted(options - readme[command]),
                                            sorted(readme[command] - options))
