"""The windows stage: keep each window's sums current, and read window rows for any clock.

Design: additive sums per (series, model, horizon) for each configured window are stored as
of the last cycle's clock (`store.schema_windows`). A `days` window moving forward is
brought up by deltas (`store.window_delta`): the sums of the pairs whose target_at the new
end passed are added and those the new start passed are taken out, which costs two strips of
targets whatever the history. Keys whose pairs inside the old window were rescored at this
clock (a revision, a late forecast) are recomputed from their pairs instead, as are a
rotating 1/REBASE_DAYS of the keys each day so that float rounding never builds up. A
`points` window, a clock that moved back, or a second cycle at the same clock recompute the
(series, model) keys scored this cycle plus the keys with pairs the window's edges swept;
every other key's window holds the same pairs as before. Each recompute is a GROUP BY over
that key's pairs inside the window, never the history. Everything is recomputed from
scratch when there is no earlier refresh, the window's definition changed, the clock jumped
by a whole window, or a cycle since the last refresh ended without reaching this stage (its
matched pairs are unknown). Each of a window's three parts (point, level and quantile sums)
goes through all this on its own, in its own transaction with its own mark, so the parts can
be refreshed side by side; a crash between them leaves each part consistent with its mark.
Readers get rows for the refreshed clock from the stored sums once every part is at it, and
for any other clock straight from the pairs, page by page of series, with the same sums and
the same arithmetic (`windows`).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pandas as pd
from sqlalchemy import Connection, Engine, text

from aftercast.config import Config, WindowConfig
from aftercast.errors import AftercastError
from aftercast.store.bulk import read_frame
from aftercast.store.db import write
from aftercast.store.parallel import each
from aftercast.store.schema_windows import SUM_TABLES
from aftercast.store.window_delta import (
    apply_strips,
    rescored_keys,
    scored_keys,
    without_extremes,
)
from aftercast.store.window_sums import (
    ALL_PARTS,
    compute_sums,
    delete_stored,
    read_stored,
    store_sums,
    stored_floors,
    window_spec,
)
from aftercast.windows import DAY, EXTREMES, KEY, WindowSums, group_horizons, window_rows

PAGE_SERIES = 5_000
# Every key of a `days` window is recomputed from its pairs once in this many days.
REBASE_DAYS = 28
_KEYS_PER_BATCH = 20_000


@dataclass
class WindowRefresh:
    """What the stage did for one window: recomputed from scratch or for `keys` keys."""

    window: str
    full: bool
    keys: int


def find_window(config: Config, name: str | None) -> WindowConfig:
    """The named window (default: the first configured); unknown names are a user error."""
    windows = config.all_windows()
    if name is None:
        return windows[0]
    for window in windows:
        if window.name == name:
            return window
    known = ", ".join(w.name for w in windows)
    raise AftercastError(f"window {name!r}: no such window; configured: {known}")


def _mark(connection: Connection, name: str, part: str) -> dict[str, Any] | None:
    row = connection.execute(
        text("SELECT spec, now, cycle_id FROM window_marks WHERE window_name = :w AND part = :p"),
        {"w": name, "p": part},
    ).one_or_none()
    return None if row is None else dict(row._mapping)


def _latest_cycle(connection: Connection) -> int:
    return int(connection.execute(text("SELECT COALESCE(MAX(id), 0) FROM cycles")).scalar_one())


def _missed_cycles(connection: Connection, mark: dict[str, Any], latest: int) -> bool:
    """Did a cycle start after the last refresh and stop before refreshing (or is it running)?"""
    count = connection.execute(
        text(
            "SELECT COUNT(*) FROM cycles WHERE id > :after AND id < :latest AND finished_at IS NULL"
        ),
        {"after": mark["cycle_id"], "latest": latest},
    ).scalar_one()
    return bool(count)


def is_current(connection: Connection, window: WindowConfig, now: int) -> bool:
    """Do the stored sums of `window`, every part of them, hold exactly its pairs at `now`?"""
    latest = _latest_cycle(connection) + 1
    for part in ALL_PARTS:
        mark = _mark(connection, window.name, part)
        if mark is None or mark["spec"] != window_spec(window) or int(mark["now"]) != now:
            return False
        if _missed_cycles(connection, mark, latest):
            return False
    return True


def _swept_keys(
    connection: Connection, window: WindowConfig, before: int, now: int
) -> pd.DataFrame:
    """(series, model) keys with pairs whose target_at the window's edges passed."""
    low, high = min(before, now), max(before, now)
    strips = [(low, high)]
    if window.days is not None:
        span = int(window.days * DAY)
        strips.append((low - span, high - span))
    selects = " UNION ".join(
        f"SELECT series_id, model_id FROM pairs WHERE target_at > :a{i} AND target_at <= :b{i}"
        for i in range(len(strips))
    )
    params = {f"a{i}": a for i, (a, _) in enumerate(strips)}
    params.update({f"b{i}": b for i, (_, b) in enumerate(strips)})
    return read_frame(connection, selects, params)


