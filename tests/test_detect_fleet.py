"""False-discovery control checked against Benjamini-Hochberg (1995) and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from aftercast.detect.fleet import benjamini_hochberg, bonferroni

# Benjamini and Hochberg (1995), JRSS B 57(1), worked example (values from memory, agree with
# statsmodels).
PAPER_PVALUES = [
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
    0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000,
]  # fmt: skip


def test_benjamini_hochberg_paper_example() -> None:
    # Same source: at q = 0.05 the step-up procedure rejects 4 hypotheses, Bonferroni 3.
    assert benjamini_hochberg(PAPER_PVALUES, 0.05).rejected.sum() == 4
    assert benjamini_hochberg(PAPER_PVALUES, 0.05).rejected[:4].all()
    assert bonferroni(PAPER_PVALUES, 0.05).rejected.sum() == 3


@pytest.mark.parametrize("rate", [0.01, 0.05, 0.2])
def test_benjamini_hochberg_equals_statsmodels_ignoring_nan(rate: float) -> None:
    # Reference: statsmodels multipletests(method="fdr_bh") on the p-values that are not NaN.
    rng = np.random.default_rng(int(rate * 100))
    pvalues = np.concatenate([rng.uniform(size=400), rng.uniform(0, 0.002, size=60)])
    pvalues[rng.choice(pvalues.size, 40, replace=False)] = np.nan
    pvalues[:3] = [0.0, 1.0, pvalues[10]]  # boundaries and a tie
    grid = pvalues.reshape(20, 23)  # any shape is one family
    result = benjamini_hochberg(grid, rate)
    known = ~np.isnan(pvalues)
    reject, adjusted, _, _ = multipletests(pvalues[known], alpha=rate, method="fdr_bh")
    assert result.rejected.shape == grid.shape
    np.testing.assert_array_equal(result.rejected.ravel()[known], reject)
    np.testing.assert_allclose(result.adjusted.ravel()[known], adjusted, rtol=1e-12)
    assert not result.rejected.ravel()[~known].any()
    assert np.isnan(result.adjusted.ravel()[~known]).all()
    assert 0 < reject.sum() < known.sum()


def test_bonferroni_equals_statsmodels_ignoring_nan() -> None:
    # Reference: statsmodels multipletests(method="bonferroni").
    rng = np.random.default_rng(9)
    pvalues = rng.uniform(0, 0.001, size=200) ** rng.uniform(0.2, 1.0, size=200)
    pvalues[::17] = np.nan
    known = ~np.isnan(pvalues)
    reject, adjusted, _, _ = multipletests(pvalues[known], alpha=0.05, method="bonferroni")
    result = bonferroni(pvalues)
    np.testing.assert_array_equal(result.rejected[known], reject)
    np.testing.assert_allclose(result.adjusted[known], adjusted, rtol=1e-12)
    assert 0 < reject.sum() < known.sum()


def test_invalid_pvalues_and_empty_fleets() -> None:
    with pytest.raises(ValueError, match="0, 1"):
        benjamini_hochberg([0.5, 1.5])
    assert benjamini_hochberg([np.nan, np.nan]).rejected.tolist() == [False, False]
    assert bonferroni([]).adjusted.size == 0
