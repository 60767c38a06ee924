"""Commands that act on alerts and explain their rules: `alerts ack|snooze|unsnooze`, `rules check`.

The actions hang under the `alerts` command, which `aftercast.commands.alerts` registers (with
the listings) before this module. Every change is recorded as a transition carrying the name
given by `--by` (default: the login name). `rules check` explains the rules, routes and
channels in force in words; the config was validated on loading, so reaching it means the
configuration is valid. Channel secrets are never printed: channels are shown by name and type.
"""

from __future__ import annotations

import argparse
import getpass
import time
from typing import Any

from aftercast.alerts.routing import EVERY_ALERT, route_names
from aftercast.alerts.rules import effective_rules, explain_rule, is_default
from aftercast.alerts.snooze import snooze_end
from aftercast.alerts.store import find_alert_ids, set_attention
from aftercast.cli import print_json
from aftercast.commands.core import open_store
from aftercast.config import Config, load_config
from aftercast.errors import AftercastError
from aftercast.periods import to_iso


def register(commands: Any) -> None:
    actions = _actions_of(commands.choices["alerts"])
    for name, verb in (("ack", "acknowledge"), ("snooze", "snooze"), ("unsnooze", "unsnooze")):
        action = actions.add_parser(name, help=f"{verb} alerts (by id, or all of one series)")
        action.add_argument("ids", nargs="*", type=int, metavar="ID")
        action.add_argument("--series", help="every open alert of this series")
        action.add_argument("--rule", help="with --series: only this rule's alerts")
        action.add_argument("--by", help="who does it (default: your login name)")
        action.add_argument("--note", default="", help="why, kept with the transition")
        if name == "snooze":
            action.add_argument(
                "--until",
                required=True,
                help="ISO 8601 time (UTC when it has no offset), or a duration: 30m, 4h, 2d, 1w",
            )
        action.set_defaults(handler=cmd_attention, verb=verb)

    rules = commands.add_parser("rules", help="alert rules")
    rule_actions = rules.add_subparsers(dest="rules_action", metavar="ACTION", required=True)
    check = rule_actions.add_parser("check", help="validate and explain the rules in force")
    check.add_argument("--json", action="store_true")
    check.set_defaults(handler=cmd_rules_check)


def _actions_of(parser: argparse.ArgumentParser) -> Any:
    """The sub-command group `aftercast.commands.alerts` gave the `alerts` parser."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action
    raise LookupError("the alerts command has no sub-commands")


def until_instant(text: str, now: int) -> int:
    """Epoch seconds of `--until`: an ISO 8601 time or a duration from now ("4h", "2d")."""
    try:
        return snooze_end(text, now)
    except ValueError as exc:
        raise AftercastError(f"--until {text!r} {exc}") from None


def cmd_attention(args: argparse.Namespace) -> int:
    if bool(args.ids) == bool(args.series):
        raise AftercastError("give alert ids or --series (not both)")
    config = load_config(args.config)
    engine = open_store(config)
    now = int(time.time())
    until = until_instant(args.until, now) if args.verb == "snooze" else None
    with engine.connect() as connection:
        ids = find_alert_ids(connection, args.ids, args.series, args.rule)
    if not ids:
        raise AftercastError(f"--series {args.series!r}: no open alert matches")
    actor = args.by or getpass.getuser()
    done = set_attention(engine, ids, args.verb, actor, now, until=until, note=args.note)
    suffix = f" until {to_iso(until)}" if until is not None else ""
    past = {"acknowledge": "acknowledged", "snooze": "snoozed", "unsnooze": "unsnoozed"}
    print(f"{past[args.verb]} {done} of {len(ids)} alert(s){suffix} as {actor}")
    if done < len(ids):
        which = "raised" if args.verb == "acknowledge" else "open (not cleared)"
        print(f"only {which} alerts can be {past[args.verb]}; the others were left as they are")
    return 0


def rules_report(config: Config) -> dict[str, Any]:
    """The rules, routes and channels in force, explained; what `rules check --json` prints."""
    rules = effective_rules(config.rules)
    routes = config.routes
    names = route_names(routes)
    return {
        "rules": [
            {
                "name": r.name,
                "detection": r.detection,
                "default": is_default(r),
                "explanation": explain_rule(r),
            }
            for r in rules
        ],
        "disabled": [r.name for r in config.rules if not r.enabled],
        "routes": [
            {"name": n, "match": r.match, "channels": r.channels}
            for n, r in zip(names, routes, strict=True)
        ]
        or [{"name": EVERY_ALERT, "match": {}, "channels": [c.name for c in config.channels]}],
        "channels": [{"name": c.name, "type": c.type} for c in config.channels],
    }


def cmd_rules_check(args: argparse.Namespace) -> int:
    report = rules_report(load_config(args.config))
    if args.json:
        print_json(report)
        return 0
    print(f"config is valid: {len(report['rules'])} rule(s) in force")
    for rule in report["rules"]:
        print(("  (default) " if rule["default"] else "  ") + rule["explanation"])
    for name in report["disabled"]:
        print(f"  {name}: switched off")
    if not report["channels"]:
        print("no channels: alerts are tracked but nothing is sent")
        return 0
    for route in report["routes"]:
        match = ", ".join(f"{k}={v}" for k, v in route["match"].items()) or "every alert"
        print(f"route {route['name']}: {match} -> {', '.join(route['channels']) or 'nothing'}")
    if report["channels"]:
        print("channels: " + ", ".join(f"{c['name']} ({c['type']})" for c in report["channels"]))
    return 0
