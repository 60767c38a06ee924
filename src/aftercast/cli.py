"""The command line: `aftercast [--config PATH] COMMAND ...` (also `python -m aftercast`).

Every error a user can cause ends in one line naming the file, row or config key and a non-zero
exit; never a traceback. Commands are thin: they load the config, open the store and call the
stage functions.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
from collections.abc import Callable, Sequence
from typing import Any

from aftercast import __version__
from aftercast.errors import AftercastError

EXIT_USER_ERROR = 2
EXIT_UNREADABLE = 1

Handler = Callable[[argparse.Namespace], int]


# Each module adds its own sub-commands with `register(commands)`, and handles them with the
# function it sets as the parser default `handler`; a new command is one new module and one line.
COMMAND_MODULES = (
    "aftercast.commands.core",
    "aftercast.commands.status",
    "aftercast.commands.daemon",
    "aftercast.commands.baselines",
    "aftercast.commands.backtest",
    "aftercast.commands.replay",
    "aftercast.commands.quarantine",
    "aftercast.commands.alerts",  # before alert_actions, whose ack/snooze attach to `alerts`
    "aftercast.commands.alert_actions",
    "aftercast.commands.outbox",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="aftercast", description="Watch live forecasts against what actually happens."
    )
    parser.add_argument(
        "--config",
        help="config file (default: $AFTERCAST_CONFIG, then ./config/aftercast.yaml)",
    )
    parser.add_argument("--version", action="version", version=f"aftercast {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse already printed one usage line
        return EXIT_USER_ERROR if exc.code else 0
    handler: Handler = args.handler
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
