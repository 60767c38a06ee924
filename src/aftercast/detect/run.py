"""The detection stage: window data from the store, every test over every key, fleet FDR, findings.

Called by the cycle after matching (and windows). It reads the detection window's pairs, makes
the baselines that have become ready, runs the coverage, accuracy, benchmark and bias checks
(pure, vectorised over all keys) and the freshness checks, controls the false-discovery rate
across the fleet, and stores the findings of this cycle (`detect.findings`). `assess` is the
part without the store: replay calls it day by day with baselines held in memory.

False discoveries: with `detection.families: series` (the default) the tests of one series
(every model, horizon bucket, level and detection) form a family; families are selected by
Benjamini-Hochberg over their Simes p-values and tests within a selected family flagged by BH
at q R / M (`detect.families.two_level_fdr`). With `families: detection` each detection gets one
plain Benjamini-Hochberg over all its tests across the fleet.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.detect.accuracy import skill_score
from aftercast.detect.baselines import load_baselines, refresh_baselines
from aftercast.detect.coverage_checks import coverage_findings
from aftercast.detect.families import benjamini_hochberg_by_group, two_level_fdr
from aftercast.detect.findings import previously_flagged, store_findings
from aftercast.detect.freshness import overdue_findings, stalled_findings
from aftercast.detect.gather import (
    DAY,
    WindowData,
    activity,
    overdue_targets,
    series_periods,
    window_data,
)
from aftercast.detect.loss_checks import accuracy_findings, benchmark_findings, bias_findings
from aftercast.detect.profiles import KEY, target_profiles
from aftercast.store.db import write
from aftercast.window_store import series_pages

STATISTICAL = (
    "coverage_low",
    "coverage_high",
    "accuracy_vs_baseline",
    "no_better_than_benchmark",
    "bias",
)
DETECTIONS = (*STATISTICAL, "actuals_overdue", "forecasts_stalled")
# Series tested at a time: memory follows this, not the fleet.
PAGE_SERIES = 10_000
# Columns some checks leave out (freshness has no p-value, only coverage has a level).
_DEFAULTS: dict[str, object] = {
    "p_value": np.nan,
    "level": np.nan,
    "condition": True,
    "severity_critical": False,
}


@dataclass
class Freshness:
    activity: pd.DataFrame
    periods: pd.DataFrame
    overdue: pd.DataFrame


@dataclass
class DetectStats:
    tests: int = 0
    flagged: int = 0
    stored: int = 0
    baselines: int = 0


def _benchmark_inputs(data: WindowData) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Per-target model and benchmark losses on the same targets, and interval-score skill."""
    on = ["series_id", "issued_at", "target_at"]
    reference = data.benchmark[[*on, "abs_error"]].rename(
        columns={"abs_error": "benchmark_abs_error"}
    )
    joined = data.pairs.merge(reference, on=on)
    matched = joined.groupby([*KEY, "target_period"], as_index=False).agg(
        abs_error=("abs_error", "mean"),
        benchmark_abs_error=("benchmark_abs_error", "mean"),
        horizon=("horizon", "max"),
    )
    hits = data.hits.merge(
        data.benchmark_hits[[*on, "level", "interval_score"]],
        on=[*on, "level"],
        suffixes=("", "_b"),
    )
    means = hits.groupby([*KEY, "level"])[["interval_score", "interval_score_b"]].mean()
    # NaN, not inf, where the benchmark's intervals scored 0 (they held every outcome at no width).
    skill = pd.Series(
        skill_score(means["interval_score"], means["interval_score_b"]), index=means.index
    ).unstack("level")
    skill.columns = [f"skill_interval_score_{level:g}" for level in skill.columns]
    return matched, skill.reset_index()


def _checks(
    config: Config, data: WindowData, baselines: pd.DataFrame, losses: pd.DataFrame
) -> list[pd.DataFrame]:
    settings = config.detection
    if data.pairs.empty:
        return []
    profiles = target_profiles(data.pairs)
    matched, skill = _benchmark_inputs(data)
    return [
        coverage_findings(data.hits, settings.min_points),
        accuracy_findings(profiles, baselines, losses, settings.min_points),
        benchmark_findings(matched, skill, settings.min_points, f"benchmark:{settings.benchmark}"),
        bias_findings(
            profiles,
            baselines,
            settings.min_points,
            settings.cusum_k,
            settings.cusum_h,
            settings.tracking_signal_limit,
        ),
    ]


def _freshness_checks(config: Config, fresh: Freshness, now: int) -> list[pd.DataFrame]:
    settings = config.detection
    forget = settings.forget_after_days * DAY
    return [
        stalled_findings(fresh.activity, fresh.periods, now, settings.stalled_periods, forget),
        overdue_findings(fresh.overdue, fresh.periods, settings.overdue_periods),
    ]


