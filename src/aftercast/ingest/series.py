"""Series metadata rows: frequency, season, time zone, unit and `label_<name>` columns.

Labels (team, region, ...) are what alert routing and the views filter by. Frequency and time
zone fix how periods are counted and season the scale of every scaled error, so they cannot
change once a series has forecasts or actuals (its stored periods would silently shift, its
window mix two scales); such a row is rejected with that reason, as the config's `series:`
entries are refused (`store.catalog.sync_series_entries`).

A file sets only the labels it has columns for: a series' other stored labels stay, and an
empty cell in a `label_<name>` column removes that label from the row's series.

A series the file creates takes its config `series:` entry first, as every path that creates a
series does (`store.catalog.ensure_series`): what the entry sets wins, the file's non-empty
cells fill what it leaves out, `series_defaults` the rest. For a series already stored the
entry applies on top at the next sync, so creating it otherwise would not last.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
from sqlalchemy import Connection, text

from aftercast.config import MAX_SEASON, Config
from aftercast.errors import InputFileError
from aftercast.ingest.cells import Reasons, flag_nul, flag_unreadable, key_values
from aftercast.ingest.load import Written
from aftercast.ingest.validate import Checked, _conflicts, _package
from aftercast.periods import check_frequency, check_timezone
from aftercast.store import schema
from aftercast.store.bulk import insert_new
from aftercast.store.catalog import holding_data, series_settings

COLUMNS = ["series_id", "frequency", "season", "timezone", "unit"]


def _check_values(values: pd.Series, check: object, reasons: Reasons, column: str) -> pd.Series:
    """Flag the rows whose value `check` refuses; the values with what it returns put in (the
    current alias of a frequency)."""
    out = values.copy()
    for value in values.dropna().unique():  # distinct values, a handful per file
        try:
            current = check(value)  # type: ignore[operator]
        except ValueError as exc:
            reasons.flag(values == value, f"bad {column}: {exc}")
        else:
            if isinstance(current, str):
                out[(values == value).fillna(False)] = current
    return out


def check_label_columns(columns: pd.Index, source: str) -> None:
    """Raise InputFileError for a `label_` column without a label name after the prefix."""
    for column in columns:
        name = str(column)
        if name.startswith("label_") and not name.removeprefix("label_").strip():
            raise InputFileError(
                f"{source}: column {name!r} has no label name after 'label_' "
                "(e.g. label_team, label_region)"
            )


def _season(frame: pd.DataFrame, reasons: Reasons) -> pd.Series:
    """The `season` column as numbers; a cell that is not a whole number in range is flagged."""
    raw = frame["season"].astype("string").str.strip().replace("", pd.NA)
    season = pd.to_numeric(raw, errors="coerce")
    whole = (season >= 1) & (season <= MAX_SEASON) & (season % 1 == 0)
    bad = raw.notna() & ~whole.astype("boolean").fillna(False)
    why = f"season is not a whole number from 1 to {MAX_SEASON}: '" + raw[bad] + "'"
    reasons.flag(bad, why)
    return season.where(~bad)


def _labels(frame: pd.DataFrame) -> pd.Series | str:
    """Each row's label edits as JSON text (names sorted): a `label_` cell's value, or null
    for an empty one (the label is removed); labels without a column are not mentioned."""
    labels = [c for c in frame.columns if str(c).startswith("label_")]
    if not labels:
        return "{}"
    label_frame = frame[labels].apply(_numbers_as_written).astype("string")
    label_frame.columns = [str(c).removeprefix("label_") for c in labels]
    return pd.Series(
        [
            json.dumps({k: None if _empty(v) else v for k, v in row.items()}, sort_keys=True)
            for row in label_frame.to_dict("records")
        ],
        index=frame.index,
    )


def _numbers_as_written(cells: pd.Series) -> pd.Series:
    """A JSON label given as a number or a boolean, as it was written: a whole number as its
    integer text, `true` and `false` in lower case.

    A JSON column of numbers with a null among them is read as floats, which would store 5 as
    "5.0", and a boolean would be stored as Python's "True". Text cells (all of a CSV file's)
    are left exactly as they are.

    >>> _numbers_as_written(pd.Series([5.0, None, 2.5, "7.0", True], dtype=object)).tolist()
    ['5', None, 2.5, '7.0', 'true']
    >>> _numbers_as_written(pd.Series([False, True])).tolist()
    ['false', 'true']
    """
    if cells.dtype.kind not in "fOb":
        return cells
    return cells.map(_as_written)


def _as_written(value: object) -> object:
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return value


def _empty(value: object) -> bool:
    return bool(pd.isna(value)) or not str(value).strip()


def _edit_labels(edits: pd.Series, stored: pd.Series) -> list[str]:
    """Stored labels (JSON text, NA for a new series) with each row's edits applied."""
    out = []
    for edit, old in zip(edits.to_numpy(), stored.to_numpy(), strict=True):
        labels = {} if pd.isna(old) else json.loads(old)
        for name, value in json.loads(edit).items():
            if value is None:
                labels.pop(name, None)
            else:
                labels[name] = value
        out.append(json.dumps(labels, sort_keys=True))
    return out


def check(frame: pd.DataFrame, first_row: int) -> Checked:
    frame = frame.reset_index(drop=True)
    reasons = Reasons(frame.index)
    flag_unreadable(frame, reasons)
    key = key_values(frame, "series_id", reasons)
    good = pd.DataFrame({"key": key})
    for column in ("frequency", "timezone", "unit"):
        if column in frame.columns:
            good[column] = frame[column].astype("string").str.strip().replace("", pd.NA)
            flag_nul(good[column], column, reasons)
    if "frequency" in good:
        good["frequency"] = _check_values(good["frequency"], check_frequency, reasons, "frequency")
    if "timezone" in good:
        _check_values(good["timezone"], check_timezone, reasons, "timezone")
    if "season" in frame.columns:
        good["season"] = _season(frame, reasons)
    good["labels"] = _labels(frame)
    # Rows of one series that disagree are all rejected, naming each other; exact repeats
    # count once, as for forecasts and actuals.
    values = [c for c in good.columns if c != "key"]
    repeats = _conflicts(good, ["key"], values, reasons, first_row)
    checked = _package(frame, reasons, first_row, good, repeats)
    checked.first_row = first_row
    return checked


