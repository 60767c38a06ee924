"""`scores export`: one set of columns for the whole file, values under their own column.

The expected values come from the input rows and the CONTRACT's definitions (design.md:
coverage, interval score, pinball loss), computed here by hand, not by aftercast.
"""

from __future__ import annotations

import csv
import functools
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pytest

from aftercast.cli import main
from aftercast.commands import core
from aftercast.store.queries import iter_pair_export
from tests.conftest import write_csv

ACTUALS = {("a", 1): 10.0, ("a", 2): 11.0, ("b", 1): 20.0, ("b", 2): 22.0}
ACTUALS |= {("c", 1): 30.0, ("c", 2): 33.0, ("d", 1): 40.0, ("d", 2): 44.0}
# Early series have only an 80% interval; later ones 80% and 95% and three quantiles. The many
# digits check that JSON Lines keeps every digit the CSV keeps.
NARROW = "series_id,model,issued_at,target_at,point,lower_80,upper_80"
WIDE = NARROW + ",lower_95,upper_95,q_10,q_50,q_90"


def _forecast(series: str, horizon: int, wide: bool) -> tuple[str, dict[str, float]]:
    y = ACTUALS[(series, horizon)]
    # Horizon 2's 80% interval lies wholly above the actual, so there are hits and misses.
    shift = 0.0 if horizon == 1 else 2.5
    values = {
        "point": y + 0.123456789012345678 + shift,
        "lower_80": y - 1.0 + shift,
        "upper_80": y + 1.0 + shift,
    }
    if wide:
        values |= {
            "lower_95": y - 2.718281828459045,
            "upper_95": y + 3.141592653589793,
            "q_10": y - 0.7071067811865476 + shift,
            "q_50": y + 0.1 + shift,
            "q_90": y + 1.4142135623730951 + shift,
        }
    cells = ",".join(repr(v) for v in values.values())
    return f"{series},m,2026-01-01,2026-01-0{1 + horizon},{cells}", values


def _expected(series: str, horizon: int, values: dict[str, float]) -> dict[str, float]:
    """The per-pair measures by the CONTRACT's definitions, from the input values alone."""
    y = ACTUALS[(series, horizon)]
    out = {"actual": y, **values, "error": y - values["point"]}
    for level in ("80", "95"):
        if f"lower_{level}" not in values:
            continue
        low, up, alpha = values[f"lower_{level}"], values[f"upper_{level}"], 1 - int(level) / 100
        out[f"hit_{level}"] = float(low <= y <= up)
        out[f"width_{level}"] = up - low
        out[f"interval_score_{level}"] = (
            (up - low) + (2 / alpha) * max(low - y, 0.0) + (2 / alpha) * max(y - up, 0.0)
        )
    for prob in ("10", "50", "90"):
        if f"q_{prob}" in values:
            p, q = int(prob) / 100, values[f"q_{prob}"]
            out[f"pinball_{prob}"] = max(p * (y - q), (p - 1) * (y - q))
    return out


