"""`aftercast status`: window measures per (series, model, horizon), as a table, JSON or CSV.

The table (rich) shows the worst rows first by the measure given with `--sort` (MASE unless
told otherwise) and stops after `--limit` rows (50); `--json` prints the CONTRACT rows as one
JSON array and `--csv` one flat row per line, both all rows in key order unless `--sort` or
`--limit` say otherwise. Rows per configured horizon bucket come only with `--buckets`: the
CONTRACT promises an integer or "all" in `horizon`, so in JSON and CSV a bucket row carries its
label in `horizon_bucket` instead, after all the CONTRACT rows. Filters: `--series` (shell
pattern on the series key), `--model`, `--horizon` (3, all, or with `--buckets` a bucket such
as 2-7), `--label name=value` (repeatable). Rows are read and written a page at a time, so the
output can be as long as the fleet.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
import time
from collections.abc import Iterable
from typing import Any

from rich.table import Table
from sqlalchemy import Engine, text

from aftercast.benchmark_methods import BENCHMARK_PREFIX
from aftercast.commands.core import open_store
from aftercast.commands.tables import table_console
from aftercast.config import load_config
from aftercast.errors import AftercastError
from aftercast.periods import parse_instant, to_iso
from aftercast.report import EXTRAS, MEASURES, NESTED, SORTS, StatusQuery, open_status
from aftercast.window_store import find_window

TABLE_LIMIT = 50
FLAT_FIELDS = ["series_id", "model", "horizon", "window", "window_start", "window_end"]


def _clock(value: str | None) -> int:
    if value is None:
        return int(time.time())
    try:
        return parse_instant(value)
    except ValueError:
        raise AftercastError(f"--now {value!r} is not an ISO 8601 time") from None


def _labels(values: list[str] | None) -> tuple[tuple[str, str], ...]:
    pairs = []
    for value in values or []:
        name, sep, wanted = value.partition("=")
        if not sep or not name:
            raise AftercastError(f"--label {value!r}: expected NAME=VALUE, e.g. team=planning")
        pairs.append((name.strip(), wanted.strip()))
    return tuple(pairs)


def _horizon(value: str | None, buckets: tuple[str, ...] | None) -> str | None:
    """The --horizon filter; a bucket label only with --buckets (`buckets` None without)."""
    if value is None or value == "all":
        return value
    low, _, high = value.partition("-")
    if not low.isdigit() or (high and not high.isdigit()):
        raise AftercastError(f"--horizon {value!r}: expected a number, a range like 2-7, or all")
    if high and buckets is None:
        raise AftercastError(f"--horizon {value!r} is a horizon bucket: add --buckets")
    if high and value not in (buckets or ()):
        configured = ", ".join(buckets or ()) or "none"
        raise AftercastError(
            f"--horizon {value!r}: not a configured horizon bucket (horizon_buckets: {configured})"
        )
    return value


def cmd_status(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    if args.limit is not None and args.limit < 0:  # SQLite would read LIMIT -1 as no limit
        raise AftercastError(f"--limit {args.limit}: give 0 for all rows, or a positive count")
    table = not (args.json or args.csv)
    limit = args.limit if args.limit is not None else (TABLE_LIMIT if table else None)
    buckets = tuple(config.horizon_buckets) if args.buckets else None
    query = StatusQuery(
        window=find_window(config, args.window),
        now=_clock(args.now),
        buckets=buckets or (),
        # The table is read worst first; machine output keeps the CONTRACT rows together.
        buckets_last=not table,
        sort=args.sort or ("mase" if table else "key"),
        series=args.series,
        model=args.model,
        horizon=_horizon(args.horizon, buckets),
        labels=_labels(args.label),
        limit=limit or None,
        # The table is for finding the production forecasts in trouble; aftercast's benchmark
        # models are shown when asked for, or by name. Machine output has every model's rows.
        benchmarks=_benchmarks(args, table),
    )
    with open_status(engine, query) as result:
        if args.json:
            _write_json(result.rows)
        elif args.csv:
            _write_csv(result.rows, result.names, bool(buckets))
        elif result.total == 0:  # an empty table would not say why
            print(f"aftercast: nothing to show: {_why_empty(engine, query, args)}", file=sys.stderr)
        else:
            print_status_table(list(result.rows), total=result.total, sort=query.sort)
            if not query.benchmarks:
                print("aftercast's own benchmark models are left out: --benchmarks show")
    return 0


def _benchmarks(args: argparse.Namespace, table: bool) -> bool:
    if args.benchmarks is not None:
        return bool(args.benchmarks == "show")
    return not table or bool(args.model and args.model.startswith(BENCHMARK_PREFIX))


def _why_empty(engine: Engine, query: StatusQuery, args: argparse.Namespace) -> str:
    """Why the table has no rows: no pairs at all, none in the window, or the filters."""
    window = query.window
    where = f"window {window.name!r} at {to_iso(query.now)}"
    low = None if window.days is None else query.now - round(window.days * 86_400)
    with engine.connect() as connection:
        first, last = connection.execute(
            text("SELECT MIN(target_at), MAX(target_at) FROM pairs")
        ).one()
        inside = connection.execute(
            text("SELECT 1 FROM pairs WHERE target_at <= :now AND target_at > :low LIMIT 1"),
            {"now": query.now, "low": -(2**62) if low is None else low},
        ).first()
    if last is None:
        return "no pairs yet: ingest forecasts and actuals, then run `aftercast cycle`"
    if inside is None:
        return (
            f"no pairs in {where}: the pairs' targets run from {to_iso(first)} to "
            f"{to_iso(last)} (see --now and --window)"
        )
    given = [
        flag
        for flag, value in (
            ("--series", args.series),
            ("--model", args.model),
            ("--horizon", args.horizon),
            ("--label", args.label),
        )
        if value
    ]
    if given:
        return f"no rows in {where} match {', '.join(given)}"
    if not query.benchmarks:
        return f"no rows of production models in {where} (--benchmarks show adds aftercast's own)"
    return f"no rows in {where}"


def _write_json(rows: Iterable[dict[str, Any]]) -> None:
    out = sys.stdout
    out.write("[")
    for index, row in enumerate(rows):
        out.write(("," if index else "") + json.dumps(row, separators=(",", ":")))
    out.write("]\n")


def _write_csv(rows: Iterable[dict[str, Any]], names: dict[str, list[str]], buckets: bool) -> None:
    flat_fields = [*FLAT_FIELDS[:3], "horizon_bucket", *FLAT_FIELDS[3:]] if buckets else FLAT_FIELDS
    header = [*flat_fields, *MEASURES, *EXTRAS]
    header += [f"{m}_{name}" for m in NESTED for name in names.get(m, [])]
    writer = csv.DictWriter(sys.stdout, fieldnames=header, extrasaction="ignore")
    writer.writeheader()
    for row in rows:
        flat = {k: v for k, v in row.items() if k not in NESTED}
        for measure in NESTED:
            flat.update({f"{measure}_{k}": v for k, v in row.get(measure, {}).items()})
        writer.writerow(flat)


def _fmt(value: object, digits: int = 2) -> str:
    return "-" if value is None else f"{value:.{digits}f}"  # type: ignore[str-format]


def print_status_table(
    records: list[dict[str, Any]], total: int | None = None, sort: str = "mase"
) -> None:
    """The rows as a rich table: accuracy, coverage per level and the tracking signal."""
    levels = sorted({lv for r in records for lv in r["coverage"]}, key=float)
    title = "aftercast status" + ("" if sort == "key" else f", worst {sort} first")
    table = Table(title=title, show_lines=False)
    columns = ["series", "model", "h", "n", "ME", "MAE", "RMSE", "MAPE %", "MASE"]
    for column in [*columns, *[f"cov {lv}%" for lv in levels], "TS"]:
        table.add_column(column, justify="left" if column in ("series", "model") else "right")
    for r in records:
        table.add_row(
            str(r["series_id"]),
            str(r["model"]),
            str(r["horizon"]) if "horizon" in r else f"bucket {r['horizon_bucket']}",
            str(r["n"]),
            _fmt(r["me"]),
            _fmt(r["mae"]),
            _fmt(r["rmse"]),
            _fmt(r["mape"], 1),
            _fmt(r["mase"]),
            *[_fmt(r["coverage"].get(lv)) for lv in levels],
            _fmt(r.get("tracking_signal"), 1),
        )
    console = table_console()
    console.print(table)
    if total is not None and total > len(records):
        console.print(f"{len(records)} of {total} rows; --limit 0 shows all, --json or --csv all")


def register(commands: Any) -> None:
    status = commands.add_parser("status", help="window measures per series, model and horizon")
    output = status.add_mutually_exclusive_group()
    output.add_argument("--json", action="store_true", help="print a JSON array of rows")
    output.add_argument("--csv", action="store_true", help="print CSV, one row per line")
    status.add_argument("--now", help="evaluation time, ISO 8601 (default: the clock)")
    status.add_argument("--window", help="named window (default: the first configured)")
    status.add_argument(
        "--sort",
        choices=SORTS,
        help="worst first by this measure (table default: mase; else key order)",
    )
    status.add_argument("--series", metavar="PATTERN", help="series keys matching a shell pattern")
    status.add_argument("--model", help="only this model")
    status.add_argument(
        "--benchmarks",
        choices=["show", "hide"],
        help="rows of aftercast's own benchmark models (default: hidden in the table, "
        "shown in --json and --csv)",
    )
    status.add_argument(
        "--buckets",
        action="store_true",
        help="add the rows of the configured horizon_buckets (JSON, CSV: key horizon_bucket)",
    )
    status.add_argument(
        "--horizon", help="only this horizon: 3, all, or with --buckets a bucket such as 2-7"
    )
    status.add_argument(
        "--label",
        action="append",
        metavar="NAME=VALUE",
        help="only series with this label (repeat to require several)",
    )
    status.add_argument(
        "--limit",
        type=int,
        metavar="N",
        help=f"at most N rows (table default {TABLE_LIMIT}; 0 for all)",
    )
    status.set_defaults(handler=cmd_status)
