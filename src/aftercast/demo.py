"""`aftercast demo`: the whole job end to end on the invented Marrow Hill Bakeries scenario.

It writes the scenario's files into a fresh folder, creates a SQLite store there, and replays the
feed the way production sees it: each day the new actuals and that morning's forecasts are
ingested and one monitoring cycle runs with the clock set to that day: aftercast makes its own
benchmarks, scores pairs, keeps windows, tests them, raises alerts and writes their digests to a
file channel; repaired series recover and their alerts clear. It then prints the status, the
alerts, the digests and a backtest, and says where every file is. No servers are needed.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass, replace
from pathlib import Path

import pandas as pd
from rich.console import Console

from aftercast.cli import main
from aftercast.config import Config, load_config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from aftercast.scenario import Scenario, ScenarioFiles, ScenarioSpec, generate, pick_degraded, write
from aftercast.store.catalog import all_series
from aftercast.store.db import make_engine, migrate

N_SERIES = 12
DAYS = 70
DEGRADE_FROM = 28
RECOVER_FROM = 46  # the collapsed series get honest forecasts again from this day
ENTRY_SERIES = "shop-001/rye"  # has a `series:` entry in the demo config


@dataclass(frozen=True)
class DemoPaths:
    folder: Path
    config: Path
    store: Path
    inputs: Path
    digests: Path


def _paths(folder: Path | None) -> DemoPaths:
    if folder is None:
        folder = Path("demo-output") / time.strftime("%Y%m%d-%H%M%S")
    folder = folder.resolve()
    folder.mkdir(parents=True, exist_ok=True)
    return DemoPaths(
        folder,
        folder / "aftercast.yaml",
        folder / "aftercast.db",
        folder / "inputs",
        folder / "alerts.jsonl",
    )


def demo_config_text(paths: DemoPaths) -> str:
    return f"""# Config written by `aftercast demo`.
store:
  url: sqlite:///{paths.store}
series_defaults:
  frequency: D
  season: 7
  timezone: UTC
window:
  name: recent
  days: 14
windows:
  - name: long
    days: 42
horizon_buckets: ["1", "2-7"]
series:
  # Applied to the stored series at every cycle, beside the labels of the series file.
  - id: {ENTRY_SERIES}
    labels: {{pager: rye-desk}}
channels:
  - name: digest-file
    type: file
    path: {paths.digests}
routes:
  - channels: [digest-file]
