"""`aftercast demo` end to end: the README's first command must keep working.

The demo replays the invented bakery scenario into a fresh SQLite store; this checks what it
promises to leave behind, not its wording: the store with scored pairs, the config it used,
digests in the file channel (CloudEvents 1.0 JSON lines, per the CloudEvents specification's
required attributes) and a status table on standard output.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from aftercast.cli import main


@pytest.mark.slow
def test_demo_runs_the_whole_job_and_leaves_its_files(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = tmp_path / "demo"
    assert main(["demo", "--folder", str(folder)]) == 0
    printed = capsys.readouterr().out
    assert str(folder / "aftercast.db") in printed
    assert (folder / "aftercast.yaml").is_file()
    engine = create_engine(f"sqlite:///{folder / 'aftercast.db'}")
    with engine.connect() as connection:
        pairs = connection.execute(text("SELECT COUNT(*) FROM pairs")).scalar_one()
        raised = connection.execute(
            text("SELECT COUNT(*) FROM alerts WHERE state <> 'pending'")
        ).scalar_one()
    engine.dispose()
    assert pairs > 0 and raised > 0
    events = [json.loads(line) for line in (folder / "alerts.jsonl").read_text().splitlines()]
    assert events
    for event in events:  # CloudEvents 1.0 required context attributes
        assert event["specversion"] == "1.0"
        assert {"id", "source", "type"} <= set(event)
