"""One series as its page shows it: settings, models, horizons, recent pairs, alert history.

Every query is keyed by the series' integer id and uses the store's indexes (pairs by series,
model and target; forecasts by series), so a series page costs the same in a fleet of ten or of
100,000 series. The pairs are those of one model at one horizon in a time range, with their
interval bounds and quantiles, plus the same horizon's pairs of aftercast's benchmark forecast
when there is one, for comparing rolling errors.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from sqlalchemy import Connection, Engine

from aftercast.store.bulk import read_frame
from aftercast.store.queries import intervals_for, quantiles_for
from aftercast.web.data import BENCHMARK_PREFIX, PREFERRED_BENCHMARK, has_table

PAIR_COLUMNS = (
    "p.forecast_id, p.horizon, p.issued_at, p.target_at, p.actual, p.point, p.error, "
    "p.abs_error, p.sq_error, p.scaled_error"
)


@dataclass
class SeriesView:
    key: str
    id: int
    settings: dict[str, Any]
    labels: dict[str, str]
    models: list[str]
    model: str | None = None
    horizons: list[int] = field(default_factory=list)
    horizon: int | None = None
    levels: list[float] = field(default_factory=list)
    level: float | None = None
    pairs: pd.DataFrame = field(default_factory=pd.DataFrame)
    intervals: pd.DataFrame = field(default_factory=pd.DataFrame)
    quantiles: pd.DataFrame = field(default_factory=pd.DataFrame)
    benchmark: str | None = None
    benchmark_pairs: pd.DataFrame = field(default_factory=pd.DataFrame)


def _pairs(
    connection: Connection, series_id: int, model_id: int, horizon: int, since: int, until: int
) -> pd.DataFrame:
    return read_frame(
        connection,
        f"SELECT {PAIR_COLUMNS} FROM pairs p WHERE p.series_id = :s AND p.model_id = :m "
        "AND p.horizon = :h AND p.target_at > :since AND p.target_at <= :until "
        "ORDER BY p.target_at, p.issued_at",
        {"s": series_id, "m": model_id, "h": horizon, "since": since, "until": until},
    )


def _choose(options: list[Any], wanted: Any) -> Any:
    if wanted in options:
        return wanted
    return options[0] if options else None


def series_view(
    engine: Engine,
    key: str,
    model: str | None,
    horizon: int | None,
    level: float | None,
    since: int,
    until: int,
) -> SeriesView | None:
    """The series' page data, or None when no series has that key."""
    with engine.connect() as connection:
        found = read_frame(connection, "SELECT * FROM series WHERE key = :k", {"k": key})
        if found.empty:
            return None
        row = found.iloc[0]
        series_id = int(row["id"])
        models = read_frame(
            connection,
            "SELECT m.id, m.name FROM models m WHERE m.id IN "
            "(SELECT DISTINCT f.model_id FROM forecasts f WHERE f.series_id = :s) ORDER BY m.name",
            {"s": series_id},
        )
        ids = dict(zip(models["name"], models["id"], strict=True))
        names = sorted(ids, key=lambda n: (n.startswith(BENCHMARK_PREFIX), n))
        view = SeriesView(
            key=key,
            id=series_id,
            models=names,
            settings={k: row[k] for k in ("frequency", "season", "timezone", "unit")},
            labels=json.loads(row["labels"] or "{}"),
        )
        view.model = _choose(names, model)
        if view.model is None:
            return view
        horizons = read_frame(
            connection,
            "SELECT DISTINCT horizon FROM pairs WHERE series_id = :s AND model_id = :m",
            {"s": series_id, "m": int(ids[view.model])},
        )
        view.horizons = sorted(int(h) for h in horizons["horizon"])
        view.horizon = _choose(view.horizons, horizon)
        if view.horizon is None:
            return view
        view.pairs = _pairs(connection, series_id, int(ids[view.model]), view.horizon, since, until)
        if not view.pairs.empty:
            view.intervals = intervals_for(connection, view.pairs["forecast_id"])
            view.quantiles = quantiles_for(connection, view.pairs["forecast_id"])
        view.levels = sorted(float(v) for v in view.intervals.get("level", pd.Series()).unique())
        view.level = _choose(view.levels, level)
        benchmarks = [n for n in names if n.startswith(BENCHMARK_PREFIX) and n != view.model]
        if benchmarks and not view.model.startswith(BENCHMARK_PREFIX):
            view.benchmark = _choose(benchmarks, PREFERRED_BENCHMARK)
            view.benchmark_pairs = _pairs(
                connection, series_id, int(ids[view.benchmark]), view.horizon, since, until
            )
    return view


def alert_history(engine: Engine, series_id: int, limit: int = 200) -> pd.DataFrame | None:
    """The series' alert transitions, newest first; None when there is no alerts table."""
    if not (has_table(engine, "alerts") and has_table(engine, "alert_transitions")):
        return None
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT t.at, a.id AS alert_id, m.name AS model, a.rule, a.horizon, t.event, "
            "t.from_state, t.to_state, t.actor, t.note, a.state AS current_state, a.severity "
            "FROM alert_transitions t JOIN alerts a ON a.id = t.alert_id "
            "JOIN models m ON m.id = a.model_id WHERE a.series_id = :s "
            "ORDER BY t.at DESC, t.id DESC LIMIT :n",
            {"s": series_id, "n": limit},
        )
