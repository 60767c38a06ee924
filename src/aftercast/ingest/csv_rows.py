"""Where a CSV file's rows begin and end: its header line, and a quote left open at its end.

Arrow's reader ends a quoted field that never closes at the end of the file and keeps what it
held as the value, so a last line `s1,2026-01-01,"2` read as the value 2. Such a field can only
be the file's last: `open_quote_line` finds it by comparing the last row's last value with the
file's last bytes (only the last batch is looked at, so the normal path costs nothing).
"""

from __future__ import annotations

import csv
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO, Any

from aftercast.errors import InputFileError

UNCLOSED_QUOTE = "malformed CSV line: a quoted field opens and never closes"
_LINE_WINDOW = 4_096  # bytes read before the open quote for the line's text (its start)


def csv_header(source: Path | IO[bytes], label: str) -> list[str]:
    """The header row's names (a BOM dropped); the source is left at its start."""
    if isinstance(source, Path):
        with source.open("rb") as handle:
            line = handle.readline()
    else:
        start = source.tell()
        line = source.readline()
        source.seek(start)
    text = line.decode("utf-8", errors="replace").lstrip("\ufeff").rstrip("\r\n")
    if not text.strip():
        raise InputFileError(f"{label}: the file has no header row")
    return next(csv.reader([text]))


def with_last(batches: Iterable[Any]) -> Iterator[tuple[Any, bool]]:
    """Each batch with whether it is the reader's last (one batch read ahead)."""
    iterator = iter(batches)
    held = next(iterator, None)
    while held is not None:
        following = next(iterator, None)
        yield held, following is None
        held = following


def open_quote_line(source: Path | IO[bytes], batch: Any, number: int, label: str) -> str | None:
    """The text of the file's last row (row `number`, the batch's last) if its last field opens
    a quote that never closes, else None.

    Such a field confined to its line is a malformed line, rejected like one. One that runs
    over further lines refuses the file: those lines may be rows the quote swallowed or a
    value's lines, and which cannot be told.
    """
    if batch.num_rows == 0:
        return None
    value = batch.column(batch.num_columns - 1)[batch.num_rows - 1].as_py()
    if value is None or not value.strip('"'):  # a value of quotes alone reads either way
        return None
    opened = b'"' + value.replace('"', '""').encode("utf-8")
    tail = _tail(source, len(opened) + _LINE_WINDOW)
    if not tail.endswith(opened):
        return None
    if "\n" in value.rstrip("\r\n") or "\r" in value.rstrip("\r\n"):
        raise InputFileError(
            f"{label}: row {number} opens a quoted field that never closes, so the lines after "
            "it cannot be told from its value; close the quote"
        )
    before = tail[: len(tail) - len(opened)]
    start = before.rfind(b"\n") + 1
    return (before[start:] + opened).decode("utf-8", errors="replace").rstrip("\r\n")


def _tail(source: Path | IO[bytes], size: int) -> bytes:
    """The last `size` bytes of the file or body (all of it if shorter)."""
    if isinstance(source, Path):
        with source.open("rb") as handle:
            return _read_tail(handle, size)
    return _read_tail(source, size)


def _read_tail(handle: IO[bytes], size: int) -> bytes:
    end = handle.seek(0, 2)
    handle.seek(max(0, end - size))
    return handle.read()
