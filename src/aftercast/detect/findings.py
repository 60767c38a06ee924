"""Storing a cycle's findings and reading them back: active findings, a cycle's findings.

A cycle keeps the findings that are flagged, nominally significant (p <= `keep_p_value`),
signalling (a CUSUM signal, a late feed) or flagged in the previous detection cycle, so
recoveries are explicit rows with `flagged = 0`; healthy keys cost no rows. Evidence is JSON
built for the kept rows only, with a frame-wide `to_json` per detection (no Python per row):
the statistic, p-value and fleet-adjusted p-value, the window, a suggested fix and the
detection's own numbers. Instants in the evidence are ISO 8601 UTC text.

`active_findings` lists what the latest detection cycle flagged with `opened_at`, the first
cycle of the key's current unbroken run of flagged cycles.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection

from aftercast.config import Config
from aftercast.detect.gather import DAY, detection_window
from aftercast.periods import to_iso
from aftercast.store.bulk import insert_frame, read_frame
from aftercast.store.schema_detect import detections
from aftercast.store.schema_detect import findings as findings_table

FINDING_KEY = ["detection", "series_id", "model_id", "bucket"]
_STORED = [
    "cycle_id",
    "now",
    "detection",
    "series_id",
    "model_id",
    "bucket",
    "level",
    "n",
    "statistic",
    "p_value",
    "p_adjusted",
    "flagged",
    "severity",
    "evidence",
]
# How many past detection cycles `opened_at` looks back through.
RUN_LOOKBACK = 400


def previously_flagged(connection: Connection) -> pd.DataFrame:
    """Keys flagged in the latest detection cycle so far."""
    return read_frame(
        connection,
        "SELECT detection, series_id, model_id, bucket FROM findings WHERE flagged = 1 "
        "AND cycle_id = (SELECT MAX(cycle_id) FROM detections)",
    )


def _iso_columns(frame: pd.DataFrame) -> pd.DataFrame:
    """Epoch-second columns (named *_at, *_start, *_end) as ISO 8601 UTC text."""
    for column in frame.columns:
        if column.endswith(("_at", "_start", "_end")):
            seconds = pd.to_numeric(frame[column], errors="coerce")
            known = seconds.notna() & (seconds.abs() < 1e11)  # beyond year 5000: no instant
            text = pd.Series(None, index=frame.index, dtype=object)
            # Whole seconds as int64: pandas' float path can trip over NaN in its overflow check.
            whole = seconds[known].round().astype(np.int64)
            stamps = pd.to_datetime(whole, unit="s", utc=True)
            text[known] = stamps.dt.strftime("%Y-%m-%dT%H:%M:%SZ").to_numpy()
            frame[column] = text
    return frame


def _window_evidence(config: Config, now: int, kept: pd.DataFrame) -> pd.Series:
    """The window object of each finding: name, start (or points), end, targets tested."""
    window = detection_window(config)
    span = (
        f'"start":"{to_iso(now - int(window.days * DAY))}"'
        if window.days is not None
        else f'"points":{window.points}'
    )
    head = f'{{"name":"{window.name}",{span},"end":"{to_iso(now)}","targets":'
    return head + kept["n"].fillna(0).astype(np.int64).astype(str) + "}"


def _integral(frame: pd.DataFrame) -> pd.DataFrame:
    """Float columns holding only whole numbers (counts padded with NaN) back to integers."""
    for column in frame.columns[frame.dtypes == np.float64]:
        values = frame[column]
        known = values.dropna()
        if len(known) and (known == np.round(known)).all() and known.abs().max() < 2**53:
            frame[column] = values.astype("Int64")
    return frame


def _is_probability(name: str) -> bool:
    return name in ("p_value", "p_adjusted") or name.endswith(("_p", "_p_value"))


def _significant_json(frame: pd.DataFrame) -> list[str]:
    """`"name":value` text per row, 10 significant digits, null where not finite.

    pandas' JSON writer keeps 10 decimal places, so a p-value of 2.3e-12 came out as 0.0.
    """
    parts = []
    for name in frame.columns:
        values = frame[name].astype(float).to_numpy()
        parts.append([f'"{name}":{v:.10g}' if np.isfinite(v) else f'"{name}":null' for v in values])
    return [",".join(row) for row in zip(*parts, strict=True)]


def evidence_json(config: Config, now: int, kept: pd.DataFrame) -> pd.Series:
    """JSON text of each kept finding's evidence, built one detection at a time."""
    out = pd.Series("{}", index=kept.index, dtype=object)
    window = _window_evidence(config, now, kept)
    for _, part in kept.groupby("detection"):
        columns = [c for c in part.columns if c.startswith("ev_") and part[c].notna().any()]
        frame = part[columns].rename(columns=lambda c: c.removeprefix("ev_"))
        frame = _integral(_iso_columns(frame))
        exact = [c for c in frame.columns if _is_probability(c)]
        heads = _significant_json(part[["statistic", "p_value", "p_adjusted"]].join(frame[exact]))
        rest = frame.drop(columns=exact)
        lines = (
            rest.to_json(orient="records", lines=True).splitlines()
            if len(rest.columns)
            else ["{}"] * len(rest)
        )
        # Splice the numbers in first and the window object last: the records are JSON
        # objects from to_json.
        out.loc[part.index] = [
            "{" + ",".join(filter(None, (head, line[1:-1]))) + ',"window":' + win + "}"
            for head, line, win in zip(heads, lines, window.loc[part.index], strict=True)
        ]
    return out


