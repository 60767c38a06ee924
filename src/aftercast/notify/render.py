"""Turns a notification into words: subject line, plain text, HTML and the CloudEvent envelope.

Every channel speaks through these functions so that an alert reads the same in an inbox, a
webhook receiver and an air-gapped JSON Lines file. The subject is written for triage on a
phone: severity first, how many, then the worst alert in a few words. The HTML comes from
jinja2 templates in `templates/` with autoescaping on, because series ids and labels are user
data. The CloudEvent (CloudEvents 1.0, structured mode) is the body of the webhook and the line
of the file channel; it carries no charts, to stay small.
"""

from __future__ import annotations

import dataclasses
import json
import re
from datetime import UTC, datetime
from typing import Any
from urllib.parse import quote, urlsplit

from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

from aftercast.notify.base import AlertLine, ChartData, Notification, jsonable
from aftercast.settings.channels import SUBJECT_PREFIX

SUBJECT_MAX_CHARS = 160
SEVERITY_RANK = {"critical": 0, "warning": 1, "info": 2}
EVENT_TYPE_PREFIX = "org.aftercast.alert."
# Shown first and in this order; anything else follows alphabetically.
EVIDENCE_ORDER = (
    "statistic",
    "p_adjusted",
    "p_value",
    "n",
    "coverage",
    "level",
    "window_start",
    "window_end",
)
# Evidence keys whose plain spelling would mislead: which p-value is the fleet-adjusted one.
EVIDENCE_LABELS = {"p_adjusted": "adjusted p", "p_value": "raw p"}
# A p-value computed as 0.0 (the tail probability underflowed): true p is only known to be tiny.
P_UNDERFLOW = "< 1e-300"

_env = Environment(
    loader=PackageLoader("aftercast.notify", "templates"),
    autoescape=select_autoescape(enabled_extensions=("html",), default_for_string=False),
    undefined=StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
    keep_trailing_newline=True,
)


def utc_timestamp(text: str) -> str:
    """ISO 8601 in, RFC 3339 UTC with a "Z" out; a time without offset is taken as UTC.

    >>> utc_timestamp("2024-05-01T02:00:00+02:00")
    '2024-05-01T00:00:00Z'
    """
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.astimezone(UTC).isoformat().replace("+00:00", "Z")


def format_value(value: Any, p_value: bool = False) -> str:
    """A number short enough for a phone screen; tiny p-values keep their exponent, and one
    that underflowed to 0 says it is below what a double holds rather than "0".

    >>> format_value(0.000012), format_value(1.23456), format_value(40)
    ('1.20e-05', '1.235', '40')
    >>> format_value(0.0, p_value=True)
    '< 1e-300'
    """
    if p_value and value == 0:
        return P_UNDERFLOW
    if isinstance(value, float):
        if value != 0 and abs(value) < 1e-3:
            return f"{value:.2e}"
        return f"{value:.4g}"
    return str(value)


def worst_alert(alerts: list[AlertLine]) -> AlertLine | None:
    """The alert to name in a subject: highest severity, then the smallest adjusted p-value.

    The fleet-adjusted p-value is the one the alert was raised on; a raw p-value is only used
    for evidence that has no adjusted one.
    """

    def rank(alert: AlertLine) -> tuple[int, float]:
        p_value = alert.evidence.get("p_adjusted", alert.evidence.get("p_value"))
        p = float(p_value) if isinstance(p_value, int | float) else 1.0
        return SEVERITY_RANK.get(alert.severity, len(SEVERITY_RANK)), p

    return min(alerts, key=rank) if alerts else None


def window_words(window: Any) -> str | None:
    """The evidence window as a reader would say it, or None when it is not a window object.

    A `days` window has a start, a `points` window its number of target periods (the detect
    stage's `window` evidence).

    >>> window_words({"name": "recent", "start": "2024-04-03T00:00:00Z",
    ...               "end": "2024-05-01T00:00:00Z", "targets": 28})
    'targets of the last 28 days (2024-04-03T00:00:00Z to 2024-05-01T00:00:00Z)'
    >>> window_words({"name": "recent", "points": 60, "end": "2024-05-01T00:00:00Z"})
    'the 60 latest targets (up to 2024-05-01T00:00:00Z)'
    """
    if not isinstance(window, dict) or not isinstance(window.get("end"), str):
        return None
    end = _display_time(window["end"])
    points, start = window.get("points"), window.get("start")
    if isinstance(points, int | float) and not isinstance(points, bool):
        latest = "the latest target" if points == 1 else f"the {points:g} latest targets"
        return f"{latest} (up to {end})"
    if not isinstance(start, str):
        return None
    try:
        days = (_instant(window["end"]) - _instant(start)).total_seconds() / 86_400
    except ValueError:
        return None
    span = "day" if round(days, 2) == 1 else f"{round(days, 2):g} days"
    return f"targets of the last {span} ({_display_time(start)} to {end})"


def _instant(text: str) -> datetime:
    return datetime.fromisoformat(utc_timestamp(text).replace("Z", "+00:00"))


def where(alert: AlertLine) -> str:
    """ "series/model", plus the horizon when the alert is about some horizons only."""
    text = f"{alert.series_id}/{alert.model}"
    return text if alert.horizon == "all" else f"{text} h{alert.horizon}"


def headline(alert: AlertLine) -> str:
    """What went wrong in a few words, e.g. "coverage 55% (80% band)"."""
    coverage, level = alert.evidence.get("coverage"), alert.evidence.get("level")
    if alert.rule.startswith("coverage") and isinstance(coverage, int | float):
        share = coverage if coverage <= 1 else coverage / 100  # accept a percent too
        band = f" ({format_value(float(level))}% band)" if isinstance(level, int | float) else ""
        return f"coverage {share:.0%}{band}"
    return alert.rule.replace("_", " ")


