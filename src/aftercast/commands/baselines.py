"""`aftercast baselines show|freeze|reset|seed`: the reference windows detection compares with.

`show` lists stored baselines; `freeze` stores a chosen window (default: the detection window
ending now) as the baseline of the selected series and models; `reset` discards baselines,
logging what they were and why, so new ones collect from now on; `seed` takes them from a
backtest run. Selections: `--series` and `--model` may repeat; none means all.
"""

from __future__ import annotations

import argparse
import getpass
import time
from typing import Any

from aftercast.benchmark_methods import METHODS, model_name
from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.config import load_config
from aftercast.detect.baselines import (
    baseline_rows,
    freeze_baselines,
    reset_baselines,
    resolve_keys,
    seed_from_backtest,
)
from aftercast.detect.gather import DAY, detection_window
from aftercast.errors import AftercastError
from aftercast.periods import parse_instant, to_iso
from aftercast.store.catalog import ensure_models


def _instant(text: str | None, flag: str, default: int) -> int:
    if text is None:
        return default
    try:
        return parse_instant(text)
    except ValueError:
        raise AftercastError(f"{flag} {text!r} is not an ISO 8601 time") from None


def cmd_show(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    with engine.connect() as connection:
        rows = baseline_rows(connection, resolve_keys(connection, args.series, args.model))
    for row in rows:
        for name in ("window_start", "window_end", "created_at"):
            row[name] = to_iso(int(row[name]))  # type: ignore[call-overload]
    if args.json:
        print_json(rows)
        return 0
    for row in rows:
        levels: dict[str, float] = row["coverage"]  # type: ignore[assignment]
        coverage = ", ".join(f"{k}%: {v:.2f}" for k, v in levels.items())
        print(
            f"{row['series']} / {row['model']} h{row['bucket']}: {row['source']} "
            f"({row['window_start']} .. {row['window_end']}, {row['targets']} targets) "
            f"MAE {row['mae']:.4g}, RMSE {row['rmse']:.4g}"
            + (f", coverage {coverage}" if coverage else "")
        )
    if not rows:
        print("no baselines stored yet")
    return 0


def cmd_freeze(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    now = int(time.time())
    window = detection_window(config)
    end = _instant(args.to, "--to", now)
    span = int((window.days or 28) * DAY)
    start = _instant(args.from_, "--from", end - span)
    if end <= start:
        raise AftercastError("--to must be after --from")
    with engine.connect() as connection:
        keys = resolve_keys(connection, args.series, args.model)
    stored = freeze_baselines(engine, config, keys, start, end, now)
    print(f"froze {stored} baseline(s) on targets in ({to_iso(start)}, {to_iso(end)}]")
    return 0


def cmd_reset(args: argparse.Namespace) -> int:
    if not (args.series or args.model or args.all):
        raise AftercastError("baselines reset: name --series and/or --model, or pass --all")
    config = load_config(args.config)
    engine = open_store(config)
    with engine.connect() as connection:
        keys = resolve_keys(connection, args.series, args.model)
    now = _instant(args.at, "--at", int(time.time()))
    dropped = reset_baselines(engine, keys, args.reason, now, args.by or getpass.getuser())
    print(
        f"reset {len(keys)} series/model pair(s), discarding {dropped} baseline(s); "
        f"new ones collect from {to_iso(now)}"
    )
    return 0


def cmd_seed(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    model_id = method_id = None
    if args.model:
        with engine.begin() as connection:
            keys = resolve_keys(connection, [], [args.model])
            model_id = int(keys["model_id"].iloc[0])
            method_id = ensure_models(connection, [model_name(args.method)])[
                model_name(args.method)
            ]
    stored = seed_from_backtest(engine, config, args.run, int(time.time()), model_id, method_id)
    print(f"seeded {stored} baseline(s) from backtest run {args.run}")
    return 0


def _selection(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--series",
        action="append",
        default=[],
        metavar="KEY",
        help="a series (repeatable; default: all)",
    )
    parser.add_argument(
        "--model",
        action="append",
        default=[],
        metavar="NAME",
        help="a model (repeatable; default: all)",
    )


def register(commands: Any) -> None:
    baselines = commands.add_parser("baselines", help="show, freeze, reset or seed baselines")
    actions = baselines.add_subparsers(dest="baselines_action", metavar="ACTION", required=True)
    show = actions.add_parser("show", help="list stored baselines")
    _selection(show)
    show.add_argument("--json", action="store_true", help="print a JSON array")
    show.set_defaults(handler=cmd_show)
    freeze = actions.add_parser("freeze", help="store a window as the baseline")
    _selection(freeze)
    freeze.add_argument(
        "--from",
        dest="from_",
        metavar="ISO",
        help="window start, exclusive (default: the detection window before --to)",
    )
    freeze.add_argument("--to", metavar="ISO", help="window end, inclusive (default: now)")
    freeze.set_defaults(handler=cmd_freeze)
    reset = actions.add_parser("reset", help="discard baselines; new ones collect from now")
    _selection(reset)
    reset.add_argument("--all", action="store_true", help="every series and model")
    reset.add_argument("--reason", default="", help="why (kept in the reset log)")
    reset.add_argument("--by", help="who resets (default: your login name)")
    reset.add_argument("--at", metavar="ISO", help="new baselines collect from here (default: now)")
    reset.set_defaults(handler=cmd_reset)
    seed = actions.add_parser("seed", help="baselines from a backtest run's pairs")
    seed.add_argument("--run", type=int, required=True, metavar="ID", help="backtest run id")
    seed.add_argument("--model", help="seed this production model's baselines instead")
    seed.add_argument(
        "--method",
        choices=list(METHODS),
        default="seasonal-naive",
        help="with --model: the backtested method to take them from",
    )
    seed.set_defaults(handler=cmd_seed)