@dataclass
class _Plan:
    """How to bring one window to the clock: from scratch, or by a delta plus some keys."""

    keys: pd.DataFrame | None  # keys to recompute from their pairs; None: all of them
    delta_from: int | None = None  # move the stored sums forward from this clock by deltas


def _delta_plan(
    connection: Connection,
    window: WindowConfig,
    part: str,
    before: int,
    now: int,
    touched: pd.DataFrame | None,
) -> _Plan:
    """A `days` window moving forward: deltas for most keys, recompute the rest.

    Recomputed: keys with a pair scored at this clock that was already inside the old window
    (its stored value may be stale), touched keys with no pair scored at this clock (scored
    elsewhere, so their pairs are unknown), and the keys of series whose id falls on today in
    a rotation of REBASE_DAYS days, which keeps rounding from building up in the sums.
    """
    span = int((window.days or 0) * DAY)
    parts = [rescored_keys(connection, now, before - span, before)]
    if touched is not None and len(touched):
        scored = scored_keys(connection, now)
        known = touched[KEY].astype("int64").merge(scored, how="left", indicator=True)
        parts.append(known.loc[known["_merge"] == "left_only", KEY])
    parts.append(
        read_frame(
            connection,
            f"SELECT DISTINCT series_id, model_id FROM {SUM_TABLES[part][0].name} "
            "WHERE window_name = :w AND series_id % :r = :k",
            {"w": window.name, "r": REBASE_DAYS, "k": (now // DAY) % REBASE_DAYS},
        )
    )
    keys = pd.concat(parts, ignore_index=True).astype("int64").drop_duplicates()
    return _Plan(keys.reset_index(drop=True), delta_from=before)


def _plan(
    connection: Connection,
    window: WindowConfig,
    part: str,
    now: int,
    touched: pd.DataFrame | None,
    latest: int,
) -> _Plan:
    """What changed since `part` was last refreshed, and so what to do (see the module
    docstring)."""
    mark = _mark(connection, window.name, part)
    if (
        mark is None
        or mark["spec"] != window_spec(window)
        or _missed_cycles(connection, mark, latest)
    ):
        return _Plan(None)
    before = int(mark["now"])
    if window.days is not None and abs(now - before) >= window.days * DAY:
        return _Plan(None)
    if window.days is not None and now > before:
        return _delta_plan(connection, window, part, before, now, touched)
    parts = [_swept_keys(connection, window, before, now)] if before != now else []
    if touched is not None and len(touched):
        parts.append(touched[KEY])
    if not parts:
        return _Plan(pd.DataFrame({"series_id": [], "model_id": []}, dtype="int64"))
    keys = pd.concat(parts, ignore_index=True).astype("int64").drop_duplicates()
    if window.points is not None and now >= before:
        # The N latest periods only move up as the clock does: no need to rank older ones.
        # The floors come from the point sums whichever part this is: a floor is only a hint,
        # kept where the window above it is full (`window_sums._points_cutoffs`).
        keys = stored_floors(connection, window.name, keys)
    return _Plan(keys.reset_index(drop=True))


def _sums_to_store(
    connection: Connection, window: WindowConfig, part: str, now: int, keys: pd.DataFrame
) -> WindowSums:
    """The sums of `part` to store for `keys`; a `days` window stores no extremes, whichever
    path (recompute or delta) brought it to the clock."""
    sums = compute_sums(connection, window, now, keys, [part])
    return without_extremes(sums) if window.days is not None else sums


def _write_mark(
    connection: Connection, window: WindowConfig, part: str, now: int, cycle_id: int
) -> None:
    connection.execute(
        text("DELETE FROM window_marks WHERE window_name = :w AND part = :p"),
        {"w": window.name, "p": part},
    )
    connection.execute(
        text(
            "INSERT INTO window_marks (window_name, part, spec, now, cycle_id, refreshed_at) "
            "VALUES (:w, :p, :spec, :now, :cycle, :at)"
        ),
        {
            "w": window.name,
            "p": part,
            "spec": window_spec(window),
            "now": now,
            "cycle": cycle_id,
            "at": int(time.time()),
        },
    )


def series_pages(connection: Connection, size: int, by: str = "id") -> Iterator[pd.DataFrame]:
    """Pages of (id, key, labels) of all series, in `by` order ('id' or 'key'), by keyset."""
    if by not in ("id", "key"):
        raise ValueError("series pages go by 'id' or 'key'")
    after: int | str = -1 if by == "id" else ""
    while True:
        page = read_frame(
            connection,
            f"SELECT id, key, labels FROM series WHERE {by} > :after ORDER BY {by} LIMIT :n",
            {"after": after, "n": size},
        )
        if page.empty:
            return
        after = int(page["id"].iloc[-1]) if by == "id" else str(page["key"].iloc[-1])
        yield page


def _refresh_part(
    connection: Connection,
    window: WindowConfig,
    part: str,
    now: int,
    touched: pd.DataFrame | None,
) -> WindowRefresh:
    """Bring the sums of one part of `window` to `now`, with that part's mark."""
    latest = _latest_cycle(connection)
    plan = _plan(connection, window, part, now, touched, latest)
    if plan.keys is None:
        delete_stored(connection, window.name, None, [part])
        count = 0
        for page in series_pages(connection, PAGE_SERIES):
            ids = pd.DataFrame({"series_id": page["id"].to_numpy()})
            sums = _sums_to_store(connection, window, part, now, ids)
            store_sums(connection, window.name, sums)
            count += len(getattr(sums, part)[KEY].drop_duplicates())
        refresh = WindowRefresh(window.name, True, count)
    else:
        if plan.delta_from is not None:
            span = int((window.days or 0) * DAY)
            apply_strips(connection, window.name, plan.delta_from, now, span, [part])
        keys = plan.keys
        for start in range(0, len(keys), _KEYS_PER_BATCH):
            batch = keys.iloc[start : start + _KEYS_PER_BATCH]
            delete_stored(connection, window.name, batch[KEY], [part])
            sums = _sums_to_store(connection, window, part, now, batch)
            store_sums(connection, window.name, sums)
        refresh = WindowRefresh(window.name, False, len(keys))
    _write_mark(connection, window, part, now, latest)
    return refresh


def refresh_windows(
    engine: Engine, config: Config, now: int, touched: pd.DataFrame | None
) -> list[WindowRefresh]:
    """The cycle's windows stage: bring every configured window's stored sums to `now`.

    `touched` holds the (series_id, model_id) keys whose pairs matching scored this cycle.
    Each part of each window (its point, level and quantile sums) is refreshed in its own
    transaction, two at a time on PostgreSQL (`store.parallel`). The report per window says
    whether any part was recomputed from scratch, and the most keys a part recomputed.
    """
    units = [(window, part) for window in config.all_windows() for part in ALL_PARTS]

    def refresh(unit: tuple[WindowConfig, str]) -> WindowRefresh:
        with write(engine) as connection:
            return _refresh_part(connection, *unit, now, touched)

    done = each(engine, units, refresh)
    refreshes = []
    for window in config.all_windows():
        parts = [r for (w, _), r in zip(units, done, strict=True) if w.name == window.name]
        refreshes.append(
            WindowRefresh(window.name, any(r.full for r in parts), max(r.keys for r in parts))
        )
    return refreshes


def _names(connection: Connection, table: str, column: str) -> pd.Series:
    frame = read_frame(connection, f"SELECT id, {column} FROM {table}")
    return pd.Series(frame[column].to_numpy(), index=frame["id"].to_numpy())


def rows_for_page(
    connection: Connection,
    buckets: list[str],
    window: WindowConfig,
    now: int,
    page: pd.DataFrame,
    stored: bool,
) -> pd.DataFrame:
    """Window rows for a page of series (columns id, key), with series and model names.

    Columns: series_id (int), series (key), model_id, model, horizon (int, bucket or 'all'),
    the measures of `windows.window_rows`, window, window_start and window_end (epoch
    seconds; a `days` window starts, exclusive, at now - D days, a `points` window at its
    first target).
    """
    ids = page["id"].astype("int64")
    if stored:
        sums = read_stored(connection, window.name, ids)
    else:
        sums = compute_sums(connection, window, now, pd.DataFrame({"series_id": ids}))
    if sums.points.empty:
        return pd.DataFrame()
    rows = window_rows(group_horizons(sums, buckets))
    keys = pd.Series(page["key"].to_numpy(), index=ids.to_numpy())
    rows.insert(1, "series", rows["series_id"].map(keys))
    rows.insert(3, "model", rows["model_id"].map(_names(connection, "models", "name")))
    rows["window"] = window.name
    if window.days is not None:
        rows["window_start"] = now - int(window.days * DAY)
        rows["window_end"] = now
    else:
        rows["window_start"] = rows["first_target"]
        rows["window_end"] = rows["last_target"]
    # The extremes are bookkeeping of `points` windows (deltas leave them stale in `days` ones).
    return rows.drop(columns=list(EXTREMES)).reset_index(drop=True)


def iter_windows(
    engine: Engine,
    config: Config,
    now: int,
    window_name: str | None = None,
    page_series: int = PAGE_SERIES,
) -> Iterator[pd.DataFrame]:
    """Window rows at `now` for all series, one frame per page of series (see rows_for_page)."""
    window = find_window(config, window_name)
    with engine.connect() as connection:
        stored = is_current(connection, window, now)
        for page in series_pages(connection, page_series):
            rows = rows_for_page(connection, config.horizon_buckets, window, now, page, stored)
            if len(rows):
                yield rows


def current_windows(
    engine: Engine, config: Config, now: int, window_name: str | None = None
) -> pd.DataFrame:
    """Window rows at `now` for every (series, model) and horizon, bucket and 'all'.

    What detection reads: the stored sums when the last cycle refreshed them at `now`, else
    computed from the pairs. Empty frame when no pair is inside the window.
    """
    pages = list(iter_windows(engine, config, now, window_name))
    return pd.concat(pages, ignore_index=True) if pages else pd.DataFrame()
