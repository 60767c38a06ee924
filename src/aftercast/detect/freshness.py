"""Data-freshness findings: actuals that are overdue, forecasts that have stopped coming.

Pure and vectorised over all (series, model) keys. These are facts, not tests: no p-value, no
fleet adjustment; a finding is flagged when its lateness, counted in the series' own periods,
reaches the configured threshold (`detection.overdue_periods`, `detection.stalled_periods`).
Severity is critical from three times the threshold on.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def stalled_findings(
    activity: pd.DataFrame, periods: pd.DataFrame, now: int, threshold: int, forget_seconds: float
) -> pd.DataFrame:
    """`forecasts_stalled` rows: periods since each (series, model) last issued a forecast.

    `activity`: series_id, model_id, last_issued_at, last_issue_period; `periods`: indexed by
    series id with `now_period`. Keys silent for longer than `forget_seconds` are left out.

    >>> a = pd.DataFrame({"series_id": [1, 1], "model_id": [1, 2], "last_issued_at": [90, 10],
    ...                   "last_issue_period": [9, 7]})
    >>> p = pd.DataFrame({"now_period": [10]}, index=[1])
    >>> stalled_findings(a, p, 100, 2, 1e6)["condition"].tolist()
    [False, True]
    """
    if activity.empty:
        return pd.DataFrame()
    now_period = periods["now_period"].reindex(activity["series_id"]).to_numpy()
    late = now_period - activity["last_issue_period"].to_numpy()
    keep = (now - activity["last_issued_at"].to_numpy() <= forget_seconds) & ~np.isnan(late)
    found = activity.loc[keep].reset_index(drop=True)
    late = late[keep].astype(np.int64)
    return pd.DataFrame(
        {
            "detection": "forecasts_stalled",
            "series_id": found["series_id"],
            "model_id": found["model_id"],
            "bucket": "all",
            "n": late,
            "statistic": late.astype(np.float64),
            "condition": late >= threshold,
            "severity_critical": late >= 3 * threshold,
            "ev_periods_since_last_issue": late,
            "ev_last_issued_at": found["last_issued_at"],
            "ev_suggested_fix": "check the job that publishes this model's forecasts",
        }
    )


def overdue_findings(overdue: pd.DataFrame, periods: pd.DataFrame, threshold: int) -> pd.DataFrame:
    """`actuals_overdue` rows: targets past due whose actual has not arrived.

    `overdue`: series_id, model_id, first_period, first_at, targets, last_at (latest actual).

    >>> o = pd.DataFrame({"series_id": [1], "model_id": [3], "first_period": [5], "first_at": [0],
    ...                   "targets": [4], "last_at": [None]})
    >>> overdue_findings(o, pd.DataFrame({"now_period": [9]}, index=[1]), 2)["statistic"].tolist()
    [4.0]
    """
    if overdue.empty:
        return pd.DataFrame()
    now_period = periods["now_period"].reindex(overdue["series_id"]).to_numpy()
    late = (now_period - overdue["first_period"].to_numpy()).astype(np.int64)
    return pd.DataFrame(
        {
            "detection": "actuals_overdue",
            "series_id": overdue["series_id"],
            "model_id": overdue["model_id"],
            "bucket": "all",
            "n": overdue["targets"].astype(np.int64),
            "statistic": late.astype(np.float64),
            "condition": late >= threshold,
            "severity_critical": late >= 3 * threshold,
            "ev_periods_late": late,
            "ev_overdue_targets": overdue["targets"],
            "ev_oldest_overdue_target_at": overdue["first_at"],
            "ev_latest_actual_at": pd.to_numeric(overdue["last_at"]),
            "ev_suggested_fix": "check the feed that delivers this series' actuals",
        }
    )
