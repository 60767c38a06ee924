"""Coverage findings: is each (series, model, horizon bucket) interval covering its level?

Pure, vectorised over every key. Hits of different horizons share actuals, so each horizon is
tested on its own, one hit per target (exact two-sided binomial, `binomial_coverage_pvalue`),
and the bucket's p-value is the Simes combination of its horizons' and levels' p-values
(Simes, 1986), valid under the positive dependence that shared actuals create. A bucket yields
a `coverage_low` row (from the tests whose coverage is below their level; the others count
with p = 1, which keeps the combination valid) and a `coverage_high` row. Evidence comes from
the bucket's worst test: Kupiec's proportion-of-failures test, Christoffersen's independence
and conditional-coverage tests on its hit sequence, its Basel traffic-light zone, and the
factor by which the bucket's half-widths would have to grow to reach the level on the window
(`widening_factor_by_group`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from aftercast.detect.coverage import (
    binomial_coverage_pvalue,
    christoffersen_conditional_coverage,
    christoffersen_independence,
    kupiec_pof,
    traffic_light_zone,
    widening_factor_by_group,
)
from aftercast.detect.families import simes_by_group
from aftercast.detect.profiles import KEY, padded

TEST = [*KEY, "horizon", "level"]


def _per_test(hits: pd.DataFrame, min_points: int) -> pd.DataFrame:
    tests = hits.groupby(TEST, as_index=False).agg(k=("hit", "sum"), n=("hit", "size"))
    level = tests["level"].to_numpy(np.float64) / 100.0
    pvalue = binomial_coverage_pvalue(tests["k"].to_numpy(np.float64), tests["n"], level)
    tests["p"] = np.where(tests["n"] >= min_points, pvalue, np.nan)
    tests["coverage"] = tests["k"] / tests["n"]
    tests["low"] = tests["coverage"] < level
    tests["code"] = pd.MultiIndex.from_frame(tests[KEY]).factorize()[0]
    return tests


def _rows_for(tests: pd.DataFrame, detection: str) -> pd.DataFrame:
    """One row per bucket: Simes p over the tests, with the worst test's identity."""
    wanted = tests["low"] if detection == "coverage_low" else ~tests["low"]
    p = np.where(wanted | tests["p"].isna(), tests["p"], 1.0)
    simes = simes_by_group(p, tests["code"].to_numpy(), int(tests["code"].max()) + 1)
    ranked = tests.assign(_p=np.nan_to_num(p, nan=2.0)).sort_values(["code", "_p"])
    worst = ranked.drop_duplicates("code").set_index("code")
    rows = worst[[*KEY, "horizon", "level", "k", "n", "coverage", "_p"]].rename(
        columns={
            "horizon": "worst_horizon",
            "k": "worst_hits",
            "n": "worst_n",
            "coverage": "worst_coverage",
            "_p": "worst_p",
        }
    )
    rows["p_value"] = simes[rows.index.to_numpy()]
    rows["detection"] = detection
    return rows.reset_index(drop=True)


