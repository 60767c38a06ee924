"""Core commands: init, ingest, cycle, scores export, demo.

Handlers are thin: load the config, open the store, call the stage functions.
"""

from __future__ import annotations

import argparse
import json
import sys
from contextlib import AbstractContextManager, nullcontext
from importlib import resources
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import pandas as pd
from sqlalchemy import Engine, text

from aftercast.cli import EXIT_UNREADABLE, print_json
from aftercast.config import Config, load_config
from aftercast.cycle import run_cycle
from aftercast.errors import AftercastError, InputFileError
from aftercast.ingest import IngestReport, ingest_path
from aftercast.logs import warnings_to_stderr
from aftercast.periods import iso_texts, parse_instant, to_iso
from aftercast.store.catalog import sync_series_entries
from aftercast.store.db import check_current, make_engine, migrate, schema_revisions
from aftercast.store.queries import iter_pair_export


def _engine(config: Config) -> Engine:
    return make_engine(config.store.url, config.store.echo)


def open_store(config: Config) -> Engine:
    """An engine on a store whose schema is current.

    An empty store is created on first use, so a trial needs no separate `init`; a store at an
    older revision is refused with one line saying how to migrate (migrating is a decision).
    """
    engine = _engine(config)
    if schema_revisions(engine)[0] is None:
        migrate(engine)
    check_current(engine)
    return engine


def _now(text: str | None) -> int | None:
    if text is None:
        return None
    try:
        return parse_instant(text)
    except ValueError:
        raise AftercastError(f"--now {text!r} is not an ISO 8601 time") from None


def starter_config_text() -> str:
    return resources.files("aftercast").joinpath("starter.yaml").read_text(encoding="utf-8")


def cmd_init(args: argparse.Namespace) -> int:
    if args.write_config:
        path: Path = args.write_config
        if path.exists():
            raise AftercastError(f"{path}: already exists; not overwritten")
        try:
            with _open_for_writing(path) as handle:
                handle.write(starter_config_text())
        except OSError as exc:
            raise _cannot_write(path, exc) from None
        print(f"wrote starter config to {path}")
        return 0
    config = load_config(args.config)
    engine = _engine(config)
    revision = migrate(engine)
    for line in sync_series_entries(engine, config):  # the config's `series:` entries win
        print(f"aftercast: warning: {line}", file=sys.stderr)
    print(f"store ready: {schema_summary(revision)}")
    return 0


def schema_summary(heads: str) -> str:
    """A comma-joined list of branch heads, said in a few words.

    Each feature's migrations branch from the first revision, so a current store is at one
    head per branch; listing them all told the reader nothing the newest one does not.

    >>> schema_summary("0002_detect,0011_current_frequencies,0003_alerts")
    'schema current (newest revision 0011_current_frequencies, one of 3 branch heads)'
    >>> schema_summary("0001")
    'schema current (revision 0001)'
    """
    names = sorted(heads.split(","))
    if len(names) == 1:
        return f"schema current (revision {names[0]})"
    return f"schema current (newest revision {names[-1]}, one of {len(names)} branch heads)"


