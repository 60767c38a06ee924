"""Invented demo scenario: Marrow Hill Bakeries, daily loaves sold per shop and product line.

Marrow Hill Bakeries is a made-up chain; nothing here describes a real business. Each series
(``shop-017/rye``) is a day-by-day count of loaves with weekly seasonality and a gentle trend.
Every model in ``ScenarioSpec.models`` issues a forecast at 06:00 UTC each day for the next
1..H days, with a point, central 80% and 95% intervals and the 10/50/90% quantiles. Healthy
forecasts are honestly calibrated: the forecast error is exactly Gaussian with the standard
deviation the intervals are built from. Chosen series can be degraded from a given day on
(``coverage_collapse``, ``level_shift``, ``stall``) so that the demo, the tests and the
benchmarks have something real to detect. Generation is vectorised over series, days, models
and horizons at once and deterministic by seed; ``write`` saves the frames as CSV, Parquet or
JSON Lines with exactly the input columns of the contract.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist

import numpy as np
import pandas as pd
import pyarrow
import pyarrow.csv

PRODUCT_LINES = ("rye", "sourdough", "white", "wholemeal", "seeded", "spelt")
TEAMS = ("planning", "logistics")
REGIONS = ("north", "south", "coast")
DEGRADATION_KINDS = ("coverage_collapse", "level_shift", "stall")
INTERVAL_LEVELS = (80, 95)
QUANTILE_LEVELS = (10, 50, 90)
FILE_FORMATS = ("csv", "parquet", "jsonl")
SEASON = 7
ISSUE_HOUR = 6
TIMEZONE = "UTC"
UNIT = "loaves"
# Monday first; the weekend rush is what makes a seasonal naive benchmark worth having.
# The mean is exactly 1 so a series' level is its average day.
WEEKLY_PROFILE = np.array([0.92, 0.90, 0.94, 0.98, 1.08, 1.22, 0.96])
# How far actuals jump under ``level_shift``, in standard deviations of the day-to-day noise.
LEVEL_SHIFT_SIGMAS = 3.0
# What the 80% interval covers under ``coverage_collapse``.
COLLAPSED_COVERAGE_80 = 0.55
# The i-th model's own error has standard deviation STEP * (i + 1) * noise * sqrt(horizon):
# the first model is the sharpest, and all of them stay better than a seasonal naive forecast.
MODEL_SPREAD_STEP = 0.1

_NORMAL = NormalDist()
# With the interval width unchanged, the 80% band covers P(|Z| < z_0.9 / k); solving for the
# stated coverage gives the factor by which the whole forecast error has to grow.
COLLAPSE_ERROR_FACTOR = _NORMAL.inv_cdf(0.9) / _NORMAL.inv_cdf((1 + COLLAPSED_COVERAGE_80) / 2)
_NEVER = np.iinfo(np.int64).max
_ISO_FORMAT = "%Y-%m-%dT%H:%M:%SZ"

FORECAST_COLUMNS = (
    "series_id",
    "model",
    "issued_at",
    "target_at",
    "horizon",
    "point",
    "lower_80",
    "upper_80",
    "lower_95",
    "upper_95",
    "q_10",
    "q_50",
    "q_90",
)
ACTUAL_COLUMNS = ("series_id", "observed_at", "value")
SERIES_COLUMNS = (
    "series_id",
    "frequency",
    "season",
    "timezone",
    "unit",
    "label_team",
    "label_region",
)


@dataclass(frozen=True)
class ScenarioSpec:
    """What to generate; ``degraded`` maps a series id to (kind, first affected day index).

    Day indices count from ``start`` (day 0). ``history_days`` adds actuals before day 0, so
    that seasonal scales and benchmarks are known from the first forecast on.
    """

    n_series: int = 40
    days: int = 120
    horizons: int = 14
    start: str = "2026-06-01"
    models: tuple[str, ...] = ("shop-planner", "quick-trend")
    degraded: dict[str, tuple[str, int]] = field(default_factory=dict)
    seed: int = 7
    history_days: int = 0


@dataclass(frozen=True)
class Scenario:
    """The generated frames; ``noise_sd`` is each series' true day-to-day noise (by series id)."""

    spec: ScenarioSpec
    series: pd.DataFrame
    forecasts: pd.DataFrame
    actuals: pd.DataFrame
    noise_sd: pd.Series


