"""Benchmark on PostgreSQL: the daily cycle at 1,000, 10,000 and 100,000 series, and the first load.

The daily cycle is one day of new data in a store that already holds a history: every series
gets one new actual (which pairs with the 14 forecasts that targeted that day, one per horizon)
and one new forecast issue of 14 horizons (80% and 95% intervals, three quantiles). What is
timed is what a day costs: ingesting the day's forecast and actual files and running the cycle
(benchmarks, matching and scoring, windows, detection, alerts). Each size runs in a fresh
database and the timed part in a subprocess of its own, whose peak resident memory
(`ru_maxrss`) is reported, so that seeding never counts. Seeding is kept small on purpose: the
series, eight days of actuals (the weekly seasonal scale needs more than seven) and only the
forecasts that target the measured day, issued on each of the 14 days before it; the rest of a
real history changes index depths, not the amount of new work. The scenario is generated in
blocks of 10,000 series, so 100,000 series never sit in memory at once.

With `--first-load` it also runs `bench/bench_ingest.py --store-url` on a fresh database: the
1.26-million-row first load on PostgreSQL against the plain pandas script.

Prints one JSON line per run and a table of seconds per 100,000 new forecast rows, which stays
flat when the cost is linear in the new data.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import create_engine, text

from aftercast.config import Config, parse_config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from aftercast.scenario import ScenarioSpec, generate, write
from aftercast.store.db import make_engine, migrate

HERE = Path(__file__).resolve().parent
BLOCK = 10_000  # series generated at a time
HORIZONS = 14
HISTORY_DAYS = 8
DAY_INDEX = HORIZONS  # the measured day: forecasts were issued on each of the 14 days before
START = "2026-06-01"
DEFAULT_ADMIN_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"


def database_url(admin_url: str, name: str) -> str:
    return admin_url.rsplit("/", 1)[0] + f"/{name}"


def fresh_database(admin_url: str, name: str) -> str:
    admin = create_engine(admin_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    admin.dispose()
    return database_url(admin_url, name)


def drop_database(admin_url: str, name: str) -> None:
    admin = create_engine(admin_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    admin.dispose()


def _block(first: int, count: int) -> Any:
    """The scenario for `count` series, renamed so that every block's series ids are its own."""
    spec = ScenarioSpec(
        n_series=count,
        days=DAY_INDEX + 1,
        horizons=HORIZONS,
        models=("shop-planner",),
        history_days=HISTORY_DAYS,
        start=START,
        seed=first,
    )
    scenario = generate(spec)
    prefix = f"b{first // BLOCK:03d}-"
    frames = {
        name: getattr(scenario, name).assign(
            series_id=prefix + getattr(scenario, name)["series_id"]
        )
        for name in ("series", "forecasts", "actuals")
    }
    return dataclasses.replace(scenario, **frames)


def write_files(series: int, folder: Path) -> None:
    """Seed files (history) under folder/seed/<block>, the measured day under folder/day/<block>."""
    day = pd.Timestamp(START, tz="UTC") + pd.Timedelta(days=DAY_INDEX)
    for first in range(0, series, BLOCK):
        scenario = _block(first, min(BLOCK, series - first))
        issued = scenario.forecasts["issued_at"].dt.floor("D")
        observed = scenario.actuals["observed_at"]
        seed = dataclasses.replace(
            scenario,
            forecasts=scenario.forecasts[scenario.forecasts["target_at"] == day],
            actuals=scenario.actuals[observed < day],
        )
        today = dataclasses.replace(
            scenario,
            forecasts=scenario.forecasts[issued == day],
            actuals=scenario.actuals[observed == day],
        )
        write(seed, folder / "seed" / f"{first // BLOCK:03d}", "csv")
        write(today, folder / "day" / f"{first // BLOCK:03d}", "csv")


def _ingest_all(engine: Any, config: Config, folders: list[Path], kind: str) -> int:
    rows = 0
    for block in folders:
        report = ingest_path(engine, config, kind, block / f"{kind}.csv")
        rows += report.accepted + report.revised
    return rows


def seed(url: str, folder: Path, series: int) -> dict[str, Any]:
    """Write the files, load the history and run one cycle so the queue is drained."""
    started = time.perf_counter()
    write_files(series, folder)
    config = parse_config({"store": {"url": url}}, "bench")
    engine = make_engine(url)
    migrate(engine)
    blocks = sorted((folder / "seed").iterdir())
    for kind in ("series", "actuals", "forecasts"):
        _ingest_all(engine, config, blocks, kind)
    day_before = parse_instant(f"{START}T12:00:00Z") + (DAY_INDEX - 1) * 86_400
    run_cycle(engine, config, day_before)
    with engine.connect() as connection:
        connection.execute(text("ANALYZE"))
    engine.dispose()
    return {"seed_seconds": round(time.perf_counter() - started, 1)}


