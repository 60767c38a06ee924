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
from collections import deque
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd

from aftercast.errors import InputFileError
from aftercast.ingest.csv_rows import UNCLOSED_QUOTE, csv_header, open_quote_line, with_last

FORMATS = {
    ".csv": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
}


# A row rejected before its cells are read (a malformed line, a line that is not a JSON object,
# a key that disagrees with another chunk's): this column holds why, and validation rejects the
# row with that reason.
PRE_REJECTED = "__rejected__"
# What such a row held, as the quarantine's `raw` JSON, when the reader had no cells to give:
# a malformed CSV line is kept as {"line": its text} (cut to LINE_KEPT characters).
PRE_RAW = "__raw__"
MARKERS = (PRE_REJECTED, PRE_RAW)
LINE_KEPT = 2_000
# A blank line of JSON Lines holds no row: it keeps its place, so that later rows keep their
# line numbers, with this in PRE_REJECTED, and validation drops it without counting it.
BLANK_LINE = "__blank__"


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


def check_is_file(path: Path) -> None:
    """Raise InputFileError unless `path` is an existing file (a directory is not one)."""
    if not path.exists():
        raise InputFileError(f"{path}: no such file")
    if path.is_dir():
        raise InputFileError(f"{path}: is a directory, not a file")


def check_readable(path: Path, fmt: str) -> None:
    """Raise InputFileError if the file is empty, unreadable or (for text) not UTF-8."""
    try:
        _check_content(path, fmt)
    except OSError as exc:  # no permission, a device that fails, a file removed meanwhile
        raise InputFileError(f"{path}: cannot read ({exc.strerror or exc})") from None


def _check_content(path: Path, fmt: str) -> None:
    if path.stat().st_size == 0:
        raise InputFileError(f"{path}: the file is empty")
    if fmt == "parquet":
        path.open("rb").close()  # pyarrow would report a permission problem as a bad file
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
    check_is_file(path)  # before the type: a missing `data` is "no such file", not "no type"
    fmt = file_format(path)
    check_readable(path, fmt)
    if fmt == "csv":
        yield from _csv_file_chunks(path, chunk_rows)
    elif fmt == "parquet":
        yield from _parquet_chunks(path, chunk_rows)
    else:
        yield from _jsonl_chunks(path, chunk_rows)


def file_parts(path: Path, chunk_rows: int) -> Iterator[Chunk | TextBlock]:
    """The file's chunks for a scan: CSV as Arrow text blocks (no Python object per cell)."""
    if file_format(path) == "csv":
        return csv_blocks(path, chunk_rows, str(path))
    return read_chunks(path, chunk_rows)


def csv_chunks(source: Path | IO[bytes], chunk_rows: int, label: str) -> Iterator[Chunk]:
    """Chunks of `chunk_rows` rows of a CSV file or body, every value as text.

    Files and pushed or pulled bodies are read alike. A line with too many or too few fields
    becomes a row of its own that holds only its reason (`PRE_REJECTED`), at its place in the
    file, so that it is quarantined with its number and every other row is kept; pandas'
    chunked reader would instead take such a line at a chunk's start as an index column or cut
    it short without a word. Leading spaces after a delimiter are dropped, as before.
    """
    for block in csv_blocks(source, chunk_rows, label):
        yield block.chunk()


@dataclass(frozen=True)
class TextBlock:
    """A chunk of CSV before it becomes a frame: its rows as an Arrow table of text, the number
    of its first row, and the malformed lines (number, reason) that fall among those rows."""

    table: Any
    first_row: int
    malformed: list[tuple[int, str, str]]  # number, reason, the line's text

    def _positions(self) -> tuple[np.ndarray, np.ndarray]:
        """Places of the table's rows and of the malformed lines within the chunk."""
        total = self.table.num_rows + len(self.malformed)
        wanted = np.array([line[0] - self.first_row for line in self.malformed], dtype=int)
        # Kept in order and inside the chunk whatever numbers the reader gave.
        bad = np.maximum.accumulate(np.maximum(wanted, 0) - np.arange(len(wanted)))
        bad = np.minimum(bad, self.table.num_rows) + np.arange(len(wanted))
        return np.setdiff1d(np.arange(total), bad), bad

    def row_numbers(self) -> np.ndarray:
        """The file's row number of each row of the table."""
        return self._positions()[0] + self.first_row

    def chunk(self) -> Chunk:
        frame = _mark_empty_rows(self.table.to_pandas())
        if not self.malformed:
            return Chunk(frame, self.first_row)
        rows, bad = self._positions()
        reasons = pd.DataFrame(
            {
                PRE_REJECTED: [reason for _, reason, _ in self.malformed],
                PRE_RAW: [_line_raw(text) for _, _, text in self.malformed],
            },
            index=bad,
        )
        combined = pd.concat([frame.set_axis(rows), reasons]).sort_index()
        return Chunk(combined.reset_index(drop=True), self.first_row)


