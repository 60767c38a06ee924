"""Cells of a raw chunk parsed into keys, times and numbers, each bad cell given a reason.

The building blocks of `validate`: column operations over a whole chunk, where a row keeps the
first reason that applies (`Reasons`). Parsing runs once over each column and the costly parts
(stripping, building reason text) only over the cells the quick parse left odd, so a clean
chunk of a million rows costs little more than pandas' own number and time parsing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from pandas._libs import lib

from aftercast.ingest.files import PRE_REJECTED
from aftercast.periods import daylight_saving_faults, parse_times

# pandas keeps an all-integer column's values as integers and otherwise uses its float parse:
# the two differ only from 2**53 on and for "-0", so then the column is parsed whole.
_EXACT = 2.0**53


class Reasons:
    """Collects the first rejection reason per row."""

    def __init__(self, index: pd.Index) -> None:
        self.reason = pd.Series(pd.NA, index=index, dtype="string")

    def flag(self, mask: pd.Series | np.ndarray, reason: str | pd.Series) -> None:
        """Give `reason` to the rows of `mask` without one yet.

        A Series mask or reason may cover only some rows (by label), so that a check can build
        its reason text over the rows it flags instead of the whole chunk.
        """
        if isinstance(mask, pd.Series):
            mask = mask.reindex(self.reason.index).to_numpy(dtype=bool, na_value=False)
        rows = np.flatnonzero(np.asarray(mask, dtype=bool) & self.reason.isna().to_numpy())
        if not len(rows):
            return
        if isinstance(reason, pd.Series):
            reason = reason.reindex(self.reason.index[rows]).astype("string").to_numpy()
        self.reason.iloc[rows] = reason

    @property
    def bad(self) -> pd.Series:
        return self.reason.notna()


def flag_unreadable(frame: pd.DataFrame, reasons: Reasons) -> None:
    """Reject the rows the reader could not read as rows (a malformed line), with its reason."""
    if PRE_REJECTED in frame.columns:
        why = frame[PRE_REJECTED]
        reasons.flag(why.notna(), why.astype("string"))


def text_values(frame: pd.DataFrame, column: str) -> pd.Series:
    # Keys repeat over a chunk (a few hundred series), so strip each distinct text once.
    codes, distinct = pd.factorize(frame[column].astype("string"))
    stripped = pd.Series(distinct, dtype="string").str.strip().replace("", pd.NA)
    return pd.Series(stripped.array.take(codes, allow_fill=True), index=frame.index, name=column)


def key_values(frame: pd.DataFrame, column: str, reasons: Reasons) -> pd.Series:
    # Before factorizing: pandas' text hash table ends a text at a NUL, so "a\x00" would
    # silently become "a", and "\x00" and "" would share one code (and one text). The rows
    # rejected for a NUL are left out of the factorizing.
    holds = flag_nul(frame[column], column, reasons)
    if holds.any():
        frame = frame[[column]].mask(holds.to_numpy(bool)[:, None])
    values = text_values(frame, column)
    reasons.flag(values.isna(), f"missing {column}")
    return values


def flag_nul(values: pd.Series, column: str, reasons: Reasons) -> pd.Series:
    """Reject text holding a NUL character, which PostgreSQL's text type cannot store; the
    rows that hold one."""
    if values.dtype.kind not in "OU" and not isinstance(values.dtype, pd.StringDtype):
        return pd.Series(False, index=values.index)  # numbers and times hold no text
    holds = values.astype("string").str.contains("\x00", regex=False, na=False)
    reasons.flag(holds, f"{column} holds a NUL character")
    return holds


def time_values(frame: pd.DataFrame, column: str, zones: pd.Series, reasons: Reasons) -> pd.Series:
    raw = frame[column]
    parsed = parse_times(raw, zones)
    failed = raw[parsed.isna().to_numpy()]  # a missing time never parses, so only these can be
    if len(failed):
        text = failed.astype("string")
        reasons.flag(failed.isna() | (text.str.strip() == ""), f"missing {column}")
        _flag_daylight_saving(failed, text, zones, column, reasons)
        reasons.flag(parsed.isna(), "unparseable " + column + ": '" + text.fillna("") + "'")
    return parsed


def _flag_daylight_saving(
    failed: pd.Series, text: pd.Series, zones: pd.Series, column: str, reasons: Reasons
) -> None:
    """Local times that the zone's clock change skips or repeats: not a parse failure."""
    zone = zones.loc[failed.index].astype("string")
    fault = daylight_saving_faults(failed, zone)
    quoted = "'" + text.fillna("") + "' "
    skipped = fault.eq("nonexistent").fillna(False).astype(bool)
    reasons.flag(
        skipped,
        f"nonexistent local {column}: "
        + quoted[skipped]
        + "does not exist in "
        + zone[skipped]
        + " (the clocks go forward over it); give the time with its UTC offset",
    )
    twice = fault.eq("ambiguous").fillna(False).astype(bool)
    reasons.flag(
        twice,
        f"ambiguous local {column}: "
        + quoted[twice]
        + "happens twice in "
        + zone[twice]
        + " (the clocks go back over it); give the time with its UTC offset",
    )


def number_values(
    frame: pd.DataFrame, column: str, reasons: Reasons, required: bool = True
) -> pd.Series:
    """The column as pandas parses its stripped text; empty and non-finite cells get reasons.

    Stripping and reason text cost most, so they run only over cells the quick parse left odd.
    """
    raw = frame[column]
    values = _quick_numbers(raw)
    odd = np.ones(len(raw), dtype=bool) if values is None else ~np.isfinite(values)
    if values is None or odd.any():
        values = np.full(len(raw), np.nan) if values is None else values
        values[odd] = _text_numbers(raw[odd], column, reasons, required)
    finite = values[np.isfinite(values)]
    if ((np.abs(finite) >= _EXACT) | ((finite == 0) & np.signbit(finite))).any():
        values = _column_numbers(raw, raw.astype("string").str.strip())[0]
    return pd.Series(values, index=raw.index, name=raw.name)


def _quick_numbers(raw: pd.Series) -> np.ndarray | None:
    """The parse of the unstripped column (pandas skips the same whitespace), or None.

    A float column still goes through its text: that parse can move a value by its last bit, and
    a row ingested again must compare equal to what was stored.
    """
    if not isinstance(raw.dtype, np.dtype):
        return None
    if raw.dtype.kind in "iu":
        return raw.to_numpy(np.float64)
    if raw.dtype == np.float64:
        return _column_numbers(raw, raw.astype("string"))[0]
    if raw.dtype == object and lib.is_string_array(raw.to_numpy(), skipna=False):
        return np.asarray(pd.to_numeric(raw.to_numpy(), errors="coerce"), dtype=np.float64)
    return None


def _column_numbers(raw: pd.Series, text: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    empty = raw.isna() | (text == "")
    values = pd.to_numeric(text.where(~empty), errors="coerce").astype("float64")
    return values.to_numpy(copy=True), empty.to_numpy(dtype=bool, na_value=False)


def _text_numbers(raw: pd.Series, column: str, reasons: Reasons, required: bool) -> np.ndarray:
    text = raw.astype("string").str.strip()
    values, empty = _column_numbers(raw, text)
    if required:
        reasons.flag(pd.Series(empty, index=raw.index), f"missing {column}")
    bad = ~empty & ~np.isfinite(values)
    shown = f"{column} is not a finite number: '" + text[bad].fillna("") + "'"
    reasons.flag(pd.Series(bad, index=raw.index), shown)
    return values
