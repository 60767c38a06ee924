"""`aftercast quarantine`: the rejected rows a user must fix, with file, row, reason and values.

The rule checked is design.md's (ingest: "quarantine bad rows with a reason"): every rejected row
can be found again after the ingest that rejected it, with its row number in the file.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from aftercast.cli import main
from tests.conftest import write_csv


@pytest.fixture
def workdir(tmp_path: Path, store_url: str, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("AFTERCAST_CONFIG", str(tmp_path / "c.yaml"))
    (tmp_path / "c.yaml").write_text(f"store:\n  url: {store_url}\n")
    assert main(["init"]) == 0
    return tmp_path


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


def test_lists_rejected_rows_with_row_numbers(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert _run(capsys, "quarantine").strip() == "no rejected rows are stored"
    bad = write_csv(
        workdir / "day.csv",
        "series_id,observed_at,value",
        "s1,2026-01-01,1",
        "s1,not a time,2",
        "s2,2026-01-01,inf",
        "s3,2026-01-02,4",
    )
    _run(capsys, "ingest", "actuals", str(bad))
    rows = json.loads(_run(capsys, "quarantine", "--json"))
    # Rows 2 and 3 of the file's body (header is line 1), newest first.
    assert sorted((r["row"], r["reason"]) for r in rows) == [
        (2, "unparseable observed_at: 'not a time'"),
        (3, "value is not a finite number: 'inf'"),
    ]
    assert {r["kind"] for r in rows} == {"actuals"}
    assert all(r["source"].endswith("day.csv") for r in rows)
    assert {r["raw"]["series_id"] for r in rows} == {"s1", "s2"}
    text = _run(capsys, "quarantine", "--kind", "actuals", "--reason", "finite")
    expected = "day.csv row 3: value is not a finite number: 'inf'"
    assert text.count("\n") == 1 and expected in text
    assert "no rejected rows match" in _run(capsys, "quarantine", "--kind", "forecasts")


def test_summary_counts_per_reason_and_limit_is_checked(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    body = [f"s{i},2026-01-0{1 + i % 3},nan" for i in range(5)] + ["s9,2026-01-01,7"]
    path = write_csv(workdir / "b.csv", "series_id,observed_at,value", *body)
    _run(capsys, "ingest", "actuals", str(path))
    _run(capsys, "ingest", "actuals", str(path))  # stored once however often it is read
    summary = json.loads(_run(capsys, "quarantine", "--summary", "--json"))
    assert [(s["reason"], s["rows"]) for s in summary] == [
        ("value is not a finite number: 'nan'", 5)
    ]
    assert len(json.loads(_run(capsys, "quarantine", "--json", "--limit", "2"))) == 2
    capsys.readouterr()
    assert main(["quarantine", "--limit", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert "argument --limit: expected a whole number" in err[-1]  # after argparse's usage
