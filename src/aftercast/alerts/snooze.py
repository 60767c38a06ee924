"""When a snooze ends, from what a person typed: an ISO 8601 time or a duration from now.

The command line takes both (`--until 2026-07-01T09:00Z`, `--until 4h`); the API takes the
time only. Everything else is refused with one line saying what was expected, never guessed:
a calendar word ("tomorrow"), a time that is not ahead of now, or one more than
`MAX_SNOOZE_DAYS` ahead (a snooze is a short hold; an alert to ignore for years is a rule to
change).
"""

from __future__ import annotations

import re
from datetime import UTC, datetime

MAX_SNOOZE_DAYS = 3660  # ten years
_DURATION = re.compile(
    r"(\d+(?:\.\d+)?)\s*(m|mins?|minutes?|h|hrs?|hours?|d|days?|w|weeks?)", re.IGNORECASE
)
_UNIT_SECONDS = {"m": 60, "h": 3600, "d": 86_400, "w": 604_800}
EXPECTED = "an ISO 8601 time (2026-07-01T09:00Z) or a duration (30m, 4h, 2d, 1w)"


def parse_time(text: str) -> int:
    """Epoch seconds of an ISO 8601 time; UTC when it has no offset. ValueError otherwise.

    >>> parse_time("2024-05-01T09:00Z"), parse_time("2024-05-01 11:00+02:00")
    (1714554000, 1714554000)
    """
    moment = datetime.fromisoformat(text.strip().replace("z", "Z"))
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return int(moment.timestamp())


def snooze_end(text: str, now: int, durations: bool = True) -> int:
    """Epoch seconds at which a snooze given as `text` ends; ValueError with the reason.

    >>> snooze_end("4h", 0), snooze_end("90 minutes", 0), snooze_end("1970-01-02", 0)
    (14400, 5400, 86400)
    """
    value = text.strip()
    found = _DURATION.fullmatch(value) if durations else None
    if found:
        seconds = float(found.group(1)) * _UNIT_SECONDS[found.group(2)[0].lower()]
        end = now + round(min(seconds, 2.0 * MAX_SNOOZE_DAYS * 86_400))
    else:
        try:
            end = parse_time(value)
        except (ValueError, OverflowError):
            raise ValueError(
                f"is not {EXPECTED if durations else 'an ISO 8601 time (2026-07-01T09:00Z)'}"
            ) from None
    if end <= now:
        raise ValueError("is not in the future")
    if end > now + MAX_SNOOZE_DAYS * 86_400:
        raise ValueError(f"is more than {MAX_SNOOZE_DAYS} days ahead")
    return end
