"""The README's Commands table names every sub-command `aftercast --help` shows, and no other."""

from __future__ import annotations

import argparse
import re
from pathlib import Path

from aftercast.cli import build_parser

README = Path(__file__).resolve().parent.parent / "README.md"


def _table_commands() -> set[str]:
    text = README.read_text(encoding="utf-8")
    section = text.split("\n## Commands\n", 1)[1].split("\n## ", 1)[0]
    return set(re.findall(r"^\| `([a-z]+)", section, flags=re.MULTILINE))


def _parser_commands() -> set[str]:
    parser = build_parser()
    (commands,) = (a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return set(commands.choices)


def test_the_commands_table_lists_every_sub_command_and_nothing_else() -> None:
    assert _table_commands() == _parser_commands()
