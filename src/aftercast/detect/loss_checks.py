"""Accuracy and bias findings per (series, model, horizon bucket), from per-target profiles.

Pure, vectorised over every key (2-D keys x time arrays, NaN-padded). A bucket contributes one
observation per target (the mean over its horizons, see `profiles`), and the remaining serial
dependence of h-step errors is left to the tests' long-run variances:

- `accuracy_vs_baseline`: the recent window's absolute errors against the baseline window's,
  `mean_shift_test` (Newey-West variances, one-sided: recent worse);
- `no_better_than_benchmark`: the model's absolute errors against aftercast's benchmark on the
  same targets and issue times, `diebold_mariano` with the Harvey-Leybourne-Newbold correction
  (one-sided: model worse); skill 1 - MAE / MAE_benchmark, and the same for interval scores;
- `bias`: errors standardised by the baseline's per-target error sd, two-sided tabular CUSUM
  (signal and onset), the mean standardised error tested against zero by the same
  autocorrelation-robust t statistic (`diebold_mariano` against a zero loss), and the tracking
  signal. Flagging needs both the CUSUM signal and the fleet-adjusted t test; the tracking
  signal alone is evidence only, since |TS| > 4 is exceeded by chance in most unbiased windows
  of a few dozen points.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from aftercast.detect.accuracy import diebold_mariano, mean_shift_test, skill_score
from aftercast.detect.bias import tabular_cusum, tracking_signal
from aftercast.detect.profiles import KEY, padded


def _mean_and_variance(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row (NaN is padding): mean, sample variance (ddof 1) and count; NaN below two values.

    Written out rather than ``np.nanvar``, which warns for every row of fewer than two values:
    a key with a single recent target is common and is no reason for a warning each cycle.
    """
    n = (~np.isnan(rows)).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nansum(rows, axis=1) / n
        variance = np.nansum((rows - mean[:, None]) ** 2, axis=1) / (n - 1)
    return mean, np.where(n >= 2, variance, np.nan), n


def welch_greater_pvalue(recent: np.ndarray, baseline: np.ndarray) -> np.ndarray:
    """One-sided Welch t test per row that mean(recent) > mean(baseline); NaN is padding.

    t = (m_r - m_b) / sqrt(s_r^2 / n_r + s_b^2 / n_b) with Welch-Satterthwaite degrees of
    freedom (Welch, 1947, Biometrika 34), as ``scipy.stats.ttest_ind(equal_var=False,
    alternative="greater")``. NaN where a row has fewer than two values or no variance.

    >>> welch_greater_pvalue(np.array([[2.0, 3.0, 2.5, 3.5]]), np.array([[1.0, 1.5, 1.0, 1.5]]))
    array([0.0061044])
    """
    (m_r, s_r, n_r), (m_b, s_b, n_b) = _mean_and_variance(recent), _mean_and_variance(baseline)
    with np.errstate(invalid="ignore", divide="ignore"):
        v_r, v_b = s_r / n_r, s_b / n_b
        t = (m_r - m_b) / np.sqrt(v_r + v_b)
        df = (v_r + v_b) ** 2 / (v_r**2 / (n_r - 1) + v_b**2 / (n_b - 1))
    valid = (n_r >= 2) & (n_b >= 2) & (v_r + v_b > 0)
    return np.where(valid, stats.t.sf(t, df), np.nan)


def _robust(pvalue_hac: np.ndarray, pvalue_plain: np.ndarray) -> np.ndarray:
    """The larger of the autocorrelation-robust and the plain p-value (NaN if both are).

    HAC variances of a few dozen points are often far too small (the DM and Newey-West tests'
    tails are then many times too heavy), so the variance used is never below the iid one.
    """
    return np.fmax(pvalue_hac, pvalue_plain)


def _rows(
    detection: str,
    keys: pd.DataFrame,
    n: np.ndarray,
    statistic: np.ndarray,
    pvalue: np.ndarray,
    min_points: int,
    **columns: object,
) -> pd.DataFrame:
    """The common head of every loss finding; p-values of short windows are left out."""
    head = {
        "detection": detection,
        **{k: keys[k].to_numpy() for k in KEY},
        "n": n,
        "statistic": statistic,
        "p_value": np.where(n >= min_points, pvalue, np.nan),
    }
    return pd.DataFrame({**head, **columns})