def cmd_ingest(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    failed = False
    files: list[dict[str, object]] = []
    for path in args.paths:
        try:
            report = ingest_path(engine, config, args.kind, path)
        except InputFileError as exc:
            print(f"aftercast: error: {exc}", file=sys.stderr)
            failed = True
            # A file that cannot be read keeps its place in the JSON, as a report of nothing
            # kept plus the `error` line, so one object per file has one shape either way.
            files.append({**IngestReport(args.kind, str(path)).as_json(), "error": str(exc)})
            continue
        files.append(report.as_json())
        _print_report(path, report, args.json)
    if args.json:
        # One path prints its own object (the CONTRACT's counts and `rejected_reasons`, plus
        # `error` when it could not be read); several print each under `files` with totals.
        print_json(files[0] if len(files) == 1 else {"files": files, **_totals(files)})
    return EXIT_UNREADABLE if failed else 0


def _print_report(path: Path, report: IngestReport, as_json: bool) -> None:
    for line in report.examples:
        print(f"rejected: {line}", file=sys.stderr)
    if report.rejected > len(report.examples):
        more = report.rejected - len(report.examples)
        print(
            f"rejected: {more} more; aftercast quarantine --source {path} lists them",
            file=sys.stderr,
        )
    if report.ignored_columns:
        print(f"note: {path}: ignored columns {', '.join(report.ignored_columns)}", file=sys.stderr)
    if not as_json:
        print(
            f"{path}: {report.accepted} accepted, {report.revised} revised, "
            f"{report.rejected} rejected, {report.unchanged} unchanged"
        )


def _totals(rows: list[dict[str, object]]) -> dict[str, object]:
    totals: dict[str, object] = {}
    for key in ("accepted", "rejected", "unchanged", "revised"):
        totals[key] = sum(int(r[key]) for r in rows)  # type: ignore[call-overload]
    reasons: dict[str, int] = {}
    for row in rows:
        for reason, count in row["rejected_reasons"].items():  # type: ignore[attr-defined]
            reasons[reason] = reasons.get(reason, 0) + count
    totals["rejected_reasons"] = reasons
    return totals


def _check_clock_forward(engine: Engine, now: int) -> None:
    """Refuse a `--now` before the clock of the last completed cycle.

    Alert lifecycles (raise after N cycles, snoozes, since when), source schedules and the
    stored windows all take each cycle to be later than the one before; stepping back would
    leave an alert history out of order. Looking back is what `replay` is for.
    """
    with engine.connect() as connection:
        last = connection.execute(
            text(
                "SELECT id, now FROM cycles WHERE finished_at IS NOT NULL "
                "ORDER BY now DESC, id DESC LIMIT 1"
            )
        ).first()
    if last is not None and now < last.now:
        raise AftercastError(
            f"--now {to_iso(now)} is before the clock of cycle {last.id} ({to_iso(last.now)}); "
            "cycles only move forward (`aftercast replay` looks back without storing)"
        )


def cmd_cycle(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    now = _now(args.now)
    if now is not None:  # the machine's own clock is trusted, even if a test once ran ahead
        _check_clock_forward(engine, now)
    with warnings_to_stderr(args.json):
        report = run_cycle(engine, config, now)
    if args.json:
        print_json(report.as_json())
    else:
        print(
            f"cycle {report.cycle_id}: {report.pairs_scored} pairs scored in {report.seconds:.2f}s"
        )
    return 0


def _open_for_writing(path: Path) -> AbstractContextManager[TextIO]:
    if str(path) == "-":  # standard output, for a pipe; left open when the export is done
        return nullcontext(sys.stdout)
    path.parent.mkdir(parents=True, exist_ok=True)
    return path.open("w", encoding="utf-8", newline="")


def _cannot_write(path: Path, exc: OSError) -> AftercastError:
    if isinstance(exc, FileExistsError):  # from mkdir: a file sits where a folder must be
        return AftercastError(f"{path}: cannot write ({exc.filename} is a file, not a folder)")
    return AftercastError(f"{path}: cannot write ({exc.strerror or exc})")


def cmd_scores(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    engine = open_store(config)
    output: Path = args.output
    rows = 0
    try:
        with engine.connect() as connection, _open_for_writing(output) as handle:
            for index, frame in enumerate(iter_pair_export(connection)):
                for column in ("issued_at", "target_at"):
                    frame[column] = iso_texts(frame[column])
                frame = frame.drop(columns=["forecast_id", "target_period"])
                if args.format == "csv":
                    frame.to_csv(handle, index=False, header=index == 0)
                else:
                    _write_jsonl(handle, frame)
                rows += len(frame)
    except OSError as exc:  # the store's errors are not OSErrors: this is the output file
        raise _cannot_write(output, exc) from None
    if str(output) == "-":
        print(f"wrote {rows} pairs to standard output", file=sys.stderr)
    else:
        print(f"wrote {rows} pairs to {output}")
    return 0


def _write_jsonl(handle: TextIO, frame: pd.DataFrame) -> None:
    """One JSON object per pair, missing measures as null.

    Floats are written as Python writes them (the shortest text that reads back as the same
    float, what the json module and the CSV export write); pandas' own JSON writer rounds to
    at most 15 decimals. The lines are built a column at a time rather than by a json.dumps
    per pair, which took about three times as long.
    """
    if frame.empty:
        return
    lines: Any = None
    for position, column in enumerate(frame.columns):
        key = ("{" if position == 0 else ",") + json.dumps(str(column)) + ":"
        text = key + _json_texts(frame[column])
        lines = text if lines is None else lines + text
    handle.write("".join(lines + "}\n"))


def _json_texts(values: pd.Series) -> pd.Series:
    """Each value of a column as JSON text: null for a missing or non-finite number."""
    missing = values.isna().to_numpy()
    if pd.api.types.is_integer_dtype(values):
        whole = values.fillna(0).astype("int64").to_numpy()
        texts = np.array(list(map(str, whole.tolist())), dtype=object)
    elif pd.api.types.is_float_dtype(values):
        numbers = values.to_numpy(dtype=np.float64)
        texts = np.array(list(map(repr, numbers.tolist())), dtype=object)
        missing |= ~np.isfinite(numbers)
    else:
        # Text repeats (series, model, instants): escape each distinct value once.
        codes, distinct = pd.factorize(values)
        escaped = np.array([json.dumps(v) for v in distinct.tolist()] + ["null"], dtype=object)
        texts = escaped[codes]  # code -1, a missing value, takes the last: null
    texts[missing] = "null"
    return pd.Series(texts, index=values.index)


def cmd_demo(args: argparse.Namespace) -> int:
    from aftercast.demo import run_demo

    return run_demo(args.folder)


def register(commands: Any) -> None:
    init = commands.add_parser("init", help="create or migrate the store")
    init.add_argument(
        "--write-config",
        type=Path,
        metavar="PATH",
        help="write a commented starter config to PATH instead",
    )
    init.set_defaults(handler=cmd_init)

    ingest = commands.add_parser("ingest", help="load forecasts, actuals or series from files")
    ingest.add_argument("kind", choices=["forecasts", "actuals", "series"])
    ingest.add_argument("paths", nargs="+", type=Path, metavar="PATH")
    ingest.add_argument("--json", action="store_true", help="print counts as one JSON object")
    ingest.set_defaults(handler=cmd_ingest)

    cycle = commands.add_parser("cycle", help="one full monitoring pass")
    cycle.add_argument("--now", help="evaluation time, ISO 8601 (default: the clock)")
    cycle.add_argument("--json", action="store_true", help="print the cycle report as JSON")
    cycle.set_defaults(handler=cmd_cycle)

    scores = commands.add_parser("scores", help="matched pairs with their per-pair measures")
    scores_commands = scores.add_subparsers(dest="scores_command", required=True)
    export = scores_commands.add_parser("export", help="write the pairs to a file")
    export.add_argument("--format", choices=["csv", "jsonl"], default="csv")
    export.add_argument(
        "-o", "--output", type=Path, required=True, metavar="PATH", help="a file, or - for stdout"
    )
    export.set_defaults(handler=cmd_scores)

    demo = commands.add_parser("demo", help="the whole job end to end on an invented scenario")
    demo.add_argument(
        "--folder",
        type=Path,
        help="where to put the demo files (default: a new folder under ./demo-output)",
    )
    demo.set_defaults(handler=cmd_demo)
