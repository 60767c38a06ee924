"""`aftercast quarantine`: the rejected rows kept in the store, newest first.

Each row shows when it was rejected, its kind (forecasts, actuals, series), the file or source
it came from, its row number there, the reason and the raw values as read. `--summary` counts
them per (kind, source, reason) instead, so a file with thousands of rejections of one kind
reads as one line. Filters: `--kind`, `--source` (a substring of the file or source name),
`--reason` (a substring of the reason). `--json` prints a JSON array.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

import sqlalchemy as sa

from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.config import load_config
from aftercast.periods import to_iso
from aftercast.store.schema import quarantine

KINDS = ("forecasts", "actuals", "series")
DEFAULT_LIMIT = 50


def _filters(args: argparse.Namespace) -> list[sa.ColumnElement[bool]]:
    where: list[sa.ColumnElement[bool]] = []
    if args.kind:
        where.append(quarantine.c.kind == args.kind)
    if args.source:
        where.append(quarantine.c.source.contains(args.source, autoescape=True))
    if args.reason:
        where.append(quarantine.c.reason.contains(args.reason, autoescape=True))
    return where


def _limit(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = -1
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return value


def quarantined_rows(engine: sa.Engine, args: argparse.Namespace) -> list[dict[str, Any]]:
    q = quarantine.c
    query = (
        sa.select(q.id, q.recorded_at, q.kind, q.source, q.row_number, q.reason, q.raw)
        .where(*_filters(args))
        .order_by(q.id.desc())
        .limit(args.limit)
    )
    with engine.connect() as connection:
        rows = connection.execute(query).mappings().all()
    return [
        {
            "id": int(row["id"]),
            "recorded_at": to_iso(int(row["recorded_at"])),
            "kind": row["kind"],
            "source": row["source"],
            "row": None if row["row_number"] is None else int(row["row_number"]),
            "reason": row["reason"],
            "raw": json.loads(row["raw"]),
        }
        for row in rows
    ]


def quarantine_summary(engine: sa.Engine, args: argparse.Namespace) -> list[dict[str, Any]]:
    q = quarantine.c
    rows_ = sa.func.count().label("rows")
    query = (
        sa.select(q.kind, q.source, q.reason, rows_, sa.func.max(q.recorded_at).label("latest"))
        .where(*_filters(args))
        .group_by(q.kind, q.source, q.reason)
        .order_by(sa.desc("latest"), q.kind, q.source, q.reason)
        .limit(args.limit)
    )
    with engine.connect() as connection:
        rows = connection.execute(query).mappings().all()
    return [
        {
            "kind": row["kind"],
            "source": row["source"],
            "reason": row["reason"],
            "rows": int(row["rows"]),
            "latest": to_iso(int(row["latest"])),
        }
        for row in rows
    ]


def cmd_quarantine(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    if args.summary:
        counts = quarantine_summary(engine, args)
        if args.json:
            print_json(counts)
            return 0
        for count in counts:
            print(
                f"{count['rows']:>8}  {count['kind']:<9}  {count['source']}  {count['reason']}"
                f"  (latest {count['latest']})"
            )
    else:
        rows = quarantined_rows(engine, args)
        if args.json:
            print_json(rows)
            return 0
        for row in rows:
            where = f"{row['source']} row {row['row']}" if row["row"] is not None else row["source"]
            raw = json.dumps(row["raw"], ensure_ascii=False, separators=(",", ":"))
            print(f"{row['recorded_at']}  {row['kind']:<9}  {where}: {row['reason']}  {raw}")
        counts = rows
    if not counts:
        what = "no rejected rows" + (" match these filters" if _filters(args) else " are stored")
        print(what)
    return 0


def register(commands: Any) -> None:
    parser = commands.add_parser("quarantine", help="list the rejected rows kept in the store")
    parser.add_argument("--kind", choices=KINDS, help="only rows of this kind")
    parser.add_argument("--source", help="only rows whose file or source name contains this")
    parser.add_argument("--reason", help="only rows whose reason contains this")
    parser.add_argument(
        "--limit",
        type=_limit,
        default=DEFAULT_LIMIT,
        help=f"most lines shown (default {DEFAULT_LIMIT})",
    )
    parser.add_argument(
        "--summary", action="store_true", help="count rows per kind, source and reason"
    )
    parser.add_argument("--json", action="store_true", help="print a JSON array")
    parser.set_defaults(handler=cmd_quarantine)
