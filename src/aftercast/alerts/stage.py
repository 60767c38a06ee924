"""The `alerts` stage of a cycle: findings -> rules -> lifecycle -> digests -> outbox.

It reads the findings the detect stage stored for this cycle, evaluates the rules in force,
moves every alert on by one cycle, and turns the resulting messages into one digest per route,
channel and kind. The alert rows, their transitions and the outbox rows are written in ONE
transaction, so a notification exists exactly when the state change it announces does; sending
is the `notify` stage's job (`aftercast.notify.deliver.deliver_due`). With no channels
configured, alerts are still tracked and nothing is queued; an alert raised then is announced at
the first cycle that has a channel.
"""

from __future__ import annotations

import json
import time
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine

from aftercast.alerts.chartdata import chart_data
from aftercast.alerts.findings import cycle_findings
from aftercast.alerts.lifecycle import OPEN_STATES, Advance, advance, fingerprint
from aftercast.alerts.routing import (
    assign_routes,
    build_digests,
    digest_heads,
    routing_labels,
)
from aftercast.alerts.rules import effective_rules, evaluate_rules, rule_parameters
from aftercast.alerts.store import load_alerts, lock_alert_stage, save_advance
from aftercast.alerts.wording import summary_line
from aftercast.config import Config
from aftercast.notify.base import Digest
from aftercast.notify.outbox import enqueue
from aftercast.periods import to_iso
from aftercast.settings.alerts import RuleConfig
from aftercast.store.bulk import read_frame
from aftercast.store.db import write


@dataclass
class AlertsReport:
    """What one alerts stage did."""

    findings: int = 0
    met: int = 0
    raised: int = 0
    cleared: int = 0
    open: int = 0
    notifications: int = 0

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class Names:
    """Series keys and labels, and model names, by their integer ids."""

    keys: pd.Series
    labels: pd.Series
    models: pd.Series


def _names(connection: Connection) -> Names:
    series = read_frame(connection, "SELECT id, key, labels FROM series").set_index("id")
    models = read_frame(connection, "SELECT id, name FROM models").set_index("id")
    labels = pd.Series([json.loads(t or "{}") for t in series["labels"]], index=series.index)
    return Names(series["key"].astype(str), labels, models["name"].astype(str))


def update_alerts(engine: Engine, config: Config, cycle_id: int, now: int) -> AlertsReport:
    """The cycle stage: apply this cycle's stored findings to the alerts."""
    with engine.connect() as connection:
        findings = cycle_findings(connection, cycle_id)
    return apply_findings(engine, config, findings, cycle_id, now)


def apply_findings(
    engine: Engine, config: Config, findings: pd.DataFrame, cycle_id: int | None, now: int
) -> AlertsReport:
    """Evaluate `findings` (see `evaluate_rules` for the columns) and advance the alerts."""
    rules = effective_rules(config.rules)
    with write(engine) as connection:
        lock_alert_stage(connection)
        names = _names(connection)
        model = names.models.reindex(findings["model_id"].to_numpy()).to_numpy()
        evaluated = evaluate_rules(findings.assign(model=model), rules, names.labels)
        evaluated["fingerprint"] = fingerprint(
            evaluated["rule"], evaluated["series_id"], evaluated["model_id"], evaluated["horizon"]
        )
        # One finding per fingerprint is the detect stage's contract; should two ever come,
        # the one that meets the rule (then the surest) speaks for the alert.
        evaluated = evaluated.sort_values(["met", "p_value"], ascending=[False, True])
        evaluated = evaluated.drop_duplicates("fingerprint").reset_index(drop=True)
        evaluated["summary"] = [
            summary_line(str(d), e, s, p, n)
            for d, e, s, p, n in zip(
                evaluated["detection"],
                evaluated["evidence"],
                evaluated["statistic"],
                evaluated["p_value"],
                evaluated["n"],
                strict=True,
            )
        ]
        current = load_alerts(connection, evaluated)
        parameters = rule_parameters(rules)
        moved = advance(current, evaluated, parameters, now, announce=bool(config.channels))
        ids = save_advance(connection, moved, cycle_id, now)
        digests = _digests(connection, config, moved, ids, names, rules, now)
        queued = enqueue(connection, digests, cycle_id, int(time.time()))
    changes = moved.transitions["event"].value_counts()
    return AlertsReport(
        findings=len(findings),
        met=int(evaluated["met"].astype(bool).sum()),
        raised=int(changes.get("raised", 0)),
        cleared=int(changes.get("cleared", 0)),
        open=int(moved.alerts["state"].isin(OPEN_STATES).sum()),
        notifications=queued,
    )


