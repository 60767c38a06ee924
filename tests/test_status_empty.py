"""`aftercast status` with no rows to show says why on stderr instead of an empty table.

The three causes are told apart: no pairs in the store at all, no pair targets inside the window
at `--now` (by the CONTRACT's window definition, design.md: now - D days < target_at <= now),
or filters that match nothing. `--json` still prints its empty array on stdout.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from aftercast.cli import main
from tests.conftest import write_csv


@pytest.fixture
def status(
    store_url: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
):  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("AFTERCAST_CONFIG", raising=False)
    (tmp_path / "c.yaml").write_text(f"store:\n  url: {store_url}\n")

    def run(*argv: str) -> tuple[str, str]:
        capsys.readouterr()
        assert main(["--config", "c.yaml", *argv]) == 0
        captured = capsys.readouterr()
        return captured.out, captured.err

    return run


def test_status_says_why_it_has_nothing_to_show(status, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    assert status("status", "--now", "2026-01-10T00:00:00Z") == (
        "",
        "aftercast: nothing to show: no pairs yet: ingest forecasts and actuals, then run "
        "`aftercast cycle`\n",
    )
    assert status("status", "--json")[0] == "[]\n"

    write_csv(
        tmp_path / "f.csv",
        "series_id,model,issued_at,target_at,point",
        "s,m,2026-01-01,2026-01-03,1",
    )
    write_csv(tmp_path / "a.csv", "series_id,observed_at,value", "s,2026-01-03,2")
    status("ingest", "forecasts", "f.csv")
    status("ingest", "actuals", "a.csv")
    status("cycle", "--now", "2026-01-10T00:00:00Z")
    out, err = status("status", "--now", "2026-01-10T00:00:00Z")
    assert "s" in out and err == ""  # the pair is in the window: a table, no note

    # 28 days after the target, the default 28-day window no longer holds it.
    out, err = status("status", "--now", "2026-01-31T00:00:00Z")
    assert out == ""
    assert err == (
        "aftercast: nothing to show: no pairs in window 'recent' at 2026-01-31T00:00:00Z: the "
        "pairs' targets run from 2026-01-03T00:00:00Z to 2026-01-03T00:00:00Z (see --now and "
        "--window)\n"
    )
    out, err = status(
        "status", "--now", "2026-01-10T00:00:00Z", "--model", "other", "--horizon", "2"
    )
    assert (out, err) == (
        "",
        "aftercast: nothing to show: no rows in window 'recent' at 2026-01-10T00:00:00Z match "
        "--model, --horizon\n",
    )
    assert status("status", "--now", "2026-01-31T00:00:00Z", "--json") == ("[]\n", "")
