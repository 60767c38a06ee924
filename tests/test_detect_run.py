"""The detection stage's own statistics: family-wise FDR, bucket p-values, power and size.

Outside sources: statsmodels' `multipletests(method="fdr_bh")`, the Benjamini-Hochberg (1995)
worked example, scipy's exact binomial test and Welch t test, numpy's quantile (Hyndman and
Fan type 7), scikit-learn's mean_absolute_error, and simulation under known nulls (a test
whose p-values are exact must reject about as often as its level).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn.metrics import mean_absolute_error
from statsmodels.stats.multitest import multipletests

from aftercast.detect.coverage_checks import coverage_findings
from aftercast.detect.families import benjamini_hochberg_by_group, simes_by_group, two_level_fdr
from aftercast.detect.gather import WindowData
from aftercast.detect.loss_checks import benchmark_findings, bias_findings, welch_greater_pvalue
from aftercast.detect.run import _benchmark_inputs

RNG_SEED = 20260601


def test_grouped_bh_and_simes_equal_statsmodels_group_by_group() -> None:
    rng = np.random.default_rng(RNG_SEED)
    p = rng.uniform(size=400) ** 2
    groups = rng.integers(0, 30, 400)
    grouped = benjamini_hochberg_by_group(p, groups, 0.05)
    simes = simes_by_group(p, groups)
    for group in range(30):
        mine = groups == group
        rejected, adjusted, _, _ = multipletests(p[mine], 0.05, method="fdr_bh")  # statsmodels
        np.testing.assert_allclose(grouped.adjusted[mine], adjusted)
        assert (grouped.rejected[mine] == rejected).all()
        assert simes[group] == pytest.approx(adjusted.min())  # Simes = least BH-adjusted p


def test_benjamini_hochberg_1995_example_rejects_four() -> None:
    # Benjamini and Hochberg (1995), JRSS B 57(1): 15 p-values, q = 0.05 -> 4 rejected
    # (values from memory; statsmodels agrees).
    p = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240,
         0.4262, 0.5719, 0.6528, 0.7590, 1.000]  # fmt: skip
    assert benjamini_hochberg_by_group(p, np.zeros(15, dtype=int), 0.05).rejected.sum() == 4
    assert multipletests(p, 0.05, method="fdr_bh")[0].sum() == 4


def test_two_level_fdr_is_bh_on_family_simes_then_bh_at_q_r_over_m() -> None:
    rng = np.random.default_rng(RNG_SEED + 1)
    families = np.repeat(np.arange(60), 8)
    p = rng.uniform(size=families.size)
    p[families < 6] = rng.uniform(size=48) * 1e-3  # six families really in trouble
    result = two_level_fdr(p, families, 0.05)
    # Benjamini and Bogomolov (2014), built from statsmodels' BH at each level.
    family_p = np.array([multipletests(p[families == f], method="fdr_bh")[1].min()
                         for f in range(60)])  # fmt: skip
    selected = multipletests(family_p, 0.05, method="fdr_bh")[0]
    inner = 0.05 * selected.sum() / 60
    expected = np.zeros(p.size, dtype=bool)
    for family in np.flatnonzero(selected):
        mine = families == family
        expected[mine] = multipletests(p[mine], inner, method="fdr_bh")[0]
    assert (result.family_selected == selected).all() and (result.flagged == expected).all()
    assert result.flagged.any()
    assert ((result.adjusted <= 0.05) == result.flagged).all()


def test_welch_p_value_equals_scipy() -> None:
    rng = np.random.default_rng(RNG_SEED + 2)
    recent = rng.normal(1.0, 2.0, (5, 14))
    baseline = rng.normal(0.0, 1.0, (5, 28))
    baseline[2, 20:] = np.nan
    got = welch_greater_pvalue(recent, baseline)
    for row in range(5):
        b = baseline[row][~np.isnan(baseline[row])]
        expected = stats.ttest_ind(recent[row], b, equal_var=False, alternative="greater").pvalue
        assert got[row] == pytest.approx(expected)


def test_welch_p_value_of_a_single_recent_target_is_nan_without_a_warning() -> None:
    # scipy's ttest_ind gives NaN for a sample of one; a key with one recent target is common,
    # so it must not raise a RuntimeWarning every cycle either.
    recent = np.array([[2.0, np.nan, np.nan], [2.0, 3.5, 2.5]])
    baseline = np.array([[1.0, 1.5, 1.2], [1.0, 1.5, 1.2]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = welch_greater_pvalue(recent, baseline)
    assert np.isnan(got[0])
    expected = stats.ttest_ind(recent[1], baseline[1], equal_var=False, alternative="greater")
    assert got[1] == pytest.approx(expected.pvalue)


def _hits(coverage: dict[tuple[int, int, float], float], n: int, seed: int) -> pd.DataFrame:
    """Interval hits per (series, horizon, level) with the given true coverage, n targets each.

    Outcomes are N(0, 1), intervals centred at 0; the half-width gives the wanted coverage.
    """
    rng = np.random.default_rng(seed)
    frames = []
    for (series, horizon, level), share in coverage.items():
        actual = rng.standard_normal(n)
        half = stats.norm.ppf(0.5 + share / 2)
        frames.append(
            pd.DataFrame(
                {
                    "series_id": series,
                    "model_id": 1,
                    "bucket": "2-7",
                    "horizon": horizon,
                    "level": level,
                    "target_period": np.arange(n),
                    "target_at": np.arange(n),
                    "actual": actual,
                    "lower": -half,
                    "upper": half,
                    "hit": (np.abs(actual) <= half).astype(float),
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def test_bucket_coverage_p_value_is_simes_over_its_exact_binomial_tests() -> None:
    wanted = {(1, h, lv): share for h, share in ((2, 0.7), (3, 0.75), (4, 0.85))
              for lv in (80.0,)} | {(1, 2, 95.0): 0.9, (1, 3, 95.0): 0.97}  # fmt: skip
    hits = _hits(wanted, 60, RNG_SEED + 3)
    rows = coverage_findings(hits, min_points=10).set_index("detection")
    tests = hits.groupby(["horizon", "level"])["hit"].agg(["sum", "size"]).reset_index()
    two_sided = np.array([stats.binomtest(int(k), int(n), lv / 100).pvalue  # scipy
                          for k, n, lv in zip(tests["sum"], tests["size"], tests["level"],
                                              strict=True)])  # fmt: skip
    low = tests["sum"] / tests["size"] < tests["level"] / 100
    for detection, side in (("coverage_low", low), ("coverage_high", ~low)):
        p = np.sort(np.where(side, two_sided, 1.0))
        simes = min(1.0, np.min(p * len(p) / np.arange(1, len(p) + 1)))  # Simes (1986)
        assert rows.loc[detection, "p_value"] == pytest.approx(simes)
    # Widening factor: the level quantile of |y - centre| / half-width, numpy's type 7.
    row = rows.loc["coverage_low"]
    at = hits.loc[hits["level"] == row["level"]]
    ratio = at["actual"].abs() / at["upper"]
    assert row["ev_widening_factor"] == pytest.approx(np.quantile(ratio, row["level"] / 100))


def _caught_within(hits: pd.DataFrame, points: int, alone: bool = False) -> set[int]:
    """Series whose coverage_low is flagged at some window of every point so far, <= points.

    `alone`: each series is its own fleet (the two-level procedure with one family is BH
    within it), so many independent trials run in one vectorised pass.
    """
    caught: set[int] = set()
    for upto in range(10, points + 1, 10):
        rows = coverage_findings(hits.loc[hits["target_period"] < upto], min_points=10)
        p, series = rows["p_value"].to_numpy(), rows["series_id"].to_numpy()
        if alone:
            flagged = benjamini_hochberg_by_group(p, series, 0.05).rejected
        else:
            flagged = two_level_fdr(p, series, 0.05).flagged
        low = flagged & (rows["detection"] == "coverage_low").to_numpy()
        caught |= set(rows.loc[low, "series_id"])
    return caught


def test_80_percent_intervals_covering_60_are_caught_within_100_points() -> None:
    # The power target, one series at a time (each its own fleet): 200 simulations.
    hits = _hits({(trial, 2, 80.0): 0.6 for trial in range(200)}, 100, RNG_SEED + 100)
    caught = _caught_within(hits, 100, alone=True)
    assert len(caught) >= 190  # binomial: P(X <= 71 of 100 at 0.6) is about 0.99


def test_in_a_healthy_fleet_most_degraded_intervals_are_still_caught_and_few_false() -> None:
    # With 400 well calibrated series beside them the FDR control asks for stronger evidence.
    healthy = {(s, 2, 80.0): 0.8 for s in range(400)}
    degraded = {(s, 2, 80.0): 0.6 for s in range(400, 440)}
    caught = _caught_within(_hits(healthy | degraded, 100, RNG_SEED + 4), 100)
    assert len({s for s in caught if s >= 400}) >= 30  # three quarters of the degraded
    assert len({s for s in caught if s < 400}) <= 8  # at most 2% of the healthy


def _profiles(values: np.ndarray, column: str) -> pd.DataFrame:
    keys, time = np.indices(values.shape)
    return pd.DataFrame(
        {
            "series_id": keys.ravel(),
            "model_id": 1,
            "bucket": "1",
            "target_period": time.ravel(),
            "target_at": time.ravel(),
            "horizon": 1,
            column: values.ravel(),
        }
    )


@pytest.mark.parametrize("level", [0.05, 0.01])
def test_bias_test_keeps_its_size_on_unbiased_errors(level: float) -> None:
    # Under iid N(0, 1) errors the plain t test is exact (Student), so the larger of it and the
    # HAC p-value rejects at most about `level` of the time (simulation, 4000 keys).
    rng = np.random.default_rng(RNG_SEED + 5)
    errors = rng.standard_normal((4000, 14))
    baselines = pd.DataFrame({"series_id": np.arange(4000), "model_id": 1, "bucket": "1",
                              "error_sd": 1.0})  # fmt: skip
    rows = bias_findings(_profiles(errors, "error"), baselines, 10, 0.5, 5.0, 4.0)
    rate = (rows["p_value"] < level).mean()
    upper = stats.binom.ppf(0.999, 4000, level) / 4000  # scipy: a generous Monte Carlo bound
    assert rate <= upper


def test_benchmark_finding_skill_equals_sklearn_mae_ratio_and_flags_a_worse_model() -> None:
    rng = np.random.default_rng(RNG_SEED + 6)
    model = np.abs(rng.normal(0, 3.0, (2, 28)))
    model[1] = np.abs(rng.normal(0, 1.0, 28))
    benchmark = np.abs(rng.normal(0, 1.0, (2, 28)))
    matched = _profiles(model, "abs_error").assign(benchmark_abs_error=benchmark.ravel())
    skill = pd.DataFrame({"series_id": [0, 1], "model_id": 1, "bucket": "1"})
    rows = benchmark_findings(matched, skill, 10, "benchmark:seasonal-naive")
    zeros = np.zeros(28)
    for row in range(2):
        expected = 1 - mean_absolute_error(zeros, model[row]) / mean_absolute_error(
            zeros, benchmark[row]
        )  # scikit-learn
        assert rows["ev_skill_mae"].iloc[row] == pytest.approx(expected)
    assert rows["p_value"].iloc[0] < 0.001 < rows["p_value"].iloc[1]
    # The suggested fix states the same ratio in words (scikit-learn MAE against the benchmark's).
    worse = -100 * (
        1 - mean_absolute_error(zeros, model[0]) / mean_absolute_error(zeros, benchmark[0])
    )
    assert (
        rows["ev_suggested_fix"]
        .iloc[0]
        .startswith(
            f"MAE is {worse:.0f}% higher than benchmark:seasonal-naive's on the same targets"
        )
    )


def test_interval_skill_is_missing_not_infinite_where_the_benchmark_scored_zero() -> None:
    """Interval-score skill 1 - IS / IS_benchmark (the generic skill score) has no value where
    the benchmark's interval score is 0: NaN, which the evidence shows as null, never inf."""
    on = {"series_id": [1, 1], "issued_at": [0, 0], "target_at": [10, 20], "level": [80.0] * 2}
    key = {"model_id": [7, 7], "bucket": ["1", "1"]}
    hits = pd.DataFrame({**on, **key, "interval_score": [2.0, 4.0]})
    benchmark_hits = pd.DataFrame({**on, "interval_score": [0.0, 0.0]})
    pairs = pd.DataFrame(
        {**on, **key, "target_period": [1, 2], "abs_error": [1.0, 1.0], "horizon": [1, 1]}
    ).drop(columns="level")
    benchmark = pairs[["series_id", "issued_at", "target_at", "abs_error"]]
    data = WindowData(pairs, hits, benchmark, benchmark_hits)
    _matched, skill = _benchmark_inputs(data)
    assert np.isnan(skill["skill_interval_score_80"].iloc[0])