"""


def _scenario_specs() -> tuple[ScenarioSpec, ScenarioSpec]:
    degraded = pick_degraded(
        N_SERIES, 3, ("coverage_collapse", "level_shift"), DEGRADE_FROM, seed=3
    )
    spec = ScenarioSpec(
        n_series=N_SERIES,
        days=DAYS,
        horizons=7,
        start="2026-06-01",
        degraded=degraded,
        seed=11,
        history_days=28,
    )
    return spec, replace(spec, degraded={})


def _feed(spec: ScenarioSpec, healthy: ScenarioSpec) -> Scenario:
    """The degraded scenario, with honest forecasts for the collapsed series from RECOVER_FROM."""
    bad, good = generate(spec), generate(healthy)
    collapsed = [k for k, (kind, _) in spec.degraded.items() if kind == "coverage_collapse"]
    recover_at = pd.Timestamp(spec.start, tz="UTC") + pd.Timedelta(days=RECOVER_FROM)

    def late(frame: pd.DataFrame) -> pd.Series:
        issued = pd.to_datetime(frame["issued_at"], utc=True)
        return frame["series_id"].isin(collapsed) & (issued >= recover_at)

    forecasts = pd.concat(
        [bad.forecasts[~late(bad.forecasts)], good.forecasts[late(good.forecasts)]]
    )
    return replace(bad, forecasts=forecasts.reset_index(drop=True))


def _replay_feed(console: Console, config: Config, files: ScenarioFiles) -> None:
    """Ingest day by day and cycle after each day, as a daily feed would arrive."""
    engine = make_engine(config.store.url)
    forecasts = {p.stem: p for p in files.forecasts}
    actuals = {p.stem: p for p in files.actuals}
    for day in sorted(set(forecasts) | set(actuals)):
        if day in actuals:
            ingest_path(engine, config, "actuals", actuals[day])
        if day in forecasts:
            ingest_path(engine, config, "forecasts", forecasts[day])
        report = run_cycle(engine, config, parse_instant(f"{day}T23:00:00Z"))
        raised, cleared = report.alerts.get("raised", 0), report.alerts.get("cleared", 0)
        if raised or cleared:
            console.print(
                f"  {day}: cycle {report.cycle_id}: {raised} alert(s) raised, "
                f"{cleared} cleared, {report.alerts.get('notifications', 0)} digest(s)"
            )
    engine.dispose()


def _show_entry(console: Console, config: Config) -> None:
    engine = make_engine(config.store.url)
    with engine.connect() as connection:
        row = all_series(connection).set_index("key").loc[ENTRY_SERIES]
    engine.dispose()
    labels = ", ".join(f"{name}={value}" for name, value in row["labels"].items())
    console.print(
        f"config entry series[0], applied by each cycle: {ENTRY_SERIES} has labels {labels} "
        "(the series file's and the config's)"
    )


def _show_rejections(console: Console, paths: DemoPaths, files: ScenarioFiles) -> None:
    """A late file of corrections with mistakes in it: each bad row is rejected with its number
    and reason and kept in the quarantine, the good row is taken as a revision."""
    header, first = files.actuals[-1].read_text(encoding="utf-8").splitlines()[:2]
    key, observed, value = first.split(",")[:3]
    rows = [
        f"{key},{observed},{float(value) + 3}",  # a corrected actual: a revision
        f"{key},2026-02-30T00:00:00Z,{value}",  # no such day
        f"{key},{observed},{value},sent twice",  # one field too many
        f",{observed},{value}",  # no series
        f"{key},{observed},inf",  # not a finite number
    ]
    path = paths.inputs / "late-corrections.csv"
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    console.rule("[bold]A late file of corrections, with mistakes in it")
    _run(console, paths.config, "ingest", "actuals", str(path))
    _run(console, paths.config, "quarantine", "--source", path.name)


def _show_digests(console: Console, paths: DemoPaths) -> None:
    if not paths.digests.exists():
        console.print("no digest written")
        return
    lines = [json.loads(line) for line in paths.digests.read_text().splitlines() if line]
    console.print(f"{len(lines)} digest messages in {paths.digests} (CloudEvents JSON lines):")
    for event in lines[:4]:
        console.print(f"  {event['time']}  {event.get('subject') or event['data'].get('summary')}")


def _run(console: Console, config_path: Path, *argv: str) -> None:
    console.print(f"[bold]$ aftercast {' '.join(argv)}[/]")
    main(["--config", str(config_path), *argv])


def run_demo(folder: Path | None = None) -> int:
    # The demo's own rules span COLUMNS when output is not a terminal (its tables are whole).
    os.environ.setdefault("COLUMNS", "150")
    console = Console()
    started = time.perf_counter()
    paths = _paths(folder)
    paths.config.write_text(demo_config_text(paths), encoding="utf-8")
    config = load_config(str(paths.config))
    spec, healthy = _scenario_specs()
    console.rule("[bold]aftercast demo: Marrow Hill Bakeries (an invented bakery chain)")
    console.print(
        f"{spec.n_series} series (daily loaves per shop and bread), models "
        f"{', '.join(spec.models)}, {spec.days} days, horizons 1-{spec.horizons}."
    )
    console.print(
        f"Degraded on purpose from day {DEGRADE_FROM}: "
        + ", ".join(f"{k} ({v[0]})" for k, v in spec.degraded.items())
        + f"; the coverage collapses are repaired from day {RECOVER_FROM}."
    )
    files = write(_feed(spec, healthy), paths.inputs, "csv", split_by_day=True)
    migrate(make_engine(config.store.url))
    series_report = ingest_path(make_engine(config.store.url), config, "series", files.series)
    console.print(f"series metadata: {series_report.accepted} series with team and region labels")
    console.print(
        "[bold]Replaying the daily feed[/] (ingest actuals and forecasts, one cycle a day; "
        "aftercast adds its own naive and seasonal naive benchmarks):"
    )
    _replay_feed(console, config, files)
    _show_entry(console, config)
    _show_rejections(console, paths, files)
    end = (pd.Timestamp(spec.start) + pd.Timedelta(days=spec.days - 1)).date()
    # The scenario's days are not today's: every status command here needs its clock.
    at_end = f"{end}T23:00:00Z"
    console.rule("[bold]Status at the end, worst MASE first")
    _run(
        console,
        paths.config,
        "status",
        "--now",
        at_end,
        "--horizon",
        "all",
        "--limit",
        "8",
    )
    console.rule("[bold]Alerts (raised, then cleared where the forecasts were repaired)")
    _run(console, paths.config, "alerts", "--all")
    console.rule("[bold]Digests delivered to the file channel")
    _show_digests(console, paths)
    console.rule("[bold]Rolling-origin backtest of the benchmarks on one series")
    _run(
        console,
        paths.config,
        "backtest",
        "--series",
        next(iter(spec.degraded)),
        "--horizon",
        "7",
        "--folds",
        "5",
    )
    console.rule("[bold]Files")
    console.print(
        f"inputs:  {paths.inputs}\nstore:   {paths.store}\nconfig:  {paths.config}\n"
        f"digests: {paths.digests}"
    )
    console.print(
        f"try:     aftercast --config {paths.config} status --now {at_end}\n"
        f"         aftercast --config {paths.config} status --now {at_end} --buckets "
        "--horizon 2-7   # per horizon bucket\n"
        f"         aftercast --config {paths.config} run   # pages on http://127.0.0.1:8080/"
    )
    console.print(f"done in {time.perf_counter() - started:.1f}s")
    return 0
