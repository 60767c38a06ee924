"""The `run` command: the daemon (scheduler plus HTTP server) until SIGTERM or SIGINT."""

from __future__ import annotations

import argparse
from typing import Any

from aftercast.config import load_config


def cmd_run(args: argparse.Namespace) -> int:
    from aftercast.daemon import run_daemon  # the web stack is only imported when it runs

    return run_daemon(load_config(args.config), args.host, args.port)


def _port(text: str) -> int:
    if not text.isdigit() or not 1 <= int(text) <= 65_535:
        raise argparse.ArgumentTypeError(f"{text!r} is not a TCP port (1-65535)")
    return int(text)


def register(commands: Any) -> None:
    run = commands.add_parser("run", help="the daemon: scheduled cycles and source pulls, HTTP API")
    run.add_argument("--host", help="address to listen on (default: config web.host, 127.0.0.1)")
    run.add_argument(
        "--port", type=_port, help="port to listen on (default: config web.port, 8080)"
    )
    run.set_defaults(handler=cmd_run)
