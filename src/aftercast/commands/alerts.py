"""`aftercast alerts [--json] [--all]`: the active findings of the latest detection cycle.

Each row: series_id, model, horizon (bucket), rule, state ("raised" while the latest cycle
flags it; "cleared" with `--all` for keys flagged recently but no longer), active, severity,
opened_at (the first cycle of the current unbroken run of flags) and evidence (statistic,
p_value, window, suggested_fix and the rule's own numbers). The `alerts` parser is
registered here so that the alert lifecycle's actions (`ack`, `snooze`, ...) attach to it.
"""

from __future__ import annotations

import argparse
from typing import Any

from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.config import load_config
from aftercast.detect.findings import active_findings, finding_records


def _line(row: dict[str, Any]) -> str:
    evidence = row["evidence"]
    adjusted = evidence.get("p_adjusted")
    sure = f", adjusted p {adjusted:.2g}" if isinstance(adjusted, float) else ""
    fix = evidence.get("suggested_fix") or ""
    # A cleared finding has no open run of cycles, so no "since".
    since = f" since {row['opened_at']}" if row.get("opened_at") else ""
    return (
        f"{row['state']:<8} {row['severity']:<8} {row['rule']:<24} {row['series_id']} / "
        f"{row['model']} h{row['horizon']}{since}{sure}" + (f"\n         {fix}" if fix else "")
    )


def cmd_alerts(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    with engine.connect() as connection:
        records = finding_records(active_findings(connection, include_cleared=args.all))
    if args.json:
        print_json(records)
    elif records:
        print("\n".join(_line(r) for r in records))
    else:
        print("no active findings" if not args.all else "no findings")
    return 0


def register(commands: Any) -> None:
    alerts = commands.add_parser(
        "alerts", help="active findings with their evidence; ack and snooze alerts"
    )
    alerts.add_argument("--json", action="store_true", help="print a JSON array")
    alerts.add_argument("--all", action="store_true", help="include findings that have cleared")
    alerts.set_defaults(handler=cmd_alerts)
