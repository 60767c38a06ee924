"""Frequencies pandas deprecated are stored under the alias pandas names now, at every way in.

Which aliases the installed pandas deprecates is asked of pandas itself (`to_offset` warns);
each is checked to count the very periods its current alias counts, on times over six decades
and three zones. A frequency aftercast accepts raises no FutureWarning on its way in or when
periods are counted. Expected business-day ordinals are counted by hand from Thursday
1970-01-01 (ordinal 0). Config, series file, push and upgrade; both stores.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from pandas.tseries.frequencies import to_offset
from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.ingest import ingest_path, ingest_records
from aftercast.periods import check_frequency, period_ordinals
from aftercast.store.db import migrate, write
from tests.conftest import make_config, write_csv

OLD = ["A", "Y", "Y-JUN", "A-MAR", "AS", "Q", "Q-JAN", "M", "2M", "H", "2H", "T", "15T", "S"]
CURRENT = {"A": "YE-DEC", "Q": "QE-DEC", "M": "ME", "H": "h", "15T": "15min", "S": "s"}
TIMES = np.arange(-500_000_000, 2_000_000_000, 86_400 * 3 + 3_613, dtype=np.int64)


@pytest.fixture(autouse=True)
def _no_future_warnings() -> Iterator[None]:
    with warnings.catch_warnings():
        warnings.simplefilter("error", FutureWarning)
        yield


def _deprecated(freq: str) -> bool:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FutureWarning)
        to_offset(freq)
    return any(w.category is FutureWarning for w in caught)


@pytest.mark.parametrize("old", OLD)
def test_a_deprecated_alias_becomes_the_current_one_with_the_same_periods(old: str) -> None:
    current = check_frequency(old)
    assert _deprecated(old) and not _deprecated(current)
    assert CURRENT.get(old, current) == current
    assert check_frequency(current) == current
    for zone in ("UTC", "Europe/Berlin", "America/New_York"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)
            before = period_ordinals(TIMES, old, zone)
        assert period_ordinals(TIMES, current, zone).tolist() == before.tolist()


@pytest.mark.parametrize("freq", ["ME", "QE", "YE", "QE-JAN", "YE-JUN", "MS", "W", "D", "h"])
def test_a_current_alias_is_kept_as_written(freq: str) -> None:
    assert check_frequency(freq) == freq
    period_ordinals(TIMES, freq, "Europe/Berlin")


@pytest.mark.parametrize(("end", "start"), [("ME", "MS"), ("QE", "QS"), ("YE", "YS")])
def test_a_period_counted_by_its_end_is_the_one_counted_by_its_start(end: str, start: str) -> None:
    ends = period_ordinals(TIMES, end, "Europe/Berlin")
    assert ends.tolist() == period_ordinals(TIMES, start, "Europe/Berlin").tolist()


def test_business_days_count_without_a_future_warning() -> None:
    thu, fri, sat, sun, mon, tue = (86_400 * d + 3_600 for d in range(6))  # 1970-01-01 on
    days = np.array([thu, fri, sat, sun, mon, tue])
    assert check_frequency("B") == "B"
    assert period_ordinals(days, "B", "UTC").tolist() == [0, 1, 2, 2, 2, 3]


def test_a_deprecated_alias_without_periods_is_refused_in_one_line() -> None:
    with pytest.raises(ValueError, match=r"^frequency 'BA' \(<BYearEnd: month=12>\) has no"):
        check_frequency("BA")


def test_config_defaults_and_entries_hold_the_current_alias(store_url: str) -> None:
    config = make_config(
        store_url,
        series_defaults={"frequency": "H", "season": 24},
        series=[{"id": "x", "frequency": "M"}],
    )
    assert (config.series_defaults.frequency, config.series[0].frequency) == ("h", "ME")


def _stored(engine: Engine) -> dict[str, str]:
    with engine.connect() as connection:
        rows = connection.execute(text("SELECT key, frequency FROM series")).all()
    return {row.key: row.frequency for row in rows}


def test_series_files_and_pushes_store_the_current_alias(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = write_csv(tmp_path / "s.csv", "series_id,frequency", "a,A", "b,15T", "c,MS", "d,Q")
    assert ingest_path(engine, config, "series", path).accepted == 4
    pushed = [{"series_id": "e", "frequency": "H"}, {"series_id": "f", "frequency": "ME"}]
    assert ingest_records(engine, config, "series", pushed, "POST /v1/series").accepted == 2
    stored = {"a": "YE-DEC", "b": "15min", "c": "MS", "d": "QE-DEC", "e": "h", "f": "ME"}
    assert _stored(engine) == stored
    again = write_csv(tmp_path / "t.csv", "series_id,frequency", "a,Y", "f,M")
    assert ingest_path(engine, config, "series", again).unchanged == 2


def test_the_upgrade_stores_the_current_alias_of_each_stored_frequency(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = write_csv(tmp_path / "s.csv", "series_id,frequency", "a,D", "b,h", "c,ME")
    assert ingest_path(engine, config, "series", path).accepted == 3
    with write(engine) as connection:  # as an earlier version stored them
        connection.execute(text("UPDATE series SET frequency = 'H' WHERE key = 'b'"))
        connection.execute(text("UPDATE series SET frequency = 'M' WHERE key = 'c'"))
        connection.execute(
            text("DELETE FROM alembic_version WHERE version_num = '0011_current_frequencies'")
        )
    migrate(engine)
    assert _stored(engine) == {"a": "D", "b": "h", "c": "ME"}


def test_the_downgrade_writes_back_the_aliases_the_earlier_version_counts_in(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    from alembic import command

    from aftercast.store.db import _alembic_config

    rows = ["a,ME", "b,QE-JAN", "c,YE-DEC", "d,2ME", "e,h", "f,MS", "g,W-SUN"]
    path = write_csv(tmp_path / "s.csv", "series_id,frequency", *rows)
    assert ingest_path(engine, config, "series", path).accepted == 7
    with write(engine) as connection:
        command.downgrade(_alembic_config(connection), "0011_current_frequencies@-1")
    old = {"a": "M", "b": "Q-JAN", "c": "Y-DEC", "d": "2M", "e": "h", "f": "MS", "g": "W-SUN"}
    assert _stored(engine) == old
