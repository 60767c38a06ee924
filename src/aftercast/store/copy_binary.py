"""PostgreSQL's binary COPY format, built from a data frame with numpy, column by column.

The format (PostgreSQL documentation, "COPY", section "Binary Format"): a signature, two
32-bit header fields, then per row a 16-bit field count and per field a 32-bit length (-1 for
NULL) followed by the value in network byte order; a 16-bit -1 ends the data. Every row is
first laid out at a fixed width (each text field padded to its column's longest value) in one
numpy record array, then the bytes a row does not use (padding, the value of a NULL) are
dropped with one boolean mask. No Python code runs per row or per value, unlike writing CSV
text, whose float formatting cost more than the database's own work in the daily cycle.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

SIGNATURE = b"PGCOPY\n\xff\r\n\x00" + (0).to_bytes(4, "big") + (0).to_bytes(4, "big")
TRAILER = (-1).to_bytes(2, "big", signed=True)
# Fixed-width types by the name PostgreSQL gives the column, with their wire layout.
FIXED = {
    "BIGINT": ">i8",
    "INTEGER": ">i4",
    "SMALLINT": ">i2",
    "FLOAT": ">f8",
    "DOUBLE PRECISION": ">f8",
    "REAL": ">f4",
    "BOOLEAN": "?",
}
TEXT = ("TEXT", "VARCHAR")
BYTES = "BYTEA"
# Beyond this many bytes of padded rows, text columns go the CSV way instead.
MAX_LAYOUT_BYTES = 512 * 1024 * 1024


def supported(type_name: str) -> bool:
    return type_name in FIXED or type_name.startswith(TEXT) or type_name == BYTES


def _text_values(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """UTF-8 bytes of each value (fixed width) and each value's length, -1 for NULL."""
    missing = column.isna().to_numpy()
    strings = column.astype(object).where(~missing, "").astype(str).to_numpy(dtype=str)
    encoded = np.char.encode(strings, "utf-8") if strings.size else strings.astype("S1")
    if encoded.dtype.itemsize == 0:  # every value empty
        encoded = encoded.astype("S1")
    lengths = np.char.str_len(encoded).astype(np.int32)
    lengths[missing] = -1
    return encoded, lengths


def _byte_values(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Each value's bytes padded to the longest (numpy's "S" type would drop trailing zero
    bytes, which a packed float may end with) and each value's length, -1 for NULL."""
    missing = column.isna().to_numpy()
    present = column.to_numpy(dtype=object)[~missing]
    used = np.fromiter(map(len, present), dtype=np.int64, count=len(present))
    width = max(int(used.max()) if used.size else 0, 1)
    flat = np.frombuffer(b"".join(present.tolist()), dtype=np.uint8)
    padded = np.zeros((len(column), width), dtype=np.uint8)
    rows = np.repeat(np.flatnonzero(~missing), used)
    padded[rows, np.arange(flat.size) - np.repeat(np.cumsum(used) - used, used)] = flat
    lengths = np.full(len(column), -1, dtype=np.int32)
    lengths[~missing] = used
    return padded.view(np.dtype((np.void, width))).ravel(), lengths


def _fixed_values(column: pd.Series, layout: str) -> tuple[np.ndarray, np.ndarray] | None:
    """The values in `layout` (NULL as zero) and each value's length, -1 for NULL; None where
    a value would not survive the cast (a fraction or an overflow in an integer column), so
    that the CSV path lets the database refuse it as it always did."""
    missing = column.isna().to_numpy()
    kind = np.dtype(layout)
    if kind.kind == "i" and not _fits_integers(column, missing, kind):
        return None
    values = column.to_numpy(dtype=kind.newbyteorder("="), na_value=0)
    lengths = np.full(len(column), kind.itemsize, dtype=np.int32)
    lengths[missing] = -1
    return values, lengths


def _fits_integers(column: pd.Series, missing: np.ndarray, kind: np.dtype) -> bool:
    present = pd.to_numeric(column[~missing], errors="coerce").to_numpy(dtype=np.float64)
    if present.size == 0:
        return True
    limits = np.iinfo(kind.newbyteorder("="))
    if column.dtype.kind in "iu":  # already integers: only the range can fail
        return bool(column[~missing].min() >= limits.min and column[~missing].max() <= limits.max)
    whole = np.isfinite(present).all() and (present == np.round(present)).all()
    return bool(whole and present.min() >= limits.min and present.max() <= limits.max)


def encode(frame: pd.DataFrame, type_names: list[str]) -> bytes | None:
    """The whole COPY payload for `frame`, or None where it cannot stand for the values
    exactly (too large a layout, a value an integer column cannot hold): then use CSV."""
    count = len(frame)
    values, lengths = [], []
    for name, type_name in zip(frame.columns, type_names, strict=True):
        if type_name in FIXED:
            fixed = _fixed_values(frame[name], FIXED[type_name])
            if fixed is None:
                return None
            value, length = fixed
        elif type_name == BYTES:
            value, length = _byte_values(frame[name])
        else:
            value, length = _text_values(frame[name])
        values.append(value)
        lengths.append(length)
    fields: list[tuple[str, str]] = [("count", ">i2")]
    for i, value in enumerate(values):
        layout = value.dtype.newbyteorder(">") if value.dtype.kind in "iuf" else value.dtype
        fields += [(f"length{i}", ">i4"), (f"value{i}", layout.str)]
    records = np.zeros(count, dtype=np.dtype(fields))
    if records.nbytes > MAX_LAYOUT_BYTES:
        return None
    records["count"] = len(values)
    for i, (value, length) in enumerate(zip(values, lengths, strict=True)):
        records[f"length{i}"] = length
        records[f"value{i}"] = value
    raw = records.view(np.uint8).reshape(count, records.dtype.itemsize)
    keep = np.ones(raw.shape, dtype=bool)
    partial = False
    for i, (value, length) in enumerate(zip(values, lengths, strict=True)):
        width = value.dtype.itemsize
        used = np.clip(length, 0, None)
        if (used == width).all():
            continue
        offsets = records.dtype.fields
        assert offsets is not None
        start = int(offsets[f"value{i}"][1])
        keep[:, start : start + width] = np.arange(width)[None, :] < used[:, None]
        partial = True
    body = raw[keep].tobytes() if partial else raw.tobytes()
    return SIGNATURE + body + TRAILER