def store_findings(
    connection: Connection,
    config: Config,
    cycle_id: int,
    now: int,
    found: pd.DataFrame,
    summary: pd.DataFrame,
    previous: pd.DataFrame,
) -> int:
    """Write this cycle's detections summary and the findings worth keeping; returns the count."""
    if len(summary):
        rows = summary.assign(cycle_id=cycle_id, now=now)
        for column in ("families_selected", "families"):
            rows[column] = rows.get(column, 0)
        insert_frame(connection, detections, rows[[c.name for c in detections.columns]])
    if found.empty:
        return 0
    was = found[FINDING_KEY].merge(previous.assign(_was=True), on=FINDING_KEY, how="left")["_was"]
    keep = (
        found["flagged"].to_numpy(bool)
        | (found["p_value"] <= config.detection.keep_p_value).to_numpy()
        | found["condition"].astype("boolean").fillna(False).to_numpy(bool)
        & ~found["detection"].isin(["coverage_low", "coverage_high"]).to_numpy()
        | was.notna().to_numpy()
    )
    kept = found.loc[keep].copy()
    if kept.empty:
        return 0
    kept["evidence"] = evidence_json(config, now, kept)
    kept["cycle_id"], kept["now"] = cycle_id, now
    kept["flagged"] = kept["flagged"].astype(np.int16)
    kept["n"] = kept["n"].fillna(0).astype(np.int64)
    kept["level"] = kept.get("level", pd.Series(np.nan, index=kept.index))
    insert_frame(connection, findings_table, kept[_STORED])
    return len(kept)


def _runs(flags: pd.DataFrame, cycles: pd.Series) -> pd.DataFrame:
    """Per key, the first cycle of the unbroken run of flagged cycles ending at the latest."""
    ordinal = pd.Series(np.arange(len(cycles)), index=cycles.to_numpy())
    flags = flags.assign(_ord=ordinal.reindex(flags["cycle_id"]).to_numpy())
    flags = flags.sort_values([*FINDING_KEY, "_ord"], ascending=[True] * 4 + [False])
    rank = flags.groupby(FINDING_KEY).cumcount()
    in_run = flags.loc[(len(cycles) - 1 - flags["_ord"]).to_numpy() == rank.to_numpy()]
    first = in_run.groupby(FINDING_KEY)["_ord"].min()
    opened = cycles.to_numpy()[first.to_numpy(np.int64)]
    return first.reset_index(name="_first").assign(opened_cycle=opened).drop(columns="_first")


def active_findings(connection: Connection, include_cleared: bool = False) -> pd.DataFrame:
    """Findings of the latest detection cycle that are flagged, with `opened_at`.

    With `include_cleared`, also keys flagged within the look-back that are no longer flagged
    (`active` false, `state` "cleared").
    """
    cycles = read_frame(
        connection,
        f"SELECT cycle_id, now FROM detections GROUP BY cycle_id, now "
        f"ORDER BY cycle_id DESC LIMIT {RUN_LOOKBACK}",
    ).sort_values("cycle_id")
    if cycles.empty:
        return pd.DataFrame()
    first = int(cycles["cycle_id"].iloc[0])
    flags = read_frame(
        connection,
        "SELECT f.*, s.key AS series_key, m.name AS model FROM findings f "
        "JOIN series s ON s.id = f.series_id JOIN models m ON m.id = f.model_id "
        "WHERE f.flagged = 1 AND f.cycle_id >= :first",
        {"first": first},
    )
    if flags.empty:
        return flags
    latest = int(cycles["cycle_id"].iloc[-1])
    runs = _runs(flags[[*FINDING_KEY, "cycle_id"]], cycles["cycle_id"])
    newest = flags.sort_values("cycle_id").drop_duplicates(FINDING_KEY, keep="last")
    rows = newest.merge(runs, on=FINDING_KEY, how="left")
    rows["active"] = rows["cycle_id"] == latest
    if not include_cleared:
        rows = rows.loc[rows["active"]]
    opened = cycles.set_index("cycle_id")["now"]
    rows["opened_at"] = opened.reindex(rows["opened_cycle"]).to_numpy()
    rows["state"] = np.where(rows["active"], "raised", "cleared")
    return rows.reset_index(drop=True)


def finding_records(rows: pd.DataFrame) -> list[dict[str, Any]]:
    """`alerts findings --json` rows: series_id, model, horizon, rule, state, active, ..."""
    records: list[dict[str, Any]] = []
    if rows.empty:
        return records
    for row in rows.sort_values(["series_key", "model", "detection", "bucket"]).itertuples():
        evidence = json.loads(row.evidence)
        records.append(
            {
                "series_id": row.series_key,
                "model": row.model,
                "horizon": row.bucket,
                "rule": row.detection,
                "state": row.state,
                "active": bool(row.active),
                "severity": row.severity,
                "opened_at": to_iso(row.opened_at) if pd.notna(row.opened_at) else None,
                "level": None if pd.isna(row.level) else float(row.level),
                "evidence": evidence,
                "as_of": to_iso(row.now),
            }
        )
    return records
