"""Times and periods.

All instants are stored as whole seconds since the Unix epoch, UTC. A series' period comes from
its frequency (a pandas offset alias). Periods of a day or longer follow the series' local
calendar (a daily series in Europe/Berlin changes day at local midnight); sub-daily periods are
counted on the UTC clock so that a daylight-saving change neither drops nor doubles an hour.
A period is an integer ordinal: horizons are differences of ordinals and pairs match on them.
"""

from __future__ import annotations

import re
import warnings
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd
from pandas.tseries.frequencies import to_offset

_OFFSET_SUFFIX = re.compile(r"[T ]\d{2}(?::?\d{2}){0,2}(?:[.,]\d+)?\s*(?:Z|[+-]\d{2}(?::?\d{2})?)$")
_DAY_SECONDS = 86_400


def check_frequency(freq: str) -> str:
    """The alias aftercast stores for `freq`; ValueError unless it can count periods in it.

    An alias pandas deprecated ('A', 'Y', 'Q', 'M', 'H', 'T', 'S', ...) becomes the one pandas
    names now ('YE-DEC', 'QE-DEC', 'ME', 'h', 'min', 's', ...), which counts the same periods,
    so a store never holds an alias a later pandas no longer reads.

    >>> check_frequency("A"), check_frequency("15T"), check_frequency("MS")
    ('YE-DEC', '15min', 'MS')
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FutureWarning)
        try:
            offset = to_offset(freq)
        except (ValueError, TypeError):
            raise ValueError(
                f"{freq!r} is not a pandas offset alias such as 'h', 'D', 'W', 'MS'"
            ) from None
    current = offset.freqstr if any(w.category is FutureWarning for w in caught) else freq
    if _tick_seconds(current) is None and not _business_days(current):
        try:
            pd.Period("2026-01-01", freq=_period_alias(current))
        except (ValueError, TypeError):
            raise ValueError(f"frequency {freq!r} ({offset}) has no calendar period") from None
    return current


def check_timezone(name: str) -> None:
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"{name!r} is not an IANA time zone such as 'UTC' or 'Europe/Berlin'"
        ) from None


def _tick_seconds(freq: str) -> int | None:
    """Length in seconds of a fixed sub-daily frequency ('h', '15min'), else None."""
    offset = to_offset(freq)
    if not isinstance(offset, pd.offsets.Tick) or isinstance(offset, pd.offsets.Day):
        return None
    nanos = offset.nanos
    seconds = int(nanos // 1_000_000_000)
    return seconds if 0 < seconds < _DAY_SECONDS or seconds % _DAY_SECONDS else None


def _business_days(freq: str) -> bool:
    """Whether `freq` counts business days ('B', '2B'), which a Period no longer should."""
    return type(to_offset(freq)) is pd.offsets.BusinessDay


def _period_alias(freq: str) -> str:
    """Period frequency for an offset alias: a month, quarter or year by its start or its end
    ('MS', 'ME', 'QE-JAN', 'YE') counts as that period."""
    offset = to_offset(freq)
    if isinstance(offset, (pd.offsets.MonthBegin, pd.offsets.MonthEnd)):
        return f"{offset.n}M"
    if isinstance(offset, pd.offsets.QuarterBegin):
        return f"{offset.n}Q"
    if isinstance(offset, pd.offsets.QuarterEnd):
        return f"{offset.n}Q-{offset.rule_code.partition('-')[2]}"  # QE-JAN: Q-JAN
    if isinstance(offset, pd.offsets.YearBegin):
        return f"{offset.n}Y"
    if isinstance(offset, pd.offsets.YearEnd):
        return f"{offset.n}Y-{offset.rule_code.partition('-')[2]}"
    return freq


def period_ordinals(epoch_seconds: np.ndarray, freq: str, timezone: str) -> np.ndarray:
    """Integer period ordinal of each instant for one (frequency, time zone).

    >>> period_ordinals(np.array([0, 86_399, 86_400]), "D", "UTC").tolist()
    [0, 0, 1]
    """
    seconds = np.asarray(epoch_seconds, dtype=np.int64)
    tick = _tick_seconds(freq)
    if tick is not None:
        return np.floor_divide(seconds, tick)
    local = pd.to_datetime(seconds, unit="s", utc=True).tz_convert(timezone).tz_localize(None)
    if _business_days(freq):  # pandas' ordinals, without its deprecated Period('B')
        days = local.normalize().to_numpy().astype("datetime64[D]")
        monday_on = np.busday_offset(days, 0, roll="forward")  # a weekend counts as Monday
        return np.busday_count(np.datetime64("1970-01-01", "D"), monday_on).astype(np.int64)
    return np.asarray(local.to_period(_period_alias(freq)).asi8, dtype=np.int64)


def periods_by_series(
    epoch_seconds: np.ndarray, freq: np.ndarray, timezone: np.ndarray
) -> np.ndarray:
    """Period ordinals where each row may have its own frequency and zone.

    Loops over the distinct (frequency, zone) combinations, of which a fleet has a handful,
    never over rows.
    """
    out = np.empty(len(epoch_seconds), dtype=np.int64)
    keys = pd.DataFrame({"f": freq, "z": timezone})
    for (f, z), index in keys.groupby(["f", "z"], sort=False).indices.items():
        out[index] = period_ordinals(np.asarray(epoch_seconds)[index], str(f), str(z))
    return out


def parse_times(values: pd.Series, timezone: pd.Series) -> pd.Series:
    """Parse ISO 8601 text (or datetimes) to epoch seconds; NA where unparseable.

    A time with an offset ('Z', '+02:00') is taken as written; one without is read in the row's
    time zone. Local times that do not exist or are ambiguous (daylight-saving changes) are NA.
    """
    if pd.api.types.is_datetime64_any_dtype(values):
        return _datetimes_to_epoch(values, timezone)
    text = values.astype("string").str.strip()
    has_offset = _has_offset(text)
    result = pd.Series(pd.NA, index=values.index, dtype="Int64")
    if has_offset.any():
        parsed = pd.to_datetime(text[has_offset], utc=True, errors="coerce", format="ISO8601")
        result[has_offset] = _epoch(parsed)
    naive = ~has_offset & text.notna() & (text != "")
    if naive.any():
        parsed = pd.to_datetime(text[naive], errors="coerce", format="ISO8601")
        result[naive] = _localise(parsed, timezone[naive])
    return result


def _has_offset(text: pd.Series) -> pd.Series:
    """Which texts end in a UTC offset; the pattern runs once per distinct text.

    A chunk repeats a few issue and target times over every series, and the pattern costs far
    more per row than the factorisation does.
    """
    codes, uniques = pd.factorize(text)
    matched = pd.Series(uniques, dtype="string").str.contains(_OFFSET_SUFFIX, na=False)
    found = np.append(matched.to_numpy(dtype=bool), False)  # code -1 (NA) takes the last
    return pd.Series(found[codes], index=text.index)


def _datetimes_to_epoch(values: pd.Series, timezone: pd.Series) -> pd.Series:
    if getattr(values.dt, "tz", None) is not None:
        return _epoch(values.dt.tz_convert("UTC"))
    return _localise(values, timezone)


def _localise(naive: pd.Series, timezone: pd.Series) -> pd.Series:
    out = pd.Series(pd.NA, index=naive.index, dtype="Int64")
    for zone, index in timezone.groupby(timezone, sort=False).groups.items():
        local = naive.loc[index].dt.tz_localize(str(zone), ambiguous="NaT", nonexistent="NaT")
        out.loc[index] = _epoch(local)
    return out


def daylight_saving_faults(values: pd.Series, timezone: pd.Series) -> pd.Series:
    """Why each time without an offset has no single instant in its zone; NA for the others.

    "nonexistent" for a local time skipped when the clocks go forward, "ambiguous" for one that
    happens twice when they go back (the two cases `parse_times` leaves NA on purpose, as
    pandas' `tz_localize` does with `nonexistent="NaT"` and `ambiguous="NaT"`). Meant for the
    few rows that failed to parse, so it runs per row's zone without caring for speed.

    >>> zone = pd.Series(["Europe/London"] * 3)
    >>> times = pd.Series(["2026-03-29T01:30", "2026-10-25T01:30", "2026-10-25T03:30"])
    >>> daylight_saving_faults(times, zone).tolist()
    ['nonexistent', 'ambiguous', <NA>]
    """
    out = pd.Series(pd.NA, index=values.index, dtype="string")
    if pd.api.types.is_datetime64_any_dtype(values):
        if getattr(values.dt, "tz", None) is not None:
            return out
        naive = values
    else:
        text = values.astype("string").str.strip()
        naive = pd.to_datetime(text.where(~_has_offset(text)), errors="coerce", format="ISO8601")
    for zone, index in timezone.groupby(timezone, sort=False).groups.items():
        local = naive.loc[index]
        exact = local.dt.tz_localize(str(zone), ambiguous="NaT", nonexistent="NaT").isna()
        # Shifting a skipped time forward succeeds: what stays NaT is ambiguous.
        twice = local.dt.tz_localize(str(zone), ambiguous="NaT", nonexistent="shift_forward")
        failed = local.notna() & exact
        out.loc[index[failed.to_numpy()]] = "nonexistent"
        out.loc[index[(failed & twice.isna()).to_numpy()]] = "ambiguous"
    return out


def _epoch(parsed: pd.Series) -> pd.Series:
    """Whole epoch seconds of tz-aware datetimes, NA for NaT (any datetime resolution)."""
    seconds = (parsed - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(seconds=1)
    return seconds.astype("Int64")


def to_iso(epoch_seconds: int | None) -> str | None:
    """ISO 8601 UTC text for an epoch second, or None."""
    if epoch_seconds is None or pd.isna(epoch_seconds):
        return None
    return pd.Timestamp(int(epoch_seconds), unit="s", tz="UTC").isoformat().replace("+00:00", "Z")


def iso_texts(epoch_seconds: pd.Series) -> pd.Series:
    """`to_iso` of every value, computed once per distinct instant (a column of pairs' issue
    and target times repeats a few instants many times).

    >>> iso_texts(pd.Series([86400, None, 86400])).tolist()
    ['1970-01-02T00:00:00Z', None, '1970-01-02T00:00:00Z']
    """
    names = {value: to_iso(value) for value in epoch_seconds.dropna().unique()}
    return epoch_seconds.map(names).astype(object).where(epoch_seconds.notna(), None)


def parse_instant(text: str) -> int:
    """Epoch seconds of one ISO 8601 time given on the command line (UTC when no offset)."""
    stamp = pd.Timestamp(text)
    if stamp.tzinfo is None:
        stamp = stamp.tz_localize("UTC")
    return int(stamp.value // 1_000_000_000)
