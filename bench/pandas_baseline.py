"""Plain pandas yardstick: read forecasts and actuals, match them, score every pair in memory.

This is what a careful analyst would write without aftercast: load the two files, join each
forecast to the actual of its target time on (series_id, target_at == observed_at), and compute
per pair the error e = y - f, |e|, e^2, APE and sAPE in percent, and for every interval level L
found in the columns the hit (lower_L <= y <= upper_L), the width and the interval score of
Gneiting and Raftery (2007). It prints one JSON line with the row counts, the time taken, rows
per second (forecast rows read and scored per second of wall time) and the peak resident memory
(``resource.getrusage``). The store-backed path is compared against it, so it stands alone:
pandas and numpy only, nothing from aftercast.
"""

from __future__ import annotations

import argparse
import json
import re
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

LEVEL_COLUMN = re.compile(r"^lower_(\d+(?:\.\d+)?)$")
TIME_COLUMNS = {"forecasts": ("issued_at", "target_at"), "actuals": ("observed_at",)}


def read_table(path: Path, kind: str) -> pd.DataFrame:
    """One CSV, Parquet or JSON Lines file (by extension), times as UTC timestamps."""
    if path.suffix == ".parquet":
        frame = pd.read_parquet(path)
    elif path.suffix == ".jsonl":
        frame = pd.read_json(path, lines=True, dtype={"series_id": str, "model": str})
    else:
        frame = pd.read_csv(path)
    for column in TIME_COLUMNS[kind]:
        frame[column] = pd.to_datetime(frame[column], utc=True, format="ISO8601")
    return frame


def interval_levels(forecasts: pd.DataFrame) -> list[str]:
    """Levels L with both lower_L and upper_L present, as their column suffix."""
    found = (LEVEL_COLUMN.match(column) for column in forecasts.columns)
    return [m.group(1) for m in found if m and f"upper_{m.group(1)}" in forecasts.columns]


def match_pairs(forecasts: pd.DataFrame, actuals: pd.DataFrame) -> pd.DataFrame:
    """Inner join of forecasts to actuals; the newest row wins where an actual repeats."""
    latest = actuals.drop_duplicates(["series_id", "observed_at"], keep="last")
    latest = latest.rename(columns={"observed_at": "target_at"})
    return forecasts.merge(latest, on=["series_id", "target_at"], how="inner", sort=False)


def score_pairs(pairs: pd.DataFrame) -> pd.DataFrame:
    """Per-pair measures, added as columns; APE and sAPE are NaN where undefined."""
    y = pairs["value"].to_numpy(dtype=float)
    f = pairs["point"].to_numpy(dtype=float)
    error = y - f
    abs_error = np.abs(error)
    with np.errstate(divide="ignore", invalid="ignore"):
        ape = np.where(y != 0, 100.0 * abs_error / np.abs(y), np.nan)
        denominator = np.abs(y) + np.abs(f)
        sape = np.where(denominator > 0, 200.0 * abs_error / denominator, np.nan)
    measures = {
        "error": error,
        "abs_error": abs_error,
        "squared_error": error**2,
        "ape": ape,
        "sape": sape,
    }
    for level in interval_levels(pairs):
        lower = pairs[f"lower_{level}"].to_numpy(dtype=float)
        upper = pairs[f"upper_{level}"].to_numpy(dtype=float)
        alpha = 1.0 - float(level) / 100.0
        width = upper - lower
        below = np.maximum(lower - y, 0.0)
        above = np.maximum(y - upper, 0.0)
        measures[f"hit_{level}"] = (lower <= y) & (y <= upper)
        measures[f"width_{level}"] = width
        measures[f"interval_score_{level}"] = width + (2.0 / alpha) * (below + above)
    return pairs.assign(**measures)


def peak_rss_mb() -> float:
    """Peak resident set size of this process; Linux reports KiB, macOS bytes."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / (1024.0 * 1024.0) if sys.platform == "darwin" else peak / 1024.0


def run(forecasts_path: Path, actuals_path: Path) -> dict[str, object]:
    """Read, match and score; returns the figures printed as the JSON line."""
    started = time.perf_counter()
    forecasts = read_table(forecasts_path, "forecasts")
    actuals = read_table(actuals_path, "actuals")
    read_done = time.perf_counter()
    scored = score_pairs(match_pairs(forecasts, actuals))
    finished = time.perf_counter()
    seconds = finished - started
    return {
        "tool": "pandas_baseline",
        "forecasts": str(forecasts_path),
        "forecast_rows": len(forecasts),
        "actual_rows": len(actuals),
        "pairs": len(scored),
        "levels": interval_levels(forecasts),
        "mae": float(scored["abs_error"].mean()) if len(scored) else None,
        "read_seconds": round(read_done - started, 3),
        "score_seconds": round(finished - read_done, 3),
        "seconds": round(seconds, 3),
        "rows_per_second": round(len(forecasts) / seconds, 1) if seconds > 0 else None,
        "peak_rss_mb": round(peak_rss_mb(), 1),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--data",
        type=Path,
        default=Path("bench/out/data"),
        help="folder written by bench/make_data.py",
    )
    parser.add_argument("--format", choices=("csv", "parquet", "jsonl"), default="csv")
    parser.add_argument("--forecasts", type=Path, help="forecast file (overrides --data)")
    parser.add_argument("--actuals", type=Path, help="actual file (overrides --data)")
    args = parser.parse_args(argv)
    forecasts = args.forecasts or args.data / args.format / f"forecasts.{args.format}"
    actuals = args.actuals or args.data / args.format / f"actuals.{args.format}"
    for path in (forecasts, actuals):
        if not path.is_file():
            print(f"pandas_baseline: cannot read {path}: no such file", file=sys.stderr)
            return 2
    print(json.dumps(run(forecasts, actuals)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