def adjust(findings: pd.DataFrame, config: Config) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Fleet-adjusted p-values, flags and severities; and a summary per detection."""
    settings = config.detection
    rate = settings.false_discovery_rate
    findings = findings.reset_index(drop=True)
    statistical = findings["detection"].isin(STATISTICAL).to_numpy()
    p = findings["p_value"].to_numpy(np.float64)
    p = np.where(statistical, p, np.nan)
    if settings.families == "series":
        families = pd.factorize(findings["series_id"])[0]
        result = two_level_fdr(p, families, rate)
        rejected, adjusted = result.flagged, result.adjusted
        selected, family_count = (
            int(result.family_selected.sum()),
            int((~np.isnan(result.family_pvalue)).sum()),
        )
    else:
        groups = pd.factorize(findings["detection"])[0]
        grouped = benjamini_hochberg_by_group(p, groups, rate)
        rejected, adjusted = grouped.rejected, grouped.adjusted
        selected, family_count = 0, 0
    condition = findings["condition"].astype("boolean").fillna(True).to_numpy(bool)
    flagged = np.where(statistical, rejected & condition, condition)
    critical = findings["severity_critical"].astype("boolean").fillna(False).to_numpy(bool)
    findings["p_adjusted"] = adjusted
    findings["flagged"] = flagged
    findings["severity"] = np.select(
        [~flagged, critical & (findings["detection"] != "coverage_high").to_numpy()],
        ["info", "critical"],
        default="warning",
    )
    tested = findings["p_value"].notna() | ~pd.Series(statistical)
    summary = pd.DataFrame(
        {
            "tests": tested.groupby(findings["detection"]).sum(),
            "flagged": findings["flagged"].groupby(findings["detection"]).sum(),
        }
    ).reindex(list(DETECTIONS), fill_value=0)
    summary["families_selected"], summary["families"] = selected, family_count
    return findings, summary.rename_axis("detection").reset_index()


def assess(
    config: Config,
    now: int,
    data: WindowData,
    baselines: pd.DataFrame,
    losses: pd.DataFrame,
    fresh: Freshness | None,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Every finding of one cycle, adjusted (pure: frames in, frames out)."""
    return combine(config, now, _checks(config, data, baselines, losses), fresh)


def combine(
    config: Config, now: int, parts: list[pd.DataFrame], fresh: Freshness | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The findings of the checks (`parts`, from any number of pages of series) and of the
    freshness checks, adjusted together across the fleet."""
    if fresh is not None:
        parts = parts + _freshness_checks(config, fresh, now)
    parts = [p for p in parts if len(p)]
    if not parts:
        empty = pd.DataFrame({"detection": list(DETECTIONS), "tests": 0, "flagged": 0})
        return pd.DataFrame(), empty.assign(families_selected=0, families=0)
    findings = pd.concat(parts, ignore_index=True)
    for column, default in _DEFAULTS.items():
        if column not in findings.columns:
            findings[column] = default
    return adjust(findings, config)


def freshness_inputs(engine: Engine, config: Config, now: int) -> Freshness:
    with engine.connect() as connection:
        recent = activity(connection)
        periods = series_periods(connection, recent["series_id"].unique(), now)
        since = now - int(config.detection.forget_after_days * DAY)
        overdue = overdue_targets(connection, periods, config.detection.overdue_periods, since, now)
    return Freshness(recent, periods, overdue)


def page_checks(
    engine: Engine, config: Config, now: int, series_ids: np.ndarray, stats: DetectStats
) -> list[pd.DataFrame]:
    """The checks of one page of series: its window data, baselines and findings."""
    with engine.connect() as connection:
        data = window_data(connection, config, now, series_ids)
    wanted = data.pairs[KEY].drop_duplicates()
    stats.baselines += refresh_baselines(engine, config, wanted, now)
    with engine.connect() as connection:
        baselines, losses = load_baselines(connection, wanted)
    return _checks(config, data, baselines, losses)


def detect(
    engine: Engine, config: Config, now: int, cycle_id: int, page_series: int = PAGE_SERIES
) -> DetectStats:
    """The cycle stage: test, adjust and store this cycle's findings.

    The window's pairs are read and tested a page of series at a time, so memory follows the
    page, not the fleet; only the findings are gathered for the fleet-wide adjustment.
    """
    stats = DetectStats()
    parts: list[pd.DataFrame] = []
    with engine.connect() as connection:
        pages = [page["id"].to_numpy(np.int64) for page in series_pages(connection, page_series)]
    for series_ids in pages:
        parts += page_checks(engine, config, now, series_ids, stats)
    with engine.connect() as connection:
        previous = previously_flagged(connection)
    findings, summary = combine(config, now, parts, freshness_inputs(engine, config, now))
    with write(engine) as connection:
        stats.stored = store_findings(
            connection, config, cycle_id, now, findings, summary, previous
        )
    if len(findings):
        stats.tests = int(findings["p_value"].notna().sum())
        stats.flagged = int(findings["flagged"].sum())
    return stats
