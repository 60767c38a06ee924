"""The command line: exit codes, one-line errors, `ingest --json`, config handling.

The rules checked are the CONTRACT's (design.md, command line): every user error is one line
naming the file, row or key, with a non-zero exit, never a traceback.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from alembic.script import ScriptDirectory

import aftercast.store.migrations
from aftercast.cli import main
from tests.conftest import write_csv

VERSIONS = Path(aftercast.store.migrations.__file__).parent / "versions"


@pytest.fixture
def workdir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("AFTERCAST_CONFIG", raising=False)
    return tmp_path


def test_ingest_json_counts_and_exit_codes(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["init"]) == 0
    # One line naming the newest revision file under migrations/versions (not every head).
    newest = max(VERSIONS.glob("0*.py")).stem
    assert capsys.readouterr().out.splitlines() == [
        f"store ready: schema current (newest revision {newest}, one of "
        f"{len(ScriptDirectory(str(VERSIONS.parent)).get_heads())} branch heads)"
    ]
    good = write_csv(workdir / "a.csv", "series_id,observed_at,value", "s,2026-01-01,1", "s,bad,2")
    capsys.readouterr()
    assert main(["ingest", "actuals", str(good), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert (out["accepted"], out["rejected"], out["unchanged"]) == (1, 1, 0)
    assert out["rejected_reasons"] == {"unparseable observed_at": 1}
    missing = workdir / "nope.csv"
    assert main(["ingest", "actuals", str(missing)]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"aftercast: error: {missing}: no such file"]


def test_unknown_config_key_names_the_key(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = workdir / "c.yaml"
    path.write_text("store:\n  url: sqlite:///x.db\nwindow:\n  dayz: 3\n")
    assert main(["--config", str(path), "init"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0
    assert "window.dayz: unknown key" in err and str(path) in err


def test_bad_config_value_and_missing_env(
    workdir: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    path = workdir / "c.yaml"
    path.write_text("series_defaults:\n  timezone: Mars/Olympus\n")
    assert main(["--config", str(path), "init"]) == 2
    assert "series_defaults.timezone" in capsys.readouterr().err
    path.write_text("store:\n  url: ${AFTERCAST_TEST_UNSET_VAR}\n")
    monkeypatch.delenv("AFTERCAST_TEST_UNSET_VAR", raising=False)
    assert main(["--config", str(path), "init"]) == 2
    err = capsys.readouterr().err
    assert "store.url" in err and "AFTERCAST_TEST_UNSET_VAR" in err


def test_config_from_environment_variable(
    workdir: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    path = workdir / "elsewhere.yaml"
    path.write_text(f"store:\n  url: sqlite:///{workdir / 'env.db'}\n")
    monkeypatch.setenv("AFTERCAST_CONFIG", str(path))
    assert main(["init"]) == 0
    assert (workdir / "env.db").exists()


def test_outdated_store_is_refused_with_the_fix(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from sqlalchemy import create_engine, text

    assert main(["status", "--json"]) == 0  # an empty store is created on first use
    engine = create_engine(f"sqlite:///{workdir / 'aftercast.db'}")
    with engine.begin() as connection:
        connection.execute(text("DELETE FROM alembic_version"))
        connection.execute(text("INSERT INTO alembic_version VALUES ('0001')"))
    capsys.readouterr()
    assert main(["status"]) == 2
    assert "run `aftercast init` to migrate" in capsys.readouterr().err


def test_write_config_is_valid_and_commented(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = workdir / "config" / "aftercast.yaml"
    assert main(["init", "--write-config", str(target)]) == 0
    text = target.read_text()
    assert text.count("#") > 20
    assert main(["--config", str(target), "init"]) == 0
    assert main(["init", "--write-config", str(target)]) == 2  # never overwrites


def test_bad_now_and_bad_flag_are_one_line(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    main(["init"])
    capsys.readouterr()
    assert main(["cycle", "--now", "not-a-time"]) == 2
    assert (
        capsys.readouterr().err.strip()
        == "aftercast: error: --now 'not-a-time' is not an ISO 8601 time"
    )
    assert main(["status", "--bogus"]) == 2


def test_python_dash_m_runs_without_traceback(workdir: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "aftercast", "ingest", "forecasts", "missing.csv"],
        capture_output=True,
        text=True,
        cwd=workdir,
        check=False,
    )
    assert result.returncode != 0
    assert "Traceback" not in result.stderr
    assert "missing.csv" in result.stderr


def test_cycle_refuses_a_clock_before_the_last_completed_cycle(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    import sqlite3

    assert main(["cycle", "--now", "2026-03-10T00:00:00Z"]) == 0
    capsys.readouterr()
    assert main(["cycle", "--now", "2026-03-09T23:59:59+00:00"]) == 2
    assert capsys.readouterr().err.splitlines() == [
        "aftercast: error: --now 2026-03-09T23:59:59Z is before the clock of cycle 1 "
        "(2026-03-10T00:00:00Z); cycles only move forward (`aftercast replay` looks back "
        "without storing)"
    ]
    # The same clock again, then a later one, are cycles like any other.
    assert main(["cycle", "--now", "2026-03-10T00:00:00Z"]) == 0
    assert main(["cycle", "--now", "2026-03-11T00:00:00Z"]) == 0
    with sqlite3.connect(workdir / "aftercast.db") as db:  # the refused one left no cycle row
        assert db.execute("SELECT COUNT(*) FROM cycles").fetchone() == (3,)


def test_ingest_says_how_many_rejected_rows_it_did_not_print(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = [f"s,bad-{i},1" for i in range(7)]
    path = write_csv(workdir / "a.csv", "series_id,observed_at,value", *rows)
    assert main(["ingest", "actuals", str(path)]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 6 and err[0].startswith(f"rejected: {path} row 1: unparseable")
    assert err[-1] == f"rejected: 2 more; aftercast quarantine --source {path} lists them"
