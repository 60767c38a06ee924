"""Config section of pulled sources: `sources:`, one settings model per source type.

Each model says `type: Literal[...]` so that `SourceConfig` can tell them apart; `SourceList`
is the validated section (names unique). The sources themselves, which read files, databases
and HTTP servers, live in the `sources` package; adding a type is a model here, a module there
and one line in its `SOURCE_TYPES`.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, Field, SecretStr

from aftercast.settings.base import Strict
from aftercast.settings.schedule import Schedule

Kind = Literal["forecasts", "actuals", "series"]
SOURCE_NAME = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$"
# The column whose highest value a SQL source remembers between pulls, by kind.
DEFAULT_WATERMARK = {"forecasts": "issued_at", "actuals": "observed_at", "series": None}


class SourceSettings(Strict):
    """Keys every source has; each type adds its own and a `type` literal."""

    type: str
    name: str = Field(pattern=SOURCE_NAME)
    kind: Kind
    schedule: Schedule = Schedule(interval_seconds=300)


class FolderSettings(SourceSettings):
    type: Literal["folder"] = "folder"
    path: str
    glob: str = "*.csv"
    after: Literal["keep", "move"] = "keep"
    done_folder: str | None = None  # default: <path>/done
    failed_folder: str | None = None  # default: <path>/failed
    settle_seconds: float = Field(5.0, ge=0)


class SqlSettings(SourceSettings):
    type: Literal["sql"] = "sql"
    url: str
    query: str
    watermark_column: str | None = None  # default: issued_at (forecasts), observed_at (actuals)
    watermark_start: int | float | str | None = "1970-01-01 00:00:00"

    def column(self) -> str | None:
        return self.watermark_column or DEFAULT_WATERMARK[self.kind]


class HttpSettings(SourceSettings):
    type: Literal["http"] = "http"
    url: str
    format: Literal["csv", "json", "jsonl"] = "json"
    records_key: str | None = None  # JSON object answers: dotted path to the array of rows
    headers: dict[str, SecretStr] = Field(default_factory=dict)  # values may be tokens
    headers_from_env: dict[str, str] = Field(default_factory=dict)  # header -> variable name
    timeout_seconds: float = Field(10.0, gt=0)
    retries: int = Field(3, ge=0, le=10)
    backoff_seconds: float = Field(1.0, ge=0)
    max_bytes: int = Field(200_000_000, ge=1)


SourceConfig = Annotated[FolderSettings | SqlSettings | HttpSettings, Field(discriminator="type")]


def _unique_names(sources: list[SourceSettings]) -> list[SourceSettings]:
    names = [s.name for s in sources]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"source names must be unique; repeated: {', '.join(repeated)}")
    return sources


SourceList = Annotated[list[SourceConfig], AfterValidator(_unique_names)]
