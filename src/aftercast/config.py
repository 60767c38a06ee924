"""Configuration: YAML validated with pydantic.

The file is read, `${ENV_VAR}` references are substituted (secrets live in the environment, not in
the file), and the result is validated against the models below. Unknown keys are errors, and
every error names the key path and what was expected, so a typo never silently falls back to a
default. Where the config comes from: `--config`, else `AFTERCAST_CONFIG`, else
`./config/aftercast.yaml` when it exists, else the built-in defaults. The sections of the stages
come from `aftercast.settings`, which imports no stage, so every stage can import this module.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Any

import yaml
from pydantic import Field, ValidationError, field_validator, model_validator

from aftercast.errors import ConfigError
from aftercast.settings.alerts import Channels, DeliveryConfig, Routes, Rules
from aftercast.settings.base import Strict
from aftercast.settings.detection import BaselineConfig, BenchmarkConfig, DetectionConfig
from aftercast.settings.sources import SourceList
from aftercast.settings.web import ApiConfig, ScheduleConfig, WebConfig

DEFAULT_CONFIG_PATH = Path("config/aftercast.yaml")
_ENV_REF = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}")


class StoreConfig(Strict):
    url: str = "sqlite:///aftercast.db"
    echo: bool = False


# The longest seasonal lag taken, in periods: a 15-minute series' year is 35,136; the store
# keeps it in a 32-bit integer column.
MAX_SEASON = 1_000_000


class SeriesDefaults(Strict):
    frequency: str = "D"
    season: int = Field(7, ge=1, le=MAX_SEASON)
    timezone: str = "UTC"

    @field_validator("frequency")
    @classmethod
    def _known_frequency(cls, value: str) -> str:
        from aftercast.periods import check_frequency

        return check_frequency(value)

    @field_validator("timezone")
    @classmethod
    def _known_timezone(cls, value: str) -> str:
        from aftercast.periods import check_timezone

        check_timezone(value)
        return value


class SeriesEntry(Strict):
    """One series' own settings; anything left out comes from `series_defaults`."""

    id: str
    frequency: str | None = None
    season: int | None = Field(None, ge=1, le=MAX_SEASON)
    timezone: str | None = None
    unit: str | None = None
    labels: dict[str, str] = Field(default_factory=dict)

    @field_validator("frequency")
    @classmethod
    def _known_frequency(cls, value: str | None) -> str | None:
        from aftercast.periods import check_frequency

        return None if value is None else check_frequency(value)

    @field_validator("timezone")
    @classmethod
    def _known_timezone(cls, value: str | None) -> str | None:
        from aftercast.periods import check_timezone

        if value is not None:
            check_timezone(value)
        return value


class WindowConfig(Strict):
    """A rolling window: the last `days` days of targets, or the `points` latest target periods."""

    name: str = "recent"
    days: float | None = Field(None, gt=0)
    points: int | None = Field(None, ge=1)

    @model_validator(mode="after")
    def _one_kind(self) -> WindowConfig:
        if (self.days is None) == (self.points is None):
            raise ValueError("give exactly one of 'days' or 'points'")
        return self


class IngestConfig(Strict):
    chunk_rows: int = Field(200_000, ge=1_000)


class CoordinationConfig(Strict):
    """`coordination:` - how replicas sharing one store split the series between them."""

    shards: int = Field(16, ge=1, le=4096)
    lease_seconds: int = Field(60, ge=2)

    @property
    def renew_seconds(self) -> float:
        """How often a holder renews, and how often the daemon should look for due shards."""
        return self.lease_seconds / 3


