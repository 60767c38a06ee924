"""PIT histogram from quantile forecasts: where outcomes fell among the forecast's quantiles.

For a calibrated probabilistic forecast the probability integral transform F(y) of the outcome is
uniform (Dawid 1984; Gneiting, Balabdaoui and Raftery 2007, JRSS B 69(2)). A forecast given as
quantiles q_1 < ... < q_k at probabilities p_1 < ... < p_k only says into which of the k + 1 bins
[0, p_1), [p_1, p_2), ..., [p_k, 1] F(y) falls: the bin is the number of quantiles below y. The
histogram counts outcomes per bin; under calibration bin j holds a share p_j - p_(j-1), so the
bars are drawn as observed share over expected share, 1 everywhere for a calibrated forecast.
Interval bounds count as quantiles: the lower and upper bound of a central L% interval are the
(1 - L/100)/2 and (1 + L/100)/2 quantiles. Pure and vectorised: frames in, arrays out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class PitHistogram:
    edges: np.ndarray  # bin edges in probability, 0 first and 1 last
    counts: np.ndarray  # outcomes per bin
    n: int

    @property
    def expected(self) -> np.ndarray:
        """Expected share of outcomes per bin under calibration."""
        return np.diff(self.edges)

    @property
    def ratio(self) -> np.ndarray:
        """Observed share over expected share per bin (1 is calibrated)."""
        if self.n == 0:
            return np.full(len(self.counts), np.nan)
        return (self.counts / self.n) / self.expected


def forecast_quantiles(intervals: pd.DataFrame, quantiles: pd.DataFrame) -> pd.DataFrame:
    """Long frame (forecast_id, prob as a fraction, value) from interval bounds and quantiles.

    >>> iv = pd.DataFrame({"forecast_id": [1], "level": [80.0], "lower": [8.0], "upper": [12.0]})
    >>> q = pd.DataFrame({"forecast_id": [1], "prob": [50.0], "value": [10.0]})
    >>> forecast_quantiles(iv, q)["prob"].round(3).tolist()
    [0.1, 0.5, 0.9]
    """
    parts = []
    if not intervals.empty:
        alpha = 1 - intervals["level"].to_numpy(dtype=float) / 100
        ids = intervals["forecast_id"].to_numpy()
        parts.append(
            pd.DataFrame(
                {
                    "forecast_id": ids,
                    "prob": alpha / 2,
                    "value": intervals["lower"].to_numpy(dtype=float),
                }
            )
        )
        parts.append(
            pd.DataFrame(
                {
                    "forecast_id": ids,
                    "prob": 1 - alpha / 2,
                    "value": intervals["upper"].to_numpy(dtype=float),
                }
            )
        )
    if not quantiles.empty:
        parts.append(
            pd.DataFrame(
                {
                    "forecast_id": quantiles["forecast_id"].to_numpy(),
                    "prob": quantiles["prob"].to_numpy(dtype=float) / 100,
                    "value": quantiles["value"].to_numpy(dtype=float),
                }
            )
        )
    if not parts:
        return pd.DataFrame({"forecast_id": [], "prob": [], "value": []})
    long = pd.concat(parts, ignore_index=True)
    long["prob"] = long["prob"].round(6)  # 0.1 from an 80% interval equals a 10% quantile
    long = long.drop_duplicates(["forecast_id", "prob"])
    return long.sort_values(["forecast_id", "prob"], ignore_index=True)


def pit_histogram(actual: pd.Series, bounds: pd.DataFrame) -> PitHistogram | None:
    """Histogram over the pairs whose forecasts share the most common set of probabilities.

    `actual` is indexed by forecast_id; `bounds` is `forecast_quantiles` output. Forecasts with
    another set of probabilities would need other bins, so they are left out; None when no
    forecast has any quantile.

    >>> bounds = pd.DataFrame({"forecast_id": [1, 1, 2, 2], "prob": [0.1, 0.9, 0.1, 0.9],
    ...                        "value": [8.0, 12.0, 8.0, 12.0]})
    >>> pit_histogram(pd.Series([7.0, 10.0], index=[1, 2]), bounds).counts.tolist()
    [1, 1, 0]
    """
    bounds = bounds[bounds["forecast_id"].isin(actual.index)]
    if bounds.empty:
        return None
    wide = bounds.pivot(index="forecast_id", columns="prob", values="value")
    present = wide.notna().to_numpy()
    # Which probabilities each forecast has, as one integer per forecast (a bit per column).
    signature = (present * (1 << np.arange(present.shape[1], dtype=np.int64))).sum(axis=1)
    values_seen, seen_counts = np.unique(signature, return_counts=True)
    common = values_seen[np.argmax(seen_counts)]
    wide = wide[signature == common].loc[:, present[signature == common][0]]
    probs = wide.columns.to_numpy(dtype=float)
    values = wide.to_numpy(dtype=float)
    outcome = actual.reindex(wide.index).to_numpy(dtype=float)
    keep = np.isfinite(outcome)
    below = (values[keep] < outcome[keep, None]).sum(axis=1)
    counts = np.bincount(below, minlength=len(probs) + 1)
    edges = np.concatenate([[0.0], probs, [1.0]])
    return PitHistogram(edges=edges, counts=counts, n=int(keep.sum()))
