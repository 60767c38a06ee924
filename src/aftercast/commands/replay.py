"""`aftercast replay --from ISO --to ISO`: which alerts the rules would have raised, and when.

Runs the detection stage over the stored history with the clock set day by day (nothing of it
is stored) and prints, per rule, the alerts that would have been raised, when they would have
cleared and how long they lasted; `--json` prints the whole report.
"""

from __future__ import annotations

import argparse
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.commands.tables import table_console
from aftercast.config import load_config
from aftercast.errors import AftercastError
from aftercast.periods import parse_instant
from aftercast.replay import ReplayReport, replay


def _instant(text: str, flag: str) -> int:
    try:
        return parse_instant(text)
    except ValueError:
        raise AftercastError(f"{flag} {text!r} is not an ISO 8601 time") from None


def _table(report: ReplayReport) -> Table:
    table = Table(
        title=f"replay {report.as_json()['from']} .. {report.as_json()['to']}: "
        f"{len(report.alerts)} alert(s) over {report.days} day(s)"
    )
    for column in ("rule", "series", "model", "h", "raised", "cleared", "days", "severity"):
        table.add_column(column)
    for row in report.alerts:
        table.add_row(
            row["rule"],
            row["series_id"],
            row["model"],
            row["horizon"],
            row["raised_at"],
            row["cleared_at"] or "still raised",
            str(row["days_flagged"]),
            row["severity"],
        )
    return table


def cmd_replay(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    start, end = _instant(args.from_, "--from"), _instant(args.to, "--to")
    if end < start:
        raise AftercastError("--to must not be before --from")
    columns = (TextColumn("replaying days"), BarColumn(), MofNCompleteColumn())
    with Progress(*columns, console=Console(stderr=True), transient=True) as bar:
        task = bar.add_task("days", total=None)
        report = replay(
            engine,
            config,
            start,
            end,
            lambda done, total: bar.update(task, completed=done, total=total),
        )
    if args.json:
        print_json(report.as_json())
        return 0
    table_console().print(_table(report))
    for rule, count in sorted(report.per_detection.items()):
        print(f"{rule}: {count} alert(s)")
    return 0


def register(commands: Any) -> None:
    command = commands.add_parser("replay", help="which alerts the rules would have raised")
    command.add_argument("--from", dest="from_", required=True, metavar="ISO", help="first day")
    command.add_argument("--to", required=True, metavar="ISO", help="last day (inclusive)")
    command.add_argument("--json", action="store_true", help="print the report as JSON")
    command.set_defaults(handler=cmd_replay)
