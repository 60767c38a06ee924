"""Charts of the series page, drawn server-side as inline SVG with matplotlib.

The band chart (actuals against the forecast's interval band, with the band's rolling coverage
under it) is the one alert e-mails carry, from `aftercast.notify.charts`, so the analyst sees the
same picture in the message and on the page. This module adds the rolling error (the model's
rolling MAE, and the benchmark's when aftercast scored one) and the PIT histogram. Colours are
the Okabe-Ito palette the band chart uses, and line styles and markers back colour up, so the
charts read the same with any colour vision; figures are small and scale to a phone's width.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from aftercast.config import WindowConfig
from aftercast.notify.base import ChartData
from aftercast.notify.charts import BLUE, GREY, VERMILLION, date_axis, render_band_chart_svg
from aftercast.periods import to_iso
from aftercast.web.pit import PitHistogram

FONT_SIZE = 8
ORANGE = "#E69F00"  # Okabe-Ito orange, for the benchmark


def rolling_mean(times: np.ndarray, values: np.ndarray, window: WindowConfig) -> np.ndarray:
    """Mean of `values` over the window ending at each time: (t - D days, t] or the N latest.

    >>> rolling_mean(np.array([0, 86_400, 172_800]), np.array([1.0, 3.0, 5.0]),
    ...              WindowConfig(days=2)).tolist()
    [1.0, 2.0, 4.0]
    """
    series = pd.Series(
        np.asarray(values, dtype=float),
        index=pd.to_datetime(np.asarray(times, dtype=np.int64), unit="s"),
    )
    if window.days is not None:
        rolled = series.rolling(pd.Timedelta(days=window.days), min_periods=1).mean()
    else:
        rolled = series.rolling(int(window.points or 1), min_periods=1).mean()
    return rolled.to_numpy()


def _values(frame: pd.DataFrame, column: str) -> list[float | None]:
    return [None if pd.isna(v) else float(v) for v in frame[column]]


def band_chart(
    series_id: str,
    model: str,
    level: float,
    pairs: pd.DataFrame,
    intervals: pd.DataFrame,
    window: WindowConfig,
) -> str:
    """Actuals against the `level`% band, with the band's rolling coverage under it."""
    band = intervals[intervals["level"] == level].set_index("forecast_id")
    data = pairs.join(band[["lower", "upper", "hit"]], on="forecast_id")
    covered = data.dropna(subset=["hit"])
    times = [str(to_iso(t)) for t in data["target_at"]]
    coverage = rolling_mean(covered["target_at"].to_numpy(), covered["hit"].to_numpy(), window)
    chart = ChartData(
        series_id=series_id,
        model=model,
        level=level,
        times=times,
        actual=_values(data, "actual"),
        point=_values(data, "point"),
        lower=_values(data, "lower"),
        upper=_values(data, "upper"),
        coverage_times=[str(to_iso(t)) for t in covered["target_at"]],
        coverage=[float(c) for c in coverage],
    )
    return render_band_chart_svg(chart)


def _svg(fig: Figure) -> str:
    import matplotlib

    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def _figure(height: float = 2.6) -> tuple[Figure, Axes]:
    fig = Figure(figsize=(6.0, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    ax: Axes = fig.subplots()
    ax.tick_params(labelsize=FONT_SIZE)
    ax.grid(True, color="#dddddd", linewidth=0.6)
    ax.spines[["top", "right"]].set_visible(False)
    return fig, ax


def rolling_error_chart(
    model: str,
    pairs: pd.DataFrame,
    benchmark: str | None,
    benchmark_pairs: pd.DataFrame,
    window: WindowConfig,
) -> str:
    """Rolling MAE of the model, and of the benchmark on the same horizon when there is one."""
    fig, ax = _figure()
    lines = [(model, pairs, BLUE, "-", "o")]
    if benchmark is not None and not benchmark_pairs.empty:
        lines.append((benchmark, benchmark_pairs, ORANGE, "--", "s"))
    for name, frame, colour, style, marker in lines:
        times = pd.to_datetime(frame["target_at"], unit="s").to_numpy()
        mae = rolling_mean(frame["target_at"].to_numpy(), frame["abs_error"].to_numpy(), window)
        ax.plot(
            times,
            mae,
            color=colour,
            linestyle=style,
            linewidth=1.4,
            label=name,
            marker=marker if len(times) < 40 else None,
            markersize=3,
        )
    if pairs.empty:
        ax.text(
            0.5,
            0.5,
            "no pairs in this range",
            transform=ax.transAxes,
            ha="center",
            color=GREY,
            parse_math=False,
        )
    else:
        date_axis(ax)
    ax.set_ylabel("rolling MAE", fontsize=FONT_SIZE)
    ax.legend(loc="upper left", fontsize=FONT_SIZE - 1, frameon=False, ncol=2)
    ax.margins(y=0.2)
    return _svg(fig)


def pit_chart(histogram: PitHistogram) -> str:
    """Bars of observed over expected share per PIT bin; the dashed line at 1 is calibration."""
    fig, ax = _figure(2.4)
    edges = histogram.edges
    ratio = np.nan_to_num(histogram.ratio)
    outside = (np.arange(len(ratio)) == 0) | (np.arange(len(ratio)) == len(ratio) - 1)
    colours = [VERMILLION if edge else BLUE for edge in outside]
    ax.bar(
        edges[:-1],
        ratio,
        width=np.diff(edges),
        align="edge",
        color=colours,
        edgecolor="white",
        linewidth=0.8,
    )
    ax.axhline(1.0, color=GREY, linestyle="--", linewidth=1)
    ax.set_xlim(0, 1)
    ax.set_xlabel("forecast probability below the outcome (PIT)", fontsize=FONT_SIZE)
    ax.set_ylabel("observed / expected", fontsize=FONT_SIZE)
    ax.set_title(
        f"{histogram.n} outcomes; dashed line: calibrated; outer bins (beyond the extreme "
        "quantiles) in red",
        loc="left",
        fontsize=FONT_SIZE,
        color=GREY,
        parse_math=False,
    )
    return _svg(fig)
