"""Benchmark: first load and first cycle through the store, against the plain pandas script.

Loads the files written by `bench/make_data.py` (1,000 series x 90 issue days x 14 horizons =
1.26 million forecast rows with 80% and 95% intervals and three quantiles) into a fresh store,
runs the first cycle (matching and scoring every pair), and runs `bench/pandas_baseline.py` on
the same files in a separate process. aftercast makes no benchmark forecasts of its own here,
as the script makes none; the first cycle with them is measured by `bench/bench_incremental.py`.
Prints one JSON line: both times, their ratio, rows per second and peak memory of each process.
Target (issue "Core data path"): ratio at most 2, peak memory under 2 GB. Store: a fresh SQLite
file by default, or `--store-url` (e.g. PostgreSQL).

It also measures the write floor: the time to read the forecast file and write its rows once
into a copy of the store's `forecasts` table (same key and indexes) through the same bulk
insert, with nothing else (no validation, bounds, quantiles, matching or scoring). The floor
over the script's time says how close any store-backed load of these rows could come.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import MetaData

from aftercast.config import parse_config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_path
from aftercast.store import schema
from aftercast.store.bulk import insert_frame
from aftercast.store.db import make_engine, migrate

HERE = Path(__file__).resolve().parent


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_store(data: Path, fmt: str, url: str) -> dict[str, float]:
    # Like for like with the pandas script, which scores the given forecasts only: no
    # benchmark forecasts of aftercast's own here (bench_incremental's first cycle has them).
    config = parse_config({"store": {"url": url}, "benchmarks": {"methods": []}}, "bench")
    engine = make_engine(url)
    migrate(engine)
    timings: dict[str, float] = {}
    start = time.perf_counter()
    ingest_path(engine, config, "series", data / fmt / f"series.{fmt}")
    report = ingest_path(engine, config, "forecasts", data / fmt / f"forecasts.{fmt}")
    timings["ingest_forecasts_seconds"] = time.perf_counter() - start
    mark = time.perf_counter()
    ingest_path(engine, config, "actuals", data / fmt / f"actuals.{fmt}")
    timings["ingest_actuals_seconds"] = time.perf_counter() - mark
    mark = time.perf_counter()
    cycle = run_cycle(engine, config)
    timings["first_cycle_seconds"] = time.perf_counter() - mark
    timings["seconds"] = time.perf_counter() - start
    timings["forecast_rows"] = report.accepted
    timings["pairs"] = cycle.pairs_scored
    return timings


def run_floor(data: Path, fmt: str, url: str) -> float:
    """Seconds to read the forecast file and write its point forecasts into a bare copy of
    the `forecasts` table (its key and indexes included) with the store's bulk insert."""
    engine = make_engine(url)
    table = schema.forecasts.to_metadata(MetaData(), name="floor_forecasts")
    for index in table.indexes:
        index.name = f"floor_{index.name}"  # type: ignore[assignment]
    for constraint in table.constraints:
        if constraint.name:
            constraint.name = f"floor_{constraint.name}"  # type: ignore[assignment]
    table.drop(engine, checkfirst=True)
    table.create(engine)
    start = time.perf_counter()
    path = data / fmt / f"forecasts.{fmt}"
    frame = pd.read_parquet(path) if fmt == "parquet" else pd.read_csv(path)
    issued = pd.to_datetime(frame["issued_at"], utc=True, format="ISO8601")
    target = pd.to_datetime(frame["target_at"], utc=True, format="ISO8601")
    issued_s = (issued.astype("int64") // 10**9).to_numpy()
    target_s = (target.astype("int64") // 10**9).to_numpy()
    rows = pd.DataFrame(
        {
            "id": np.arange(1, len(frame) + 1),
            "series_id": pd.factorize(frame["series_id"])[0] + 1,
            "model_id": pd.factorize(frame["model"])[0] + 1,
            "issued_at": issued_s,
            "target_at": target_s,
            "issue_period": issued_s // 86_400,
            "target_period": target_s // 86_400,
            "horizon": (target_s - issued_s) // 86_400,
            "point": frame["point"].to_numpy(np.float64),
            "ingested_at": int(time.time()),
        }
    )
    with engine.begin() as connection:
        insert_frame(connection, table, rows)
    seconds = time.perf_counter() - start
    table.drop(engine)
    engine.dispose()
    return seconds


def run_baseline(data: Path, fmt: str) -> dict[str, float]:
    result = subprocess.run(
        [sys.executable, str(HERE / "pandas_baseline.py"), "--data", str(data), "--format", fmt],
        capture_output=True,
        text=True,
        check=True,
    )
    return dict(json.loads(result.stdout.strip().splitlines()[-1]))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, default=Path("bench/out/data"))
    parser.add_argument("--format", choices=("csv", "parquet"), default="csv")
    parser.add_argument("--store-url", help="store URL (default: a fresh SQLite file)")
    args = parser.parse_args(argv)
    if not (args.data / args.format).is_dir():
        print(
            f"bench_ingest: {args.data / args.format} missing: run bench/make_data.py first",
            file=sys.stderr,
        )
        return 2
    # The script runs first: a child's peak memory starts from its parent's size at the fork
    # (Linux keeps ru_maxrss across exec), which after the store path would be the store's.
    baseline = run_baseline(args.data, args.format)
    with tempfile.TemporaryDirectory() as folder:
        url = args.store_url or f"sqlite:///{Path(folder) / 'bench.db'}"
        store = run_store(args.data, args.format, url)
        store_peak = peak_rss_mb()  # before the floor, which reads the whole file at once
        floor = run_floor(args.data, args.format, url)
    result = {
        "bench": "ingest_and_first_cycle",
        "store": url.split(":", 1)[0],
        "format": args.format,
        **{k: round(v, 3) for k, v in store.items()},
        "rows_per_second": round(store["forecast_rows"] / store["seconds"]),
        "peak_rss_mb": round(store_peak, 1),
        "pandas_seconds": baseline["seconds"],
        "pandas_peak_rss_mb": baseline["peak_rss_mb"],
        "ratio": round(store["seconds"] / baseline["seconds"], 2),
        "floor_seconds": round(floor, 3),
        "floor_ratio": round(floor / baseline["seconds"], 2),
    }
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
