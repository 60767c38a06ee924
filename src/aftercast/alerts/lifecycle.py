"""The alert lifecycle: hysteresis, dedup by fingerprint, reminders, snooze and acknowledgement.

An alert is identified by its fingerprint (rule, series, model, horizon bucket), so one problem
is one alert however many cycles see it. Its states:

- ``pending``: the rule is met, but for fewer than `raise_after` consecutive cycles;
- ``raised``: met for `raise_after` cycles; stays raised until `clear_after` consecutive cycles
  do not meet it;
- ``acknowledged``: raised, and someone said they are on it: no more reminders;
- ``cleared``: recovered (or a pending alert that never got as far as raised: "lapsed").

A cleared fingerprint that trips again starts a new episode on the same alert. Messages go out
when an alert is raised (one), while it stays raised and unacknowledged (a reminder every
`remind_every_hours`), and when it clears (one, and only if its raise was told to anyone).
While snoozed an alert is tracked as usual but raises and reminders wait; when the snooze ends
and the alert is still raised, the message that was held back goes out at the next cycle. A
reminder that falls due, or a snooze that ends, up to `CYCLE_SLACK_SECONDS` after a cycle's
clock counts as due at that cycle, so that a scheduler firing a little early does not push it
a whole cycle late. Everything here is pure and vectorised over all alerts: frames in, frames
out; the store module reads and writes them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

PENDING, RAISED, ACKNOWLEDGED, CLEARED = "pending", "raised", "acknowledged", "cleared"
OPEN_STATES = (PENDING, RAISED, ACKNOWLEDGED)
CYCLE_SLACK_SECONDS = 60  # a reminder or snooze end this close after a cycle's clock is due
STATES = (PENDING, RAISED, ACKNOWLEDGED, CLEARED)

ALERT_COLUMNS = [
    "id",
    "fingerprint",
    "rule",
    "series_id",
    "model_id",
    "horizon",
    "state",
    "severity",
    "met_streak",
    "unmet_streak",
    "episode",
    "since_at",
    "raised_at",
    "cleared_at",
    "notified_at",
    "acknowledged_by",
    "acknowledged_at",
    "snoozed_until",
    "snoozed_by",
    "statistic",
    "p_value",
    "summary",
    "evidence",
]
# Taken from this cycle's evaluation when there is one, else kept from the stored alert.
_LATEST = ["rule", "series_id", "model_id", "horizon", "statistic", "p_value"]
_LATEST_OBJECTS = ["summary", "evidence"]


def fingerprint(
    rule: pd.Series, series_id: pd.Series, model_id: pd.Series, horizon: pd.Series
) -> pd.Series:
    """The dedup key of an alert: rule, series, model and horizon bucket, as one string."""
    return (
        rule.astype(str)
        + "|"
        + series_id.astype("int64").astype(str)
        + "|"
        + model_id.astype("int64").astype(str)
        + "|"
        + horizon.astype(str)
    )


@dataclass(frozen=True)
class Advance:
    """The outcome of one cycle: alert rows to write, transitions to record, messages to send."""

    alerts: pd.DataFrame  # ALERT_COLUMNS; `id` is NaN for alerts seen for the first time
    transitions: pd.DataFrame  # fingerprint, event, from_state, to_state, note, evidence
    notices: pd.DataFrame  # fingerprint, kind ("raised" | "reminder" | "cleared")


def empty_alerts() -> pd.DataFrame:
    return pd.DataFrame(columns=ALERT_COLUMNS)


def advance(
    current: pd.DataFrame,
    evaluated: pd.DataFrame,
    parameters: pd.DataFrame,
    now: int,
    announce: bool = True,
) -> Advance:
    """Move every open alert, and every fingerprint whose rule is met, on by one cycle.

    `current`: stored alerts (ALERT_COLUMNS) of the fingerprints concerned; `evaluated`: this
    cycle's rule evaluation with `fingerprint`, `met`, `raise_after`, `clear_after`,
    `remind_seconds`, `summary` and the latest evidence; `parameters`: per-rule settings indexed
    by rule name, used for open alerts that were not evaluated this cycle (they count as not met;
    those of a rule no longer in force clear after one cycle). Without `announce` (no channel to
    send to) no message is due and no alert counts as told, so a raise is announced at the first
    cycle that has somewhere to send it.
    """
    cur = current.set_index("fingerprint")
    ev = evaluated.set_index("fingerprint")
    keys = cur.index[cur["state"].isin(OPEN_STATES)].union(ev.index[ev["met"].astype(bool)])
    frame = cur.reindex(keys)
    latest = ev.reindex(keys)
    seen = latest["met"].notna().to_numpy()
    for column in _LATEST + _LATEST_OBJECTS:
        frame[column] = latest[column].where(seen, frame[column])
    met = latest["met"].astype("boolean").fillna(False).to_numpy(dtype=bool)
    # An alert keeps the severity of the problem, not of the quiet cycles that clear it.
    frame["severity"] = latest["severity"].where(met, cur["severity"].reindex(keys))
    frame["severity"] = frame["severity"].fillna(latest["severity"])
    settings = _settings(frame["rule"], latest, parameters)

    prev = frame["state"].fillna("").to_numpy(dtype=object)
    fresh = np.isin(prev, ["", CLEARED])
    was_pending = prev == PENDING
    was_up = np.isin(prev, [RAISED, ACKNOWLEDGED])
    met_before = _numbers(frame["met_streak"], fresh)
    unmet_before = _numbers(frame["unmet_streak"], fresh)
    met_streak = np.where(met, met_before + 1, 0)
    unmet_streak = np.where(met, 0, unmet_before + 1)
    reaches = met & (met_streak >= settings["raise_after"].to_numpy())
    lapses = was_pending & ~met
    clears = was_up & ~met & (unmet_streak >= settings["clear_after"].to_numpy())
    state = prev.copy()
    state[(fresh | was_pending) & met] = PENDING
    state[(fresh | was_pending) & reaches] = RAISED
    state[lapses | clears] = CLEARED
    raised_now = (fresh | was_pending) & reaches

    frame["state"] = state
    frame["met_streak"] = met_streak
    frame["unmet_streak"] = unmet_streak
    frame["since_at"] = np.where(fresh & met, now, frame["since_at"])
    frame["episode"] = _numbers(frame["episode"], np.zeros(len(frame), dtype=bool)) + raised_now
    frame["raised_at"] = np.where(raised_now, now, frame["raised_at"])
    frame["notified_at"] = frame["notified_at"].where(~raised_now)
    frame["cleared_at"] = np.where(lapses | clears, now, frame["cleared_at"])
    for column in ("acknowledged_by", "acknowledged_at"):
        frame[column] = frame[column].where(~(lapses | clears))

    kinds = _notices(frame, settings, raised_now, clears, now)
    if not announce:
        kinds[:] = ""
    frame["notified_at"] = frame["notified_at"].where(kinds == "", now)
    transitions = _transitions(frame, prev, lapses, clears, latest, settings)
    notices = pd.DataFrame({"fingerprint": keys[kinds != ""], "kind": kinds[kinds != ""]})
    alerts = frame.reset_index(names="fingerprint")[ALERT_COLUMNS]
    return Advance(alerts, transitions, notices)


def _numbers(column: pd.Series, reset: np.ndarray) -> np.ndarray:
    """A counter column as whole numbers, 0 where missing or where `reset`."""
    values = pd.to_numeric(column).fillna(0).to_numpy(dtype=np.int64)
    return np.where(reset, 0, values)


def _settings(rule: pd.Series, latest: pd.DataFrame, parameters: pd.DataFrame) -> pd.DataFrame:
    names = ["raise_after", "clear_after", "remind_seconds"]
    stored = parameters.reindex(rule.to_numpy())[names].set_axis(rule.index)
    out = latest[names].astype(float).combine_first(stored.astype(float))
    out["in_force"] = rule.isin(parameters.index).to_numpy()
    # A rule taken out of the config: its alerts clear at the next cycle, and say why.
    return out.fillna({"raise_after": 1, "clear_after": 1, "remind_seconds": 0})


def snooze_running(snoozed_until: object, now: int) -> np.ndarray:
    """Whether each snooze still holds at a cycle run at `now`; null (no snooze) is False.

    A snooze that ends within `CYCLE_SLACK_SECONDS` after `now` is over already: the cycle
    sends what it held back, and the listings, which ask here too, no longer show it snoozed.

    >>> snooze_running(np.array([None, 1000, 1061], dtype=object), now=1000).tolist()
    [False, False, True]
    """
    until = np.asarray(snoozed_until, dtype=float)
    with np.errstate(invalid="ignore"):
        return until > now + CYCLE_SLACK_SECONDS


def _notices(
    frame: pd.DataFrame,
    settings: pd.DataFrame,
    raised_now: np.ndarray,
    clears: np.ndarray,
    now: int,
) -> np.ndarray:
    """Which message each alert needs this cycle: "raised", "reminder", "cleared" or ""."""
    state = frame["state"].to_numpy(dtype=object)
    # A scheduler fires a little early or late; a snooze ending or a reminder falling due within
    # the slack after this cycle's clock goes with this cycle rather than a whole cycle late.
    snoozed = snooze_running(frame["snoozed_until"].to_numpy(), now)
    notified = frame["notified_at"].astype(float).to_numpy()
    told = ~np.isnan(notified)
    remind = settings["remind_seconds"].to_numpy()
    slack = np.minimum(CYCLE_SLACK_SECONDS, remind / 2)  # never sooner than half its interval
    with np.errstate(invalid="ignore"):
        reminder_due = told & (remind > 0) & (now - notified >= remind - slack)
    up = (state == RAISED) & ~snoozed
    kinds = np.full(len(frame), "", dtype=object)
    kinds[up & ~told] = "raised"  # just raised, or held back by a snooze that has ended
    kinds[up & ~raised_now & reminder_due] = "reminder"
    kinds[clears & told] = "cleared"
    return kinds


def _transitions(
    frame: pd.DataFrame,
    prev: np.ndarray,
    lapses: np.ndarray,
    clears: np.ndarray,
    latest: pd.DataFrame,
    settings: pd.DataFrame,
) -> pd.DataFrame:
    state = frame["state"].to_numpy(dtype=object)
    changed = state != prev
    event = np.where(state == RAISED, "raised", np.where(state == PENDING, "opened", ""))
    event = np.where(lapses, "lapsed", np.where(clears, "cleared", event))
    gone = ~settings["in_force"].to_numpy()
    note = np.where(
        clears & gone,
        "rule no longer in force",
        np.where(clears | lapses, "rule not met", np.where(state == RAISED, "rule met", "")),
    )
    evidence = frame["evidence"].where(latest["met"].notna(), None)
    from_state = prev.copy()
    from_state[prev == ""] = None  # seen for the first time
    out = pd.DataFrame(
        {
            "fingerprint": frame.index,
            "event": event,
            "from_state": from_state,
            "to_state": state,
            "note": note,
            "evidence": evidence.to_numpy(dtype=object),
        }
    )
    return out.loc[changed].reset_index(drop=True)
