"""Ingestion: files (or in-memory rows) in, validated rows upserted, rejections quarantined.

`ingest_path` is what the command line, folder sources and the HTTP push endpoints call. It reads
a file chunk by chunk; each chunk is validated (`validate`), written (`load`) and its rejected rows
put in the quarantine with their row number and reason, all in one transaction per chunk.
"""

from __future__ import annotations

import itertools
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
from aftercast.ingest.conflicts import find_conflicts, mark_conflicts
from aftercast.ingest.files import (
    Chunk,
    content_hash,
    file_format,
    file_parts,
    read_chunks,
    set_aside_invalid_text,
)
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
from aftercast.store.bulk import insert_frame, read_frame
from aftercast.store.catalog import ensure_models, ensure_series, series_settings, settings_for
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


# A source's quarantined rows in a range of row numbers: a range of `ix_quarantine_lookup`.
QUARANTINED_ROWS = (
    "SELECT row_number, reason, raw FROM quarantine WHERE kind = :kind AND source = :source "
    "AND row_number BETWEEN :low AND :high"
)


def _not_yet_quarantined(
    connection: Connection, rejected: pd.DataFrame, report: IngestReport
) -> pd.DataFrame:
    """The rejected rows the quarantine does not hold yet for this source: ingesting a file
    again counts its rejections again but stores each (row, reason, raw values) once."""
    stored = read_frame(
        connection,
        QUARANTINED_ROWS,
        {
            "kind": report.kind,
            "source": report.source,
            "low": int(rejected["row_number"].min()),
            "high": int(rejected["row_number"].max()),
        },
    )
    if stored.empty:
        return rejected
    seen = pd.MultiIndex.from_frame(stored.astype({"row_number": "int64"}))
    keys = pd.MultiIndex.from_frame(rejected[["row_number", "reason", "raw"]])
    return rejected[~keys.isin(seen)]


def _quarantine(
    connection: Connection, checked: Checked, report: IngestReport, batch_id: int, now: int
) -> None:
    rejected = checked.rejected
    if rejected.empty:
        return
    # A reason may quote the cell it rejects: keep it storable (no NUL, no lone surrogate).
    reason = rejected["reason"].astype(str).str.replace("\x00", "\\x00", regex=False)
    reason = reason.map(lambda r: r.encode("utf-8", "backslashreplace").decode("utf-8"))
    rejected = rejected.assign(reason=reason)
    frame = _not_yet_quarantined(connection, rejected, report)
    frame = frame.assign(batch_id=batch_id, kind=report.kind, source=report.source, recorded_at=now)
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
        written = series_rows.write(connection, checked, now, config)
    else:
        keys = frame["series_id"].astype("string").str.strip().dropna()
        # Keys that validation will reject are not looked up (a NUL cannot even be sent).
        usable = (keys != "") & ~keys.str.contains("\x00", regex=False)
        settings = _settings_of(connection, config, keys[usable])
        check = check_forecasts if kind == "forecasts" else check_actuals
        checked = check(frame, chunk.first_row, settings)
        # Only series with a row that passed are created: a rejected row leaves no trace.
        ids = ensure_series(connection, config, checked.good["series_key"])["id"]
        if kind == "forecasts":
            models = ensure_models(connection, checked.good["model"].unique())
            written = write_forecasts(connection, checked, ids, models, now)
        else:
            written = write_actuals(connection, checked, ids, batch_id, now)
    _quarantine(connection, checked, report, batch_id, now)
    _count(report, written)


def _settings_of(connection: Connection, config: Config, keys: pd.Series) -> pd.DataFrame:
    """Settings (frequency, season, time zone) of the keys, stored or as they would be created."""
    stored = series_settings(connection, keys.unique())
    missing = pd.Index(keys.unique()).difference(stored.index)
    if not len(missing):
        return stored
    created = settings_for(config, pd.Series(missing), stored)
    return created if stored.empty else pd.concat([stored, created])


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
    # The batch is logged once its first chunk is read and has the columns it needs: a source
    # that cannot be read leaves no log row (its caller reports the error), rather than one
    # that never finishes at every pull.
    batch_id: int | None = None
    try:
        for chunk in chunks:
            if batch_id is None:
                require_columns(chunk.frame, REQUIRED[kind], source)
                if kind == "series":
                    series_rows.check_label_columns(chunk.frame.columns, source)
                report.ignored_columns = [
                    c
                    for c in extra_columns(chunk.frame, KNOWN_COLUMNS[kind])
                    if not (kind == "series" and str(c).startswith("label_"))  # labels are read
                ]
                batch_id = _start_log(engine, kind, source, digest, now)
            with write(engine) as connection:
                _write_chunk(connection, config, kind, chunk, report, batch_id, now)
    except InputFileError as exc:
        if batch_id is None:
            raise
        # The file broke off after some chunks were stored: they stay, and the log says so.
        _finish_log(engine, batch_id, report)
        kept = report.accepted + report.revised + report.unchanged
        raise InputFileError(f"{exc} (the {kept} rows before it were kept)") from None
    if batch_id is None:
        raise InputFileError(f"{source}: the file has a header but no rows")
    _finish_log(engine, batch_id, report)
    return report


def ingest_path(engine: Engine, config: Config, kind: str, path: Path) -> IngestReport:
    """Ingest one file (CSV, Parquet or JSON Lines, by extension).

    A file longer than one chunk is read once more first, for rows that share a key with
    another chunk's rows but disagree (`conflicts`): they are rejected like such rows within a
    chunk, instead of the later one silently revising the earlier.
    """
    rows = config.ingest.chunk_rows
    chunks = read_chunks(path, rows)
    first = next(chunks, None)
    if first is None:  # a CSV header alone, or JSON Lines of blank lines
        what = "a header but no rows" if file_format(path) == "csv" else "no rows, only blank lines"
        raise InputFileError(f"{path}: the file has {what}")
    require_columns(first.frame, REQUIRED[kind], str(path))
    second = next(chunks, None)
    head = [first] if second is None else [first, second]
    clashes = {} if second is None else find_conflicts(kind, file_parts(path, rows))

    def all_chunks() -> Any:
        for chunk in itertools.chain(head, chunks):
            yield mark_conflicts(chunk, clashes)

    return ingest_chunks(engine, config, kind, str(path), all_chunks(), content_hash(path))


def ingest_records(
    engine: Engine, config: Config, kind: str, records: list[dict[str, Any]], source: str
) -> IngestReport:
    """Ingest rows already parsed (HTTP push): the same checks and counts as a file."""
    frame = pd.DataFrame.from_records(records) if records else pd.DataFrame()
    if frame.empty:
        raise InputFileError(f"{source}: no rows")
    chunk = Chunk(set_aside_invalid_text(frame), 1)
    return ingest_chunks(engine, config, kind, source, iter([chunk]))
