"""Every error a user can cause is one line naming the file, row or key, never a traceback.

The rule is the CONTRACT's (design.md, command line). Each case below is run in-process through
`aftercast.cli.main`, and stderr must be exactly one line that names what to fix.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

from aftercast.cli import main
from tests.conftest import write_csv

# Nothing listens on port 1, so connecting is refused at once.
DOWN_POSTGRES = "postgresql+psycopg://postgres@127.0.0.1:1/aftercast"
STORE_COMMANDS = [
    ["status"],
    ["init"],
    ["ingest", "actuals", "a.csv"],
    ["cycle"],
    ["scores", "export", "-o", "out.csv"],
    ["alerts"],
]


@dataclass(frozen=True)
class Case:
    """A command run in a fresh folder after `setup`; stderr must name `names`."""

    argv: list[str]
    names: str
    setup: Callable[[Path], object] = lambda _: None


def _config(url: str) -> Callable[[Path], object]:
    return lambda folder: (folder / "c.yaml").write_text(f"store:\n  url: {url}\n")


def _ingest(name: str, make: Callable[[Path], object]) -> Case:
    return Case(["ingest", "actuals", name], name, make)


CASES = {
    "not a data file": _ingest("x.txt", lambda d: (d / "x.txt").write_text("a,b\n1,2\n")),
    "empty file": _ingest("e.csv", lambda d: (d / "e.csv").write_bytes(b"")),
    "missing column": _ingest(
        "m.csv", lambda d: write_csv(d / "m.csv", "series_id,observed_at", "s,2026-01-01")
    ),
    "not UTF-8": _ingest(
        "l.csv", lambda d: (d / "l.csv").write_bytes(b"series_id,observed_at,value\n\xe9,x,1\n")
    ),
    "a column named twice": _ingest(
        "twice.csv",
        lambda d: write_csv(
            d / "twice.csv", "series_id,observed_at,value,value", "s,2026-01-01,1,2"
        ),
    ),
    "a directory": _ingest("folder.csv", lambda d: (d / "folder.csv").mkdir()),
    "a directory without type": _ingest("folder", lambda d: (d / "folder").mkdir()),
    "no such file": _ingest("nope.csv", lambda d: None),
    "unknown config key": Case(
        ["--config", "c.yaml", "init"],
        "window.dayz",
        lambda d: (d / "c.yaml").write_text("window:\n  dayz: 3\n"),
    ),
    **{
        f"postgres down: {' '.join(argv[:2])}": Case(
            ["--config", "c.yaml", *argv], "127.0.0.1:1", _config(DOWN_POSTGRES)
        )
        for argv in STORE_COMMANDS
    },
    **{
        f"sqlite cannot open: {' '.join(argv[:2])}": Case(
            ["--config", "c.yaml", *argv],
            "/nonexistent-dir/x.db",
            _config("sqlite:////nonexistent-dir/x.db"),
        )
        for argv in STORE_COMMANDS
    },
    "not a database file": Case(
        ["--config", "c.yaml", "status"],
        "junk.db",
        lambda d: (
            (d / "junk.db").write_text("not a database\n" * 100),
            _config(f"sqlite:///{d / 'junk.db'}")(d),
        ),
    ),
    "psycopg2-style url": Case(
        ["--config", "c.yaml", "status"],
        "store.url",
        _config("postgresql://postgres@127.0.0.1/aftercast"),
    ),
    # A file where a folder must be: no permission bits involved, so it fails as root too.
    "export into a file": Case(
        ["scores", "export", "-o", "plain/out.csv"],
        "plain/out.csv",
        lambda d: (d / "plain").write_text("x"),
    ),
    "export onto a directory": Case(
        ["scores", "export", "--format", "jsonl", "-o", "taken"],
        "taken",
        lambda d: (d / "taken").mkdir(),
    ),
    "negative status --limit": Case(["status", "--limit", "-1"], "--limit -1: give 0 for all"),
    "negative status --limit, JSON": Case(["status", "--json", "--limit", "-5"], "--limit -5"),
    "starter config into a file": Case(
        ["init", "--write-config", "plain/c.yaml"],
        "plain/c.yaml",
        lambda d: (d / "plain").write_text("x"),
    ),
}


@pytest.fixture
def workdir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("AFTERCAST_CONFIG", raising=False)
    return tmp_path


@pytest.mark.parametrize("case", CASES.values(), ids=CASES.keys())
def test_user_error_is_one_line(
    case: Case, workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    case.setup(workdir)
    write_csv(workdir / "a.csv", "series_id,observed_at,value", "s,2026-01-01,1")
    code = main(case.argv)
    err = capsys.readouterr().err
    assert code != 0
    assert "Traceback" not in err
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("aftercast: error: "), err
    assert case.names in lines[0]


def test_down_store_names_the_cause_not_the_driver_essay(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _config(DOWN_POSTGRES)(workdir)
    assert main(["--config", "c.yaml", "init"]) == 2
    assert capsys.readouterr().err.strip() == (
        f"aftercast: error: store {DOWN_POSTGRES}: cannot open (connection failed: connection "
        'to server at "127.0.0.1", port 1 failed: Connection refused)'
    )


def test_psycopg2_style_url_says_which_url_works(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _config("postgresql://postgres@127.0.0.1/aftercast")(workdir)
    assert main(["--config", "c.yaml", "status"]) == 2
    assert "postgresql+psycopg://" in capsys.readouterr().err


def test_unreadable_file_exit_code_is_the_same_for_a_directory(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (workdir / "d.csv").mkdir()
    assert main(["ingest", "actuals", "nope.csv"]) == main(["ingest", "actuals", "d.csv"]) == 1
    assert capsys.readouterr().err.splitlines()[-1] == (
        "aftercast: error: d.csv: is a directory, not a file"
    )


def test_ingest_json_of_one_unreadable_file_has_the_one_file_shape(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    good = write_csv(workdir / "a.csv", "series_id,observed_at,value", "s,2026-01-01,1")
    assert main(["ingest", "actuals", str(good), "--json"]) == 0
    success = json.loads(capsys.readouterr().out)
    assert main(["ingest", "actuals", "nope.csv", "--json"]) == 1
    captured = capsys.readouterr()
    failure = json.loads(captured.out)
    assert set(failure) == {*success, "error"}
    assert failure["error"] == "nope.csv: no such file"
    assert (failure["accepted"], failure["rejected"], failure["rejected_reasons"]) == (0, 0, {})
    assert captured.err.strip() == "aftercast: error: nope.csv: no such file"


def test_ingest_json_of_several_files_keeps_the_unreadable_one(
    workdir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    good = write_csv(workdir / "a.csv", "series_id,observed_at,value", "s,2026-01-01,1", "s,x,2")
    assert main(["ingest", "actuals", "nope.csv", str(good), "--json"]) == 1
    out = json.loads(capsys.readouterr().out)
    assert [f.get("error") for f in out["files"]] == ["nope.csv: no such file", None]
    assert (out["accepted"], out["rejected"]) == (1, 1)
    assert out["rejected_reasons"] == {"unparseable observed_at": 1}


def _parquet(path: Path, columns: list[str]) -> None:
    import pandas as pd

    pd.DataFrame({name: ["x"] for name in columns}).to_parquet(path)


@pytest.mark.parametrize(
    ("name", "make", "found"),
    [
        (
            "m.csv",
            lambda p: write_csv(p, "sid,observed_at,value", "s,2026-01-01,1"),
            "sid, observed_at, value",
        ),
        (
            "m.jsonl",
            lambda p: p.write_text('{"series":"s","observed_at":"2026-01-01","value":1}\n'),
            "series, observed_at, value",
        ),
        # A name with a space around it looks right unless quoted.
        (
            "m.parquet",
            lambda p: _parquet(p, ["series_id ", "observed_at", "value"]),
            "'series_id ', observed_at, value",
        ),
        (
            "w.csv",
            lambda p: write_csv(p, ",".join(f"c{i}" for i in range(25)), ",".join("1" * 25)),
            ", ".join(f"c{i}" for i in range(20)) + ", and 5 more",
        ),
    ],
)
def test_missing_column_error_lists_the_columns_found(
    name: str,
    make: Callable[[Path], object],
    found: str,
    workdir: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    make(workdir / name)
    assert main(["ingest", "actuals", name]) == 1
    (line,) = capsys.readouterr().err.splitlines()
    assert line.startswith(f"aftercast: error: {name}: missing required column")
    assert line.endswith(f" (columns found: {found})")
