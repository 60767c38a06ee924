"""Reading input files in chunks: CSV, Parquet and JSON Lines, chosen by extension.

Each chunk is a frame of raw values plus the 1-based number of its first data row, so that a
rejected row can be named in the file. A multi-gigabyte file never sits whole in memory: CSV and
JSON Lines are read `chunk_rows` lines at a time, Parquet a record batch at a time. Problems with
the file as a whole (unknown type, empty, not UTF-8, missing columns) raise InputFileError with
one line naming the file.
"""

from __future__ import annotations

import codecs
import hashlib
import io
import json
from collections.abc import Iterator
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import IO

import pandas as pd

from aftercast.errors import InputFileError

FORMATS = {
    ".csv": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
}


@dataclass(frozen=True)
class Chunk:
    frame: pd.DataFrame
    first_row: int  # 1-based number of the chunk's first data row in the file


def file_format(path: Path) -> str:
    suffixes = [s.lower() for s in path.suffixes]
    for suffix in reversed(suffixes):
        if suffix in FORMATS:
            return FORMATS[suffix]
    raise InputFileError(
        f"{path}: unknown file type {path.suffix or '(none)'!r}; use .csv, .parquet or .jsonl"
    )


def content_hash(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def check_readable(path: Path, fmt: str) -> None:
    """Raise InputFileError if the file is missing, empty or (for text) not UTF-8."""
    if not path.exists():
        raise InputFileError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise InputFileError(f"{path}: the file is empty")
    if fmt == "parquet":
        return
    decoder = codecs.getincrementaldecoder("utf-8")()
    offset = 0
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            try:
                decoder.decode(block)
            except UnicodeDecodeError as exc:
                raise InputFileError(
                    f"{path}: not UTF-8 text (bad byte at offset {offset + exc.start}); "
                    "save it as UTF-8"
                ) from None
            offset += len(block)


def read_chunks(path: Path, chunk_rows: int) -> Iterator[Chunk]:
    """Yield the file's rows as chunks of raw values (text for CSV, as typed for the others)."""
    fmt = file_format(path)
    check_readable(path, fmt)
    if fmt == "csv":
        yield from _csv_chunks(path, chunk_rows)
    elif fmt == "parquet":
        yield from _parquet_chunks(path, chunk_rows)
    else:
        yield from _jsonl_chunks(path, chunk_rows)


def csv_reader(source: Path | IO[bytes], chunk_rows: int) -> Iterator[pd.DataFrame]:
    """Frames of `chunk_rows` rows of a CSV file or body, every value as text (a file and a
    pushed or pulled body are read alike)."""
    return pd.read_csv(
        source,
        dtype=str,
        keep_default_na=False,
        chunksize=chunk_rows,
        encoding="utf-8",
        skipinitialspace=True,
    )


def _csv_chunks(path: Path, chunk_rows: int) -> Iterator[Chunk]:
    try:
        reader = csv_reader(path, chunk_rows)
        first = 1
        for frame in reader:
            if frame.empty:
                continue
            yield Chunk(frame, first)
            first += len(frame)
    except pd.errors.EmptyDataError:
        raise InputFileError(f"{path}: the file has no header row") from None
    except pd.errors.ParserError as exc:
        raise InputFileError(f"{path}: not a readable CSV file ({_first_line(exc)})") from None


def _parquet_chunks(path: Path, chunk_rows: int) -> Iterator[Chunk]:
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(path)
    except Exception as exc:  # pyarrow raises several unrelated types for a bad file
        raise InputFileError(f"{path}: not a readable Parquet file ({_first_line(exc)})") from None
    first = 1
    for batch in parquet.iter_batches(batch_size=chunk_rows):
        frame = batch.to_pandas()
        yield Chunk(frame, first)
        first += len(frame)


def _jsonl_chunks(path: Path, chunk_rows: int) -> Iterator[Chunk]:
    first = 1
    with path.open("r", encoding="utf-8") as handle:
        while True:
            lines = list(islice(handle, chunk_rows))
            if not lines:
                return
            yield Chunk(_parse_jsonl(path, lines, first), first)
            first += len(lines)


def _parse_jsonl(path: Path, lines: list[str], first: int) -> pd.DataFrame:
    """Parse a block of JSON lines in C; only a block that fails is re-read line by line."""
    try:
        frame = pd.read_json(
            io.StringIO("".join(lines)), lines=True, dtype=False, convert_dates=False
        )
        if len(frame) == len(lines):
            return frame
    except ValueError:
        pass
    records: list[dict[str, object]] = []
    for offset, line in enumerate(lines):
        try:
            value = json.loads(line) if line.strip() else {}
        except json.JSONDecodeError:
            value = None
        if not isinstance(value, dict):
            # Keep the row so it is quarantined with its number instead of vanishing.
            value = {"__unparseable__": line.rstrip("\n")[:500]}
        records.append(value)
        del offset
    return pd.DataFrame.from_records(records)


def _first_line(exc: BaseException) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