def csv_blocks(source: Path | IO[bytes], chunk_rows: int, label: str) -> Iterator[TextBlock]:
    """The CSV as `TextBlock`s of `chunk_rows` rows (see `csv_chunks`)."""
    import pyarrow as pa
    from pyarrow import csv as arrow_csv

    names = [name.lstrip(" ") for name in csv_header(source, label)]
    twice = sorted({name for name in names if names.count(name) > 1})
    if twice:  # which of the two would hold the value? The file must say.
        raise InputFileError(
            f"{label}: column {', '.join(twice)} appears more than once in the header"
        )
    malformed: deque[tuple[int, str, str]] = deque()

    def set_aside(row: Any) -> str:
        # The reader counts records from the header's, so the first data row is 2. A line of
        # white space alone is as blank, not malformed.
        fields = f"{row.actual_columns} fields, the header has {row.expected_columns}"
        why = BLANK_LINE if not (row.text or "").strip() else f"malformed CSV line: {fields}"
        malformed.append((int(row.number) - 1, why, row.text or ""))
        return "skip"

    try:
        reader = arrow_csv.open_csv(
            source,
            read_options=arrow_csv.ReadOptions(
                column_names=names, skip_rows=1, block_size=4 << 20, use_threads=False
            ),
            # An empty line is a row of empty fields that `_mark_empty_rows` makes blank.
            parse_options=arrow_csv.ParseOptions(
                invalid_row_handler=set_aside, newlines_in_values=True, ignore_empty_lines=False
            ),
            convert_options=arrow_csv.ConvertOptions(
                column_types={name: pa.string() for name in names}, strings_can_be_null=False
            ),
        )
        # Rows stay Arrow batches until a chunk is full.
        held: list[Any] = []
        first = 1
        for batch, last in with_last(reader):
            if last:  # a quote its last field opens and never closes: a malformed line
                rows = sum(b.num_rows for b in held) + batch.num_rows + len(malformed)
                line = open_quote_line(source, batch, first + rows - 1, label)
                if line is not None:
                    batch = batch.slice(0, batch.num_rows - 1)
                    malformed.append((first + rows - 1, UNCLOSED_QUOTE, line))
            held.append(_trimmed(batch))
            while sum(b.num_rows for b in held) >= chunk_rows:
                table = pa.Table.from_batches(held)
                block = _block(table.slice(0, chunk_rows), first, malformed)
                held = table.slice(chunk_rows).to_batches()
                yield block
                first += block.table.num_rows + len(block.malformed)
        rest = pa.Table.from_batches(held, schema=reader.schema)
        if rest.num_rows or malformed:
            yield _block(rest, first, malformed, last=True)
    except (pa.ArrowInvalid, UnicodeDecodeError) as exc:
        raise InputFileError(f"{label}: not a readable CSV file ({_first_line(exc)})") from None


def _mark_empty_rows(frame: pd.DataFrame) -> pd.DataFrame:
    """Rows of empty fields alone (an empty line, `,,`) marked `BLANK_LINE`, in their place."""
    empty = (frame == "").all(axis=1)
    if frame.empty or not empty.any():
        return frame
    return frame.assign(**{PRE_REJECTED: empty.map({True: BLANK_LINE, False: None})})


def _line_raw(text: str) -> str:
    """The quarantine's `raw` for a line the reader could not split into the header's fields."""
    if len(text) <= LINE_KEPT:
        return json.dumps({"line": text})
    return json.dumps({"line": text[:LINE_KEPT], "line_length": len(text)})


def _block(
    table: Any, first: int, malformed: deque[tuple[int, str, str]], last: bool = False
) -> TextBlock:
    """The block starting at row `first`, with the malformed lines that fall inside it (and,
    for the `last` block, every one left)."""
    end, placed = first + table.num_rows, []
    while malformed and (last or malformed[0][0] < end):
        placed.append(malformed.popleft())
        end += 1  # each malformed line pushes the block's last row one further
    return TextBlock(table, first, placed)