class Config(Strict):
    store: StoreConfig = StoreConfig()
    series_defaults: SeriesDefaults = SeriesDefaults()
    series: list[SeriesEntry] = Field(default_factory=list)
    window: WindowConfig = WindowConfig(days=28)
    windows: list[WindowConfig] = Field(default_factory=list)
    horizon_buckets: list[str] = Field(default_factory=list)
    ingest: IngestConfig = IngestConfig()
    sources: SourceList = Field(default_factory=list)
    schedule: ScheduleConfig = ScheduleConfig()
    api: ApiConfig = ApiConfig()
    web: WebConfig = WebConfig()
    channels: Channels = Field(default_factory=list)
    routes: Routes = Field(default_factory=list)  # after `channels`: it checks their names
    delivery: DeliveryConfig = DeliveryConfig()
    rules: Rules = Field(default_factory=list)
    benchmarks: BenchmarkConfig = BenchmarkConfig()
    baseline: BaselineConfig = BaselineConfig()
    detection: DetectionConfig = DetectionConfig()
    coordination: CoordinationConfig = CoordinationConfig()

    @field_validator("horizon_buckets")
    @classmethod
    def _buckets(cls, value: list[str]) -> list[str]:
        for bucket in value:
            if not re.fullmatch(r"\d+(-\d+)?", bucket.strip()):
                raise ValueError(f"horizon bucket {bucket!r} must look like '1' or '2-7'")
        return value

    @model_validator(mode="after")
    def _windows_named_once(self) -> Config:
        # Raised as ConfigError, not ValueError, so the line names the exact key path: a
        # check across sections would otherwise be reported at the top level.
        keys = ["window.name", *(f"windows[{i}].name" for i in range(len(self.windows)))]
        first: dict[str, str] = {}
        for key, window in zip(keys, self.all_windows(), strict=True):
            if window.name in first:
                raise ConfigError(
                    f"config key {key}: window name {window.name!r} is already used by "
                    f"{first[window.name]}; window names must be unique"
                )
            first[window.name] = key
        wanted = self.detection.window
        if wanted is not None and wanted not in first:
            raise ConfigError(
                f"config key detection.window: no window is named {wanted!r} "
                f"(configured: {', '.join(first)})"
            )
        return self

    def all_windows(self) -> list[WindowConfig]:
        """The default window first, then any extra named windows."""
        return [self.window, *self.windows]


def substitute_env(value: Any, path: str = "") -> Any:
    """Replace `${NAME}` in every string with the environment variable NAME.

    An unset variable is an error naming the key, so a missing secret fails at start-up rather than
    at the first delivery.
    """
    if isinstance(value, dict):
        return {k: substitute_env(v, f"{path}.{k}" if path else str(k)) for k, v in value.items()}
    if isinstance(value, list):
        return [substitute_env(v, f"{path}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, str):

        def repl(match: re.Match[str]) -> str:
            name = match.group(1)
            if name not in os.environ:
                raise ConfigError(f"config key {path}: environment variable {name} is not set")
            return os.environ[name]

        return _ENV_REF.sub(repl, value)
    return value


_SECRET_KEY = re.compile(r"password|secret|token|headers", re.IGNORECASE)


def _describe(error: dict[str, Any]) -> str:
    location = ".".join(str(part) for part in error["loc"]) or "(top level)"
    if error["type"] == "extra_forbidden":
        return f"config key {location}: unknown key"
    message = error["msg"].removeprefix("Value error, ")
    if _SECRET_KEY.search(location) or isinstance(error.get("input"), dict | list):
        return f"config key {location}: {message}"  # never echo a secret or a whole section
    return f"config key {location}: {message} (got {error.get('input')!r})"


def parse_config(raw: Any, source: str = "config") -> Config:
    """Validate an already-loaded mapping; errors name `source` and the key path."""
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{source}: the top level must be a mapping of keys")
    try:
        return Config.model_validate(substitute_env(raw))
    except ValidationError as exc:
        first = exc.errors()[0]
        more = len(exc.errors()) - 1
        suffix = f" (and {more} more problem{'s' if more > 1 else ''})" if more else ""
        raise ConfigError(f"{source}: {_describe(dict(first))}{suffix}") from None
    except ConfigError as exc:
        raise ConfigError(f"{source}: {exc}") from None


def resolve_config_path(explicit: str | None) -> Path | None:
    if explicit:
        return Path(explicit)
    if os.environ.get("AFTERCAST_CONFIG"):
        return Path(os.environ["AFTERCAST_CONFIG"])
    return DEFAULT_CONFIG_PATH if DEFAULT_CONFIG_PATH.exists() else None


def load_config(explicit: str | None = None) -> Config:
    """Load the config the command line should use (see the module docstring for the order)."""
    path = resolve_config_path(explicit)
    if path is None:
        return Config()
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: config file is not UTF-8 text") from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{path}:{where} is not valid YAML") from None
    return parse_config(raw, str(path))
