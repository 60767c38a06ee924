"""Write the benchmark data set: the bakery scenario at 1,000 series x 90 issue days x 14 horizons.

With the default single model that is 1,260,000 forecast rows (point, 80% and 95% intervals,
10/50/90% quantiles) and 90,000 actuals, saved twice under the output folder: ``csv/`` and
``parquet/``, each with ``series``, ``forecasts`` and ``actuals`` files. A small share of series
is degraded from day 60 on (coverage collapse or level shift, never a stall, which would drop
rows) so that the detection stages have real work. It prints one JSON line with the paths, row
counts and time taken. Same arguments, same files.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from aftercast.scenario import ScenarioSpec, generate, pick_degraded, write

MODELS = ("shop-planner", "quick-trend")
# Stalled series would drop forecast rows; the benchmark keeps its round 1,260,000.
BENCH_DEGRADATIONS = ("coverage_collapse", "level_shift")


def build_spec(args: argparse.Namespace) -> ScenarioSpec:
    """The scenario the benchmark runs on, from the command-line arguments."""
    degraded = pick_degraded(
        args.series, args.degraded, BENCH_DEGRADATIONS, args.degrade_from, seed=args.seed
    )
    return ScenarioSpec(
        n_series=args.series,
        days=args.days,
        horizons=args.horizons,
        models=MODELS[: args.models],
        degraded=degraded,
        seed=args.seed,
    )


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", nargs="?", type=Path, default=Path("bench/out/data"))
    parser.add_argument("--series", type=int, default=1000)
    parser.add_argument("--days", type=int, default=90, help="issue days (and days of actuals)")
    parser.add_argument("--horizons", type=int, default=14)
    parser.add_argument("--models", type=int, choices=(1, 2), default=1)
    parser.add_argument("--degraded", type=int, default=50, help="series degraded (default 5%%)")
    parser.add_argument("--degrade-from", type=int, default=60, help="first degraded day")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument(
        "--formats", nargs="+", choices=("csv", "parquet", "jsonl"), default=["csv", "parquet"]
    )
    return parser.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    started = time.perf_counter()
    scenario = generate(build_spec(args))
    generated = time.perf_counter()
    written = {}
    for fmt in args.formats:
        files = write(scenario, args.out / fmt, fmt)
        written[fmt] = {
            "series": str(files.series),
            "forecasts": str(files.forecasts[0]),
            "actuals": str(files.actuals[0]),
        }
    print(
        json.dumps(
            {
                "tool": "make_data",
                "forecast_rows": len(scenario.forecasts),
                "actual_rows": len(scenario.actuals),
                "series": len(scenario.series),
                "degraded": len(scenario.spec.degraded),
                "generate_seconds": round(generated - started, 3),
                "write_seconds": round(time.perf_counter() - generated, 3),
                "files": written,
            }
        )
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
