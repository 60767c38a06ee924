"""Coverage tests checked against scipy, statsmodels, the Basel 1996 table and chi-square tables."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from aftercast.detect.coverage import (
    binomial_coverage_pvalue,
    christoffersen_conditional_coverage,
    christoffersen_independence,
    kupiec_pof,
    traffic_light_zone,
    widening_factor,
    widening_factor_by_group,
)
from aftercast.detect.coverage_checks import coverage_fix


def test_binomial_pvalue_equals_scipy_binomtest_on_random_cases() -> None:
    # Reference: scipy.stats.binomtest(k, n, p, alternative="two-sided").pvalue.
    rng = np.random.default_rng(20240601)
    n = rng.integers(1, 1500, size=1500)
    level = rng.choice([0.5, 0.8, 0.9, 0.95, 0.99, 0.123], size=n.size)
    spread = 3 * np.sqrt(n * level * (1 - level)) + 1
    hits = np.clip(np.round(rng.normal(n * level, spread)), 0, n).astype(int)
    hits[::7] = rng.integers(0, n[::7] + 1)  # some far in the tails
    expected = [
        stats.binomtest(int(k), int(m), float(p)).pvalue
        for k, m, p in zip(hits, n, level, strict=True)
    ]
    np.testing.assert_allclose(
        binomial_coverage_pvalue(hits, n, level), expected, rtol=1e-12, atol=1e-300
    )


def test_binomial_pvalue_equals_scipy_for_every_count_of_small_samples() -> None:
    # Reference: scipy.stats.binomtest, exhaustively over k = 0..n for n < 30.
    n = np.concatenate([np.full(m + 1, m) for m in range(1, 30)])
    hits = np.concatenate([np.arange(m + 1) for m in range(1, 30)])
    for level in (0.5, 0.8, 0.95):
        expected = [
            stats.binomtest(int(k), int(m), level).pvalue for k, m in zip(hits, n, strict=True)
        ]
        np.testing.assert_allclose(binomial_coverage_pvalue(hits, n, level), expected, rtol=1e-12)


def test_binomial_pvalue_without_data_is_nan_and_percent_level_is_refused() -> None:
    assert np.isnan(binomial_coverage_pvalue([0, np.nan], [0, 10], 0.8)).all()
    with pytest.raises(ValueError, match="fraction"):
        binomial_coverage_pvalue(8, 10, 80)
    with pytest.raises(ValueError, match="whole"):
        binomial_coverage_pvalue(8.5, 10, 0.8)


def test_binomial_power_against_intervals_that_cover_sixty_percent() -> None:
    # Requirement (common practice power target): 80% intervals that really cover 60% are caught
    # at 5% within 100 points in at least 90% of runs.
    rng = np.random.default_rng(7)
    hits = (rng.random((2000, 100)) < 0.6).sum(axis=1)
    assert (binomial_coverage_pvalue(hits, 100, 0.8) < 0.05).mean() >= 0.9


def test_traffic_light_matches_basel_1996_table_1() -> None:
    # Basel Committee on Banking Supervision (1996), Table 1: 250 days at 99% coverage.
    table_percent = [8.11, 28.58, 54.32, 75.81, 89.22, 95.88, 98.63, 99.60, 99.89, 99.97, 99.99]
    result = traffic_light_zone(np.arange(11), 250, 0.99)
    np.testing.assert_array_equal(np.round(result.cumulative_probability * 100, 2), table_percent)
    # Same table: green 0-4 exceptions, yellow 5-9, red 10 or more.
    expected = ["green"] * 5 + ["yellow"] * 5 + ["red"]
    assert result.zone.tolist() == expected
    assert traffic_light_zone(25, 250, 0.99).zone.item() == "red"
    assert traffic_light_zone(0, 0, 0.99).zone.item() == "none"


def _kupiec_by_hand(x: int, n: int, p: float) -> float:
    # Kupiec (1995), J. Derivatives 3(2), the LR_pof formula written out term by term.
    phat = x / n
    restricted = (n - x) * math.log(1 - p) + (x * math.log(p) if x else 0.0)
    unrestricted = (n - x) * math.log(1 - phat) + (x * math.log(phat) if x else 0.0)
    return -2 * restricted + 2 * unrestricted


@pytest.mark.parametrize(("misses", "n", "level"), [(7, 250, 0.99), (0, 250, 0.99), (31, 100, 0.8)])
def test_kupiec_agrees_with_hand_formula_and_scipy_likelihoods(
    misses: int, n: int, level: float
) -> None:
    result = kupiec_pof(misses, n, level)
    assert float(result.statistic) == pytest.approx(
        _kupiec_by_hand(misses, n, 1 - level), rel=1e-12
    )
    # Same LR from scipy.stats.binom.logpmf: 2 [l(p^) - l(p)].
    by_scipy = 2 * (
        stats.binom.logpmf(misses, n, misses / n) - stats.binom.logpmf(misses, n, 1 - level)
    )
    assert float(result.statistic) == pytest.approx(by_scipy, rel=1e-9, abs=1e-12)


def test_likelihood_ratio_pvalues_cross_five_percent_at_the_chi_square_critical_values() -> None:
    # Chi-square table: 5% critical values 3.841 (1 df) for LR_pof, 5.991 (2 df) for LR_cc.
    rng = np.random.default_rng(11)
    n = rng.integers(20, 400, size=3000)
    misses = rng.binomial(n, rng.uniform(0.02, 0.4, size=n.size))
    pof = kupiec_pof(misses, n, 0.9)
    clear = np.abs(pof.statistic - 3.841) > 1e-3
    np.testing.assert_array_equal((pof.pvalue < 0.05)[clear], (pof.statistic > 3.841)[clear])
    hits = (rng.random((3000, 120)) > rng.uniform(0.02, 0.4, size=(3000, 1))).astype(float)
    cc = christoffersen_conditional_coverage(hits, 0.9)
    clear = np.abs(cc.statistic - 5.991) > 1e-3
    np.testing.assert_array_equal((cc.pvalue < 0.05)[clear], (cc.statistic > 5.991)[clear])
    assert (cc.statistic > 5.991).any() and (cc.statistic < 5.991).any()


def test_christoffersen_independence_equals_logit_likelihood_ratio() -> None:
    # Reference: statsmodels Logit of the miss indicator on its previous value; its llr is the
    # LR of the first-order Markov chain against independence (Christoffersen, 1998).
    rng = np.random.default_rng(3)
    hits = np.empty((20, 150))
    for row in range(hits.shape[0]):
        stay_missed = rng.uniform(0.1, 0.6)
        state = 1
        for t in range(hits.shape[1]):
            state = int(rng.random() < (1 - stay_missed if state == 0 else 0.85))
            hits[row, t] = state
    result = christoffersen_independence(hits)
    compared = 0
    for row in range(hits.shape[0]):
        miss = 1 - hits[row]
        if not (miss[1:] * miss[:-1]).any():
            continue  # no miss follows a miss: Logit has no finite maximum (separation)
        fit = sm.Logit(miss[1:], sm.add_constant(miss[:-1])).fit(disp=0, method="newton")
        # Tolerances are the optimiser's: Logit finds its maximum numerically, we in closed form.
        assert result.statistic[row] == pytest.approx(fit.llr, rel=1e-6, abs=1e-6)
        assert result.pvalue[row] == pytest.approx(fit.llr_pvalue, rel=1e-5, abs=1e-6)
        compared += 1
    assert compared >= 15


def test_christoffersen_handles_zero_transition_counts_and_gaps() -> None:
    no_misses = christoffersen_independence(np.ones(50))
    assert float(no_misses.statistic) == 0.0 and float(no_misses.pvalue) == 1.0
    # Isolated misses only (n11 = 0): the 0 ln 0 = 0 convention of Christoffersen (1998).
    hits = np.ones(40)
    hits[[5, 15, 25, 35]] = 0
    n00, n01, n10 = 31.0, 4.0, 4.0  # 39 transitions, each miss entered and left once
    pooled = (n01 + 0) / (n00 + n01 + n10)
    by_hand = 2 * (
        n00 * math.log(n00 / (n00 + n01))
        + n01 * math.log(n01 / (n00 + n01))
        - (n00 + n10) * math.log(1 - pooled)
        - n01 * math.log(pooled)
    )
    assert float(christoffersen_independence(hits).statistic) == pytest.approx(by_hand, rel=1e-12)
    # NaN is "no observation": the observed values count as consecutive.
    gappy = np.insert(hits, [3, 10, 10, 30], np.nan)
    padded = np.vstack([gappy, np.concatenate([hits, np.full(4, np.nan)])])
    np.testing.assert_allclose(
        christoffersen_independence(padded).statistic,
        christoffersen_independence(hits).statistic,
    )
    assert np.isnan(christoffersen_independence([1.0, np.nan]).statistic)


def test_widening_factor_equals_numpy_quantile_per_row() -> None:
    # Reference: numpy.quantile, method="linear" (Hyndman and Fan type 7).
    rng = np.random.default_rng(5)
    error = np.abs(rng.standard_normal((30, 60)))
    width = rng.uniform(0.5, 2.0, size=(30, 60))
    error[rng.random(error.shape) < 0.2] = np.nan
    levels = rng.choice([0.8, 0.95], size=30)
    factor = widening_factor(error, width, levels)
    for row in range(30):
        ratio = error[row] / width[row]
        expected = np.quantile(ratio[~np.isnan(ratio)], levels[row])
        assert factor[row] == pytest.approx(expected, rel=1e-12)
    codes = np.repeat(np.arange(30), 60)
    grouped = widening_factor_by_group(error.ravel(), width.ravel(), levels, codes)
    np.testing.assert_allclose(grouped, factor, rtol=1e-12)


def test_widening_factor_recovers_an_understated_spread() -> None:
    # Standard normal table: an 80% central interval is +/- 1.2816 sigma. Intervals built for
    # sigma = 1 around outcomes with sigma = 2 must grow by a factor of 2.
    rng = np.random.default_rng(9)
    outcome = 2.0 * rng.standard_normal((2, 20000))
    factor = widening_factor(np.abs(outcome), 1.2816, 0.8)
    # Sampling sd of the factor is about 0.013 (asymptotic quantile variance p(1 - p) / (n f(q)^2)
    # with f the half-normal density); allow about four of them.
    np.testing.assert_allclose(factor, 2.0, atol=0.05)
    assert widening_factor_by_group([1.0], [0.0], 0.8, [1]).tolist()[1] == math.inf
    assert np.isnan(widening_factor_by_group([1.0], [1.0], 0.8, [1], n_groups=3)[[0, 2]]).all()


def test_the_suggested_fix_never_quotes_a_factor_of_zero_or_nan() -> None:
    """Outcomes that sit on the intervals' centre give an empirical factor of 0 (the level
    quantile of |y - centre| / half-width): "narrow by a factor of 0.00" would read as a fault,
    and a missing factor (zero-width intervals) as "nan"; both get words of their own."""
    texts = coverage_fix(pd.Series([80.0, 95.0, 80.0, 80.0]), pd.Series([1.5, 0.8, 0.001, np.nan]))
    assert texts[0].startswith("widen the 80% intervals' half-width by a factor of 1.50")
    assert texts[1].startswith("narrow the 95% intervals' half-width by a factor of 0.80")
    assert "0.00" not in texts[2] and "fell on the 80% intervals' centre" in texts[2]
    assert "nan" not in texts[3] and "no width" in texts[3]
