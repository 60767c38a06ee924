"""Ingestion: files (or in-memory rows) in, validated rows upserted, rejections quarantined.

`ingest_path` is what the command line, folder sources and the HTTP push endpoints call. It reads
a file chunk by chunk; each chunk is validated (`validate`), written (`load`) and its rejected rows
put in the quarantine with their row number and reason, all in one transaction per chunk.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import Connection, Engine, update

from aftercast.config import Config
from aftercast.errors import InputFileError
from aftercast.ingest import series as series_rows
from aftercast.ingest.files import Chunk, content_hash, read_chunks
from aftercast.ingest.load import Written, write_actuals, write_forecasts
from aftercast.ingest.validate import (
    ACTUAL_REQUIRED,
    FORECAST_REQUIRED,
    Checked,
    check_actuals,
    check_forecasts,
    extra_columns,
    require_columns,
)
from aftercast.store import schema
from aftercast.store.bulk import insert_frame
from aftercast.store.catalog import ensure_models, ensure_series
from aftercast.store.db import write

KINDS = ("forecasts", "actuals", "series")
KNOWN_COLUMNS = {
    "forecasts": [*FORECAST_REQUIRED, "horizon"],
    "actuals": ACTUAL_REQUIRED,
    "series": series_rows.COLUMNS,
}
REQUIRED = {"forecasts": FORECAST_REQUIRED, "actuals": ACTUAL_REQUIRED, "series": ["series_id"]}


@dataclass
class IngestReport:
    """Counts for one source, as `ingest --json` prints them."""

    kind: str
    source: str
    accepted: int = 0
    rejected: int = 0
    unchanged: int = 0
    revised: int = 0
    rejected_reasons: Counter[str] = field(default_factory=Counter)
    ignored_columns: list[str] = field(default_factory=list)
    examples: list[str] = field(default_factory=list)  # first few "row N: reason" lines

    def as_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "source": self.source,
            "accepted": self.accepted,
            "rejected": self.rejected,
            "unchanged": self.unchanged,
            "revised": self.revised,
            "rejected_reasons": dict(self.rejected_reasons),
            "ignored_columns": self.ignored_columns,
        }


def _reason_code(reason: str) -> str:
    return reason.split(":", 1)[0]


def _quarantine(
    connection: Connection, checked: Checked, report: IngestReport, batch_id: int, now: int
) -> None:
    rejected = checked.rejected
    if rejected.empty:
        return
    frame = rejected.assign(
        batch_id=batch_id, kind=report.kind, source=report.source, recorded_at=now
    )
    insert_frame(
        connection,
        schema.quarantine,
        frame[["batch_id", "kind", "source", "row_number", "reason", "raw", "recorded_at"]],
    )
    report.rejected += len(rejected)
    report.rejected_reasons.update(_reason_code(r) for r in rejected["reason"])
    room = 5 - len(report.examples)
    for number, reason in zip(
        rejected["row_number"][:room], rejected["reason"][:room], strict=True
    ):
        report.examples.append(f"{report.source} row {number}: {reason}")


def _start_log(engine: Engine, kind: str, source: str, digest: str | None, now: int) -> int:
    with write(engine) as connection:
        result = connection.execute(
            schema.ingest_log.insert().values(
                kind=kind, source=source, content_hash=digest, started_at=now
            )
        )
        return int(result.inserted_primary_key[0])  # type: ignore[index]


def _finish_log(engine: Engine, batch_id: int, report: IngestReport) -> None:
    with write(engine) as connection:
        connection.execute(
            update(schema.ingest_log)
            .where(schema.ingest_log.c.id == batch_id)
            .values(
                accepted=report.accepted + report.revised,
                rejected=report.rejected,
                unchanged=report.unchanged,
                finished_at=int(time.time()),
            )
        )


def _write_chunk(
    connection: Connection,
    config: Config,
    kind: str,
    chunk: Chunk,
    report: IngestReport,
    batch_id: int,
    now: int,
) -> None:
    frame = chunk.frame
    if kind == "series":
        checked = series_rows.check(frame, chunk.first_row)
        written = series_rows.write(connection, checked, now, config.series_defaults)
    else:
        keys = frame["series_id"].astype("string").str.strip().dropna()
        settings = ensure_series(connection, config, keys[keys != ""])
        if kind == "forecasts":
            checked = check_forecasts(frame, chunk.first_row, settings)
            models = ensure_models(connection, checked.good["model"].unique())
            written = write_forecasts(connection, checked, settings["id"], models, now)
        else:
            checked = check_actuals(frame, chunk.first_row, settings)
            written = write_actuals(connection, checked, settings["id"], batch_id, now)
    _quarantine(connection, checked, report, batch_id, now)
    _count(report, written)


def _count(report: IngestReport, written: Written) -> None:
    report.accepted += written.accepted
    report.unchanged += written.unchanged
    report.revised += written.revised


def ingest_chunks(
    engine: Engine, config: Config, kind: str, source: str, chunks: Any, digest: str | None = None
) -> IngestReport:
    """Validate and store chunks of raw rows (from a file, a query or an HTTP body)."""
    if kind not in KINDS:
        raise InputFileError(f"unknown kind {kind!r}: use forecasts, actuals or series")
    report = IngestReport(kind=kind, source=source)
    now = int(time.time())
    batch_id = _start_log(engine, kind, source, digest, now)
    seen_any = False
    for chunk in chunks:
        if not seen_any:
            require_columns(chunk.frame, REQUIRED[kind], source)
            report.ignored_columns = extra_columns(chunk.frame, KNOWN_COLUMNS[kind])
            seen_any = True
        with write(engine) as connection:
            _write_chunk(connection, config, kind, chunk, report, batch_id, now)
    if not seen_any:
        raise InputFileError(f"{source}: the file has a header but no rows")
    _finish_log(engine, batch_id, report)
    return report


def ingest_path(engine: Engine, config: Config, kind: str, path: Path) -> IngestReport:
    """Ingest one file (CSV, Parquet or JSON Lines, by extension)."""
    chunks = read_chunks(path, config.ingest.chunk_rows)
    first = next(chunks, None)
    if first is None:
        raise InputFileError(f"{path}: the file has a header but no rows")
    require_columns(first.frame, REQUIRED[kind], str(path))

    def all_chunks() -> Any:
        yield first
        yield from chunks

    return ingest_chunks(engine, config, kind, str(path), all_chunks(), content_hash(path))


def ingest_records(
    engine: Engine, config: Config, kind: str, records: list[dict[str, Any]], source: str
) -> IngestReport:
    """Ingest rows already parsed (HTTP push): the same checks and counts as a file."""
    frame = pd.DataFrame.from_records(records) if records else pd.DataFrame()
    if frame.empty:
        raise InputFileError(f"{source}: no rows")
    return ingest_chunks(engine, config, kind, source, iter([Chunk(frame, 1)]))
