"""SQL source: a query against any SQLAlchemy URL, reading only rows after a watermark.

The query names its columns as the CONTRACT does (`SELECT store AS series_id, ...`) and uses the
bind parameter `:since`; aftercast passes the highest value of `watermark_column` stored so far
(`watermark_start` on the first pull) and, once the rows are stored, keeps the new highest value
per source. A failed pull leaves the watermark where it was, so nothing is skipped. Because
ingest is idempotent, `>= :since` is a safe choice when several rows can share a watermark value.
Rows are fetched `ingest.chunk_rows` at a time, so a large first load never sits whole in memory.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from datetime import datetime
from typing import Any

import pandas as pd
from sqlalchemy import create_engine, text
from sqlalchemy.exc import ArgumentError, NoSuchModuleError, SQLAlchemyError

from aftercast.ingest.files import Chunk
from aftercast.settings.sources import SqlSettings
from aftercast.sources.base import Batch, Source, SourceError, SourceState


def encode_watermark(value: Any) -> str:
    """A watermark as JSON text that remembers its type (a datetime stays a datetime)."""
    if isinstance(value, pd.Timestamp | datetime):
        return json.dumps({"type": "datetime", "value": pd.Timestamp(value).isoformat()})
    if hasattr(value, "item"):
        value = value.item()
    return json.dumps({"type": type(value).__name__, "value": value})


def decode_watermark(stored: str) -> Any:
    raw = json.loads(stored)
    if raw["type"] == "datetime":
        return pd.Timestamp(raw["value"]).to_pydatetime()
    return raw["value"]


class _Highest:
    """The highest watermark value seen across the chunks of one pull."""

    def __init__(self, column: str | None) -> None:
        self.column = column
        self.value: Any = None

    def update(self, frame: pd.DataFrame) -> None:
        if self.column is None:
            return
        if self.column not in frame.columns:
            raise SourceError(
                f"watermark_column {self.column!r} is not among the query's columns "
                f"({', '.join(map(str, frame.columns))})"
            )
        values = frame[self.column].dropna()
        if values.empty:
            return
        top = values.max()
        self.value = top if self.value is None else max(self.value, top)


class SqlSource(Source):
    settings_type = SqlSettings
    settings: SqlSettings

    def _where(self) -> str:
        from sqlalchemy.engine import make_url

        try:
            return make_url(self.settings.url).render_as_string(hide_password=True)
        except ArgumentError:
            return "(unparseable url)"

    def _rows(self, since: Any) -> Iterator[Chunk]:
        try:
            engine = create_engine(self.settings.url)
        except (ArgumentError, NoSuchModuleError) as exc:
            raise SourceError(f"url {self._where()}: {exc}") from None
        first = 1
        try:
            with engine.connect() as connection:
                frames = pd.read_sql_query(
                    text(self.settings.query),
                    connection,
                    params={"since": since},
                    chunksize=self.chunk_rows,
                )
                for frame in frames:
                    if len(frame):
                        yield Chunk(frame, first)
                        first += len(frame)
        except SQLAlchemyError as exc:
            detail = str(getattr(exc, "orig", None) or exc).strip().splitlines()[0]
            raise SourceError(f"query on {self._where()} failed: {detail}") from None
        finally:
            engine.dispose()

    def batches(self, state: SourceState) -> Iterator[Batch]:
        stored = state.watermark()
        since = decode_watermark(stored) if stored is not None else self.settings.watermark_start
        rows = self._rows(since)
        first = next(rows, None)
        if first is None:
            return
        highest = _Highest(self.settings.column())
        highest.update(first.frame)  # a missing column fails before anything is stored

        def chunks() -> Iterator[Chunk]:
            yield first
            for chunk in rows:
                highest.update(chunk.frame)
                yield chunk

        def succeeded() -> None:
            if highest.value is not None:
                state.set_watermark(encode_watermark(highest.value))

        yield Batch(label="query", chunks=chunks(), succeeded=succeeded)
