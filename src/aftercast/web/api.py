"""The HTTP API under `/v1`: push ingestion, paginated reads, alert acknowledge and snooze.

`POST /v1/forecasts`, `/v1/actuals` and `/v1/series` take a JSON array of rows with the CONTRACT
columns, or `text/csv`, and answer with the object `ingest --json` prints plus `examples` (the
first rejected rows, which `ingest` writes to stderr), from the same ingest path: bad rows are
counted and quarantined with their reasons, never a server error. A body over
`api.max_body_bytes` is refused with 413 before it is read whole. Writes need
`Authorization: Bearer <api.token>`, compared in constant time; without a configured token every
write is refused. Reads page with `limit`/`offset` (pairs with the `after` cursor, which stays
fast however deep the page).
"""

from __future__ import annotations

import hmac
import json
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, HTTPException, Path, Query, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.concurrency import run_in_threadpool

from aftercast.errors import AftercastError
from aftercast.ingest import ingest_chunks, ingest_records
from aftercast.periods import parse_instant
from aftercast.sources.http import clean_records, csv_chunks
from aftercast.web import readers
from aftercast.web.service import Service, service, window_or_404

router = APIRouter(prefix="/v1")
bearer = HTTPBearer(auto_error=False, description="the token of config key api.token")

TIME = {"type": "string", "description": "ISO 8601; without an offset: the series' zone"}
NUMBER = {"type": "number"}
ROWS = {  # the CONTRACT input columns; other columns are ignored (and said so)
    "forecasts": {
        "required": ["series_id", "model", "issued_at", "target_at", "point"],
        "properties": {
            "series_id": {"type": "string"},
            "model": {"type": "string"},
            "issued_at": TIME,
            "target_at": TIME,
            "point": NUMBER,
            "lower_80": NUMBER,
            "upper_80": NUMBER,
            "q_50": NUMBER,
            "horizon": {"type": "integer"},
        },
    },
    "actuals": {
        "required": ["series_id", "observed_at", "value"],
        "properties": {"series_id": {"type": "string"}, "observed_at": TIME, "value": NUMBER},
    },
    "series": {
        "required": ["series_id"],
        "properties": {
            "series_id": {"type": "string"},
            "frequency": {"type": "string"},
            "season": {"type": "integer"},
            "timezone": {"type": "string"},
            "unit": {"type": "string"},
            "label_team": {"type": "string"},
        },
    },
}


def push_body(kind: str) -> dict[str, Any]:
    """OpenAPI request body of a push endpoint: a JSON array of rows, or CSV text."""
    row = {"type": "object", "additionalProperties": True, **ROWS[kind]}
    return {
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {"schema": {"type": "array", "items": row}},
                "text/csv": {"schema": {"type": "string"}},
            },
        }
    }


INGEST_ANSWER = {
    200: {"description": "Counts and rejection reasons, as `aftercast ingest --json` prints them"},
    400: {"description": "The body is not JSON or CSV"},
    401: {"description": "Missing or wrong bearer token"},
    413: {"description": "The body is larger than api.max_body_bytes"},
    415: {"description": "Neither application/json nor text/csv"},
    422: {"description": "No rows, or required columns missing"},
}
Limit = Annotated[int, Query(ge=1, le=100_000, description="rows per page")]
Offset = Annotated[int, Query(ge=0, le=10**12)]
HORIZON = r"^(all|\d{1,6}|\d{1,6}-\d{1,6}|\d{1,6}\+)$"  # 3, "all", a bucket "2-7" or "15+"


