"""`aftercast backtest`: rolling-origin evaluation of the benchmark methods, with a progress bar.

Prints a table per method and horizon (MAE, RMSE, coverage per level) or, with `--json`, the
run as one JSON object; `--seed-baselines` makes the run the baselines of the benchmark models.
"""

from __future__ import annotations

import argparse
import time
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from aftercast.backtest import BacktestOptions, BacktestResult, run_backtest
from aftercast.benchmark_methods import METHODS
from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.commands.tables import table_console
from aftercast.config import load_config
from aftercast.detect.baselines import seed_from_backtest


def _table(result: BacktestResult) -> Table:
    table = Table(
        title=f"backtest run {result.run_id}: {result.series} series, "
        f"{result.folds} folds, {result.pairs} pairs"
    )
    levels = sorted({k for row in result.summary for k in row if k.startswith("coverage_")})
    for column in (
        "method",
        "h",
        "n",
        "MAE",
        "RMSE",
        *[f"cov {c.removeprefix('coverage_')}%" for c in levels],
    ):
        table.add_column(column, justify="left" if column == "method" else "right")
    for row in result.summary:
        table.add_row(
            str(row["method"]),
            str(row["horizon"]),
            str(row["n"]),
            f"{row['mae']:.4g}",
            f"{row['rmse']:.4g}",
            *[f"{row[c]:.2f}" if row.get(c) is not None else "-" for c in levels],
        )
    return table


def cmd_backtest(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    options = BacktestOptions(
        series=tuple(args.series),
        methods=tuple(args.methods or METHODS),
        horizon=args.horizon,
        folds=args.folds,
        step=args.step,
        initial=args.initial,
    )
    console = Console(stderr=True)
    columns = (TextColumn("backtest folds"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=console, transient=args.json) as bar:
        task = bar.add_task("folds", total=options.folds)
        result = run_backtest(
            engine,
            config,
            options,
            lambda done, total: bar.update(task, completed=done, total=total),
        )
    if args.seed_baselines:
        seeded = seed_from_backtest(engine, config, result.run_id, int(time.time()))
        console.print(
            f"seeded {seeded} baseline(s) of the benchmark models from run {result.run_id}"
        )
    if args.json:
        print_json(result.as_json())
    else:
        table_console().print(_table(result))
    return 0


def register(commands: Any) -> None:
    backtest = commands.add_parser(
        "backtest", help="rolling-origin evaluation of benchmark forecasts"
    )
    backtest.add_argument(
        "--series",
        action="append",
        default=[],
        metavar="KEY",
        help="a series (repeatable; default: every series with actuals)",
    )
    backtest.add_argument("--methods", nargs="+", choices=list(METHODS), help="default: all")
    backtest.add_argument("--horizon", type=int, default=14, help="periods ahead (default 14)")
    backtest.add_argument("--folds", type=int, default=5, help="origins (default 5)")
    backtest.add_argument("--step", type=int, help="periods between origins (default: horizon)")
    backtest.add_argument(
        "--initial",
        type=int,
        help="least training periods before the first origin (default: 4 seasons)",
    )
    backtest.add_argument(
        "--seed-baselines",
        action="store_true",
        help="make this run the benchmark models' baselines",
    )
    backtest.add_argument("--json", action="store_true", help="print the run as JSON")
    backtest.set_defaults(handler=cmd_backtest)
