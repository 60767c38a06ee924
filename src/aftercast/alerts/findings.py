"""This cycle's findings, as the rules read them.

The detect stage stores one finding per (cycle, detection, series, model, horizon bucket) with
its statistic, p-value, fleet-adjusted p-value, whether it is flagged, a severity and evidence.
This module reads one cycle's findings into the frame `alerts.rules.evaluate_rules` takes:
detection, series_id, model_id, horizon, flagged, severity, statistic, p_value (adjusted where
the detection adjusts), n and evidence (dicts). Findings a detection did not store (not
flagged and unremarkable) are simply absent, which the lifecycle counts as "not met".
"""

from __future__ import annotations

import json

import pandas as pd
from sqlalchemy import Connection

from aftercast.store.bulk import read_frame

FINDING_COLUMNS = [
    "detection",
    "series_id",
    "model_id",
    "horizon",
    "flagged",
    "severity",
    "statistic",
    "p_value",
    "n",
    "evidence",
]


def empty_findings() -> pd.DataFrame:
    return pd.DataFrame(columns=FINDING_COLUMNS)


def cycle_findings(connection: Connection, cycle_id: int) -> pd.DataFrame:
    """The findings the detect stage stored for `cycle_id` (table `findings`)."""
    frame = read_frame(
        connection,
        "SELECT detection, series_id, model_id, bucket AS horizon, level, n, flagged, severity, "
        "statistic, COALESCE(p_adjusted, p_value) AS p_value, evidence FROM findings "
        "WHERE cycle_id = :cycle",
        {"cycle": cycle_id},
    )
    if frame.empty:
        return empty_findings()
    evidence = [json.loads(e) if e else {} for e in frame["evidence"]]
    # The chart of a coverage alert shows the band of the level the finding is about.
    for item, level in zip(evidence, frame["level"], strict=True):
        if pd.notna(level):
            item.setdefault("level", float(level))
    frame["evidence"] = evidence
    frame["flagged"] = frame["flagged"].astype(bool)
    frame["horizon"] = frame["horizon"].astype(str)
    return frame[FINDING_COLUMNS]
