"""One sentence per alert for the messages: what is wrong and how sure, in plain words.

The detect stage leaves numbers in each finding's evidence (coverage, level, n, statistic,
p-value, skill, overdue periods...). This turns the ones a reader needs first into a sentence;
the message lists the rest of the evidence after it and the suggested fix, when there is one,
on its own line.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from aftercast.alerts.rules import DETECTIONS


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def _percent(value: float) -> float:
    """Shares may come as fractions (0.55) or percents (55)."""
    return value * 100 if abs(value) <= 1 else value


def _sureness(statistic: Any, p_value: Any, n: Any) -> str:
    parts = []
    if (p := _number(p_value)) is not None:
        parts.append(f"p = {p:.2g}")
    if (s := _number(statistic)) is not None:
        parts.append(f"statistic {s:.3g}")
    if (count := _number(n)) is not None:
        parts.append(f"{count:.0f} points")
    return f" ({', '.join(parts)})" if parts else ""


def summary_line(
    detection: str, evidence: Mapping[str, Any] | None, statistic: Any, p_value: Any
) -> str:
    """The sentence a message shows for an alert.

    >>> summary_line("coverage_low", {"coverage": 0.55, "level": 80, "n": 40}, None, 1e-6)
    'The 80% interval covered 55% of the last 40 outcomes (p = 1e-06).'
    >>> summary_line("bias", {"n": 28}, 5.2, None)
    'Errors keep one sign (CUSUM or tracking signal) (statistic 5.2, 28 points).'
    """
    evidence = evidence or {}
    coverage, level = _number(evidence.get("coverage")), _number(evidence.get("level"))
    n = evidence.get("n")
    if detection.startswith("coverage") and coverage is not None and level is not None:
        count = _number(n)
        outcomes = f"the last {count:.0f} outcomes" if count is not None else "recent outcomes"
        p = _number(p_value)
        sure = f" (p = {p:.2g})" if p is not None else ""
        return (
            f"The {_percent(level):g}% interval covered {_percent(coverage):.0f}% of "
            f"{outcomes}{sure}."
        )
    text = DETECTIONS.get(detection, detection.replace("_", " "))
    return text[0].upper() + text[1:] + _sureness(statistic, p_value, n) + "."
