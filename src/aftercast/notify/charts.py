"""Draws the chart an on-call analyst looks at first: actuals against the forecast band.

The top panel shades the central prediction interval, draws the point forecast through it and
marks each actual, with the actuals that fell outside the band drawn larger, in another colour
and with another marker shape. The bottom panel shows the rolling coverage of the band against
its nominal level. Colours are the Okabe-Ito palette, which stays distinct for the common kinds
of colour blindness, and shape backs colour up. Figures are built with matplotlib's object API
on an Agg canvas, so no display and no pyplot global state are ever involved, and the web
pages can reuse the SVG form inline.
"""

from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")  # before anything can import pyplot: never look for a display

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import NullLocator, PercentFormatter  # noqa: E402

from aftercast.notify.base import ChartData  # noqa: E402

# Okabe and Ito (2008), "Color universal design".
BLUE, SKY_BLUE, VERMILLION, GREEN, GREY = "#0072B2", "#56B4E9", "#D55E00", "#009E73", "#555555"
FIGURE_INCHES = (6.0, 3.6)
DPI = 100
FONT_SIZE = 8


def _times(values: list[str]) -> np.ndarray:
    # Naive UTC datetime64 is what matplotlib's date axis takes without any converters.
    return (
        pd.to_datetime(pd.Series(values, dtype=object), utc=True, format="ISO8601")
        .dt.tz_convert(None)
        .to_numpy()
    )


def _numbers(values: list[float | None], length: int, name: str) -> np.ndarray:
    if len(values) != length:
        raise ValueError(f"chart {name} has {len(values)} values for {length} times")
    return np.array(values, dtype=float)  # None becomes NaN, which matplotlib leaves as a gap


def _draw_band(ax: Axes, chart: ChartData) -> None:
    times = _times(chart.times)
    count = len(times)
    actual = _numbers(chart.actual, count, "actual")
    point = _numbers(chart.point, count, "point")
    lower = _numbers(chart.lower, count, "lower")
    upper = _numbers(chart.upper, count, "upper")
    level = f"{chart.level:g}%"
    ax.fill_between(
        times, lower, upper, color=SKY_BLUE, alpha=0.35, linewidth=0, label=f"{level} interval"
    )
    ax.plot(times, point, color=BLUE, linewidth=1.3, label="forecast")
    with np.errstate(invalid="ignore"):
        outside = (actual < lower) | (actual > upper)
    inside = ~outside & np.isfinite(actual)
    # Misses get colour, size and shape, so they stand out in greyscale and to any eye.
    for mask, marker, size, colour, label in (
        (inside, "o", 3.2, "black", "actual"),
        (outside, "X", 6.0, VERMILLION, f"outside ({int(outside.sum())})"),
    ):
        ax.plot(
            times[mask],
            actual[mask],
            linestyle="none",
            marker=marker,
            markersize=size,
            color=colour,
            label=label,
        )
    if count == 0:
        ax.text(
            0.5,
            0.5,
            "no recent pairs",
            transform=ax.transAxes,
            ha="center",
            color=GREY,
            parse_math=False,
        )
        ax.set_yticks([])
    ax.legend(loc="upper left", fontsize=FONT_SIZE - 1, frameon=False, ncol=4)
    ax.margins(x=0.01, y=0.25)  # head room so the legend does not cover the data


def _draw_coverage(ax: Axes, chart: ChartData) -> None:
    times = _times(chart.coverage_times)
    coverage = _numbers(chart.coverage, len(times), "coverage")
    target = chart.level / 100
    ax.axhline(target, color=GREY, linestyle="--", linewidth=1, label=f"target {chart.level:g}%")
    ax.plot(
        times,
        coverage,
        color=GREEN,
        linewidth=1.5,
        marker="." if len(times) < 40 else None,
        label="rolling coverage",
    )
    finite = coverage[np.isfinite(coverage)]
    low = min([target, *finite.tolist()]) if finite.size else target
    ax.set_ylim(max(0.0, low - 0.1), 1.02)
    ax.yaxis.set_major_formatter(PercentFormatter(xmax=1, decimals=0))
    if len(times) == 0:
        ax.text(
            0.5,
            0.2,
            "no coverage history yet",
            transform=ax.transAxes,
            ha="center",
            color=GREY,
            parse_math=False,
        )
    ax.legend(loc="lower left", fontsize=FONT_SIZE - 1, frameon=False, ncol=2)


def date_axis(ax: Axes) -> None:
    """Concise date ticks, 3 to 6 of them. The locator's default of at least 5 ticks cannot
    divide spans such as 4 days (fewer than 5 day ticks, too many hour ticks for 6), so it
    warned and fell back to one tick every 12 hours. Data at one instant alone is shown with a
    day either side rather than the years matplotlib would widen it to."""
    low, high = ax.dataLim.intervalx
    if np.isfinite(low) and high - low < 1.0:  # matplotlib's date unit is the day
        ax.set_xlim(low - 1.0, high + 1.0)
    locator = AutoDateLocator(minticks=3, maxticks=6)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))


def _figure(chart: ChartData) -> Figure:
    fig = Figure(figsize=FIGURE_INCHES, dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    # One time axis for both panels, so a coverage dip lines up with the misses that caused it.
    band_ax, coverage_ax = fig.subplots(2, 1, sharex=True, height_ratios=(2.2, 1))
    _draw_band(band_ax, chart)
    _draw_coverage(coverage_ax, chart)
    has_times = bool(chart.times or chart.coverage_times)
    for ax in (band_ax, coverage_ax):
        if has_times:
            date_axis(ax)
        else:
            ax.xaxis.set_major_locator(NullLocator())  # a date axis over nothing would show 1970
        ax.tick_params(labelsize=FONT_SIZE)
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.spines[["top", "right"]].set_visible(False)
    # Series ids are user data: never let a "$" switch on mathtext.
    horizon = chart.horizon_words()
    band_ax.set_title(
        f"{chart.series_id} / {chart.model}" + (f", {horizon}" if horizon else ""),
        loc="left",
        fontsize=FONT_SIZE + 1,
        fontweight="bold",
        parse_math=False,
    )
    coverage_ax.set_title(
        "coverage over the rolling window",
        loc="left",
        fontsize=FONT_SIZE,
        color=GREY,
        parse_math=False,
    )
    return fig


def render_band_chart(chart: ChartData) -> bytes:
    """The chart as PNG bytes, about 600 by 360 pixels: readable on a phone, small in a mail."""
    buffer = io.BytesIO()
    _figure(chart).savefig(buffer, format="png", metadata={"Software": None})
    return buffer.getvalue()


def render_band_chart_svg(chart: ChartData) -> str:
    """The chart as an `<svg>` element ready to inline in HTML (no XML prolog, text as text)."""
    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        _figure(chart).savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]