def _entry_settings(config: Config, keys: pd.Index) -> pd.DataFrame:
    """What the config's `series:` entries set for `keys`: NA where an entry is silent."""
    entries = {e.id: e for e in config.series}  # a key listed twice: the later entry wins
    out = pd.DataFrame(
        index=keys, columns=["frequency", "timezone", "season", "unit"], dtype=object
    )
    out["labels"] = [json.dumps(entries[k].labels) if k in entries else "{}" for k in keys]
    for key in keys.intersection(list(entries)):
        for column in ("frequency", "timezone", "season", "unit"):
            value = getattr(entries[key], column)
            if value is not None:
                out.loc[key, column] = value
    return out


def write(connection: Connection, checked: Checked, now: int, config: Config) -> Written:
    """Create new series and update stored ones; refuse period-changing edits once data exists."""
    rows = checked.good.set_index("key")
    if rows.empty:
        return Written()
    for column in ("frequency", "timezone", "unit", "season"):
        if column not in rows:
            rows[column] = pd.NA
    stored = series_settings(connection, rows.index)
    known = rows.index.intersection(stored.index)
    fresh = rows.index.difference(stored.index)
    entry = _entry_settings(config, fresh)
    merged = rows.copy()
    for column in ("frequency", "timezone", "season", "unit"):
        default = getattr(config.series_defaults, column, None)
        fallback = pd.Series(default, index=rows.index, dtype=object)
        fallback.loc[known] = stored.loc[known, column]
        merged[column] = rows[column].astype(object).where(rows[column].notna(), fallback)
        wins = entry[column].notna()
        merged.loc[wins[wins].index, column] = entry.loc[wins, column]
    merged["labels"] = _edit_labels(rows["labels"], stored["labels"].reindex(rows.index))
    merged.loc[fresh, "labels"] = [
        json.dumps({**json.loads(mine), **json.loads(theirs)}, sort_keys=True)
        for mine, theirs in zip(merged.loc[fresh, "labels"], entry["labels"], strict=True)
    ]
    _refuse_period_changes(connection, checked, merged.loc[known], stored.loc[known])
    merged = merged.drop(index=merged.index.intersection(checked.rejected_keys))
    new = merged.loc[merged.index.difference(stored.index)].reset_index(names="key")
    insert_new(connection, schema.series, new.assign(created_at=now, updated_at=now), "key")
    present = merged.loc[merged.index.intersection(stored.index)]
    same = _as_stored(present, stored.loc[present.index])
    changed = present.loc[~same]
    params = [
        {
            "k": key,
            "f": r["frequency"],
            "z": r["timezone"],
            "s": int(r["season"]),
            "u": r["unit"],
            "l": r["labels"],
            "t": now,
        }
        for key, r in changed.astype(object).where(changed.notna(), None).iterrows()
    ]
    if params:
        connection.execute(
            text(
                "UPDATE series SET frequency = :f, timezone = :z, season = :s, unit = :u, "
                "labels = :l, "
                "updated_at = :t WHERE key = :k"
            ),
            params,
        )
    unchanged = int(same.sum()) + checked.duplicates
    return Written(accepted=len(new), revised=len(changed), unchanged=unchanged)


def _as_stored(wanted: pd.DataFrame, stored: pd.DataFrame) -> np.ndarray:
    """Which rows would store exactly what is stored already (re-ingesting changes nothing)."""
    same = np.ones(len(wanted), dtype=bool)
    for column in ("frequency", "timezone", "unit"):
        new, old = (f[column].astype(object) for f in (wanted, stored))
        same &= new.where(new.notna(), None).to_numpy() == old.where(old.notna(), None).to_numpy()
    same &= wanted["season"].to_numpy("float64") == stored["season"].to_numpy("float64")
    # Labels the config's entries wrote may list their names in another order.
    for i in np.flatnonzero(same & (wanted["labels"].to_numpy() != stored["labels"].to_numpy())):
        same[i] = json.loads(wanted["labels"].iloc[i]) == json.loads(stored["labels"].iloc[i])
    return same


def _refuse_period_changes(
    connection: Connection, checked: Checked, wanted: pd.DataFrame, stored: pd.DataFrame
) -> None:
    if wanted.empty:
        return
    stored = stored.reindex(wanted.index)
    moved = (
        (wanted["frequency"] != stored["frequency"])
        | (wanted["timezone"] != stored["timezone"])
        | (wanted["season"].astype("float64") != stored["season"].astype("float64"))
    )
    if not moved.any():
        return
    ids = stored.loc[moved[moved].index, "id"].astype("int64")
    held = holding_data(connection, ids.tolist())
    blocked = ids[ids.isin(list(held))].index
    if len(blocked):
        numbers = checked.good.reset_index().set_index("key").loc[blocked]
        extra = pd.DataFrame(
            {
                "row_number": numbers["index"].to_numpy() + checked.first_row,
                "reason": "frequency, timezone or season cannot change once the series holds data",
                "raw": [json.dumps({"series_id": k}) for k in blocked],
            }
        )
        checked.rejected = pd.concat([checked.rejected, extra], ignore_index=True)
        checked.rejected_keys = list(blocked)