def _sequence_evidence(hits: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    """Kupiec, Christoffersen and traffic light on each row's worst (horizon, level) test."""
    keys = rows[[*KEY, "worst_horizon", "level"]].rename(columns={"worst_horizon": "horizon"})
    matrix = padded(hits, keys, "hit", key=TEST)
    level = rows["level"].to_numpy(np.float64) / 100.0
    misses = rows["worst_n"] - rows["worst_hits"]
    kupiec = kupiec_pof(misses, rows["worst_n"], level)
    independence = christoffersen_independence(matrix)
    conditional = christoffersen_conditional_coverage(matrix, level)
    light = traffic_light_zone(misses, rows["worst_n"], level)
    return pd.DataFrame(
        {
            "kupiec_lr": kupiec.statistic,
            "kupiec_p": kupiec.pvalue,
            "christoffersen_independence_p": independence.pvalue,
            "christoffersen_conditional_p": conditional.pvalue,
            "traffic_light": light.zone,
        },
        index=rows.index,
    )


def _pooled(hits: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    """Coverage over all the bucket's pairs at the row's level, targets, and widening factor."""
    at_level = hits.merge(rows[[*KEY, "level"]].reset_index(names="_row"), on=[*KEY, "level"])
    grouped = at_level.groupby("_row")
    centre = (at_level["lower"] + at_level["upper"]) / 2.0
    factor = widening_factor_by_group(
        (at_level["actual"] - centre).abs().to_numpy(),
        ((at_level["upper"] - at_level["lower"]) / 2.0).to_numpy(),
        rows["level"].to_numpy(np.float64) / 100.0,
        at_level["_row"].to_numpy(),
        len(rows),
    )
    out = pd.DataFrame(
        {
            "coverage": grouped["hit"].mean(),
            "pairs": grouped["hit"].size(),
            "targets": grouped["target_period"].nunique(),
            "window_first": grouped["target_at"].min(),
            "window_last": grouped["target_at"].max(),
        }
    ).reindex(rows.index)
    out["widening_factor"] = factor
    return out


def coverage_findings(hits: pd.DataFrame, min_points: int) -> pd.DataFrame:
    """`coverage_low` and `coverage_high` rows for every bucket with interval pairs.

    `hits`: one row per (pair, level) with series_id, model_id, bucket, horizon, level
    (percent), target_period, target_at, hit, lower, upper and actual. Columns out: detection,
    the key, level, n (targets), statistic (coverage minus level, percentage points), p_value,
    and evidence columns prefixed `ev_`.
    """
    if hits.empty:
        return pd.DataFrame()
    tests = _per_test(hits, min_points)
    rows = pd.concat(
        [_rows_for(tests, "coverage_low"), _rows_for(tests, "coverage_high")], ignore_index=True
    )
    pooled = _pooled(hits, rows)
    evidence = _sequence_evidence(hits, rows)
    gap = 100.0 * pooled["coverage"] - rows["level"]
    factor = pooled["widening_factor"]
    fix = coverage_fix(rows["level"], factor)
    out = pd.DataFrame(
        {
            "detection": rows["detection"],
            **{k: rows[k] for k in KEY},
            "level": rows["level"],
            "n": pooled["targets"].fillna(0).astype(np.int64),
            "statistic": gap,
            "p_value": rows["p_value"],
            "severity_critical": (rows["detection"] == "coverage_low")
            & (100.0 - 100.0 * pooled["coverage"] >= 2.0 * (100.0 - rows["level"])),
            "ev_coverage": pooled["coverage"],
            "ev_level": rows["level"],
            "ev_pairs": pooled["pairs"].fillna(0).astype(np.int64),
            "ev_worst_horizon": rows["worst_horizon"].astype(np.int64),
            "ev_worst_horizon_coverage": rows["worst_coverage"],
            "ev_worst_horizon_p_value": rows["worst_p"].where(rows["worst_p"] <= 1.0),
            **{f"ev_{c}": evidence[c] for c in evidence.columns},
            "ev_widening_factor": factor,
            "ev_suggested_fix": fix.where(factor.notna(), ""),
            "window_first": pooled["window_first"],
            "window_last": pooled["window_last"],
        }
    )
    return out


def coverage_fix(level: pd.Series, factor: pd.Series) -> pd.Series:
    """The suggested fix for each coverage finding, from its level and widening factor.

    A factor that rounds to 0 means at least `level`% of the outcomes fell on the intervals'
    centre, so no factor is worth quoting ("narrow by a factor of 0.00" reads as a mistake);
    a missing one (intervals of zero width) cannot be scaled at all.

    >>> print(coverage_fix(pd.Series([80.0]), pd.Series([1.5])).iloc[0][:55])
    widen the 80% intervals' half-width by a factor of 1.50
    """
    name = level.map("{:g}".format)
    verb = pd.Series(np.where(factor >= 1.0, "widen", "narrow"), index=level.index)
    scaled = (
        verb
        + " the "
        + name
        + "% intervals' half-width by a factor of "
        + factor.map("{:.2f}".format)
        + " to cover "
        + name
        + "% of the window's outcomes"
    )
    centred = (
        "at least "
        + name
        + "% of the window's outcomes fell on the "
        + name
        + "% intervals' centre: they could be much narrower"
    )
    no_width = (
        "the "
        + name
        + "% intervals have no width to scale: give them a width that covers "
        + name
        + "% of the outcomes"
    )
    return scaled.where(factor.round(2) > 0, centred).where(factor.notna(), no_width)
