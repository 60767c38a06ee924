"""One sentence per alert for the messages: what is wrong and how sure, in plain words.

The detect stage leaves numbers in each finding's evidence (coverage and level, recent and
baseline MAE, skill against the benchmark, mean error and its direction, periods late...).
This turns the ones a reader needs first into a sentence, with the fleet-adjusted p-value (or
the statistic) that says how sure it is; the message lists the rest of the evidence after it,
and the suggested fix, when there is one, on its own line. Missing numbers fall back to the
detection's description.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

from aftercast.alerts.rules import DETECTIONS
from aftercast.notify.render import P_UNDERFLOW

Evidence = Mapping[str, Any]


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def _percent(value: float) -> float:
    """Shares and levels may come as fractions (0.55) or percents (55)."""
    return value * 100 if abs(value) <= 1 else value


def _coverage(e: Evidence, n: float | None) -> str | None:
    coverage, level = _number(e.get("coverage")), _number(e.get("level"))
    if coverage is None or level is None:
        return None
    count = _number(e.get("pairs")) or n
    outcomes = f"{count:.0f} recent forecasts" if count else "recent forecasts"
    return f"The {_percent(level):g}% interval covered {_percent(coverage):.0f}% of {outcomes}"


def _baseline(e: Evidence, n: float | None) -> str | None:
    recent, baseline = _number(e.get("recent_mae")), _number(e.get("baseline_mae"))
    if recent is None or baseline is None:
        return None
    return f"MAE {recent:.4g} on the recent window against {baseline:.4g} at baseline"


def _benchmark(e: Evidence, n: float | None) -> str | None:
    model, bench = _number(e.get("model_mae")), _number(e.get("benchmark_mae"))
    if model is None or bench is None:
        return None
    name = e.get("benchmark") or "the benchmark"
    return f"MAE {model:.4g} against {bench:.4g} for {name} on the same targets"


def _bias(e: Evidence, n: float | None) -> str | None:
    mean_error, direction = _number(e.get("mean_error")), e.get("direction")
    if mean_error is None or not direction:
        return None
    return f"Persistent {direction}: mean error {mean_error:+.4g}"


def _overdue(e: Evidence, n: float | None) -> str | None:
    late, targets = _number(e.get("periods_late")), _number(e.get("overdue_targets"))
    if late is None:
        return None
    count = f"{targets:.0f} targets' " if targets else ""
    return f"{count}actuals are overdue, the oldest by {late:.0f} periods"


def _stalled(e: Evidence, n: float | None) -> str | None:
    late = _number(e.get("periods_since_last_issue"))
    if late is None:
        return None
    return f"No new forecast for {late:.0f} periods"


_SENTENCES: dict[str, Callable[[Evidence, float | None], str | None]] = {
    "coverage_low": _coverage,
    "coverage_high": _coverage,
    "accuracy_vs_baseline": _baseline,
    "no_better_than_benchmark": _benchmark,
    "bias": _bias,
    "actuals_overdue": _overdue,
    "forecasts_stalled": _stalled,
}


def _sureness(statistic: Any, p_value: Any) -> str:
    # The findings an alert reads carry the fleet-adjusted p-value (Benjamini-Hochberg).
    if (p := _number(p_value)) is not None:
        return f" (adjusted p = {p:.2g})" if p > 0 else f" (adjusted p {P_UNDERFLOW})"
    if (s := _number(statistic)) is not None:
        return f" (statistic {s:.3g})"
    return ""


def summary_line(
    detection: str, evidence: Evidence | None, statistic: Any, p_value: Any, n: Any = None
) -> str:
    """The sentence a message shows for an alert.

    >>> summary_line("coverage_low", {"coverage": 0.55, "level": 80}, None, 1e-6, 40)
    'The 80% interval covered 55% of 40 recent forecasts (adjusted p = 1e-06).'
    >>> summary_line("bias", {}, 5.2, None)
    'Errors keep one sign (CUSUM or tracking signal) (statistic 5.2).'
    """
    sentence = _SENTENCES.get(detection, lambda e, n: None)(evidence or {}, _number(n))
    if sentence is None:
        text = DETECTIONS.get(detection, detection.replace("_", " "))
        sentence = text[0].upper() + text[1:]
    return sentence + _sureness(statistic, p_value) + "."
