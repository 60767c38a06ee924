"""Benchmark: the next day's ingest and cycle against the first full cycle, and history doubled.

For each history length (90 days, then twice that, by default) a fresh store is loaded with
the bakery scenario (1,000 series, one model, 14 horizons, 80% and 95% intervals, three
quantiles, 28 days of earlier actuals): every actual and forecast up to the end of the last
stored day is ingested, and the first cycle runs over all of it (benchmarks, matching,
windows from scratch, detection, alerts). Then the next day arrives: one actual per series and
one forecast issue of 14 horizons, ingested and cycled. The issue's targets: the next day
takes at most 10% of the first cycle (aim 5%), and doubling the history changes the next
day's time by at most 30%. Prints one JSON line per history length (seconds per stage of
both cycles) and a summary line with the two ratios. Invented data, timings only.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import create_engine, text

from aftercast.config import Config, parse_config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_chunks
from aftercast.ingest.files import Chunk
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.db import make_engine, migrate

CHUNK = 200_000


def _chunks(frame: pd.DataFrame) -> Iterator[Chunk]:
    frame = frame.reset_index(drop=True)
    for start in range(0, len(frame), CHUNK):
        yield Chunk(frame.iloc[start : start + CHUNK].reset_index(drop=True), start + 1)


def _fresh_store(base: str, label: str) -> str:
    """A new empty store: a SQLite file under `base` (a folder) or a database on `base`."""
    if not base.startswith("postgresql"):
        path = Path(base) / f"incremental-{label}.db"
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        path.parent.mkdir(parents=True, exist_ok=True)
        return f"sqlite:///{path}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    name = f"aftercast_bench_incr_{label}"
    with admin.connect() as connection:
        connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    admin.dispose()
    return base.rsplit("/", 1)[0] + f"/{name}"


def _ingest(engine: Any, config: Config, kind: str, frame: pd.DataFrame) -> float:
    started = time.perf_counter()
    ingest_chunks(engine, config, kind, f"bench {kind}", _chunks(frame))
    return time.perf_counter() - started


def run_history(args: argparse.Namespace, days: int) -> dict[str, Any]:
    """Load `days` days, run the first cycle, then the next day; seconds of each part."""
    spec = ScenarioSpec(
        n_series=args.series,
        days=days + 1,
        horizons=14,
        models=("shop-planner",),
        history_days=28,
        seed=args.seed,
    )
    scenario = generate(spec)
    url = _fresh_store(args.store, f"{days}d")
    config = parse_config({"store": {"url": url}}, "bench config")
    engine = make_engine(url)
    migrate(engine)
    next_day = scenario.forecasts["issued_at"].max().normalize()
    actuals, forecasts = scenario.actuals, scenario.forecasts
    stored_actuals = actuals[actuals["observed_at"] < next_day]
    new_actuals = actuals[
        (actuals["observed_at"] >= next_day)
        & (actuals["observed_at"] < next_day + pd.Timedelta(days=1))
    ]
    result: dict[str, Any] = {
        "tool": "bench_incremental",
        "days": days,
        "series": args.series,
        "store": engine.url.get_backend_name(),
    }
    result["load_seconds"] = _ingest(engine, config, "actuals", stored_actuals) + _ingest(
        engine, config, "forecasts", forecasts[forecasts["issued_at"] < next_day]
    )
    now = int(next_day.timestamp()) - 1
    first = run_cycle(engine, config, now)
    result["first_cycle_seconds"] = first.seconds
    result["first_cycle_stages"] = first.stages
    result["first_cycle_pairs"] = first.pairs_scored
    ingest_seconds = _ingest(engine, config, "actuals", new_actuals) + _ingest(
        engine, config, "forecasts", forecasts[forecasts["issued_at"] >= next_day]
    )
    second = run_cycle(engine, config, now + 86_400)
    result["next_day_ingest_seconds"] = ingest_seconds
    result["next_day_cycle_seconds"] = second.seconds
    result["next_day_cycle_stages"] = second.stages
    result["next_day_pairs"] = second.pairs_scored
    result["next_day_seconds"] = ingest_seconds + second.seconds
    result["next_day_share_of_first_cycle"] = result["next_day_seconds"] / first.seconds
    engine.dispose()
    return result


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=1000)
    parser.add_argument("--days", type=int, default=90, help="stored days; also run at twice")
    parser.add_argument(
        "--store",
        default="bench/out",
        help="folder for SQLite files, or a postgresql+psycopg:// server URL",
    )
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("-o", "--output", type=Path, help="also write the JSON lines here")
    return parser.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    runs = []
    for days in (args.days, 2 * args.days):
        runs.append(run_history(args, days))
        print(json.dumps(runs[-1]), flush=True)
    base, doubled = runs
    summary = {
        "tool": "bench_incremental",
        "summary": True,
        "next_day_share_of_first_cycle": round(base["next_day_share_of_first_cycle"], 4),
        "target_share": 0.10,
        "next_day_change_when_history_doubles": round(
            doubled["next_day_seconds"] / base["next_day_seconds"] - 1, 4
        ),
        "target_change": 0.30,
    }
    print(json.dumps(summary), flush=True)
    if args.output:
        args.output.parent.mkdir(parents=True, exist_ok=True)
        args.output.write_text("\n".join(json.dumps(r) for r in [*runs, summary]) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
