"""Status pages, rendered on the server with jinja2: the fleet overview and one page per series.

`/` lists a row per series and model (the window's "all horizons" row by default): accuracy,
coverage per level against its nominal, bias, skill against aftercast's benchmark and alert
state where those exist; it sorts by any column, filters by label, model and series id, and pages
through any number of series. `/series/{series_id}` (the id may contain "/") shows actuals
against the forecasts at one horizon with the interval band, rolling error and coverage, the
PIT histogram, the window rows and the alert history. No script, no external asset: the pages
work offline and on a phone.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlencode

import pandas as pd
from fastapi import APIRouter, HTTPException, Query, Request
from fastapi.responses import HTMLResponse
from fastapi.templating import Jinja2Templates
from markupsafe import Markup

from aftercast.periods import parse_instant, to_iso
from aftercast.report import status_json
from aftercast.web import charts
from aftercast.web.data import FleetQuery, fleet_page, label_choices
from aftercast.web.pit import forecast_quantiles, pit_histogram
from aftercast.web.readers import clock
from aftercast.web.series_data import alert_history, series_view
from aftercast.web.service import service, window_or_404

TEMPLATES = Jinja2Templates(directory=str(Path(__file__).parent / "templates"))
router = APIRouter(include_in_schema=False)
DAY = 86_400


def number(value: Any, digits: int = 2) -> str:
    """A measure for a table cell; a dash when undefined."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if pd.isna(value):
        return "–"
    return f"{value:,.{digits}f}"


def coverage_flag(coverage: Any, level: float, n: Any) -> str:
    """'low' or 'high' when coverage is more than two standard errors from its nominal level.

    Two binomial standard errors, sqrt(L(1 - L)/n), is a common-practice screen for the table;
    the alerts use the exact binomial test with false-discovery control.
    """
    if coverage is None or pd.isna(coverage) or not n:
        return ""
    nominal = level / 100
    margin = 2 * math.sqrt(nominal * (1 - nominal) / float(n))
    if coverage < nominal - margin:
        return "low"
    return "high" if coverage > nominal + margin else ""


TEMPLATES.env.filters["number"] = number
TEMPLATES.env.globals["coverage_flag"] = coverage_flag


def _now(text: str | None) -> int:
    if not text:
        return clock()
    try:
        return parse_instant(text)
    except (ValueError, OverflowError):
        raise HTTPException(422, f"now: {text!r} is not an ISO 8601 time") from None


def _levels(frame: pd.DataFrame) -> list[str]:
    names = {c.removeprefix("coverage_") for c in frame.columns if c.startswith("coverage_")}
    return sorted(names, key=float)


def _link(request: Request, **changes: Any) -> str:
    """The current URL with some query parameters changed (None drops one)."""
    params = [(k, v) for k, v in request.query_params.multi_items() if k not in changes]
    params += [(k, str(v)) for k, v in changes.items() if v is not None]
    return f"{request.url.path}?{urlencode(params)}"


@router.get("/", response_class=HTMLResponse)
def overview(
    request: Request,
    sort: str = "series_id",
    order: Annotated[str, Query(pattern="^(asc|desc)$")] = "asc",
    label: Annotated[list[str], Query()] = [],  # noqa: B006
    q: Annotated[str, Query(max_length=200)] = "",
    model: Annotated[str, Query(max_length=255)] = "",
    horizon: Annotated[str, Query(max_length=20)] = "all",
    window: str | None = None,
    benchmarks: bool = False,
    page: Annotated[int, Query(ge=1, le=10**7)] = 1,
    per_page: Annotated[int, Query(ge=10, le=500)] = 50,
    now: str | None = None,
) -> HTMLResponse:
    state = service(request)
    chosen = window_or_404(state.config, window)
    at = _now(now)
    frame = state.fleet.get(state.engine, chosen, at)
    labels = dict(v.split(":", 1) for v in label if ":" in v)
    query = FleetQuery(
        sort=sort,
        descending=order == "desc",
        labels=labels,
        text=q,
        model=model,
        horizon=horizon,
        benchmarks=benchmarks,
        page=page,
        per_page=per_page,
    )
    rows, total = fleet_page(frame, query)
    context = {
        "rows": rows.to_dict("records"),
        "total": total,
        "query": query,
        "pages": max(1, math.ceil(total / per_page)),
        "levels": _levels(frame),
        "has_skill": "skill" in frame.columns,
        "has_alerts": "alert_state" in frame.columns,
        "label_choices": label_choices(frame) if not frame.empty else {},
        "models": sorted(frame["model"].unique()) if not frame.empty else [],
        "window": chosen,
        "windows": state.config.all_windows(),
        "now": to_iso(at),
        "clock": now,  # a `now` the page was asked for, carried into its links
        "link": lambda **changes: _link(request, **changes),
    }
    return TEMPLATES.TemplateResponse(request, "overview.html", context)


def _charts(view: Any, window: Any) -> dict[str, Markup]:
    out: dict[str, Markup] = {}
    if view.pairs.empty:
        return out
    if view.level is not None:
        out["band"] = Markup(
            charts.band_chart(view.key, view.model, view.level, view.pairs, view.intervals, window)
        )
    out["error"] = Markup(
        charts.rolling_error_chart(
            view.model, view.pairs, view.benchmark, view.benchmark_pairs, window
        )
    )
    histogram = pit_histogram(
        view.pairs.set_index("forecast_id")["actual"],
        forecast_quantiles(view.intervals, view.quantiles),
    )
    if histogram is not None and histogram.n:
        out["pit"] = Markup(charts.pit_chart(histogram))
    return out


@router.get("/series/{series_id:path}", response_class=HTMLResponse)
def series_page(
    request: Request,
    series_id: str,
    model: str | None = None,
    horizon: Annotated[int | None, Query(ge=1, le=10**6)] = None,
    level: Annotated[float | None, Query(gt=0, lt=100)] = None,
    days: Annotated[int, Query(ge=1, le=3_650)] = 90,
    window: str | None = None,
    now: str | None = None,
) -> HTMLResponse:
    state = service(request)
    chosen = window_or_404(state.config, window)
    at = _now(now)
    view = series_view(state.engine, series_id, model, horizon, level, at - days * DAY, at)
    if view is None:
        raise HTTPException(404, f"no series {series_id!r}")
    frame = state.fleet.get(state.engine, chosen, at)
    mine = (
        frame[(frame["series_id"] == series_id) & (frame["model"] == view.model)]
        if not frame.empty
        else frame
    )
    history = alert_history(state.engine, view.id)
    context = {
        "view": view,
        "charts": _charts(view, chosen),
        "windows_rows": status_json(mine) if not mine.empty else [],
        "levels": _levels(mine) if not mine.empty else [],
        "history": history.to_dict("records") if history is not None else None,
        "to_iso": to_iso,
        "days": days,
        "window": chosen,
        "now": to_iso(at),
        "clock": now,
        "link": lambda **changes: _link(request, **changes),
    }
    return TEMPLATES.TemplateResponse(request, "series.html", context)
