"""Routing and grouping: which channels hear about an alert, and in how many messages.

A route matches alert labels (the series' labels, the rule's extra labels, and `rule`,
`severity` and `model`) and names channels; a route with no `match` takes every alert, and with
no routes configured every alert goes to every channel. Per route, channel and kind of message
(raised, reminder, cleared), one cycle's alerts become one digest, sorted worst first (severity,
then p-value) and capped, the rest summed up as "and N more": a team watching 300 series gets
one email listing 40 alerts, not 40 emails. Pure: frames in, `Notification`s out.
"""

from __future__ import annotations

import uuid
from collections.abc import Mapping, Sequence
from typing import Any
from urllib.parse import quote

import pandas as pd

from aftercast.alerts.rules import label_frame, labels_match
from aftercast.notify.base import AlertLine, ChartData, Digest, Notification
from aftercast.settings.alerts import RouteConfig

SEVERITY_RANK = {"critical": 0, "warning": 1, "info": 2}
# Notice kinds from the lifecycle, as the notification contract names them.
NOTIFICATION_KIND = {"raised": "digest", "reminder": "reminder", "cleared": "cleared"}
KIND_ORDER = ("raised", "reminder", "cleared")
EVERY_ALERT = "all"


def route_names(routes: Sequence[RouteConfig]) -> list[str]:
    """Each route's name: its own, else its match ("team=planning"), else "all"; made unique."""
    names: list[str] = []
    for route in routes:
        name = route.name or (
            ",".join(f"{k}={v}" for k, v in sorted(route.match.items())) or EVERY_ALERT
        )
        base, n = name, 2
        while name in names:
            name, n = f"{base}#{n}", n + 1
        names.append(name)
    return names


def routing_labels(
    series_labels: pd.Series, rule_labels: pd.Series, extra: pd.DataFrame
) -> list[dict[str, str]]:
    """The labels routes match on, per alert: series', then the rule's, then `extra` columns."""
    own = extra.astype(str).to_dict("records")
    return [{**s, **r, **e} for s, r, e in zip(series_labels, rule_labels, own, strict=True)]


def assign_routes(
    lines: pd.DataFrame, routes: Sequence[RouteConfig], channel_names: Sequence[str]
) -> pd.DataFrame:
    """`lines` repeated once per (route, channel) that should carry it; adds those two columns.

    Routes match on each line's `route_labels` (see `routing_labels`).
    """
    if lines.empty or not channel_names:
        return lines.assign(route=pd.Series(dtype=object), channel=pd.Series(dtype=object))
    if not routes:
        routes = [RouteConfig(name=EVERY_ALERT, channels=list(channel_names))]
    table = label_frame(lines["route_labels"].reset_index(drop=True))
    parts = []
    for name, route in zip(route_names(routes), routes, strict=True):
        chosen = lines.loc[labels_match(table, route.match)]
        for channel in route.channels:
            parts.append(chosen.assign(route=name, channel=channel))
    return pd.concat(parts, ignore_index=True)


def worst_first(lines: pd.DataFrame) -> pd.DataFrame:
    """Sorted for reading: by route, channel and kind, then severity, p-value and series."""
    rank = lines["severity"].map(SEVERITY_RANK).fillna(len(SEVERITY_RANK))
    kind = lines["kind"].map({k: i for i, k in enumerate(KIND_ORDER)})
    p_value = lines["p_value"].astype(float).fillna(1.0)
    keyed = lines.assign(_kind=kind, _rank=rank, _p=p_value)
    keyed = keyed.sort_values(
        ["route", "channel", "_kind", "_rank", "_p", "series_id", "model", "rule"], kind="stable"
    )
    return keyed.drop(columns=["_kind", "_rank", "_p"])


def digest_heads(routed: pd.DataFrame, cap: int, per_digest: int) -> pd.DataFrame:
    """The first `per_digest` lines of each capped digest: the alerts that get a chart."""
    if routed.empty or per_digest == 0:
        return routed.iloc[0:0]
    ordered = worst_first(routed)
    heads = ordered.groupby(["route", "channel", "kind"], sort=False).head(min(cap, per_digest))
    return heads


def build_digests(
    routed: pd.DataFrame,
    *,
    cap: int,
    created_at: str,
    charts: Mapping[int, ChartData],
    per_digest: int,
    base_url: str | None = None,
) -> list[Digest]:
    """One notification per (route, channel, kind) present in `routed`, worst alerts first.

    `routed` comes from `assign_routes` with, per line: alert_id, kind, series_id, model,
    horizon, rule, state, severity, opened_at (ISO 8601), summary, evidence, labels, p_value
    and, for a cleared alert, cleared_at (ISO 8601).
    `charts` maps an alert id to its chart; the first `per_digest` alerts of a digest carry one.
    With `base_url` (the web pages), a digest links to its series' page, or to the overview
    when it is about several series.
    """
    if routed.empty:
        return []
    digests = []
    ordered = worst_first(routed)
    for (route, channel, kind), group in ordered.groupby(["route", "channel", "kind"], sort=False):
        shown = group.head(cap)
        drawn = [charts[i] for i in shown["alert_id"].head(per_digest) if i in charts]
        notification = Notification(
            id=new_notification_id(),
            kind=NOTIFICATION_KIND[str(kind)],
            route=str(route),
            channel=str(channel),
            created_at=created_at,
            alerts=[_line(row) for row in shown.to_dict("records")],
            more=len(group) - len(shown),
            charts=drawn,
            dashboard_url=_link(base_url, group["series_id"]),
        )
        ids = group["alert_id"].astype("int64").tolist()
        digests.append(Digest(notification, ids))
    return digests


def _link(base_url: str | None, series: pd.Series) -> str | None:
    if not base_url:
        return None
    root = base_url.rstrip("/")
    keys = series.unique()
    return f"{root}/series/{quote(str(keys[0]), safe='')}" if len(keys) == 1 else f"{root}/"


def new_notification_id() -> str:
    """A fresh idempotency key; receivers drop a message whose id they have seen."""
    return f"ntf_{uuid.uuid4().hex}"


def _line(row: Mapping[str, Any]) -> AlertLine:
    return AlertLine(
        series_id=str(row["series_id"]),
        model=str(row["model"]),
        horizon=str(row["horizon"]),
        rule=str(row["rule"]),
        state=str(row["state"]),
        severity=str(row["severity"]),
        opened_at=str(row["opened_at"]),
        summary=str(row["summary"]),
        evidence=dict(row["evidence"] or {}),
        labels={str(k): str(v) for k, v in (row["labels"] or {}).items()},
        cleared_at=row.get("cleared_at") or None,
    )


def count_by_kind(digests: Sequence[Digest]) -> dict[str, int]:
    """How many notifications of each kind a cycle queued (for its report)."""
    counts: dict[str, int] = {}
    for digest in digests:
        counts[digest.notification.kind] = counts.get(digest.notification.kind, 0) + 1
    return counts
