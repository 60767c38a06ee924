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
    # The status table has rows: its clock is the scenario's end, not today.
    status = printed.split("$ aftercast status", 1)[1].split("$ aftercast alerts", 1)[0]
    rows = [line.split("│")[1:-1] for line in status.splitlines() if line.startswith("│")]
    assert rows and all(cells[0].strip().startswith("shop-") for cells in rows)
    assert all(cells[2].strip() == "all" and int(cells[3]) > 0 for cells in rows)
    # The commands it suggests set the same clock, so they show rows too.
    (suggested,) = [line for line in printed.splitlines() if line.startswith("try:")]
    assert "status --now 20" in suggested
    assert (folder / "aftercast.yaml").is_file()
    engine = create_engine(f"sqlite:///{folder / 'aftercast.db'}")
    with engine.connect() as connection:
        pairs = connection.execute(text("SELECT COUNT(*) FROM pairs")).scalar_one()
        raised = connection.execute(
            text("SELECT COUNT(*) FROM alerts WHERE state <> 'pending'")
        ).scalar_one()
        labels = connection.execute(
            text("SELECT labels FROM series WHERE key = 'shop-001/rye'")
        ).scalar_one()
        quarantined = connection.execute(text("SELECT reason FROM quarantine")).scalars().all()
    engine.dispose()
    # The late corrections file: four mistakes quarantined with their reasons, one revision.
    assert len(quarantined) == 4 and any(r.startswith("malformed CSV line") for r in quarantined)
    assert "0 accepted, 1 revised, 4 rejected" in printed
    # ... and listed again by `aftercast quarantine`, each with its row number in that file.
    assert printed.count("late-corrections.csv row ") == 4
    assert pairs > 0 and raised > 0
    # The config's series entry is applied on top of the series file's labels.
    labels = json.loads(labels)
    assert labels["pager"] == "rye-desk" and {"team", "region"} <= set(labels)
    events = [json.loads(line) for line in (folder / "alerts.jsonl").read_text().splitlines()]
    assert events
    for event in events:  # CloudEvents 1.0 required context attributes
        assert event["specversion"] == "1.0"
        assert {"id", "source", "type"} <= set(event)
