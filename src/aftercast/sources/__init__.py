"""Where rows come from besides `aftercast ingest`: pulled sources, one module per type.

`files` holds the chunked file readers every path shares. `base` is the contract a source type
keeps; `folder`, `sql` and `http` are the types; adding one is a new module and one line in
`SOURCE_TYPES`. `SourceList` is the validated `sources:` config section (discriminated by
`type`, names unique). `pull_all` (the cycle's first stage) and `pull_source` (what the daemon
schedules) live in `pull`, which is not imported here: the config reads this package for its
settings, and `pull` reaches the ingest path, which reads the config.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import AfterValidator, Field

from aftercast.sources.base import Source, SourceResult, SourceSettings
from aftercast.sources.folder import FolderSettings, FolderSource
from aftercast.sources.http import HttpSettings, HttpSource
from aftercast.sources.sql import SqlSettings, SqlSource

SOURCE_TYPES: dict[str, type[Source]] = {
    "folder": FolderSource,
    "sql": SqlSource,
    "http": HttpSource,
}

SourceConfig = Annotated[FolderSettings | SqlSettings | HttpSettings, Field(discriminator="type")]


def _unique_names(sources: list[SourceSettings]) -> list[SourceSettings]:
    names = [s.name for s in sources]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"source names must be unique; repeated: {', '.join(repeated)}")
    return sources


SourceList = Annotated[list[SourceConfig], AfterValidator(_unique_names)]


def build_source(settings: SourceSettings, chunk_rows: int) -> Source:
    return SOURCE_TYPES[settings.type](settings, chunk_rows)


__all__ = [
    "SOURCE_TYPES",
    "Source",
    "SourceConfig",
    "SourceList",
    "SourceResult",
    "SourceSettings",
    "build_source",
]