@pytest.fixture
def store(
    store_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> tuple[Path, dict[tuple[str, int], dict[str, float]]]:
    """A store whose pairs come two per export batch, the first batches without 95% or q_."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("AFTERCAST_CONFIG", raising=False)
    monkeypatch.setattr(core, "iter_pair_export", functools.partial(iter_pair_export, batch=2))
    config = tmp_path / "c.yaml"
    config.write_text(f"store:\n  url: {store_url}\n")
    expected: dict[tuple[str, int], dict[str, float]] = {}
    for name, header, keys in (("narrow", NARROW, "ab"), ("wide", WIDE, "cd")):
        rows = []
        for series in keys:
            for horizon in (1, 2):
                row, values = _forecast(series, horizon, header == WIDE)
                rows.append(row)
                expected[(series, horizon)] = _expected(series, horizon, values)
        write_csv(tmp_path / f"{name}.csv", header, *rows)
        assert main(["--config", str(config), "ingest", "forecasts", f"{name}.csv"]) == 0
    actual_rows = [f"{s},2026-01-0{1 + h},{y!r}" for (s, h), y in ACTUALS.items()]
    write_csv(tmp_path / "actuals.csv", "series_id,observed_at,value", *actual_rows)
    assert main(["--config", str(config), "ingest", "actuals", "actuals.csv"]) == 0
    assert main(["--config", str(config), "cycle", "--now", "2026-01-10T00:00:00Z"]) == 0
    return config, expected


def _check_row(row: Mapping[str, Any], expected: dict[str, float]) -> None:
    for column, value in row.items():
        if column in expected:
            assert value is not None, column
            assert float(value) == pytest.approx(expected[column], rel=1e-12, abs=1e-12), column
        elif column.split("_")[0] in ("lower", "upper", "hit", "width", "q", "pinball") or (
            column.startswith("interval_score")
        ):
            assert value in ("", None), column  # a measure this pair's forecast does not have


def test_csv_columns_hold_across_batches(
    store: tuple[Path, dict[tuple[str, int], dict[str, float]]],
    capsys: pytest.CaptureFixture[str],
) -> None:
    config, expected = store
    assert main(["--config", str(config), "scores", "export", "-o", "pairs.csv"]) == 0
    assert capsys.readouterr().out.strip().endswith("wrote 8 pairs to pairs.csv")
    with open("pairs.csv", newline="", encoding="utf-8") as handle:
        lines = list(csv.reader(handle))
    header, body = lines[0], lines[1:]
    for name in ("lower_80", "lower_95", "hit_95", "interval_score_95", "q_10", "pinball_90"):
        assert name in header
    assert len(body) == 8
    assert all(len(line) == len(header) for line in body)
    for line in body:
        row = dict(zip(header, line, strict=True))
        _check_row(row, expected[(str(row["series_id"]), int(row["horizon"]))])
        assert row["hit_80"] in ("0", "1")  # whole numbers in every batch, gaps or not


def test_jsonl_keeps_every_digit_of_the_csv(
    store: tuple[Path, dict[tuple[str, int], dict[str, float]]],
    capsys: pytest.CaptureFixture[str],
) -> None:
    config, expected = store
    for fmt in ("csv", "jsonl"):
        argv = ["--config", str(config), "scores", "export", "--format", fmt, "-o", f"p.{fmt}"]
        assert main(argv) == 0
    with open("p.csv", newline="", encoding="utf-8") as handle:
        from_csv = list(csv.DictReader(handle))
    with open("p.jsonl", encoding="utf-8") as handle:
        from_jsonl = [json.loads(line) for line in handle]
    assert [list(r) for r in from_jsonl] == [list(r) for r in from_csv]
    for row_csv, row_json in zip(from_csv, from_jsonl, strict=True):
        values = expected[(row_json["series_id"], row_json["horizon"])]
        _check_row(row_json, values)
        for column, text in row_csv.items():
            if isinstance(row_json[column], float):
                assert row_json[column] == float(text), column  # the same double, exactly
        # Input values come back to within a unit or two in the last place (ingest's parser is
        # not exactly rounded), far inside what 10 significant digits would lose.
        for column in ("point", "q_90"):
            if column in values:
                assert row_json[column] == pytest.approx(values[column], rel=1e-15, abs=0)


def test_csv_of_a_store_without_pairs_is_its_header_row(
    store_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("AFTERCAST_CONFIG", raising=False)
    (tmp_path / "c.yaml").write_text(f"store:\n  url: {store_url}\n")
    export = ["--config", "c.yaml", "scores", "export"]
    assert main([*export, "-o", "empty.csv"]) == 0
    assert main([*export, "--format", "jsonl", "-o", "empty.jsonl"]) == 0
    # Then one pair, for the header a file with rows has (the same reader, csv.reader).
    write_csv(
        tmp_path / "f.csv",
        "series_id,model,issued_at,target_at,point",
        "s,m,2026-01-01,2026-01-02,1",
    )
    write_csv(tmp_path / "a.csv", "series_id,observed_at,value", "s,2026-01-02,2")
    for kind in ("forecasts", "actuals"):
        assert main(["--config", "c.yaml", "ingest", kind, f"{kind[0]}.csv"]) == 0
    assert main(["--config", "c.yaml", "cycle", "--now", "2026-01-10T00:00:00Z"]) == 0
    assert main([*export, "-o", "one.csv"]) == 0
    with (
        open("empty.csv", newline="", encoding="utf-8") as empty,
        open("one.csv", newline="", encoding="utf-8") as one,
    ):
        (header,) = list(csv.reader(empty))
        assert [header] == list(csv.reader(one))[:1]
    assert "series_id" in header and "error" in header
    assert Path("empty.jsonl").read_bytes() == b""  # JSON Lines: no pairs, no lines


def test_dash_writes_to_standard_output_and_the_count_to_stderr(
    store: tuple[Path, dict[tuple[str, int], dict[str, float]]],
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`-o -` (the usual convention for a pipe): the same bytes as the file, and stdout holds
    nothing else, so `aftercast scores export -o - | ...` reads clean CSV or JSON Lines."""
    config, _ = store
    for fmt in ("csv", "jsonl"):
        export = ["--config", str(config), "scores", "export", "--format", fmt]
        assert main([*export, "-o", f"file.{fmt}"]) == 0
        capsys.readouterr()
        assert main([*export, "-o", "-"]) == 0
        captured = capsys.readouterr()
        assert captured.out == Path(f"file.{fmt}").read_text(encoding="utf-8")
        assert captured.err.startswith("wrote ") and "standard output" in captured.err
    assert not Path("-").exists()