def render_subject(n: Notification, prefix: str = SUBJECT_PREFIX) -> str:
    """One line to triage from: "[aftercast] CRITICAL 3 alerts - worst: s/m coverage 55% ..."."""
    total = len(n.alerts) + n.more
    worst = worst_alert(n.alerts)
    if n.kind == "test":
        text = f"TEST notification for route {n.route} via {n.channel}"
    elif worst is None:
        text = f"{n.kind.upper()} no alerts"
    elif n.kind == "cleared":
        count = "" if total == 1 else f" {total} alerts - incl."
        text = f"CLEARED{count} {where(worst)} {headline(worst)}"
    else:
        lead = "REMINDER " if n.kind == "reminder" else ""
        opened = "open " if n.kind == "reminder" else ""
        count = "" if total == 1 else f" {total} {opened}alerts - worst:"
        text = f"{lead}{worst.severity.upper()}{count} {where(worst)} {headline(worst)}"
    subject = " ".join(f"{prefix} {text}".split())  # no line breaks can reach a header
    if len(subject) > SUBJECT_MAX_CHARS:
        subject = subject[: SUBJECT_MAX_CHARS - 3] + "..."
    return subject


def chart_content_id(n: Notification, index: int) -> str:
    """The Content-ID (without angle brackets) that ties an inline PNG to its <img> tag."""
    return f"chart{index}.{safe_token(n.id)}@aftercast"


def safe_token(text: str) -> str:
    """Characters allowed in a Message-ID or Content-ID left part; others become "-"."""
    return re.sub(r"[^A-Za-z0-9._-]", "-", text) or "x"


def _alert_view(alert: AlertLine) -> dict[str, Any]:
    evidence = dict(alert.evidence)
    fix = evidence.pop("suggested_fix", None)
    cleared = alert.state == "cleared"
    window = window_words(evidence.get("window"))
    if window is not None:
        del evidence["window"]  # said in words on its own line
    keys = [k for k in EVIDENCE_ORDER if k in evidence]
    keys += sorted(k for k in evidence if k not in EVIDENCE_ORDER)
    horizon = "all horizons" if alert.horizon == "all" else f"horizon {alert.horizon}"
    return {
        "alert": alert,
        "severity": alert.severity.upper(),
        "where": f"{alert.series_id} / {alert.model}, {horizon}",
        "rule": alert.rule.replace("_", " "),
        "opened": _display_time(alert.opened_at),
        "labels": ", ".join(f"{k}={v}" for k, v in sorted(alert.labels.items())),
        "evidence": [
            (_label(k), format_value(evidence[k], k in EVIDENCE_LABELS)) for k in keys
        ],
        # A fix for a problem that has gone away would only be noise.
        "fix": None if fix is None or cleared else str(fix),
        "cleared": _display_time(alert.cleared_at) if cleared and alert.cleared_at else None,
        "window": window,
    }


def _label(key: str) -> str:
    return EVIDENCE_LABELS.get(key, key.replace("_", " "))


def _display_time(text: str) -> str:
    try:
        return utc_timestamp(text)
    except ValueError:
        return text


def _context(n: Notification, inline_charts: bool) -> dict[str, Any]:
    url = n.dashboard_url if n.dashboard_url and _is_web_url(n.dashboard_url) else None
    charts = [
        {
            "cid": chart_content_id(n, i),
            "caption": _caption(c),
        }
        for i, c in enumerate(n.charts)
    ]
    return {
        "n": n,
        "subject": render_subject(n),
        "created": _display_time(n.created_at),
        "alerts": [_alert_view(a) for a in n.alerts],
        "more": n.more,
        "dashboard_url": url,
        "charts": charts if inline_charts else [],
    }


def _caption(chart: ChartData) -> str:
    where = f"{chart.series_id} / {chart.model}"
    horizon = chart.horizon_words()
    where = f"{where}, {horizon}" if horizon else where
    band = f"{format_value(chart.level)}% band"
    return f"{where}: actuals against the {band}, and its rolling coverage"


def _is_web_url(url: str) -> bool:
    # A link in an email must not be able to run script (javascript:, data:).
    return urlsplit(url).scheme in ("http", "https")


def render_text(n: Notification) -> str:
    """The plain-text body: every alert with where, since when, how sure and what would fix it."""
    return _env.get_template("notification.txt").render(_context(n, inline_charts=False))


def render_html(n: Notification, inline_charts: bool = False) -> str:
    """The HTML body; with `inline_charts` it refers to each chart as cid:`chart_content_id`."""
    return _env.get_template("notification.html").render(_context(n, inline_charts))


def render_event(n: Notification) -> dict[str, Any]:
    """The CloudEvents 1.0 structured-mode event for `n` (charts left out to keep it small)."""
    data = {
        "kind": n.kind,
        "route": n.route,
        "channel": n.channel,
        "summary": render_subject(n),
        "alerts": [jsonable(dataclasses.asdict(a)) for a in n.alerts],
        "more": n.more,
        "dashboard_url": n.dashboard_url,
    }
    return {
        "specversion": "1.0",
        "id": n.id,
        "source": f"urn:aftercast:{quote(n.route, safe='') or 'default'}",
        "type": EVENT_TYPE_PREFIX + n.kind,
        "time": utc_timestamp(n.created_at),
        "datacontenttype": "application/json",
        "data": data,
    }


def render_event_json(n: Notification) -> str:
    """`render_event` as compact strict JSON: the exact bytes signed and sent or appended."""
    return json.dumps(render_event(n), separators=(",", ":"), ensure_ascii=False, allow_nan=False)
