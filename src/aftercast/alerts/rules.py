"""Alert rules: structured YAML saying when a detection becomes an alert, and for whom.

A rule names one detection (`coverage_low`, `bias`, ...) and narrows what it flags: a stricter
adjusted p-value, a minimum number of points, a minimum size of the statistic, some series
labels, models or horizon buckets. It also says how sure the cycle must be before anyone is
told (raise after K consecutive cycles that meet it, clear after J that do not), how often to
remind, the severity, and labels to add for routing. There is no expression language: every
knob is a named key, so `aftercast rules check` can explain each rule in words. The configured
rules are merged with the defaults by name: a rule named like a default replaces it, `enabled:
false` turns one off, other names add rules; with no rules configured the defaults apply.
Evaluation is pure and vectorised over the cycle's findings, one pass per rule.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Sequence

import numpy as np
import pandas as pd

from aftercast.settings.alerts import RuleConfig

SEVERITIES: tuple[str, ...] = ("critical", "warning", "info")

# What each detection means, in the words `rules check` and the messages use; the keys are the
# values `RuleConfig.detection` accepts.
DETECTIONS: dict[str, str] = {
    "coverage_low": "prediction intervals cover fewer outcomes than their level",
    "coverage_high": "prediction intervals cover more outcomes than their level (too wide)",
    "accuracy_vs_baseline": "accuracy is worse than in the model's own baseline window",
    "no_better_than_benchmark": "the model is no better than aftercast's seasonal naive benchmark",
    "bias": "errors keep one sign (CUSUM or tracking signal)",
    "actuals_overdue": "actuals for past targets have not arrived",
    "forecasts_stalled": "new forecasts have stopped arriving",
}


def _default(detection: str, raise_after: int, clear_after: int) -> RuleConfig:
    return RuleConfig.model_validate(
        {"detection": detection, "raise_after": raise_after, "clear_after": clear_after}
    )


# Statistical rules wait for a second cycle before paging and a third quiet one before clearing,
# so one unlucky window neither pages nor flaps; freshness problems are facts, told at once.
DEFAULT_RULES: tuple[RuleConfig, ...] = (
    _default("coverage_low", 2, 3),
    _default("coverage_high", 3, 3),
    _default("accuracy_vs_baseline", 2, 3),
    _default("no_better_than_benchmark", 3, 3),
    _default("bias", 2, 3),
    _default("actuals_overdue", 1, 1),
    _default("forecasts_stalled", 1, 1),
)


def effective_rules(configured: Sequence[RuleConfig]) -> list[RuleConfig]:
    """The rules in force: defaults changed or switched off by name, then the added ones.

    A configured rule named like a default changes only the keys it gives, so `{detection:
    bias, raise_after: 4}` keeps the default's other settings.
    """
    by_name = {rule.name: rule for rule in configured}
    merged = [
        rule.model_copy(update=by_name.pop(rule.name).model_dump(exclude_unset=True))
        if rule.name in by_name
        else rule
        for rule in DEFAULT_RULES
    ]
    merged += [rule for rule in configured if rule.name in by_name]
    return [rule for rule in merged if rule.enabled]


def is_default(rule: RuleConfig) -> bool:
    return any(rule == default for default in DEFAULT_RULES)


def label_frame(labels: pd.Series) -> pd.DataFrame:
    """Series labels (a Series of dicts, indexed by series id) as one column per label name."""
    if labels.empty:
        return pd.DataFrame(index=labels.index)
    return pd.DataFrame(labels.tolist(), index=labels.index).astype(object)


def labels_match(table: pd.DataFrame, wanted: dict[str, str]) -> np.ndarray:
    """Rows of a label table whose labels include every `wanted` label (all rows when none)."""
    mask = np.ones(len(table), dtype=bool)
    for name, value in wanted.items():
        if name not in table.columns:
            return np.zeros(len(table), dtype=bool)
        mask &= (table[name] == value).to_numpy()
    return mask


def names_match(names: pd.Series, patterns: Sequence[str]) -> np.ndarray:
    """Which names match any of the shell patterns (`benchmark:*`); all when there are none."""
    if not patterns:
        return np.ones(len(names), dtype=bool)
    regex = "|".join(f"(?:{fnmatch.translate(p)})" for p in patterns)
    return names.astype(str).str.match(regex).to_numpy(dtype=bool)


EVALUATION_COLUMNS = [
    "rule",
    "detection",
    "series_id",
    "model_id",
    "horizon",
    "met",
    "severity",
    "statistic",
    "p_value",
    "n",
    "evidence",
    "raise_after",
    "clear_after",
    "remind_seconds",
    "rule_labels",
]


def evaluate_rules(
    findings: pd.DataFrame, rules: Sequence[RuleConfig], series_labels: pd.Series
) -> pd.DataFrame:
    """One row per (rule, finding of its detection in scope), with `met` saying if it trips.

    `findings` has columns detection, series_id, model_id, model (name), horizon, flagged,
    severity, statistic, p_value (fleet-adjusted where the detection adjusts), n and evidence
    (dicts). `series_labels` maps series id to its labels. A rule can only narrow what the
    detection flagged: every threshold it sets must hold as well.
    """
    if findings.empty or not rules:
        return pd.DataFrame(columns=EVALUATION_COLUMNS)
    # Only the series that have findings: a label table of the whole fleet is not needed.
    present = series_labels.reindex(findings["series_id"].unique())
    present = present.map(lambda v: v if isinstance(v, dict) else {})
    table = label_frame(present).reindex(findings["series_id"].to_numpy())
    parts = []
    for rule in rules:
        scope = (findings["detection"] == rule.detection).to_numpy()
        scope &= labels_match(table, rule.match)
        scope &= names_match(findings["model"], rule.models)
        if rule.horizons:
            scope &= findings["horizon"].astype(str).isin(rule.horizons).to_numpy()
        part = findings.loc[scope]
        if part.empty:
            continue
        parts.append(_judge(part, rule))
    if not parts:
        return pd.DataFrame(columns=EVALUATION_COLUMNS)
    return pd.concat(parts, ignore_index=True)[EVALUATION_COLUMNS]


def _judge(part: pd.DataFrame, rule: RuleConfig) -> pd.DataFrame:
    met = part["flagged"].astype("boolean").fillna(False).to_numpy(dtype=bool)
    p_value = part["p_value"].astype(float).to_numpy()
    statistic = part["statistic"].astype(float).to_numpy()
    with np.errstate(invalid="ignore"):
        if rule.max_p_value is not None:
            # No p-value (freshness detections) means the threshold does not apply.
            met &= np.isnan(p_value) | (p_value <= rule.max_p_value)
        if rule.min_statistic is not None:
            met &= np.abs(statistic) >= rule.min_statistic
    if rule.min_points:
        met &= part["n"].fillna(0).to_numpy() >= rule.min_points
    out = part.assign(
        rule=rule.name,
        met=met,
        raise_after=rule.raise_after,
        clear_after=rule.clear_after,
        remind_seconds=int(rule.remind_every_hours * 3600),
        rule_labels=[rule.labels] * len(part),
    )
    if rule.severity is not None:
        out["severity"] = rule.severity
    return out


def rule_parameters(rules: Sequence[RuleConfig]) -> pd.DataFrame:
    """Hysteresis and reminder settings per rule name, for alerts whose finding went missing."""
    return pd.DataFrame(
        {
            "raise_after": [r.raise_after for r in rules],
            "clear_after": [r.clear_after for r in rules],
            "remind_seconds": [int(r.remind_every_hours * 3600) for r in rules],
        },
        index=pd.Index([r.name for r in rules], name="rule"),
    )


def explain_rule(rule: RuleConfig) -> str:
    """One paragraph saying in words when `rule` raises, clears, reminds and for what."""
    parts = [f"{rule.name}: when {DETECTIONS[rule.detection]}"]
    narrowed = []
    if rule.max_p_value is not None:
        narrowed.append(f"adjusted p-value at most {rule.max_p_value:g}")
    if rule.min_points:
        narrowed.append(f"at least {rule.min_points} points")
    if rule.min_statistic is not None:
        narrowed.append(f"|statistic| at least {rule.min_statistic:g}")
    if narrowed:
        parts.append(" with " + ", ".join(narrowed))
    scope = []
    if rule.match:
        scope.append("series labelled " + ", ".join(f"{k}={v}" for k, v in rule.match.items()))
    if rule.models:
        scope.append("models " + ", ".join(rule.models))
    if rule.horizons:
        scope.append("horizon buckets " + ", ".join(rule.horizons))
    parts.append(" (" + "; ".join(scope) + ")" if scope else " (every series and model)")
    cycles = "one cycle" if rule.raise_after == 1 else f"{rule.raise_after} consecutive cycles"
    parts.append(f", raised after {cycles}")
    parts.append(f", cleared after {rule.clear_after} without")
    severity = rule.severity or "as the detection grades it"
    parts.append(f"; severity {severity}")
    if rule.remind_every_hours:
        parts.append(f"; reminders every {rule.remind_every_hours:g} h while raised")
    else:
        parts.append("; no reminders")
    if rule.labels:
        parts.append("; routing labels " + ", ".join(f"{k}={v}" for k, v in rule.labels.items()))
    return "".join(parts) + "."
