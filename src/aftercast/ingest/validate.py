"""Row validation: raw chunks in, normalised rows and rejections (with reasons) out.

Pure and vectorised: every check is a column operation over the whole chunk, and a row gets the
first reason that applies. What the CONTRACT rejects is rejected here, never silently dropped:
a missing or unparseable key or time, a non-finite number, `lower > point` or `point > upper`,
a target not after the issue period, a level outside (0, 100), and rows of one file that share a
key but disagree (all of them, each naming the others).
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from aftercast.errors import InputFileError
from aftercast.ingest.cells import (
    Reasons,
    flag_unreadable,
    key_values,
    number_values,
    time_values,
)
from aftercast.ingest.files import BLANK_LINE, MARKERS, PRE_RAW
from aftercast.periods import periods_by_series

FORECAST_REQUIRED = ["series_id", "model", "issued_at", "target_at", "point"]
ACTUAL_REQUIRED = ["series_id", "observed_at", "value"]
_BOUND = re.compile(r"^(lower|upper|q)_(\d+(?:\.\d+)?)$")


@dataclass
class Checked:
    """One chunk after validation."""

    good: pd.DataFrame
    rejected: pd.DataFrame  # row_number, reason, raw (JSON text)
    duplicates: int = 0  # rows repeating another row of the chunk exactly (kept once)
    intervals: pd.DataFrame = field(default_factory=pd.DataFrame)  # row, level, lower, upper
    quantiles: pd.DataFrame = field(default_factory=pd.DataFrame)  # row, prob, value
    first_row: int = 1
    rejected_keys: list[str] = field(default_factory=list)  # refused when written (series only)


FOUND_LISTED = 20  # columns a missing-column error lists; a wide file's others are counted


def require_columns(frame: pd.DataFrame, required: list[str], source: str) -> None:
    """Raise InputFileError naming the missing columns and the columns the file has.

    The columns found show a misspelt or differently named header at once; a name with
    spaces around it or none at all is quoted, since it would otherwise look right.
    """
    missing = [c for c in required if c not in frame.columns]
    if not missing:
        return
    found = [str(c) for c in frame.columns if c not in MARKERS]
    shown = [c if c and c == c.strip() else repr(c) for c in found[:FOUND_LISTED]]
    if len(found) > FOUND_LISTED:
        shown.append(f"and {len(found) - FOUND_LISTED} more")
    raise InputFileError(
        f"{source}: missing required column{'s' if len(missing) > 1 else ''} "
        f"{', '.join(missing)} (columns found: {', '.join(shown) or 'none'})"
    )


def extra_columns(frame: pd.DataFrame, known: list[str]) -> list[str]:
    """Columns the kind does not read (said once per file); the reader's own marker is not one."""
    known = [*known, *MARKERS]
    return [c for c in frame.columns if c not in known and not _BOUND.match(str(c))]


def _raw_json(frame: pd.DataFrame) -> pd.Series:
    records = frame.astype("string").to_dict("records")
    return pd.Series(
        [json.dumps({k: (None if pd.isna(v) else v) for k, v in r.items()}) for r in records],
        index=frame.index,
        dtype=object,
    )


def _rejections(frame: pd.DataFrame, reasons: Reasons, first_row: int) -> pd.DataFrame:
    bad = reasons.bad
    rejected = pd.DataFrame(
        {
            "row_number": (frame.index[bad].to_numpy() + first_row).astype("int64"),
            "reason": reasons.reason[bad].astype(str).to_numpy(),
        }
    )
    # The markers hold the reason, stored beside the raw values already, and for a row the
    # reader could not split (a malformed line) what it held instead of its cells.
    raw = frame.loc[bad].drop(columns=list(MARKERS), errors="ignore")
    rejected["raw"] = _raw_json(raw).to_numpy() if bad.any() else []
    if PRE_RAW in frame.columns and bad.any():
        held = frame.loc[bad, PRE_RAW].to_numpy()
        rejected["raw"] = np.where(pd.notna(held), held, rejected["raw"].to_numpy())
    return rejected


def _conflicts(
    good: pd.DataFrame, key: list[str], values: list[str], reasons: Reasons, first_row: int
) -> int:
    """Flag rows sharing a key but disagreeing; drop exact repeats. Returns the repeat count."""
    dup = good.duplicated(subset=key, keep=False) & ~reasons.bad
    if not dup.any():
        return 0
    block = good.loc[dup, key + values].copy()
    block["_row"] = block.index.to_numpy() + 0
    distinct = block.groupby(key, dropna=False)[values].nunique(dropna=False).max(axis=1)
    conflicted_keys = distinct[distinct > 1].index
    keyed = block.set_index(key)
    clash = keyed.index.isin(conflicted_keys)
    clashing = keyed[clash]
    if len(clashing):
        rows = clashing.groupby(level=list(range(len(key))))["_row"].apply(list)
        for _, members in rows.items():
            numbers = [int(first_row + i) for i in members]
            for i, number in zip(members, numbers, strict=True):
                others = ", ".join(str(n) for n in numbers if n != number)
                reasons.flag(
                    good.index == i, f"same key as another row with other values: row {others}"
                )
    repeats = block.loc[~clash].duplicated(subset=key, keep="first")
    reasons.flag(good.index.isin(repeats[repeats].index), "__repeat__")
    return int(repeats.sum())


