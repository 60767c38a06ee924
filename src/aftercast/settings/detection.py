"""Config sections of benchmarks, baselines and detection: `benchmarks:`, `baseline:`, `detection:`.

They are plain pydantic models (strict, frozen), and `bucket_labels` turns the root config's
`horizon_buckets` into the buckets in force. Every key here is shown, commented, in
`starter.yaml`.
"""

from __future__ import annotations

import re
from datetime import datetime
from typing import Literal

from pydantic import Field, field_validator, model_validator

from aftercast.settings.base import Strict

BenchmarkMethod = Literal["naive", "seasonal-naive"]
_ALL_METHODS: tuple[BenchmarkMethod, ...] = ("naive", "seasonal-naive")
# Horizon buckets used when the config gives none: one hit per target within each.
DEFAULT_BUCKETS = ("1", "2-7", "8-14", "15+")


class BenchmarkConfig(Strict):
    """aftercast's own forecasts, made at every issue time of a production forecast."""

    methods: list[BenchmarkMethod] = Field(default_factory=lambda: list(_ALL_METHODS))
    ets: bool = False  # statsmodels ETS as a third benchmark (fits one model per series)
    levels: list[float] = Field(default_factory=lambda: [80.0, 95.0])
    error_window: int = Field(56, ge=4)  # past errors per horizon behind the interval quantiles
    min_errors: int = Field(8, ge=2)  # fewer past errors: point forecast without intervals
    ets_history: int = Field(112, ge=10)  # latest actuals an ETS benchmark is fitted on

    @field_validator("levels")
    @classmethod
    def _levels(cls, value: list[float]) -> list[float]:
        for level in value:
            if not 0 < level < 100:
                raise ValueError(f"level {level:g} must be a percent strictly between 0 and 100")
        return sorted(set(value))


class BaselineConfig(Strict):
    """The reference window of each (series, model, horizon bucket).

    By default the first `days` days of targets after the model's first forecast for the
    series (or after a reset); with `start` and `end`, those dates for every key.
    """

    days: float = Field(28.0, gt=0)
    start: datetime | None = None
    end: datetime | None = None
    settle_days: float = Field(1.0, ge=0)  # wait this long after the window for late actuals
    min_points: int = Field(10, ge=2)  # targets a bucket needs before its baseline is kept

    @model_validator(mode="after")
    def _both_dates(self) -> BaselineConfig:
        if (self.start is None) != (self.end is None):
            raise ValueError("give both 'start' and 'end', or neither")
        if self.start is not None and self.end is not None and self.end <= self.start:
            raise ValueError("'end' must be after 'start'")
        return self


class DetectionConfig(Strict):
    """Statistical tests run each cycle, and the fleet-wide false-discovery control."""

    false_discovery_rate: float = Field(0.05, gt=0, lt=1)
    families: Literal["series", "detection"] = "series"
    window: str | None = None  # name of a configured window; default: the first one
    min_points: int = Field(10, ge=2)  # targets a test needs in the window
    benchmark: BenchmarkMethod = "seasonal-naive"
    cusum_k: float = Field(0.5, ge=0)
    cusum_h: float = Field(5.0, gt=0)
    tracking_signal_limit: float = Field(4.0, gt=0)
    overdue_periods: int = Field(2, ge=1)  # actuals this many periods late are overdue
    stalled_periods: int = Field(2, ge=1)  # no new forecast for this many periods: stalled
    forget_after_days: float = Field(90.0, gt=0)  # stalled for longer: retired, not reported
    keep_p_value: float = Field(0.05, gt=0, le=1)  # unflagged findings kept at or below this
    include_benchmarks: bool = False  # test aftercast's own benchmark models as well


def bucket_labels(configured: list[str]) -> list[str]:
    """The horizon buckets in force: the configured ones plus an open-ended last one.

    >>> bucket_labels([])
    ['1', '2-7', '8-14', '15+']
    >>> bucket_labels(["1", "2-7"])
    ['1', '2-7', '8+']
    """
    labels = [b.strip() for b in configured] or list(DEFAULT_BUCKETS)
    last = labels[-1]
    if not last.endswith("+"):
        high = int(re.split(r"-", last)[-1])
        labels.append(f"{high + 1}+")
    return labels
