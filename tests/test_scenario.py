"""Tests of the invented bakery scenario, its files, and the plain-pandas benchmark baseline.

Calibration and degradation are checked with binomial tolerances from scipy.stats: within one
(model, horizon) slice every pair has its own actual noise and its own forecast draw, so the
interval hits are independent Bernoulli trials. The baseline's measures are checked against
scikit-learn. Column names come from the CONTRACT section of the design.
"""

from __future__ import annotations

import importlib.util
import json
import re
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path
from types import ModuleType

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.metrics import (
    mean_absolute_error,
    mean_absolute_percentage_error,
    mean_pinball_loss,
    mean_squared_error,
)

from aftercast.scenario import (
    DEGRADATION_KINDS,
    ScenarioSpec,
    generate,
    pick_degraded,
    series_ids,
    write,
)

ROOT = Path(__file__).resolve().parents[1]
SMALL = ScenarioSpec(n_series=12, days=20, horizons=5)
# CONTRACT: input columns (design.md); horizon is the optional explicit column.
FORECAST_COLUMNS = ["series_id", "model", "issued_at", "target_at", "horizon", "point"]
FORECAST_COLUMNS += ["lower_80", "upper_80", "lower_95", "upper_95", "q_10", "q_50", "q_90"]
ACTUAL_COLUMNS = ["series_id", "observed_at", "value"]
# Bonferroni-corrected family-wise error rate of each binomial check.
FAMILY_ALPHA = 1e-3


