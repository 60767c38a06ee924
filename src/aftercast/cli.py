"""The command line: `aftercast [--config PATH] COMMAND ...` (also `python -m aftercast`).

Every error a user can cause ends in one line naming the file, row or config key and a non-zero
exit; never a traceback. Commands are thin: they load the config, open the store and call the
stage functions.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from aftercast import __version__
from aftercast.errors import AftercastError

EXIT_USER_ERROR = 2
EXIT_UNREADABLE = 1

Handler = Callable[[argparse.Namespace], int]


def _add_ingest(commands: Any) -> None:
    ingest = commands.add_parser("ingest", help="load forecasts, actuals or series from files")
    ingest.add_argument("kind", choices=["forecasts", "actuals", "series"])
    ingest.add_argument("paths", nargs="+", type=Path, metavar="PATH")
    ingest.add_argument("--json", action="store_true", help="print counts as one JSON object")


def _add_status(commands: Any) -> None:
    status = commands.add_parser("status", help="window measures per series, model and horizon")
    status.add_argument("--json", action="store_true", help="print a JSON array of rows")
    status.add_argument("--now", help="evaluation time, ISO 8601 (default: the clock)")
    status.add_argument("--window", help="named window (default: the first configured)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="aftercast", description="Watch live forecasts against what actually happens."
    )
    parser.add_argument(
        "--config", help="config file (default: $AFTERCAST_CONFIG, then ./config/aftercast.yaml)"
    )
    parser.add_argument("--version", action="version", version=f"aftercast {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    init = commands.add_parser("init", help="create or migrate the store")
    init.add_argument(
        "--write-config",
        type=Path,
        metavar="PATH",
        help="write a commented starter config to PATH instead",
    )
    _add_ingest(commands)
    cycle = commands.add_parser("cycle", help="one full monitoring pass")
    cycle.add_argument("--now", help="evaluation time, ISO 8601 (default: the clock)")
    cycle.add_argument("--json", action="store_true", help="print the cycle report as JSON")
    _add_status(commands)
    scores = commands.add_parser("scores", help="matched pairs with their per-pair measures")
    scores_commands = scores.add_subparsers(dest="scores_command", required=True)
    export = scores_commands.add_parser("export", help="write the pairs to a file")
    export.add_argument("--format", choices=["csv", "jsonl"], default="csv")
    export.add_argument("-o", "--output", type=Path, required=True, metavar="PATH")
    demo = commands.add_parser("demo", help="the whole job end to end on an invented scenario")
    demo.add_argument(
        "--folder",
        type=Path,
        help="where to put the demo files (default: a new folder under ./demo-output)",
    )
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse already printed one usage line
        return int(exc.code or 0) and EXIT_USER_ERROR
    from aftercast import commands

    handler: Handler = getattr(commands, f"cmd_{args.command}")
    try:
        return handler(args)
    except AftercastError as exc:
        print(f"aftercast: error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print("aftercast: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


def print_json(value: Any) -> None:
    json.dump(value, sys.stdout, indent=None, separators=(",", ":"))
    sys.stdout.write("\n")