@dataclass(frozen=True)
class ScenarioFiles:
    """Where ``write`` put each table; one path each unless split by day."""

    folder: Path
    series: Path
    forecasts: tuple[Path, ...]
    actuals: tuple[Path, ...]


@dataclass(frozen=True)
class _Truth:
    mean: np.ndarray  # (series, history + days + horizons): expected loaves per day
    noise_sd: np.ndarray  # (series,)
    noise: np.ndarray  # (series, history + days): standard normal draws for the actuals


def series_ids(n_series: int) -> list[str]:
    """Series ids ``shop-NNN/<product line>``, product lines cycling within each shop."""
    n_shops = -(-n_series // len(PRODUCT_LINES))
    width = max(3, len(str(n_shops)))
    return [
        f"shop-{i // len(PRODUCT_LINES) + 1:0{width}d}/{PRODUCT_LINES[i % len(PRODUCT_LINES)]}"
        for i in range(n_series)
    ]


def pick_degraded(
    n_series: int,
    count: int,
    kinds: Sequence[str] = DEGRADATION_KINDS,
    from_day: int = 60,
    seed: int = 7,
) -> dict[str, tuple[str, int]]:
    """Choose ``count`` distinct series at random and give them ``kinds`` in turn.

    >>> pick_degraded(12, 3, ("stall",), 5, seed=1) == pick_degraded(12, 3, ("stall",), 5, seed=1)
    True
    """
    if not 0 <= count <= n_series:
        raise ValueError(f"count must be between 0 and n_series ({n_series}), got {count}")
    unknown = sorted(set(kinds) - set(DEGRADATION_KINDS))
    if unknown or not kinds:
        raise ValueError(f"kinds must be among {DEGRADATION_KINDS}, got {list(kinds)}")
    ids = series_ids(n_series)
    chosen = np.sort(np.random.default_rng(seed).choice(n_series, size=count, replace=False))
    return {ids[i]: (kinds[j % len(kinds)], from_day) for j, i in enumerate(chosen)}


def generate(spec: ScenarioSpec) -> Scenario:
    """Build the series, forecasts and actuals frames for ``spec``; same spec, same frames."""
    _check_spec(spec)
    rng = np.random.default_rng(spec.seed)
    ids = np.array(series_ids(spec.n_series), dtype=object)
    truth = _truth(spec, rng)
    return Scenario(
        spec=spec,
        series=_series_frame(ids),
        forecasts=_forecasts_frame(spec, ids, truth, rng),
        actuals=_actuals_frame(spec, ids, truth),
        noise_sd=pd.Series(truth.noise_sd, index=pd.Index(ids, name="series_id"), name="noise_sd"),
    )


def _check_spec(spec: ScenarioSpec) -> None:
    if min(spec.n_series, spec.days, spec.horizons) < 1 or spec.history_days < 0:
        raise ValueError("n_series, days and horizons must be at least 1, history_days >= 0")
    if not spec.models or len(set(spec.models)) != len(spec.models):
        raise ValueError(f"models must be distinct and non-empty, got {spec.models}")
    known = set(series_ids(spec.n_series))
    for series_id, (kind, from_day) in spec.degraded.items():
        if series_id not in known:
            raise ValueError(f"degraded series {series_id!r} is not in the scenario")
        if kind not in DEGRADATION_KINDS:
            raise ValueError(f"degradation {kind!r} for {series_id} not in {DEGRADATION_KINDS}")
        if from_day < 0:
            raise ValueError(f"degradation of {series_id} starts before day 0: {from_day}")
    _start(spec)


def _start(spec: ScenarioSpec) -> np.datetime64:
    stamp = pd.Timestamp(spec.start)
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    return np.datetime64(stamp.normalize().to_datetime64(), "ns")


def _onset(spec: ScenarioSpec, kind: str) -> np.ndarray:
    """First affected day per series for one kind of degradation; never for the others."""
    position = {series_id: i for i, series_id in enumerate(series_ids(spec.n_series))}
    onset = np.full(spec.n_series, _NEVER, dtype=np.int64)
    for series_id, (what, from_day) in spec.degraded.items():
        if what == kind:
            onset[position[series_id]] = from_day
    return onset


def _truth(spec: ScenarioSpec, rng: np.random.Generator) -> _Truth:
    n = spec.n_series
    level = rng.uniform(40.0, 400.0, n)
    weekly_amplitude = rng.uniform(0.5, 1.5, n)
    yearly_growth = rng.normal(0.0, 0.1, n)
    noise_share = rng.uniform(0.05, 0.10, n)
    noise = rng.standard_normal((n, spec.history_days + spec.days))
    day = np.arange(-spec.history_days, spec.days + spec.horizons)
    weekday = (pd.Timestamp(_start(spec)).dayofweek + day) % SEASON
    weekly = 1.0 + weekly_amplitude[:, None] * (WEEKLY_PROFILE[weekday] - 1.0)[None, :]
    trend = 1.0 + yearly_growth[:, None] * (day / 365.0)[None, :]
    return _Truth(mean=level[:, None] * weekly * trend, noise_sd=level * noise_share, noise=noise)


def _series_frame(ids: np.ndarray) -> pd.DataFrame:
    index = np.arange(len(ids))
    shop = index // len(PRODUCT_LINES)
    return pd.DataFrame(
        {
            "series_id": ids,
            "frequency": "D",
            "season": SEASON,
            "timezone": TIMEZONE,
            "unit": UNIT,
            "label_team": np.array(TEAMS, dtype=object)[index % len(PRODUCT_LINES) % len(TEAMS)],
            "label_region": np.array(REGIONS, dtype=object)[shop % len(REGIONS)],
        },
        columns=list(SERIES_COLUMNS),
    )


def _utc(start: np.datetime64, day: np.ndarray, hour: int = 0) -> pd.Series:
    stamps = start + day.astype("timedelta64[D]") + np.timedelta64(hour, "h")
    return pd.Series(pd.to_datetime(stamps, utc=True))


def _actuals_frame(spec: ScenarioSpec, ids: np.ndarray, truth: _Truth) -> pd.DataFrame:
    day = np.arange(-spec.history_days, spec.days)
    shift = (day[None, :] >= _onset(spec, "level_shift")[:, None]) * LEVEL_SHIFT_SIGMAS
    value = truth.mean[:, : day.size] + truth.noise_sd[:, None] * (truth.noise + shift)
    # Rows run day by day, as a till system would deliver them.
    return pd.DataFrame(
        {
            "series_id": np.tile(ids, day.size),
            "observed_at": _utc(_start(spec), np.repeat(day, len(ids))),
            "value": np.round(np.maximum(value.T.ravel(), 0.0), 2),
        }
    )


def _forecasts_frame(
    spec: ScenarioSpec, ids: np.ndarray, truth: _Truth, rng: np.random.Generator
) -> pd.DataFrame:
    shape = (spec.days, spec.n_series, len(spec.models), spec.horizons)
    day = np.arange(spec.days).reshape(-1, 1, 1, 1)
    series = np.arange(spec.n_series).reshape(1, -1, 1, 1)
    model = np.arange(len(spec.models)).reshape(1, 1, -1, 1)
    horizon = np.arange(1, spec.horizons + 1).reshape(1, 1, 1, -1)
    target = day + horizon
    noise_sd = truth.noise_sd[series]
    own_sd = MODEL_SPREAD_STEP * (model + 1) * noise_sd * np.sqrt(horizon)
    # Standard deviation of actual minus point: the intervals are built from exactly this.
    error_sd = np.sqrt(noise_sd**2 + own_sd**2)
    collapsed = target >= _onset(spec, "coverage_collapse")[series]
    collapsed_own_sd = np.sqrt((COLLAPSE_ERROR_FACTOR * error_sd) ** 2 - noise_sd**2)
    model_sd = np.where(collapsed, collapsed_own_sd, own_sd)
    point = truth.mean[series, spec.history_days + target] + rng.standard_normal(shape) * model_sd

    keep = np.broadcast_to(day < _onset(spec, "stall")[series], shape).ravel()
    columns: dict[str, object] = {
        "series_id": ids[np.broadcast_to(series, shape).ravel()[keep]],
        "model": np.array(spec.models, dtype=object)[np.broadcast_to(model, shape).ravel()[keep]],
        "issued_at": _utc(_start(spec), np.broadcast_to(day, shape).ravel()[keep], ISSUE_HOUR),
        "target_at": _utc(_start(spec), np.broadcast_to(target, shape).ravel()[keep]),
        "horizon": np.broadcast_to(horizon, shape).ravel()[keep],
    }

    def loaves(offset_in_sd: float) -> np.ndarray:
        # Clipping at zero is monotone, so it keeps lower <= point <= upper and, as actuals are
        # never negative, leaves every coverage exactly as it was.
        values = point + offset_in_sd * error_sd
        return np.round(np.maximum(values.ravel()[keep], 0.0), 2)

    columns["point"] = loaves(0.0)
    for level in INTERVAL_LEVELS:
        z = _NORMAL.inv_cdf(0.5 + level / 200)
        columns[f"lower_{level}"] = loaves(-z)
        columns[f"upper_{level}"] = loaves(z)
    for percent in QUANTILE_LEVELS:
        columns[f"q_{percent}"] = loaves(_NORMAL.inv_cdf(percent / 100))
    return pd.DataFrame(columns, columns=list(FORECAST_COLUMNS))


def write(
    scenario: Scenario, folder: Path, fmt: str = "csv", split_by_day: bool = False
) -> ScenarioFiles:
    """Save the scenario as ``series``, ``forecasts`` and ``actuals`` files in ``folder``.

    ``fmt`` is csv, parquet or jsonl. CSV and JSON Lines carry ISO 8601 times ending in ``Z``;
    Parquet keeps them as UTC timestamps. With ``split_by_day`` forecasts go to
    ``forecasts/<issue date>.<fmt>`` and actuals to ``actuals/<observation date>.<fmt>``, the
    way a daily feed delivers them.
    """
    if fmt not in FILE_FORMATS:
        raise ValueError(f"fmt must be one of {FILE_FORMATS}, got {fmt!r}")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    series_path = folder / f"series.{fmt}"
    _write_frame(scenario.series, series_path, fmt)
    return ScenarioFiles(
        folder=folder,
        series=series_path,
        forecasts=_write_table(
            scenario.forecasts, folder / "forecasts", "issued_at", fmt, split_by_day
        ),
        actuals=_write_table(
            scenario.actuals, folder / "actuals", "observed_at", fmt, split_by_day
        ),
    )


def _write_table(
    frame: pd.DataFrame, stem: Path, day_column: str, fmt: str, split_by_day: bool
) -> tuple[Path, ...]:
    if not split_by_day:
        path = stem.with_suffix(f".{fmt}")
        _write_frame(frame, path, fmt)
        return (path,)
    stem.mkdir(exist_ok=True)
    paths = []
    for day, part in frame.groupby(frame[day_column].dt.floor("D"), sort=True):
        path = stem / f"{pd.Timestamp(day):%Y-%m-%d}.{fmt}"
        _write_frame(part, path, fmt)
        paths.append(path)
    return tuple(paths)


def _write_frame(frame: pd.DataFrame, path: Path, fmt: str) -> None:
    if fmt == "parquet":
        frame.to_parquet(path, index=False)
        return
    text = frame.copy()
    for column in text.columns:
        if isinstance(text[column].dtype, pd.DatetimeTZDtype):
            text[column] = _iso_text(text[column])
    if fmt == "csv":
        # pyarrow writes CSV several times faster than pandas; nothing generated here contains a
        # comma, a quote or a line break, so no value needs quoting.
        unquoted = pyarrow.csv.WriteOptions(quoting_style="none", quoting_header="none")
        pyarrow.csv.write_csv(pyarrow.Table.from_pandas(text, preserve_index=False), path, unquoted)
    else:
        text.to_json(path, orient="records", lines=True)


def _iso_text(stamps: pd.Series) -> np.ndarray:
    """ISO 8601 text in UTC; formats each distinct time once, as there are few of them."""
    codes, distinct = pd.factorize(stamps)
    text = np.asarray(pd.DatetimeIndex(distinct).tz_convert("UTC").strftime(_ISO_FORMAT))
    return text.astype(object)[codes]