def _lines(moved: Advance, ids: pd.Series, names: Names, rules: list[RuleConfig]) -> pd.DataFrame:
    """One line per notice with what a message shows about its alert and what routes match."""
    lines = moved.notices.merge(moved.alerts.drop(columns="id"), on="fingerprint")
    lines["alert_id"] = ids.reindex(lines["fingerprint"]).to_numpy()
    lines = lines.rename(columns={"series_id": "series_num", "model_id": "model_num"})
    lines["series_id"] = names.keys.reindex(lines["series_num"].to_numpy()).to_numpy()
    lines["model"] = names.models.reindex(lines["model_num"].to_numpy()).to_numpy()
    series_labels = names.labels.reindex(lines["series_num"].to_numpy()).map(
        lambda v: v if isinstance(v, dict) else {}
    )
    by_rule = {rule.name: rule for rule in rules}
    rule_labels = lines["rule"].map(lambda r: by_rule[r].labels if r in by_rule else {})
    lines["labels"] = [{**s, **r} for s, r in zip(series_labels, rule_labels, strict=True)]
    lines["route_labels"] = routing_labels(
        series_labels, rule_labels, lines[["rule", "severity", "model"]]
    )
    lines["opened_at"] = lines["since_at"].map(lambda t: to_iso(t) or "")
    cleared_at = lines["cleared_at"].where(lines["kind"] == "cleared")
    lines["cleared_at"] = cleared_at.map(to_iso).astype(object)
    lines["state"] = np.where(lines["kind"] == "cleared", "cleared", lines["state"])
    return lines


def _level_percent(evidence: Any) -> float | None:
    level = evidence.get("level") if isinstance(evidence, dict) else None
    if not isinstance(level, int | float):
        return None
    return float(level) * 100 if 0 < level < 1 else float(level)


def _chart_keys(heads: pd.DataFrame) -> pd.DataFrame:
    """What `chart_data` needs for the alerts at the top of each emailed digest."""
    return pd.DataFrame(
        {
            "alert_id": heads["alert_id"].to_numpy(),
            "series_id": heads["series_num"].to_numpy(),
            "model_id": heads["model_num"].to_numpy(),
            "horizon": heads["horizon"].to_numpy(),
            "level": [_level_percent(e) for e in heads["evidence"]],
            "series_key": heads["series_id"].to_numpy(),
            "model": heads["model"].to_numpy(),
        }
    )


def _digests(
    connection: Connection,
    config: Config,
    moved: Advance,
    ids: pd.Series,
    names: Names,
    rules: list[RuleConfig],
    now: int,
) -> list[Digest]:
    channels = {entry.name: entry.type for entry in config.channels}
    if moved.notices.empty or not channels:
        return []
    delivery = config.delivery
    routed = assign_routes(_lines(moved, ids, names, rules), config.routes, list(channels))
    # Only email draws charts; a webhook event or a file line would just carry the numbers.
    by_mail = routed.loc[routed["channel"].map(channels) == "email"]
    heads = digest_heads(by_mail, delivery.digest_max_alerts, delivery.charts_per_digest)
    charts = chart_data(connection, _chart_keys(heads.drop_duplicates("alert_id")), now)
    return build_digests(
        routed,
        cap=delivery.digest_max_alerts,
        created_at=str(to_iso(int(time.time()))),
        charts=charts,
        per_digest=delivery.charts_per_digest,
        base_url=config.web.base_url,
    )
