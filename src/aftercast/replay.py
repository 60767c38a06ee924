"""Replay: the detection cycles over stored history, the clock set day by day, nothing stored.

For tuning rules before going live: `replay(engine, config, start, end)` first brings the
store's facts up to date as a live cycle would (benchmark forecasts for every issue time,
matched pairs; both depend only on the data), then evaluates the detection stage at each day's
clock with the given config and keeps the findings in memory. Baselines are taken as stored,
or computed from the config where none is stored, and each is used only from the day its
window (plus `settle_days`) had passed. The report says, per detection, which alerts would
have been raised and when, and when they would have cleared. Freshness checks are left out:
the store does not know when each actual arrived, so replaying them would be fiction.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from aftercast.benchmarks import make_benchmarks
from aftercast.config import Config
from aftercast.detect.baselines import load_baselines, pending_baselines
from aftercast.detect.findings import FINDING_KEY
from aftercast.detect.gather import window_data
from aftercast.detect.profiles import KEY
from aftercast.detect.run import assess
from aftercast.matching import match
from aftercast.periods import to_iso
from aftercast.store.bulk import read_frame

DAY = 86_400
Progress = Callable[[int, int], None]
_RANK = {"critical": 0, "warning": 1, "info": 2}


@dataclass
class ReplayReport:
    start: int
    end: int
    days: int
    alerts: list[dict[str, Any]] = field(default_factory=list)
    per_detection: dict[str, int] = field(default_factory=dict)

    def as_json(self) -> dict[str, Any]:
        return {
            "from": to_iso(self.start),
            "to": to_iso(self.end),
            "days": self.days,
            "alerts_per_rule": self.per_detection,
            "alerts": self.alerts,
        }


def _baselines(engine: Engine, config: Config, end: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Stored baselines, completed by those the config would have made by `end`."""
    with engine.connect() as connection:
        keys = read_frame(connection, "SELECT series_id, model_id FROM forecast_activity")
        stored, stored_losses = load_baselines(connection, keys)
        data = window_data(connection, config, end)
        wanted = data.pairs[KEY].drop_duplicates()
        if len(stored):
            wanted = wanted.merge(stored[KEY], on=KEY, how="left", indicator=True)
            wanted = wanted.loc[wanted["_merge"] == "left_only", KEY]
        made, made_losses = pending_baselines(connection, config, wanted, end)
    return _stacked(stored, made), _stacked(stored_losses, made_losses)


def _stacked(first: pd.DataFrame, second: pd.DataFrame) -> pd.DataFrame:
    # An empty frame is left out of the concatenation, whose dtypes it would otherwise decide.
    parts = [frame for frame in (first, second) if len(frame)] or [first]
    return pd.concat(parts, ignore_index=True)


def _episodes(flags: pd.DataFrame, days: np.ndarray) -> pd.DataFrame:
    """Runs of consecutive flagged days per key: raised, cleared (None while still flagged)."""
    ordinal = pd.Series(np.arange(len(days)), index=days)
    flags = flags.assign(_day=ordinal.reindex(flags["now"]).to_numpy())
    flags = flags.sort_values([*FINDING_KEY, "_day"])
    new_run = flags.groupby(FINDING_KEY)["_day"].diff().ne(1)
    flags["_run"] = new_run.cumsum()
    flags["_rank"] = flags["severity"].map(_RANK)
    flags["_abs"] = flags["statistic"].abs()
    runs = flags.groupby("_run").agg(
        **{k: (k, "first") for k in [*FINDING_KEY, "series_key", "model"]},
        first=("_day", "min"),
        last=("_day", "max"),
        rank=("_rank", "min"),
        peak_statistic=("_abs", "max"),
    )
    runs["raised_at"] = days[runs["first"].to_numpy()]
    after = runs["last"].to_numpy() + 1
    runs["cleared_at"] = np.where(after < len(days), days[np.minimum(after, len(days) - 1)], -1)
    runs["days_flagged"] = runs["last"] - runs["first"] + 1
    return runs.reset_index(drop=True)


def replay(
    engine: Engine, config: Config, start: int, end: int, progress: Progress | None = None
) -> ReplayReport:
    """Evaluate detection at each day's clock from `start` to `end`; store nothing of it."""
    make_benchmarks(engine, config, end)
    match(engine, end)
    summary, losses = _baselines(engine, config, end)
    settle = int(config.baseline.settle_days * DAY)
    days = np.arange(start, end + 1, DAY, dtype=np.int64)
    flagged = []
    with engine.connect() as connection:
        names = read_frame(connection, "SELECT id, key FROM series").set_index("id")["key"]
        models = read_frame(connection, "SELECT id, name FROM models").set_index("id")["name"]
        for index, now in enumerate(days):
            ready = summary.loc[summary["window_end"] + settle <= now] if len(summary) else summary
            found, _ = assess(
                config,
                int(now),
                window_data(connection, config, int(now)),
                ready,
                losses.merge(ready[KEY], on=KEY) if len(ready) else losses.iloc[:0],
                None,
            )
            if len(found):
                flagged.append(
                    found.loc[found["flagged"], [*FINDING_KEY, "severity", "statistic"]].assign(
                        now=now
                    )
                )
            if progress is not None:
                progress(index + 1, len(days))
    report = ReplayReport(start=start, end=end, days=len(days))
    flags = pd.concat(flagged, ignore_index=True) if flagged else pd.DataFrame()
    if flags.empty:
        return report
    flags["series_key"] = names.reindex(flags["series_id"]).to_numpy()
    flags["model"] = models.reindex(flags["model_id"]).to_numpy()
    runs = _episodes(flags, days)
    report.per_detection = {str(k): int(v) for k, v in runs.groupby("detection").size().items()}
    report.alerts = [
        {
            "rule": row.detection,
            "series_id": row.series_key,
            "model": row.model,
            "horizon": row.bucket,
            "raised_at": to_iso(int(row.raised_at)),
            "cleared_at": to_iso(int(row.cleared_at)) if row.cleared_at >= 0 else None,
            "days_flagged": int(row.days_flagged),
            "severity": [k for k, v in _RANK.items() if v == row.rank][0],
            "peak_statistic": float(row.peak_statistic),
        }
        for row in runs.sort_values(["detection", "raised_at", "series_key"]).itertuples()
    ]
    return report
