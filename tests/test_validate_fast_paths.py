"""Row validation's quick paths give exactly what the plain column-wide checks give.

Each reference below is the straightforward check (strip every cell, parse the whole column,
build every reason) that the quick paths in `validate` and `periods` must reproduce: the same
values to the bit (signed zeros included), the same reasons on the same rows.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from aftercast.ingest.cells import Reasons, number_values, text_values, time_values
from aftercast.periods import _OFFSET_SUFFIX, _has_offset

TRICKY = [
    "", " ", "  1.5 ", "\xa02.5", "\u30003", "3\u2003", "\t7\n", "\x1c8\x1f",
    "nan", "NaN", " nan ", "inf", "-inf", "+inf", "Infinity", "-Infinity",
    "1e3", "1E-3", "1e400", "-1e400", "abc", "1_000", "0x10", "\u0661\u0662", "True",
    "-0", "0", "-0.0", "1.", ".5", "+5", "5e", "--1", "1,5", "0.1", "1e16",
    "9007199254740993", "-12345678901234567", "12345678901234567890", "99999999999999999999999",
]  # fmt: skip


def _slow_number(frame: pd.DataFrame, column: str, required: bool) -> tuple[pd.Series, pd.Series]:
    reasons = Reasons(frame.index)
    raw = frame[column]
    text = raw.astype("string").str.strip()
    empty = raw.isna() | (text == "")
    values = pd.to_numeric(text.where(~empty), errors="coerce").astype("float64")
    if required:
        reasons.flag(empty, f"missing {column}")
    bad = ~empty & ~np.isfinite(values)
    reasons.flag(bad, column + " is not a finite number: '" + text.fillna("") + "'")
    return values.where(~empty), reasons.reason


def _same_numbers(cells: Sequence[object], dtype: object = object, required: bool = True) -> None:
    frame = pd.DataFrame({"x": pd.Series(cells, dtype=dtype)})
    expected, expected_reasons = _slow_number(frame, "x", required)
    reasons = Reasons(frame.index)
    got = number_values(frame, "x", reasons, required)
    assert got.dtype == np.float64
    np.testing.assert_array_equal(got.to_numpy(), expected.to_numpy())
    assert np.array_equal(np.signbit(got.to_numpy()), np.signbit(expected.to_numpy()))
    pd.testing.assert_series_equal(reasons.reason, expected_reasons)


@pytest.mark.parametrize("cell", TRICKY)
@pytest.mark.parametrize("required", [True, False])
def test_one_tricky_cell_among_numbers(cell: str, required: bool) -> None:
    _same_numbers(["1.25", cell, " 3 ", "4e2"], required=required)


@pytest.mark.parametrize("cell", TRICKY)
def test_tricky_cell_among_integers_and_whole_columns(cell: str) -> None:
    _same_numbers(["-0", "12", cell, "7"])
    _same_numbers([cell, cell, cell])


@given(
    st.lists(
        st.one_of(
            st.sampled_from(TRICKY),
            st.floats(allow_nan=True, allow_infinity=True).map(repr),
            st.integers(-(2**70), 2**70).map(str),
            st.text(alphabet="0123456789.-+eE \t\xa0", max_size=8),
        ),
        min_size=1,
        max_size=30,
    )
)
@settings(max_examples=300, deadline=None)
def test_any_text_column_parses_as_the_plain_check_does(cells: list[str]) -> None:
    _same_numbers(cells)


@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=1, max_size=30))
@settings(max_examples=200, deadline=None)
def test_float_columns_parse_as_their_text_does(cells: list[float]) -> None:
    _same_numbers(cells, dtype=np.float64)


def test_typed_and_mixed_columns() -> None:
    _same_numbers([0.1 + 0.2, -0.0, 1e17, np.nan, np.inf, -np.inf, 2.5], dtype=np.float64)
    _same_numbers([1, -3, 2**60, 0], dtype=np.int64)
    _same_numbers([1, 2.5, None, True, "3", " 4 ", np.nan, float("inf"), pd.NA, pd.NaT, "x"])
    _same_numbers([True, False], dtype=bool)
    _same_numbers([1.5, np.nan], dtype=np.float32)
    _same_numbers(["1.5", None, pd.NA], dtype="string")


def test_times_get_the_reasons_of_the_plain_check() -> None:
    cells = [
        "2026-06-01T00:00:00Z", "", " ", None, "garbage", " 2026-06-01T00:00:00+02:00 ",
        "2026-03-29T02:30:00", "2026-06-01", "\xa02026-06-01T00:00Z", "NaT", "nan",
    ]  # fmt: skip
    frame = pd.DataFrame({"t": pd.Series(cells, dtype=object)})
    zones = pd.Series("Europe/Berlin", index=frame.index)
    expected = Reasons(frame.index)
    raw = frame["t"]
    expected.flag(raw.isna() | (raw.astype("string").str.strip() == ""), "missing t")
    # Berlin's clocks skip 02:00-03:00 on 29 March 2026 (IANA tz database, Europe/Berlin).
    expected.flag(
        raw == "2026-03-29T02:30:00",
        "nonexistent local t: '2026-03-29T02:30:00' does not exist in Europe/Berlin (the clocks "
        "go forward over it); give the time with its UTC offset",
    )
    unparseable = "unparseable t: '" + raw.astype("string").fillna("") + "'"
    expected.flag(time_values(frame, "t", zones, Reasons(frame.index)).isna(), unparseable)
    reasons = Reasons(frame.index)
    time_values(frame, "t", zones, reasons)
    pd.testing.assert_series_equal(reasons.reason, expected.reason)
    assert reasons.reason.notna().sum() == 7


def test_offsets_and_keys_match_the_per_row_operations() -> None:
    cells = ["2026-06-01T00:00:00Z", None, "2026-06-01T00:00:00", "2026-06-01T00:00:00Z", " a "]
    text = pd.Series(cells, dtype="string").str.strip()
    expected = text.str.contains(_OFFSET_SUFFIX, na=False).to_numpy(dtype=bool)
    np.testing.assert_array_equal(_has_offset(text).to_numpy(), expected)
    keys = pd.DataFrame({"k": [" s1 ", "s1", "", None, "\xa0s2\u3000", "s1", " "]})
    plain = keys["k"].astype("string").str.strip().replace("", pd.NA)
    pd.testing.assert_series_equal(text_values(keys, "k"), plain)