def _lag_horizon(horizon: pd.Series, n: np.ndarray) -> np.ndarray:
    """The h of the DM variance: the bucket's largest horizon, at most a third of the points."""
    cap = np.maximum(n // 3, 1)
    return np.clip(horizon.fillna(1).to_numpy(np.int64), 1, cap)


def _keys_with(profiles: pd.DataFrame, others: pd.DataFrame) -> pd.DataFrame:
    """Keys present in both frames (none when either is empty, whatever its column types)."""
    if profiles.empty or others.empty:
        return pd.DataFrame(columns=KEY)
    return profiles[KEY].drop_duplicates().merge(others[KEY].drop_duplicates(), on=KEY)


def accuracy_findings(
    profiles: pd.DataFrame, baselines: pd.DataFrame, losses: pd.DataFrame, min_points: int
) -> pd.DataFrame:
    """`accuracy_vs_baseline` rows for keys with both recent profiles and a baseline."""
    keys = _keys_with(profiles, baselines)
    if keys.empty:
        return pd.DataFrame()
    keys = keys.merge(baselines, on=KEY)
    recent = padded(profiles, keys, "abs_error")
    reference = padded(losses, keys, "abs_error")
    n = (~np.isnan(recent)).sum(axis=1)
    result = mean_shift_test(recent, reference, alternative="greater")
    pvalue = _robust(result.pvalue, welch_greater_pvalue(recent, reference))
    with np.errstate(invalid="ignore", divide="ignore"):
        recent_mae = np.nanmean(recent, axis=1)
        baseline_mae = np.nanmean(reference, axis=1)
        ratio = recent_mae / baseline_mae
    fix = (
        "MAE is " + pd.Series(ratio).map("{:.2f}".format) + " times the baseline's: check the "
        "model's inputs or retrain it; after a deliberate change, reset the baseline"
    )
    return _rows(
        "accuracy_vs_baseline",
        keys,
        n,
        result.statistic,
        pvalue,
        min_points,
        severity_critical=ratio >= 1.5,
        ev_recent_mae=recent_mae,
        ev_baseline_mae=baseline_mae,
        ev_mae_ratio=ratio,
        ev_baseline_targets=(~np.isnan(reference)).sum(axis=1),
        ev_baseline_source=keys["source"],
        ev_baseline_start=keys["window_start"],
        ev_baseline_end=keys["window_end"],
        ev_suggested_fix=fix.to_numpy(),
    )


def benchmark_findings(
    matched: pd.DataFrame, interval_skill: pd.DataFrame, min_points: int, benchmark: str
) -> pd.DataFrame:
    """`no_better_than_benchmark` rows from per-target profiles matched with the benchmark.

    `matched`: per (key, target_period) the model's `abs_error`, the benchmark's
    `benchmark_abs_error` (same targets and issue times) and `horizon`; `interval_skill`:
    per key, one `skill_interval_score_<level>` column per level.
    """
    if matched.empty:
        return pd.DataFrame()
    keys = matched.groupby(KEY, as_index=False)["horizon"].max()
    model = padded(matched, keys, "abs_error")
    reference = padded(matched, keys, "benchmark_abs_error")
    n = (~np.isnan(model)).sum(axis=1)
    result = diebold_mariano(
        model, reference, horizon=_lag_horizon(keys["horizon"], n), alternative="greater"
    )
    plain = diebold_mariano(model, reference, horizon=1, alternative="greater")
    pvalue = _robust(result.pvalue, plain.pvalue)
    with np.errstate(invalid="ignore"):
        model_mae, benchmark_mae = np.nanmean(model, axis=1), np.nanmean(reference, axis=1)
    skill = skill_score(model_mae, benchmark_mae)
    fix = mae_against_benchmark(skill, benchmark) + (
        " on the same targets: check the model against recent data, or use the benchmark meanwhile"
    )
    extra = keys[KEY].merge(interval_skill, on=KEY, how="left")
    return _rows(
        "no_better_than_benchmark",
        keys,
        n,
        result.statistic,
        pvalue,
        min_points,
        severity_critical=skill <= -0.2,
        ev_benchmark=benchmark,
        ev_model_mae=model_mae,
        ev_benchmark_mae=benchmark_mae,
        ev_skill_mae=skill,
        **{f"ev_{c}": extra[c].to_numpy() for c in extra.columns if c not in KEY},
        ev_suggested_fix=fix.to_numpy(),
    )


def mae_against_benchmark(skill: np.ndarray, benchmark: str) -> pd.Series:
    """'MAE is 12% higher than <benchmark>'s', from the MAE skill (1 - MAE / benchmark MAE):
    'lower' for a positive skill, 'the same as' where it rounds to 0 (never '-0% higher'), and
    no percentage where the skill is undefined (the benchmark's MAE is 0).

    >>> for text in mae_against_benchmark(np.array([-0.12, 0.001, 0.3, np.nan]), "naive"):
    ...     print(text)
    MAE is 12% higher than naive's
    MAE is the same as naive's
    MAE is 30% lower than naive's
    MAE is above naive's, which is 0
    """
    percent = pd.Series(np.round(-100 * np.asarray(skill, dtype=float)))
    size = percent.abs().map("{:.0f}".format)
    higher = "MAE is " + size + f"% higher than {benchmark}'s"
    lower = "MAE is " + size + f"% lower than {benchmark}'s"
    same = pd.Series(f"MAE is the same as {benchmark}'s", index=percent.index)
    texts = higher.where(percent > 0, lower.where(percent < 0, same))
    return texts.where(percent.notna(), f"MAE is above {benchmark}'s, which is 0")


def bias_findings(
    profiles: pd.DataFrame,
    baselines: pd.DataFrame,
    min_points: int,
    k: float,
    h: float,
    limit: float,
) -> pd.DataFrame:
    """`bias` rows: CUSUM on errors standardised by the baseline's error sd, and a t test."""
    keys = _keys_with(profiles, baselines)
    if keys.empty:
        return pd.DataFrame()
    keys = keys.merge(baselines[[*KEY, "error_sd"]], on=KEY)
    keys = keys.loc[keys["error_sd"] > 0].reset_index(drop=True)
    if keys.empty:
        return pd.DataFrame()
    errors = padded(profiles, keys, "error")
    times = padded(profiles, keys, "target_at")
    horizon = padded(profiles, keys, "horizon")
    z = errors / keys["error_sd"].to_numpy()[:, None]
    n = (~np.isnan(z)).sum(axis=1)
    chart = tabular_cusum(z, k=k, h=h)
    lag_horizon = _lag_horizon(pd.Series(np.nanmax(horizon, axis=1)), n)
    t_test = diebold_mariano(z, np.zeros_like(z), horizon=lag_horizon)
    pvalue = _robust(t_test.pvalue, diebold_mariano(z, np.zeros_like(z), horizon=1).pvalue)
    signal = tracking_signal(errors, limit=limit)
    onset = np.where(chart.onset >= 0, chart.onset, 0)
    onset_at = np.where(chart.onset >= 0, times[np.arange(len(keys)), onset], np.nan)
    with np.errstate(invalid="ignore"):
        mean_z = np.nanmean(z, axis=1)
    side = np.where(mean_z > 0, "under-forecasting", "over-forecasting")
    fix = (
        pd.Series(side)
        + ": the mean error is "
        + pd.Series(mean_z).map("{:+.2f}".format)
        + (
            " baseline standard deviations; correct the level (e.g. subtract the recent mean "
            "error) or retrain"
        )
    )
    return _rows(
        "bias",
        keys,
        n,
        t_test.statistic,
        pvalue,
        min_points,
        condition=chart.first_signal >= 0,
        severity_critical=np.abs(mean_z) >= 1.0,
        ev_mean_error=np.nanmean(errors, axis=1),
        ev_mean_standardised_error=mean_z,
        ev_cusum_upper=chart.upper,
        ev_cusum_lower=chart.lower,
        ev_cusum_signal=chart.first_signal >= 0,
        ev_direction=side,
        ev_onset_at=onset_at,
        ev_tracking_signal=signal.signal,
        ev_tracking_signal_outside_limit=signal.flagged,
        ev_baseline_error_sd=keys["error_sd"],
        ev_suggested_fix=fix.to_numpy(),
    )
