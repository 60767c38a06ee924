"""A CSV whose last field opens a quote that never closes (RFC 4180: a quoted field ends with a
quote). Confined to its line, that line is malformed: rejected at its row number, every good row
kept, wherever the chunks fall and whether or not a line break ends the file. Run over further
lines, the rows after the quote cannot be told from its value: the file is refused, nothing
stored. Closed quotes, a value's line break among them, read as before. Row numbers and values
are counted by hand. Both stores; the pushed-body path (`sources.http.csv_chunks`) too.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.errors import InputFileError
from aftercast.ingest import ingest_path
from aftercast.ingest.csv_rows import UNCLOSED_QUOTE
from aftercast.sources.http import csv_chunks
from aftercast.store.bulk import read_frame
from tests.conftest import make_config

HEADER = "series_id,observed_at,value"


def _rows(count: int) -> list[str]:
    days = pd.date_range("2026-01-01", periods=count, freq="h", tz="UTC")
    return [f"s{i % 3},{day:%Y-%m-%dT%H:%M:%SZ},{i}" for i, day in enumerate(days)]


def _stored(engine: Engine) -> tuple[list[float], list[tuple[int, str, str]]]:
    with engine.connect() as connection:
        values = read_frame(connection, "SELECT value FROM actuals ORDER BY value")["value"]
        rejected = read_frame(
            connection, "SELECT row_number, reason, raw FROM quarantine ORDER BY row_number"
        )
    rows = [(int(n), r, json.loads(w)["line"]) for n, r, w in rejected.itertuples(index=False)]
    return values.tolist(), rows


@pytest.mark.parametrize("good", [999, 1_000])  # the bad row ends the first chunk / is alone
@pytest.mark.parametrize("ending", ["", "\n", "\r\n"])
def test_a_last_field_left_open_is_a_malformed_line_at_its_number(
    engine: Engine, config: Config, tmp_path: Path, good: int, ending: str
) -> None:
    lines = [HEADER, *_rows(good), 's1,2026-03-01T00:00:00Z,"2']
    path = tmp_path / "actuals.csv"
    path.write_bytes(("\n".join(lines) + ending).encode())
    chunked = make_config(
        str(config.store.url), ingest={"chunk_rows": 1_000}, series_defaults={"frequency": "h"}
    )

    report = ingest_path(engine, chunked, "actuals", path)

    assert (report.accepted, report.rejected) == (good, 1)
    values, rejected = _stored(engine)
    assert values == [float(i) for i in range(good)]  # the 2 is not stored
    assert rejected == [(good + 1, UNCLOSED_QUOTE, 's1,2026-03-01T00:00:00Z,"2')]


def test_a_quote_left_open_over_further_lines_refuses_the_file(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = tmp_path / "actuals.csv"
    # Is row 3 the value's second line, or a row the quote swallowed? The file cannot say.
    path.write_text(f'{HEADER}\ns0,2026-01-01,1\ns1,2026-01-01,"2\ns2,2026-01-02,3\n')
    with pytest.raises(InputFileError, match=r"row 2 opens a quoted field that never closes"):
        ingest_path(engine, config, "actuals", path)
    assert _stored(engine) == ([], [])


@pytest.mark.parametrize("last", ['"2"', '"2"\n', '"2\n"\n', 'x"2', '""""'])
def test_closed_quotes_and_a_quote_inside_a_value_read_as_before(last: str) -> None:
    body = f"{HEADER}\ns0,2026-01-01,1\ns1,2026-01-01,{last}".encode()
    (chunk,) = csv_chunks(body, 1_000, "body")
    assert "__rejected__" not in chunk.frame
    expected = {'"2"': "2", '"2"\n': "2", '"2\n"\n': "2\n", 'x"2': 'x"2', '""""': '"'}[last]
    assert chunk.frame["value"].tolist() == ["1", expected]


def test_a_pushed_body_left_open_is_read_as_a_file_is() -> None:
    body = f'{HEADER}\ns0,2026-01-01,1\ns1,2026-01-01,"2'.encode()
    (chunk,) = csv_chunks(body, 1_000, "body")
    assert chunk.frame["__rejected__"].tolist()[1] == UNCLOSED_QUOTE
    with pytest.raises(InputFileError, match="^body: row 2 opens"):
        list(csv_chunks(body + b"\ns2,2026-01-02,3\n", 1_000, "body"))
