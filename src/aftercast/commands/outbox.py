"""`aftercast outbox retry ID... | --all-dead`: send given-up notifications again.

A notification is dead after `delivery.max_attempts` failed sends or a permanent refusal. Once
the cause is fixed (a password, a URL, a full mailbox), `retry` puts it back in the queue, due
now with a fresh count of attempts; the next delivery pass (a cycle, or the daemon's delivery
job) sends it with its original idempotency key.
"""

from __future__ import annotations

import argparse
import getpass
import time
from typing import Any

from aftercast.commands.core import open_store
from aftercast.config import load_config
from aftercast.errors import AftercastError
from aftercast.notify.outbox import requeue_dead


def register(commands: Any) -> None:
    outbox = commands.add_parser("outbox", help="the notification outbox: re-queue dead messages")
    actions = outbox.add_subparsers(dest="outbox_action", metavar="ACTION", required=True)
    retry = actions.add_parser("retry", help="queue dead notifications to be sent again")
    retry.add_argument(
        "ids", nargs="*", metavar="ID", help="notification ids, as `alerts notifications` lists"
    )
    retry.add_argument("--all-dead", action="store_true", help="every dead notification")
    retry.add_argument("--by", help="who does it (default: your login name)")
    retry.set_defaults(handler=cmd_retry)


def cmd_retry(args: argparse.Namespace) -> int:
    if bool(args.ids) == args.all_dead:
        raise AftercastError("give notification ids or --all-dead (not both)")
    engine = open_store(load_config(args.config))
    actor = args.by or getpass.getuser()
    chosen = requeue_dead(engine, None if args.all_dead else args.ids, actor, int(time.time()))
    if not chosen:
        print("no dead notifications")
        return 0
    print(f"re-queued {len(chosen)} dead notification(s), due now: {', '.join(chosen)}")
    return 0