def _bounds(
    frame: pd.DataFrame, point: pd.Series, reasons: Reasons
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Long frames of interval bounds and quantiles per row, with their rejections flagged."""
    levels: dict[float, dict[str, str]] = {}
    probs: dict[float, str] = {}
    for column in frame.columns:
        match = _BOUND.match(str(column))
        if not match:
            continue
        kind, number = match.group(1), float(match.group(2))
        if not 0 < number < 100:
            present = frame[column].notna() & (frame[column].astype("string").str.strip() != "")
            reasons.flag(present, f"level outside (0, 100): column {column}")
            continue
        if kind == "q":
            probs[number] = str(column)
        else:
            levels.setdefault(number, {})[kind] = str(column)
    intervals = []
    for level, columns in sorted(levels.items()):
        if set(columns) != {"lower", "upper"}:
            only = next(iter(columns.values()))
            reasons.flag(
                frame[only].notna() & (frame[only].astype("string") != ""),
                f"interval bound without its pair: {only}",
            )
            continue
        lower = number_values(frame, columns["lower"], reasons, required=False)
        upper = number_values(frame, columns["upper"], reasons, required=False)
        one_side = lower.isna() != upper.isna()
        reasons.flag(
            one_side, f"interval bound without its pair: {columns['lower']}/{columns['upper']}"
        )
        reasons.flag(lower > point, f"{columns['lower']} > point")
        reasons.flag(point > upper, f"point > {columns['upper']}")
        keep = lower.notna() & upper.notna()
        intervals.append(
            pd.DataFrame(
                {
                    "row": frame.index[keep],
                    "level": level,
                    "lower": lower[keep].to_numpy(),
                    "upper": upper[keep].to_numpy(),
                }
            )
        )
    quantiles = []
    previous: pd.Series | None = None
    for prob, column in sorted(probs.items()):
        value = number_values(frame, column, reasons, required=False)
        if previous is not None:
            reasons.flag(value < previous, f"quantiles cross: {column}")
        previous = value.where(value.notna(), previous) if previous is not None else value
        keep = value.notna()
        quantiles.append(
            pd.DataFrame({"row": frame.index[keep], "prob": prob, "value": value[keep].to_numpy()})
        )
    empty_i = pd.DataFrame({"row": [], "level": [], "lower": [], "upper": []})
    empty_q = pd.DataFrame({"row": [], "prob": [], "value": []})
    return (
        pd.concat(intervals, ignore_index=True) if intervals else empty_i,
        pd.concat(quantiles, ignore_index=True) if quantiles else empty_q,
    )


def check_forecasts(frame: pd.DataFrame, first_row: int, settings: pd.DataFrame) -> Checked:
    """Validate a chunk of forecast rows; `settings` (frequency, timezone) is indexed by key."""
    frame = frame.reset_index(drop=True)
    reasons = Reasons(frame.index)
    flag_unreadable(frame, reasons)
    series_key = key_values(frame, "series_id", reasons)
    model = key_values(frame, "model", reasons)
    known = settings.reindex(series_key.fillna(""))
    zones = pd.Series(known["timezone"].to_numpy(), index=frame.index).fillna("UTC")
    freqs = pd.Series(known["frequency"].to_numpy(), index=frame.index).fillna("D")
    issued = time_values(frame, "issued_at", zones, reasons)
    target = time_values(frame, "target_at", zones, reasons)
    point = number_values(frame, "point", reasons)
    intervals, quantiles = _bounds(frame, point, reasons)
    ok_times = issued.notna() & target.notna()
    issue_period = pd.Series(0, index=frame.index, dtype="int64")
    target_period = pd.Series(0, index=frame.index, dtype="int64")
    if ok_times.any():
        issue_period[ok_times] = periods_by_series(
            issued[ok_times].to_numpy("int64"),
            freqs[ok_times].to_numpy(),
            zones[ok_times].to_numpy(),
        )
        target_period[ok_times] = periods_by_series(
            target[ok_times].to_numpy("int64"),
            freqs[ok_times].to_numpy(),
            zones[ok_times].to_numpy(),
        )
    horizon = target_period - issue_period
    reasons.flag(ok_times & (horizon < 1), "target_at is not after the issue period")
    if "horizon" in frame.columns:
        given = number_values(frame, "horizon", reasons, required=False)
        disagree = given.notna() & (given != horizon)
        reasons.flag(
            disagree,
            "horizon column disagrees with the times: column says "
            + given.where(disagree).map(_number_text, na_action="ignore").fillna("")
            + ", times give "
            + horizon.astype("string"),
        )
    good = pd.DataFrame(
        {
            "series_key": series_key,
            "model": model,
            "issued_at": issued,
            "target_at": target,
            "issue_period": issue_period,
            "target_period": target_period,
            "horizon": horizon,
            "point": point,
        }
    )
    signature = bound_signature(intervals, quantiles, frame.index)
    good["_bounds"] = signature
    repeats = _conflicts(
        good,
        ["series_key", "model", "issued_at", "target_at"],
        ["point", "_bounds"],
        reasons,
        first_row,
    )
    return _package(
        frame, reasons, first_row, good.drop(columns="_bounds"), repeats, intervals, quantiles
    )


def bound_signature(intervals: pd.DataFrame, quantiles: pd.DataFrame, index: pd.Index) -> pd.Series:
    """A 64-bit fingerprint of each row's interval bounds and quantiles (0 for none).

    Each bound is hashed in C and the hashes of one row are combined with XOR, so the
    fingerprint does not depend on column order and a whole chunk is compared in one pass.
    """
    parts = []
    if len(intervals):
        parts.append(
            pd.DataFrame(
                {
                    "row": intervals["row"].to_numpy(),
                    "k": 1,
                    "a": intervals["level"].to_numpy(np.float64),
                    "b": intervals["lower"].to_numpy(np.float64),
                    "c": intervals["upper"].to_numpy(np.float64),
                }
            )
        )
    if len(quantiles):
        parts.append(
            pd.DataFrame(
                {
                    "row": quantiles["row"].to_numpy(),
                    "k": 2,
                    "a": quantiles["prob"].to_numpy(np.float64),
                    "b": quantiles["value"].to_numpy(np.float64),
                    "c": 0.0,
                }
            )
        )
    if not parts:
        return pd.Series(np.zeros(len(index), dtype=np.uint64), index=index)
    long = pd.concat(parts, ignore_index=True).sort_values("row", kind="stable")
    hashes = pd.util.hash_pandas_object(long[["k", "a", "b", "c"]], index=False).to_numpy()
    rows = long["row"].to_numpy()
    starts = np.flatnonzero(np.r_[True, rows[1:] != rows[:-1]])
    combined = np.bitwise_xor.reduceat(hashes, starts)
    return pd.Series(combined, index=rows[starts]).reindex(index, fill_value=np.uint64(0))


def _package(
    frame: pd.DataFrame,
    reasons: Reasons,
    first_row: int,
    good: pd.DataFrame,
    repeats: int,
    intervals: pd.DataFrame | None = None,
    quantiles: pd.DataFrame | None = None,
) -> Checked:
    """Split into kept rows and rejections; exact repeats are neither (counted as unchanged)."""
    is_repeat = reasons.reason.isin(["__repeat__", BLANK_LINE]).fillna(False).astype(bool)
    reasons.reason[is_repeat] = pd.NA  # a blank line is neither a rejection nor a repeat
    kept = good.loc[~reasons.bad & ~is_repeat]
    checked = Checked(kept, _rejections(frame, reasons, first_row), repeats)
    if intervals is not None:
        checked.intervals = intervals[intervals["row"].isin(kept.index)]
    if quantiles is not None:
        checked.quantiles = quantiles[quantiles["row"].isin(kept.index)]
    return checked


def check_actuals(frame: pd.DataFrame, first_row: int, settings: pd.DataFrame) -> Checked:
    """Validate a chunk of actual rows; the key is (series, period of observed_at)."""
    frame = frame.reset_index(drop=True)
    reasons = Reasons(frame.index)
    flag_unreadable(frame, reasons)
    series_key = key_values(frame, "series_id", reasons)
    known = settings.reindex(series_key.fillna(""))
    zones = pd.Series(known["timezone"].to_numpy(), index=frame.index).fillna("UTC")
    freqs = pd.Series(known["frequency"].to_numpy(), index=frame.index).fillna("D")
    observed = time_values(frame, "observed_at", zones, reasons)
    value = number_values(frame, "value", reasons)
    period = pd.Series(0, index=frame.index, dtype="int64")
    ok = observed.notna()
    if ok.any():
        period[ok] = periods_by_series(
            observed[ok].to_numpy("int64"), freqs[ok].to_numpy(), zones[ok].to_numpy()
        )
    good = pd.DataFrame(
        {"series_key": series_key, "observed_at": observed, "period": period, "value": value}
    )
    repeats = _conflicts(
        good, ["series_key", "period"], ["value", "observed_at"], reasons, first_row
    )
    return _package(frame, reasons, first_row, good, repeats)


def _number_text(value: float) -> str:
    """A number as a reason quotes it: a whole number as its integer text (`3`, not `3.0`)."""
    return str(int(value)) if float(value).is_integer() else repr(float(value))
