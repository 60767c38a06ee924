"""`aftercast alerts`: the alerts an analyst acts on, and what was found and sent about them.

`alerts [--json] [--all]` lists the lifecycle alerts (pending, raised, acknowledged, snoozed;
with `--all` the cleared ones too), each with the id that `alerts ack ID` and `alerts snooze ID`
take, worst first. `alerts findings` lists the raw findings of the latest detection cycle
(before rules and hysteresis), `alerts history ID` one alert's transitions and `alerts
notifications` the messages waiting, retrying or given up. The `alerts` parser is registered
here so that the lifecycle's actions (`ack`, `snooze`, ...) attach to it.
"""

from __future__ import annotations

import argparse
from typing import Any

from aftercast.alerts.listing import alert_rows, transitions_of
from aftercast.alerts.store import find_alert_ids
from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.config import load_config
from aftercast.detect.findings import active_findings, finding_records
from aftercast.notify.outbox import DEAD, DELIVERED, PENDING, notification_listing, outbox_counts
from aftercast.periods import to_iso


def register(commands: Any) -> None:
    alerts = commands.add_parser("alerts", help="alerts with their ids and state; ack and snooze")
    alerts.add_argument("--json", action="store_true", help="print a JSON array")
    alerts.add_argument("--all", action="store_true", help="include cleared alerts")
    alerts.set_defaults(handler=cmd_alerts)
    actions = alerts.add_subparsers(dest="alert_action", metavar="ACTION")
    found = actions.add_parser("findings", help="what the latest detection cycle flagged")
    found.add_argument("--json", action="store_true", help="print a JSON array")
    found.add_argument("--all", action="store_true", help="include findings that have cleared")
    found.set_defaults(handler=cmd_findings)
    history = actions.add_parser("history", help="every transition of one alert")
    history.add_argument("alert_id", type=int, metavar="ID")
    history.add_argument("--json", action="store_true")
    history.set_defaults(handler=cmd_history)
    sent = actions.add_parser("notifications", help="notifications waiting, retrying or dead")
    sent.add_argument("--json", action="store_true")
    sent.add_argument("--delivered", action="store_true", help="include delivered ones")
    sent.set_defaults(handler=cmd_notifications)


def alert_lines(rows: list[dict[str, Any]]) -> list[str]:
    """One line per alert (and its suggested fix below it), the ids and rules in columns."""
    if not rows:
        return []
    id_width = max(len(f"#{row['id']}") for row in rows)
    rule_width = max(len(str(row["rule"])) for row in rows)
    lines = []
    for row in rows:
        flags = _flags(row)
        tail = f" [{'; '.join(flags)}]" if flags else ""
        cleared = row["state"] == "cleared"
        when = f"cleared {row['cleared_at']}" if cleared else f"since {row['opened_at']}"
        lines.append(
            f"{'#' + str(row['id']):>{id_width}} {row['state']:<12} {row['severity']:<8} "
            f"{row['rule']:<{rule_width}} {row['series_id']} / {row['model']} h{row['horizon']} "
            f"{when}: {row['summary']}{tail}"
        )
        fix = (row.get("evidence") or {}).get("suggested_fix")
        if fix and not cleared:
            lines.append(f"{'':>{id_width}} {fix}")
    return lines


def _flags(row: dict[str, Any]) -> list[str]:
    flags = []
    if row["acknowledged_by"]:
        flags.append(f"ack by {row['acknowledged_by']}")
    if row["snoozed"]:
        flags.append(f"snoozed until {row['snoozed_until']}")
    if row["notification_status"] in (PENDING, DEAD) and row["notification_attempts"]:
        flags.append(
            f"notification {row['notification_status']} after "
            f"{row['notification_attempts']} attempt(s): {row['notification_detail']}"
        )
    return flags


def cmd_alerts(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    with engine.connect() as connection:
        rows = alert_rows(connection, include_cleared=args.all)
        counts = outbox_counts(connection)
    if args.json:
        print_json(rows)
        return 0
    for line in alert_lines(rows):
        print(line)
    if not rows:
        print("no open alerts" if not args.all else "no alerts")
    failing = counts[DEAD] or counts["retrying"]
    print(_counts_line(counts) + ("; see `aftercast alerts notifications`" if failing else ""))
    return 0


def _finding_line(row: dict[str, Any]) -> str:
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


def cmd_findings(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    with engine.connect() as connection:
        records = finding_records(active_findings(connection, include_cleared=args.all))
    if args.json:
        print_json(records)
    elif records:
        print("\n".join(_finding_line(r) for r in records))
    else:
        print("no active findings" if not args.all else "no findings")
    return 0


def _counts_line(counts: dict[str, int]) -> str:
    return (
        f"notifications: {counts[PENDING]} pending ({counts['retrying']} retrying), "
        f"{counts[DELIVERED]} delivered, {counts[DEAD]} dead"
    )


def cmd_history(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    with engine.connect() as connection:
        find_alert_ids(connection, [args.alert_id])
        rows = transitions_of(connection, args.alert_id)
    if args.json:
        print_json(rows)
        return 0
    for row in rows:
        note = f" ({row['note']})" if row["note"] else ""
        print(
            f"{row['at']} {row['event']:<12} {row['from_state'] or '-'} -> {row['to_state']} "
            f"by {row['actor']}{note}"
        )
    return 0


def _when(row: dict[str, Any]) -> str:
    """The time that matters for a notification in its state; only a pending one has a next."""
    if row["status"] == DELIVERED:
        return f"delivered {row['delivered_at']}"
    if row["status"] == DEAD:
        return f"given up {row['last_attempt_at']}"
    return f"next {row['due_at']}"


def cmd_notifications(args: argparse.Namespace) -> int:
    engine = open_store(load_config(args.config))
    statuses = (PENDING, DEAD, DELIVERED) if args.delivered else (PENDING, DEAD)
    with engine.connect() as connection:
        frame = notification_listing(connection, statuses, limit=200)
        counts = outbox_counts(connection)
    for column in ("created_at", "due_at", "last_attempt_at", "delivered_at"):
        frame[column] = [to_iso(v) for v in frame[column]]
    rows = frame.astype(object).where(frame.notna(), None).to_dict("records")
    if args.json:
        print_json(rows)
        return 0
    for row in rows:
        print(
            f"{row['notification_id']} {row['status']:<9} {row['channel']} ({row['kind']}, "
            f"{row['alert_count']} alerts) attempts {row['attempts']}, {_when(row)}: "
            f"{row['detail'] or '-'}"
        )
    if not rows:
        print("no notifications waiting or dead")
    hint = "; `aftercast outbox retry ID` or `--all-dead` sends dead ones again"
    print(_counts_line(counts) + (hint if counts[DEAD] else ""))
    return 0
