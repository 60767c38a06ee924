"""Rows of one file that share a key but disagree, found across the whole file.

Validation finds such rows within a chunk; a file longer than one chunk (`ingest.chunk_rows`)
is first read once more to find the keys whose rows fall in different chunks. Every row of such
a key is rejected, as within a chunk: neither value can be trusted over the other, and taking
the later one as a revision would hide the producer's mistake. The scan keeps two 64-bit hashes,
the chunk and the row number per row (28 bytes), never the rows themselves. Keys are compared
as their stripped text (a file writes one key one way), values as numbers where they parse as
numbers (so `5` and `5.0` agree) and as stripped text otherwise.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd

from aftercast.ingest.files import MARKERS, PRE_REJECTED, Chunk, TextBlock

KEYS = {
    "forecasts": ["series_id", "model", "issued_at", "target_at"],
    "actuals": ["series_id", "observed_at"],
    "series": ["series_id"],
}
_MIX = np.uint64(0x100000001B3)  # the 64-bit FNV prime, to fold one column's hash into the next
REASON = "same key as another row with other values"  # the reason validation gives in a chunk


def _text_hash(values: pd.Series) -> np.ndarray:
    # Keys repeat over a file (a few hundred series and times), so strip and hash distinct texts.
    codes, distinct = pd.factorize(values.astype("string"), use_na_sentinel=True)
    stripped = pd.Series(distinct, dtype="string").str.strip().fillna("").to_numpy(object)
    hashed = pd.util.hash_array(stripped, categorize=False) if len(stripped) else stripped
    out = np.zeros(len(values), dtype=np.uint64)
    present = codes >= 0
    out[present] = np.asarray(hashed, dtype=np.uint64)[codes[present]]
    return out


def _numbers(values: pd.Series) -> np.ndarray:
    """The values as float64, NaN where a value is not a number."""
    if values.dtype.kind in "fiub":
        return values.to_numpy(dtype=np.float64, na_value=np.nan)
    import pyarrow as pa
    from pyarrow import compute

    try:  # Arrow's cast parses text in C++, several times quicker than pandas
        text = compute.utf8_trim_whitespace(pa.array(values.to_numpy(object), type=pa.string()))
        text = compute.if_else(compute.equal(text, ""), None, text)
        return compute.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # some cell is not a number: the careful way
        return pd.to_numeric(values, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)


def _value_hash(values: pd.Series) -> np.ndarray:
    numbers = _numbers(values)
    numbers = np.where(numbers == 0.0, 0.0, numbers)  # -0 and 0 are one value
    hashed = numbers.view(np.uint64).copy()
    text = np.isnan(numbers)
    if text.any():
        hashed[text] = _text_hash(values[text])
    return hashed


def _fold(frame: pd.DataFrame, columns: list[str], one: object) -> np.ndarray:
    folded = np.zeros(len(frame), dtype=np.uint64)
    for column in columns:
        folded = (folded * _MIX) ^ one(frame[column])  # type: ignore[operator]
    return folded


def _chunk_hashes(chunk: Chunk, key_columns: list[str]) -> pd.DataFrame | None:
    frame = chunk.frame
    usable = (
        frame[PRE_REJECTED].isna().to_numpy()
        if PRE_REJECTED in frame
        else np.ones(len(frame), dtype=bool)
    )
    frame = frame[usable]
    if frame.empty or any(c not in frame for c in key_columns):
        return None
    values = [c for c in frame.columns if c not in key_columns and c not in MARKERS]
    return pd.DataFrame(
        {
            "key": _fold(frame, key_columns, _text_hash),
            "value": _fold(frame, values, _value_hash),
            "row": np.flatnonzero(usable) + chunk.first_row,
        }
    )


def _arrow_text_hash(column: Any) -> np.ndarray:
    # Hash each distinct stripped text once, in Arrow's dictionary of the column.
    from pyarrow import compute

    encoded = compute.dictionary_encode(compute.utf8_trim_whitespace(column)).combine_chunks()
    distinct = encoded.dictionary.to_numpy(zero_copy_only=False).astype(object)
    hashed = pd.util.hash_array(distinct, categorize=False) if len(distinct) else distinct
    return np.asarray(hashed, dtype=np.uint64)[encoded.indices.to_numpy()]


def _arrow_value_hash(column: Any) -> np.ndarray:
    import pyarrow as pa
    from pyarrow import compute

    text = compute.utf8_trim_whitespace(column)
    try:
        blank = compute.equal(text, "")
        numbers = compute.cast(compute.if_else(blank, None, text), pa.float64())
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # some cell is not a number: the careful way
        return _value_hash(column.to_pandas())
    values = numbers.to_numpy(zero_copy_only=False)
    values = np.where(values == 0.0, 0.0, values)  # -0 and 0 are one value
    hashed = values.view(np.uint64).copy()
    empty = np.isnan(values)
    if empty.any():
        hashed[empty] = _arrow_text_hash(text)[empty]
    return hashed


def _block_hashes(block: TextBlock, key_columns: list[str]) -> pd.DataFrame | None:
    table = block.table
    if table.num_rows == 0 or any(c not in table.column_names for c in key_columns):
        return None
    folded = [np.zeros(table.num_rows, dtype=np.uint64), np.zeros(table.num_rows, dtype=np.uint64)]
    for name in table.column_names:
        is_key = name in key_columns
        hashed = (_arrow_text_hash if is_key else _arrow_value_hash)(table.column(name))
        folded[0 if is_key else 1] = (folded[0 if is_key else 1] * _MIX) ^ hashed
    return pd.DataFrame({"key": folded[0], "value": folded[1], "row": block.row_numbers()})


def find_conflicts(kind: str, parts: Iterable[Chunk | TextBlock]) -> dict[int, str]:
    """Row number -> reason, for the rows whose key has other values in another chunk.

    `parts` are the file's chunks, or for CSV its text blocks, hashed in Arrow without making
    Python objects of every cell.
    """
    if kind not in KEYS:
        return {}
    key_columns = KEYS[kind]
    hashes: list[pd.DataFrame] = []
    for number, part in enumerate(parts):
        if isinstance(part, TextBlock):
            found = _block_hashes(part, key_columns)
        else:
            found = _chunk_hashes(part, key_columns)
        if found is not None:
            hashes.append(found.assign(chunk=np.int32(number)))
    if len(hashes) < 2:
        return {}
    rows = pd.concat(hashes, ignore_index=True)
    spread = rows.groupby("key").agg(values=("value", "nunique"), chunks=("chunk", "nunique"))
    clashing = spread.index[(spread["values"] > 1) & (spread["chunks"] > 1)]
    found = rows[rows["key"].isin(clashing)].sort_values("row")
    reasons: dict[int, str] = {}
    for _, members in found.groupby("key")["row"]:
        numbers = members.tolist()  # a handful per key; conflicts are rare
        for row in numbers:
            others = [str(n) for n in numbers if n != row][:10]
            reasons[int(row)] = f"{REASON}: row {', '.join(others)}"
    return reasons


def mark_conflicts(chunk: Chunk, reasons: dict[int, str]) -> Chunk:
    """The chunk with its conflicting rows set aside, so validation rejects them with `reasons`."""
    if not reasons:
        return chunk
    numbers = np.arange(len(chunk.frame)) + chunk.first_row
    hits = np.isin(numbers, np.fromiter(reasons, dtype=np.int64))
    if not hits.any():
        return chunk
    frame = chunk.frame.copy()
    if PRE_REJECTED not in frame:
        frame[PRE_REJECTED] = pd.Series(pd.NA, index=frame.index, dtype=object)
    frame.loc[hits, PRE_REJECTED] = [reasons[int(n)] for n in numbers[hits]]
    return Chunk(frame, chunk.first_row)
