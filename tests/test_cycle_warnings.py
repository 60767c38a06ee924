"""`aftercast cycle` keeps standard output for its result and sends every warning to stderr.

A failed source, a dropped file that cannot be read and a `series:` entry that cannot be applied
each give one warning naming the source or the config key: a plain line, or with `--json` a JSON
line, while standard output holds only the cycle's own line or JSON document.
"""

from __future__ import annotations

import json
import logging
import os
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

from aftercast.cli import main
from aftercast.logs import TextFormatter
from tests.conftest import write_csv

DAYS = ("2026-06-03T00:00:00Z", "2026-06-04T00:00:00Z")  # sources due again on the second


def _setup(folder: Path, season: int) -> Path:
    drop = folder / "drop"
    drop.mkdir(exist_ok=True)
    write_csv(drop / "good.csv", "series_id,observed_at,value", "s,2026-06-01,1")
    (drop / "broken.parquet").write_text(f"not parquet, season {season}")  # new each day
    for path in drop.iterdir():
        os.utime(path, (0, 0))  # settled long ago
    config: dict[str, Any] = {
        "store": {"url": f"sqlite:///{folder / 'a.db'}"},
        "series": [{"id": "s", "season": season}],
        "sources": [
            {"name": "drop", "type": "folder", "kind": "actuals", "path": str(drop)},
            {"name": "gone", "type": "folder", "kind": "actuals", "path": str(folder / "no")},
        ],
    }
    for source in config["sources"]:
        source.update({"glob": "*", "settle_seconds": 0, "schedule": 1})
    path = folder / "c.yaml"
    path.write_text(yaml.safe_dump(config), encoding="utf-8")
    return path


def _cycle(
    folder: Path, day: int, capsys: pytest.CaptureFixture[str], *flags: str
) -> tuple[str, list[str]]:
    path = _setup(folder, season=7 * (day + 1))
    capsys.readouterr()
    assert main(["--config", str(path), "cycle", "--now", DAYS[day], *flags]) == 0
    captured = capsys.readouterr()
    return captured.out, captured.err.splitlines()


def test_cycle_warnings_are_plain_lines_on_stderr(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _cycle(tmp_path, 0, capsys)  # stores series s with season 7 and an actual
    out, err = _cycle(tmp_path, 1, capsys)
    assert out.startswith("cycle 2: ") and len(out.splitlines()) == 1
    assert all(line.startswith("aftercast: warning: ") for line in err), err
    text = "\n".join(err)
    assert "series[0].season: series 's' is stored with 7" in text
    assert f"source 'gone': folder {tmp_path / 'no'} does not exist" in text
    assert f"source 'drop': {tmp_path / 'drop' / 'broken.parquet'}: " in text
    assert len(err) == 3


def test_cycle_json_keeps_stdout_one_document_and_warns_in_json_lines(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _cycle(tmp_path, 0, capsys, "--json")
    out, err = _cycle(tmp_path, 1, capsys, "--json")
    assert json.loads(out)["cycle_id"] == 2  # the whole of stdout is the report
    lines = [json.loads(line) for line in err]
    assert {line["level"] for line in lines} == {"warning"}
    assert {line["cycle_id"] for line in lines} == {2}
    named = {(line["event"], line.get("source"), line.get("key")) for line in lines}
    assert named == {
        ("series entry not applied", None, "series[0].season"),
        ("source failed", "gone", None),
        ("batch not read", "drop", None),
    }
    (unread,) = [line for line in lines if line["event"] == "batch not read"]
    assert unread["batch"] == str(tmp_path / "drop" / "broken.parquet")


def test_a_crash_logged_with_its_source_is_one_plain_line_naming_it() -> None:
    """`log.exception(..., extra={"source": name})`, as a pull that crashed is logged."""
    try:
        raise ValueError("bad header\nsecond line")
    except ValueError:
        record = logging.makeLogRecord(
            {"msg": "source pull crashed", "levelno": logging.ERROR, "levelname": "ERROR"}
        )
        record.source = "warehouse"
        record.exc_info = sys.exc_info()
    line = TextFormatter().format(record)
    assert line == "aftercast: error: source 'warehouse': ValueError: bad header second line"