def measure_day(url: str, folder: Path) -> dict[str, Any]:
    """Ingest the day's files and run its cycle; times and this process's peak memory."""
    config = parse_config({"store": {"url": url}}, "bench")
    engine = make_engine(url)
    blocks = sorted((folder / "day").iterdir())
    started = time.perf_counter()
    forecasts = _ingest_all(engine, config, blocks, "forecasts")
    actuals = _ingest_all(engine, config, blocks, "actuals")
    ingested = time.perf_counter()
    now = parse_instant(f"{START}T12:00:00Z") + DAY_INDEX * 86_400
    report = run_cycle(engine, config, now)
    finished = time.perf_counter()
    engine.dispose()
    return {
        "forecast_rows": forecasts,
        "actual_rows": actuals,
        "pairs_scored": report.pairs_scored,
        "ingest_seconds": round(ingested - started, 2),
        "cycle_seconds": round(finished - ingested, 2),
        "seconds": round(finished - started, 2),
        "stages": {k: round(v, 2) for k, v in report.stages.items()},
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
    }


def _child(*args: str) -> dict[str, Any]:
    done = subprocess.run(
        [sys.executable, __file__, *args], capture_output=True, text=True, check=False
    )
    if done.returncode != 0:
        raise SystemExit(f"bench_postgres {' '.join(args)} failed:\n{done.stderr[-4000:]}")
    return dict(json.loads(done.stdout.strip().splitlines()[-1]))


def daily_run(admin_url: str, series: int, scratch: Path, keep: bool) -> dict[str, Any]:
    name = f"aftercast_bench_{series}"
    url = fresh_database(admin_url, name)
    folder = scratch / f"series-{series}"
    result: dict[str, Any] = {"bench": "daily_cycle", "store": "postgresql", "series": series}
    try:
        result.update(_child("--seed", str(series), "--url", url, "--folder", str(folder)))
        result.update(_child("--day", "--url", url, "--folder", str(folder)))
    finally:
        if not keep:
            drop_database(admin_url, name)
            shutil.rmtree(folder, ignore_errors=True)
    result["seconds_per_100k_forecast_rows"] = round(
        result["seconds"] / max(result["forecast_rows"], 1) * 100_000, 2
    )
    return result


def first_load(admin_url: str, data: Path) -> dict[str, Any]:
    if not (data / "csv").is_dir():
        subprocess.run(
            [sys.executable, str(HERE / "make_data.py"), str(data), "--formats", "csv"], check=True
        )
    name = "aftercast_bench_first_load"
    url = fresh_database(admin_url, name)
    try:
        done = subprocess.run(
            [
                sys.executable,
                str(HERE / "bench_ingest.py"),
                "--data",
                str(data),
                "--store-url",
                url,
            ],
            capture_output=True,
            text=True,
            check=True,
        )
    finally:
        drop_database(admin_url, name)
    return dict(json.loads(done.stdout.strip().splitlines()[-1]))


def print_table(rows: list[dict[str, Any]]) -> None:
    print(
        f"{'series':>8} {'new forecasts':>14} {'pairs':>10} {'ingest s':>9} {'cycle s':>8} "
        f"{'total s':>8} {'s/100k rows':>12} {'peak MB':>8}",
        file=sys.stderr,
    )
    for r in rows:
        print(
            f"{r['series']:>8} {r['forecast_rows']:>14} {r['pairs_scored']:>10} "
            f"{r['ingest_seconds']:>9} {r['cycle_seconds']:>8} {r['seconds']:>8} "
            f"{r['seconds_per_100k_forecast_rows']:>12} {r['peak_rss_mb']:>8}",
            file=sys.stderr,
        )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, nargs="+", default=[1_000, 10_000, 100_000])
    parser.add_argument(
        "--admin-url",
        default=DEFAULT_ADMIN_URL,
        help="a PostgreSQL URL whose server may create scratch databases",
    )
    parser.add_argument("--scratch", type=Path, default=HERE / "out" / "postgres")
    parser.add_argument("--first-load", action="store_true", help="also the 1.26M-row first load")
    parser.add_argument("--data", type=Path, default=HERE / "out" / "data")
    parser.add_argument("--keep", action="store_true", help="keep the scratch databases")
    parser.add_argument("--seed", type=int, help=argparse.SUPPRESS)  # child: seed N series
    parser.add_argument("--day", action="store_true", help=argparse.SUPPRESS)  # child: measure
    parser.add_argument("--url", help=argparse.SUPPRESS)
    parser.add_argument("--folder", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.seed is not None:
        print(json.dumps(seed(args.url, args.folder, args.seed)))
        return 0
    if args.day:
        print(json.dumps(measure_day(args.url, args.folder)))
        return 0
    rows = []
    for series in args.series:
        rows.append(daily_run(args.admin_url, series, args.scratch, args.keep))
        print(json.dumps(rows[-1]), flush=True)
    print_table(rows)
    if args.first_load:
        print(json.dumps(first_load(args.admin_url, args.data)), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
