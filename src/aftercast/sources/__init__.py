"""Where rows come from besides `aftercast ingest`: pulled sources, one module per type.

`base` is the contract a source type keeps; `folder`, `sql` and `http` are the types, each
reading the settings model of its type from `aftercast.settings.sources` and handing its rows
to the ingest package as chunks (`aftercast.ingest.files`, the readers every path shares);
adding one is that model, a new module here and one line in `SOURCE_TYPES`. `pull_all` (the
cycle's first stage) and `pull_source` (what the daemon schedules) live in `pull`.
"""

from __future__ import annotations

from aftercast.settings.sources import SourceSettings
from aftercast.sources.base import Source, SourceResult
from aftercast.sources.folder import FolderSource
from aftercast.sources.http import HttpSource
from aftercast.sources.sql import SqlSource

SOURCE_TYPES: dict[str, type[Source]] = {
    "folder": FolderSource,
    "sql": SqlSource,
    "http": HttpSource,
}


def build_source(settings: SourceSettings, chunk_rows: int) -> Source:
    return SOURCE_TYPES[settings.type](settings, chunk_rows)


__all__ = ["SOURCE_TYPES", "Source", "SourceResult", "build_source"]