def require_token(
    request: Request,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> None:
    """401 unless the request carries the configured bearer token."""
    token = service(request).config.api.token
    given = credentials.credentials if credentials is not None else ""
    expected = token.get_secret_value() if token is not None else ""
    # compare_digest takes the same time whatever the first differing byte is.
    if not expected or not hmac.compare_digest(given.encode(), expected.encode()):
        raise HTTPException(
            401, "missing or wrong bearer token", headers={"WWW-Authenticate": "Bearer"}
        )


Authorised = Annotated[None, Depends(require_token)]


async def _body(request: Request, limit: int) -> bytes:
    declared = request.headers.get("content-length", "")
    if declared.isdigit() and int(declared) > limit:
        raise HTTPException(413, f"body larger than api.max_body_bytes={limit}")
    body = bytearray()
    async for part in request.stream():
        body.extend(part)
        if len(body) > limit:
            raise HTTPException(413, f"body larger than api.max_body_bytes={limit}")
    return bytes(body)


def _rows(body: bytes, content_type: str, label: str) -> list[dict[str, Any]] | bytes:
    """Parsed JSON rows, or the CSV bytes as they are."""
    media = content_type.split(";", 1)[0].strip().lower()
    if media in ("text/csv", "application/csv"):
        return body
    if media != "application/json" and not media.endswith("+json"):
        raise HTTPException(415, "send application/json (an array of rows) or text/csv")
    try:
        parsed = json.loads(body)
    except (ValueError, RecursionError) as exc:
        raise HTTPException(400, f"{label}: body is not JSON ({exc})") from None
    if not isinstance(parsed, list):
        raise HTTPException(422, f"{label}: expected a JSON array of rows")
    return clean_records(parsed)


async def _push(request: Request, kind: str) -> dict[str, Any]:
    state = service(request)
    label = f"POST /v1/{kind}"
    body = await _body(request, state.config.api.max_body_bytes)
    rows = _rows(body, request.headers.get("content-type", ""), label)

    def ingest() -> dict[str, Any]:
        if isinstance(rows, bytes):
            chunks = csv_chunks(rows, state.config.ingest.chunk_rows, label)
            report = ingest_chunks(state.engine, state.config, kind, label, chunks)
        else:
            report = ingest_records(state.engine, state.config, kind, rows, label)
        answer = report.as_json()
        state.metrics.record_ingest(kind, "push", answer)
        return {**answer, "examples": report.examples}

    try:
        return await run_in_threadpool(ingest)
    except AftercastError as exc:  # no rows, missing columns, unreadable CSV
        raise HTTPException(422, str(exc)) from None


def _push_route(kind: str, what: str) -> None:
    async def push(request: Request, _: Authorised) -> dict[str, Any]:
        return await _push(request, kind)

    router.add_api_route(
        f"/{kind}",
        push,
        methods=["POST"],
        name=f"push_{kind}",
        summary=f"Push {what} (a JSON array of rows, or CSV)",
        openapi_extra=push_body(kind),
        responses=INGEST_ANSWER,  # type: ignore[arg-type]
    )


_push_route("forecasts", "forecasts")
_push_route("actuals", "actuals")
_push_route("series", "series settings and labels")


def _instant(text: str | None, name: str) -> int | None:
    if text is None:
        return None
    try:
        return parse_instant(text)
    except (ValueError, OverflowError):
        raise HTTPException(422, f"{name}: {text!r} is not an ISO 8601 time") from None


def parse_labels(values: list[str]) -> dict[str, str]:
    """`team:retail` filters as a mapping; 422 for one without a colon."""
    labels = {}
    for value in values:
        name, sep, wanted = value.partition(":")
        if not sep or not name:
            raise HTTPException(422, f"label {value!r}: write it as name:value")
        labels[name] = wanted
    return labels


def _page(items: list[dict[str, Any]], total: int, limit: int, offset: int) -> dict[str, Any]:
    return {"items": items, "total": total, "limit": limit, "offset": offset}


@router.get("/series", summary="Series with their settings and labels")
def list_series(
    request: Request,
    limit: Limit = 100,
    offset: Offset = 0,
    label: Annotated[list[str], Query(description="name:value, repeatable")] = [],  # noqa: B006
    q: Annotated[str, Query(max_length=200, description="part of the series id")] = "",
) -> dict[str, Any]:
    state = service(request)
    limit = min(limit, state.config.api.page_limit)
    items, total = readers.series_page(state.engine, parse_labels(label), q, limit, offset)
    return _page(items, total, limit, offset)


@router.get("/windows", summary="Window measures per series, model and horizon (status rows)")
def list_windows(
    request: Request,
    limit: Limit = 100,
    offset: Offset = 0,
    series_id: str | None = None,
    model: str | None = None,
    horizon: Annotated[
        str | None, Query(pattern=r"^(all|\d{1,6}|\d{1,6}-\d{1,6}|\d{1,6}\+)$")
    ] = None,
    window: str | None = None,
    now: str | None = None,
) -> dict[str, Any]:
    state = service(request)
    limit = min(limit, state.config.api.page_limit)
    chosen = window_or_404(state.config, window)
    frame = state.fleet.get(state.engine, chosen, _instant(now, "now") or readers.clock())
    items, total = readers.window_page(frame, series_id, model, horizon, limit, offset)
    return _page(items, total, limit, offset)


@router.get("/pairs", summary="Matched pairs with their per-pair measures, by forecast id")
def list_pairs(
    request: Request,
    limit: Limit = 100,
    after: Annotated[int, Query(ge=0, le=2**62, description="last forecast id seen")] = 0,
    series_id: str | None = None,
    model: str | None = None,
    horizon: Annotated[int | None, Query(ge=1, le=10**6)] = None,
    since: Annotated[str | None, Query(description="targets after this time")] = None,
    until: Annotated[str | None, Query(description="targets at or before this time")] = None,
) -> dict[str, Any]:
    state = service(request)
    limit = min(limit, state.config.api.page_limit)
    filters = readers.PairFilter(
        series_id, model, horizon, _instant(since, "since"), _instant(until, "until")
    )
    items = readers.pairs_page(state.engine, filters, after, limit)
    next_after = items[-1]["forecast_id"] if len(items) == limit else None
    return {"items": items, "limit": limit, "after": after, "next_after": next_after}


@router.get("/alerts", summary="Alerts with their state")
def list_alerts(
    request: Request,
    limit: Limit = 100,
    offset: Offset = 0,
    state: Literal["pending", "raised", "acknowledged", "cleared"] | None = None,
    series_id: str | None = None,
) -> dict[str, Any]:
    app_state = service(request)
    limit = min(limit, app_state.config.api.page_limit)
    items, total = readers.alerts_page(app_state.engine, state, series_id, limit, offset)
    return _page(items, total, limit, offset)


@router.get("/sources", summary="Pulled sources: last success, lag, failures in a row")
def list_sources(request: Request) -> dict[str, Any]:
    state = service(request)
    return {"items": readers.sources(state.engine, state.config)}


def alert_action(request: Request, alert_id: int, action: str, body: dict[str, Any]) -> Any:
    state: Service = service(request)
    try:
        return readers.alert_action(state.engine, alert_id, action, body)
    except LookupError as exc:
        raise HTTPException(404, str(exc)) from None
    except (ValueError, TypeError) as exc:
        raise HTTPException(422, str(exc)) from None


AlertId = Annotated[int, Path(ge=1, le=2**62)]


@router.post("/alerts/{alert_id}/acknowledge", summary="Acknowledge an alert: no more reminders")
def acknowledge_alert(
    request: Request, alert_id: AlertId, _: Authorised, body: readers.AckBody | None = None
) -> Any:
    return alert_action(request, alert_id, "acknowledge", (body or readers.AckBody()).model_dump())


@router.post("/alerts/{alert_id}/snooze", summary="Snooze an alert until a time")
def snooze_alert(
    request: Request, alert_id: AlertId, body: readers.SnoozeBody, _: Authorised
) -> Any:
    return alert_action(request, alert_id, "snooze", body.model_dump())