def load_bench(name: str) -> ModuleType:
    spec = importlib.util.spec_from_file_location(name, ROOT / "bench" / f"{name}.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def pairs_of(forecasts: pd.DataFrame, actuals: pd.DataFrame) -> pd.DataFrame:
    observed = actuals.rename(columns={"observed_at": "target_at"})
    return forecasts.merge(observed, on=["series_id", "target_at"], how="inner")


def outcome_shares(pairs: pd.DataFrame) -> pd.DataFrame:
    """Hits per (model, horizon): interval coverage, and y <= q for each quantile."""
    y = pairs["value"]
    hits = pd.DataFrame(
        {
            "80": (pairs["lower_80"] <= y) & (y <= pairs["upper_80"]),
            "95": (pairs["lower_95"] <= y) & (y <= pairs["upper_95"]),
            "q_10": y <= pairs["q_10"],
            "q_50": y <= pairs["q_50"],
            "q_90": y <= pairs["q_90"],
        }
    )
    keys = [pairs["model"], pairs["horizon"]]
    return hits.groupby(keys).agg(["sum", "count"])


def outside_binomial(k: pd.Series, n: pd.Series, p: float, tests: int) -> pd.Series:
    """True where k successes in n is outside the central binomial interval (scipy.stats.binom)."""
    low, high = stats.binom.interval(1 - FAMILY_ALPHA / tests, n.to_numpy(), p)
    return (k < low) | (k > high)


def miscalibrated(pairs: pd.DataFrame) -> list[str]:
    shares = outcome_shares(pairs)
    nominal = {"80": 0.80, "95": 0.95, "q_10": 0.10, "q_50": 0.50, "q_90": 0.90}
    tests = len(shares) * len(nominal)
    failed = []
    for name, p in nominal.items():
        k, n = shares[(name, "sum")], shares[(name, "count")]
        bad = outside_binomial(k, n, p, tests)
        failed += [f"{name} {key}: {k[key]}/{n[key]} vs {p}" for key in k.index[bad]]
    return failed


def test_frames_have_exactly_the_contract_columns_and_shape() -> None:
    scenario = generate(SMALL)
    assert list(scenario.forecasts.columns) == FORECAST_COLUMNS
    assert list(scenario.actuals.columns) == ACTUAL_COLUMNS
    n, days, models, horizons = 12, 20, 2, 5
    assert len(scenario.forecasts) == n * days * models * horizons
    assert len(scenario.actuals) == n * days
    assert set(scenario.forecasts["model"]) == {"shop-planner", "quick-trend"}
    series = scenario.series
    assert series["series_id"].is_unique and len(series) == n
    assert series["series_id"].str.fullmatch(r"shop-\d{3}/[a-z]+").all()
    assert set(series["label_team"]) == {"planning", "logistics"}
    assert set(series["label_region"]) <= {"north", "south", "coast"}
    assert (series["season"] == 7).all() and (series["frequency"] == "D").all()
    issued = scenario.forecasts["issued_at"]
    assert str(issued.dt.tz) == "UTC" and (issued.dt.hour == 6).all()


def test_same_seed_same_frames_other_seed_other_values() -> None:
    first, again = generate(SMALL), generate(SMALL)
    for name in ("series", "forecasts", "actuals"):
        pd.testing.assert_frame_equal(getattr(first, name), getattr(again, name))
    other = generate(ScenarioSpec(n_series=12, days=20, horizons=5, seed=8))
    assert not np.allclose(first.actuals["value"], other.actuals["value"])


def test_healthy_intervals_and_quantiles_are_calibrated() -> None:
    scenario = generate(ScenarioSpec(n_series=150, days=70, horizons=7))
    failed = miscalibrated(pairs_of(scenario.forecasts, scenario.actuals))
    assert not failed, failed


def test_calibration_check_catches_intervals_ten_percent_too_narrow() -> None:
    # The tolerance must be tight enough to see a modest miscalibration, or the test above
    # could not fail: shrink every band by 10% around its point.
    scenario = generate(ScenarioSpec(n_series=150, days=70, horizons=7))
    narrow = scenario.forecasts.copy()
    for column in ("lower_80", "upper_80", "lower_95", "upper_95", "q_10", "q_90"):
        narrow[column] = narrow["point"] + 0.9 * (narrow[column] - narrow["point"])
    failed = miscalibrated(pairs_of(narrow, scenario.actuals))
    assert any(line.startswith("80 ") for line in failed)


def test_coverage_collapse_keeps_width_and_drops_80_coverage_to_55() -> None:
    ids = series_ids(60)
    healthy_spec = ScenarioSpec(n_series=60, days=45, horizons=5)
    spec = ScenarioSpec(
        n_series=60, days=45, horizons=5, degraded={i: ("coverage_collapse", 15) for i in ids}
    )
    healthy, collapsed = generate(healthy_spec), generate(spec)
    width = collapsed.forecasts["upper_80"] - collapsed.forecasts["lower_80"]
    healthy_width = healthy.forecasts["upper_80"] - healthy.forecasts["lower_80"]
    np.testing.assert_allclose(width, healthy_width, atol=0.011)  # rounding to 0.01 only

    pairs = pairs_of(collapsed.forecasts, collapsed.actuals)
    after = pairs[pairs["target_at"] >= pd.Timestamp("2026-06-16", tz="UTC")]
    before = pairs[pairs["target_at"] < pd.Timestamp("2026-06-16", tz="UTC")]
    assert not miscalibrated(before)
    # Error growth k for which a band of half-width z_0.9 covers 55%: z_0.9 / k = z_0.775
    # (standard normal quantiles from scipy.stats.norm); the 95% band then covers 2 Phi(z/k) - 1.
    k = stats.norm.ppf(0.9) / stats.norm.ppf(0.775)
    expected_95 = 2 * stats.norm.cdf(stats.norm.ppf(0.975) / k) - 1
    shares = outcome_shares(after)
    for level, p in (("80", 0.55), ("95", expected_95)):
        bad = outside_binomial(shares[(level, "sum")], shares[(level, "count")], p, 2 * 20)
        assert not bad.any(), shares[level][bad]


def test_level_shift_moves_actuals_by_a_multiple_of_the_noise_and_not_the_forecasts() -> None:
    ids = series_ids(30)
    healthy = generate(ScenarioSpec(n_series=30, days=40, horizons=3))
    shifted = generate(
        ScenarioSpec(
            n_series=30, days=40, horizons=3, degraded={i: ("level_shift", 20) for i in ids}
        )
    )
    pd.testing.assert_frame_equal(healthy.forecasts, shifted.forecasts)
    jump = shifted.actuals["value"] - healthy.actuals["value"]
    after = shifted.actuals["observed_at"] >= pd.Timestamp("2026-06-21", tz="UTC")
    assert np.allclose(jump[~after], 0.0)
    per_series = jump[after].groupby(shifted.actuals["series_id"][after])
    assert (per_series.min() > 0).all()
    assert (per_series.max() - per_series.min() <= 0.011).all()  # one jump per series

    pairs = pairs_of(healthy.forecasts, healthy.actuals)
    one_day = pairs[(pairs["model"] == "shop-planner") & (pairs["horizon"] == 1)]
    error_sd = (one_day["value"] - one_day["point"]).groupby(one_day["series_id"]).std()
    # A sample sd from about 39 pairs is within roughly 1/sqrt(2n) = 11% (common practice);
    # the median over 30 series of jump / sd should sit near the 3 sigma the scenario promises.
    assert 2.5 <= float((per_series.mean() / error_sd).median()) <= 3.5
    after_pairs = pairs_of(shifted.forecasts, shifted.actuals)
    late = after_pairs[after_pairs["target_at"] >= pd.Timestamp("2026-06-21", tz="UTC")]
    late_hits = ((late["lower_80"] <= late["value"]) & (late["value"] <= late["upper_80"])).sum()
    assert stats.binomtest(int(late_hits), len(late), 0.8, alternative="less").pvalue < 1e-9


def test_stall_stops_forecasts_but_not_actuals() -> None:
    stalled = ["shop-001/white", "shop-002/rye"]
    healthy = generate(SMALL)
    spec = ScenarioSpec(
        n_series=12, days=20, horizons=5, degraded={i: ("stall", 10) for i in stalled}
    )
    scenario = generate(spec)
    pd.testing.assert_frame_equal(healthy.actuals, scenario.actuals)
    forecasts = scenario.forecasts
    last_issue = forecasts.groupby("series_id")["issued_at"].max().dt.day
    assert (last_issue[stalled] == 10).all()  # day index 9 is 2026-06-10
    assert (last_issue.drop(stalled) == 20).all()
    assert len(forecasts) == len(healthy.forecasts) - 2 * 10 * 2 * 5


@settings(max_examples=25, deadline=None)
@given(
    n_series=st.integers(1, 14),
    days=st.integers(1, 12),
    horizons=st.integers(1, 6),
    two_models=st.booleans(),
    degraded=st.integers(0, 5),
    from_day=st.integers(0, 14),
    seed=st.integers(0, 2**31),
)
def test_contract_invariants_hold_for_any_spec(
    n_series: int,
    days: int,
    horizons: int,
    two_models: bool,
    degraded: int,
    from_day: int,
    seed: int,
) -> None:
    chosen = pick_degraded(n_series, min(degraded, n_series), DEGRADATION_KINDS, from_day, seed)
    models = ("shop-planner", "quick-trend") if two_models else ("shop-planner",)
    spec = ScenarioSpec(n_series, days, horizons, models=models, degraded=chosen, seed=seed)
    scenario = generate(spec)
    f = scenario.forecasts
    values = f.select_dtypes("number").to_numpy()
    assert np.isfinite(values).all() and (scenario.actuals["value"] >= 0).all()
    # CONTRACT: lower <= point <= upper; target after the issue period; horizon agrees.
    for level in ("80", "95"):
        assert (f[f"lower_{level}"] <= f["point"]).all() and (
            f["point"] <= f[f"upper_{level}"]
        ).all()
    assert ((f["lower_95"] <= f["lower_80"]) & (f["upper_80"] <= f["upper_95"])).all()
    assert ((f["q_10"] <= f["q_50"]) & (f["q_50"] <= f["q_90"])).all()
    periods = (f["target_at"].dt.floor("D") - f["issued_at"].dt.floor("D")).dt.days
    assert (periods == f["horizon"]).all() and (f["horizon"] >= 1).all()
    assert scenario.actuals["observed_at"].max() < pd.Timestamp(
        spec.start, tz="UTC"
    ) + pd.Timedelta(days=days)
    assert not f.duplicated(["series_id", "model", "issued_at", "target_at"]).any()


def test_pick_degraded_is_deterministic_and_spreads_kinds() -> None:
    chosen = pick_degraded(40, 9, DEGRADATION_KINDS, 30, seed=3)
    assert chosen == pick_degraded(40, 9, DEGRADATION_KINDS, 30, seed=3)
    assert set(chosen) <= set(series_ids(40)) and len(chosen) == 9
    kinds = pd.Series([kind for kind, _ in chosen.values()]).value_counts()
    assert kinds.to_dict() == {kind: 3 for kind in DEGRADATION_KINDS}
    assert {day for _, day in chosen.values()} == {30}
    with pytest.raises(ValueError, match="count"):
        pick_degraded(4, 5, DEGRADATION_KINDS, 1, seed=0)


def test_bad_specs_are_refused_naming_the_problem() -> None:
    with pytest.raises(ValueError, match="shop-999/rye"):
        generate(ScenarioSpec(n_series=3, degraded={"shop-999/rye": ("stall", 2)}))
    with pytest.raises(ValueError, match="melt"):
        generate(ScenarioSpec(n_series=3, degraded={"shop-001/rye": ("melt", 2)}))


def read_back(path: Path) -> pd.DataFrame:
    if path.suffix == ".parquet":
        return pd.read_parquet(path)
    if path.suffix == ".jsonl":
        return pd.read_json(path, lines=True, dtype=False, convert_dates=False)
    return pd.read_csv(path)


@pytest.mark.parametrize("fmt", ["csv", "parquet", "jsonl"])
def test_written_files_round_trip_with_iso_8601_utc_times(tmp_path: Path, fmt: str) -> None:
    scenario = generate(SMALL)
    files = write(scenario, tmp_path, fmt)
    assert files.series == tmp_path / f"series.{fmt}"
    assert files.forecasts == (tmp_path / f"forecasts.{fmt}",)
    forecasts = read_back(files.forecasts[0])
    for column in ("issued_at", "target_at"):
        if fmt != "parquet":
            # Python's own ISO 8601 reader must see an explicit zero offset on every value.
            offsets = {datetime.fromisoformat(text).utcoffset() for text in forecasts[column]}
            assert offsets == {timedelta(0)}
        forecasts[column] = pd.to_datetime(forecasts[column], utc=True, format="ISO8601")
    pd.testing.assert_frame_equal(forecasts, scenario.forecasts, check_dtype=False)
    actuals = read_back(files.actuals[0])
    assert list(actuals.columns) == ACTUAL_COLUMNS and len(actuals) == len(scenario.actuals)
    assert list(read_back(files.series).columns) == list(scenario.series.columns)


def test_split_by_day_writes_one_file_per_issue_and_observation_date(tmp_path: Path) -> None:
    scenario = generate(SMALL)
    files = write(scenario, tmp_path, "csv", split_by_day=True)
    assert [p.name for p in files.forecasts[:2]] == ["2026-06-01.csv", "2026-06-02.csv"]
    assert len(files.forecasts) == 20 and len(files.actuals) == 20
    for path in files.forecasts:
        issued = pd.read_csv(path)["issued_at"].str[:10]
        assert set(issued) == {path.stem}
    together = pd.concat([pd.read_csv(p) for p in files.actuals], ignore_index=True)
    assert len(together) == len(scenario.actuals)
    assert np.allclose(together["value"], scenario.actuals["value"])


def test_baseline_measures_agree_with_scikit_learn(tmp_path: Path) -> None:
    baseline = load_bench("pandas_baseline")
    files = write(generate(SMALL), tmp_path, "csv")
    forecasts = baseline.read_table(files.forecasts[0], "forecasts")
    actuals = baseline.read_table(files.actuals[0], "actuals")
    scored = baseline.score_pairs(baseline.match_pairs(forecasts, actuals))
    y, f = scored["value"], scored["point"]
    assert len(scored) == len(pairs_of(forecasts, actuals)) > 0
    assert scored["abs_error"].mean() == pytest.approx(mean_absolute_error(y, f))
    assert scored["squared_error"].mean() == pytest.approx(mean_squared_error(y, f))
    # scikit-learn returns MAPE as a fraction; the baseline reports percent.
    assert scored["ape"].mean() == pytest.approx(100 * mean_absolute_percentage_error(y, f))
    for level in (80, 95):
        alpha = 1 - level / 100
        # Gneiting and Raftery (2007): the interval score is 2/alpha times the sum of the
        # quantile (pinball) losses of its ends at alpha/2 and 1 - alpha/2.
        lower = mean_pinball_loss(y, scored[f"lower_{level}"], alpha=alpha / 2)
        upper = mean_pinball_loss(y, scored[f"upper_{level}"], alpha=1 - alpha / 2)
        expected = 2 / alpha * (lower + upper)
        assert scored[f"interval_score_{level}"].mean() == pytest.approx(expected)


def test_baseline_percentage_errors_on_the_textbook_example() -> None:
    baseline = load_bench("pandas_baseline")
    pairs = pd.DataFrame(
        {
            "value": [100.0, 150.0, 0.0],
            "point": [150.0, 100.0, 0.0],
            "lower_80": [140.0, 90.0, -1.0],
        }
    ).assign(upper_80=[160.0, 120.0, 1.0])
    scored = baseline.score_pairs(pairs)
    # Common practice: 150 against 100 is 50%, 100 against 150 is 33%; MAPE skips y == 0.
    np.testing.assert_allclose(scored["ape"], [50.0, 100 / 3, np.nan])
    # M4 Competitor's Guide: sAPE = 200 |y - f| / (|y| + |f|), undefined when both are zero.
    np.testing.assert_allclose(scored["sape"], [40.0, 40.0, np.nan])
    assert scored["hit_80"].tolist() == [False, False, True]


def test_baseline_script_prints_one_json_line(tmp_path: Path) -> None:
    files = write(generate(SMALL), tmp_path, "parquet")
    command = [sys.executable, str(ROOT / "bench" / "pandas_baseline.py")]
    done = subprocess.run(
        [*command, "--forecasts", str(files.forecasts[0]), "--actuals", str(files.actuals[0])],
        capture_output=True,
        text=True,
        check=True,
        timeout=120,
    )
    (line,) = done.stdout.splitlines()
    report = json.loads(line)
    # Targets d + h with d + h < 20 days of actuals: per series and model sum_h (20 - h).
    assert report["pairs"] == 12 * 2 * sum(20 - h for h in range(1, 6))
    assert report["levels"] == ["80", "95"] and report["peak_rss_mb"] > 0
    missing = subprocess.run(
        [*command, "--data", str(tmp_path / "nowhere")], capture_output=True, text=True, timeout=120
    )
    assert missing.returncode != 0 and re.search(r"cannot read .*nowhere", missing.stderr)


def test_make_data_writes_csv_and_parquet_with_the_same_rows(tmp_path: Path) -> None:
    make_data = load_bench("make_data")
    argv = [str(tmp_path), "--series", "12", "--days", "10", "--horizons", "3", "--degraded", "2"]
    assert make_data.main(argv) == 0
    from_csv = pd.read_csv(tmp_path / "csv" / "forecasts.csv")
    from_parquet = pd.read_parquet(tmp_path / "parquet" / "forecasts.parquet")
    assert len(from_csv) == len(from_parquet) == 12 * 10 * 3
    np.testing.assert_allclose(from_csv["upper_95"], from_parquet["upper_95"])
