"""Run every benchmark in `bench/` in turn and keep each one's JSON lines under `bench/`.

`make bench` calls this. The order follows the issues' targets: the first load on SQLite
against the plain pandas script (`results-ingest-sqlite.json`), the next day against the first
full cycle at a history and at twice it (`results-incremental-sqlite.jsonl`), and, when a
PostgreSQL server answers at `--admin-url`, the daily cycle at 1,000, 10,000 and 100,000
series plus the first load there (`results-postgres.jsonl`). Takes tens of minutes on 2 cores;
the numbers go in the README by hand, with the machine they were measured on.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

from sqlalchemy import create_engine, text
from sqlalchemy.exc import OperationalError

HERE = Path(__file__).resolve().parent
DATA = HERE / "out" / "data"


def _run(script: str, *args: str, output: Path) -> None:
    print(f"bench: {script} {' '.join(args)}", file=sys.stderr, flush=True)
    done = subprocess.run(
        [sys.executable, str(HERE / script), *args], stdout=subprocess.PIPE, text=True, check=True
    )
    output.write_text(done.stdout, encoding="utf-8")
    sys.stdout.write(done.stdout)


def _postgres_answers(url: str) -> bool:
    try:
        with create_engine(url).connect() as connection:
            connection.execute(text("SELECT 1"))
    except OperationalError:
        return False
    return True


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--admin-url", default="postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
    )
    args = parser.parse_args(argv)
    if not (DATA / "csv").is_dir():
        subprocess.run([sys.executable, str(HERE / "make_data.py"), str(DATA)], check=True)
    _run("bench_ingest.py", "--data", str(DATA), output=HERE / "results-ingest-sqlite.json")
    _run("bench_incremental.py", output=HERE / "results-incremental-sqlite.jsonl")
    if _postgres_answers(args.admin_url):
        _run(
            "bench_postgres.py",
            "--admin-url",
            args.admin_url,
            "--first-load",
            "--data",
            str(DATA),
            output=HERE / "results-postgres.jsonl",
        )
    else:
        print(f"bench: no PostgreSQL at {args.admin_url}; its benchmarks skipped", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