def _trimmed(batch: Any) -> Any:
    """The batch with leading spaces dropped from every value (what a space after a comma is)."""
    import pyarrow as pa
    from pyarrow import compute

    columns = [compute.utf8_ltrim(column, characters=" ") for column in batch.columns]
    return pa.RecordBatch.from_arrays(columns, names=batch.schema.names)


def _csv_file_chunks(path: Path, chunk_rows: int) -> Iterator[Chunk]:
    for chunk in csv_chunks(path, chunk_rows, str(path)):
        if len(chunk.frame):
            yield chunk


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
    with path.open("r", encoding="utf-8") as handle:
        yield from jsonl_chunks(handle, chunk_rows)


def jsonl_chunks(lines: Iterable[str], chunk_rows: int) -> Iterator[Chunk]:
    """Chunks of `chunk_rows` lines of JSON Lines (a file, or a pulled body), a row's number
    being its line number. A line that is not a JSON object is a row holding its reason; blank
    lines are `BLANK_LINE` rows, dropped by validation; a chunk of blank lines alone is none."""
    source = iter(lines)
    first = 1
    while True:
        block = list(islice(source, chunk_rows))
        if not block:
            return
        frame = _parse_jsonl_lines(block)
        if frame is not None:  # a chunk of blank lines alone has no rows, nor columns
            yield Chunk(set_aside_invalid_text(frame), first)
        first += len(block)


def _parse_jsonl_lines(lines: list[str]) -> pd.DataFrame | None:
    """The rows of a block of lines, a blank line (empty or only white space) as a `BLANK_LINE`
    row in its place; None when every line is blank."""
    blank = [i for i, line in enumerate(lines) if not line.strip()]
    if not blank:
        return _parse_jsonl(lines)
    if len(blank) == len(lines):
        return None
    filled = np.setdiff1d(np.arange(len(lines)), blank)
    frame = _parse_jsonl([lines[i] for i in filled]).set_axis(filled)
    marks = pd.DataFrame({PRE_REJECTED: BLANK_LINE}, index=blank)
    return pd.concat([frame, marks]).sort_index().reset_index(drop=True)


def _parse_jsonl(lines: list[str]) -> pd.DataFrame:
    """Parse a block of JSON lines in C; only a block that fails is re-read line by line."""
    try:
        frame = pd.read_json(
            io.StringIO("".join(lines)), lines=True, dtype=False, convert_dates=False
        )
        if len(frame) == len(lines):
            return frame
    except (ValueError, AttributeError, TypeError):
        # pandas raises AttributeError for a line of JSON that is not an object (`[1, 2]`).
        pass
    records: list[dict[str, object]] = []
    for line in lines:
        try:
            value = json.loads(line)
        except json.JSONDecodeError:
            value = None
        if not isinstance(value, dict):
            # Keep the row so it is quarantined with its number instead of vanishing.
            value = {PRE_REJECTED: f"not a JSON object: {line.rstrip()[:200]}"}
        records.append(value)
    return pd.DataFrame.from_records(records)


def set_aside_invalid_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Rows holding text that is not Unicode (a lone surrogate, which a JSON `\\ud800` escape
    can carry and no store can keep) set aside with that reason, their odd cells cleared.

    For rows parsed from JSON; a CSV file or body has been decoded as UTF-8 already.
    """
    reasons = pd.Series(None, index=frame.index, dtype=object)
    for column in frame.columns:
        if frame[column].dtype != object or column == PRE_REJECTED:
            continue
        odd = frame[column].map(_lone_surrogate).to_numpy(dtype=bool)
        if odd.any():
            frame = frame.copy() if reasons.isna().all() else frame
            frame.loc[odd, column] = None
            reasons[odd & reasons.isna().to_numpy()] = f"{column} is not Unicode text"
    if reasons.isna().all():
        return frame
    if PRE_REJECTED in frame:
        reasons = frame[PRE_REJECTED].where(frame[PRE_REJECTED].notna(), reasons)
    return frame.assign(**{PRE_REJECTED: reasons})


def _lone_surrogate(value: object) -> bool:
    if not isinstance(value, str):
        return False
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def _first_line(exc: BaseException) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
