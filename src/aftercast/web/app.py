"""The FastAPI application: API, pages, static files, health, readiness and metrics.

`create_app` wires the routers to one `Service` (store, config, metrics, scheduler). `/healthz`
says the process answers; `/readyz` says it can do its job: the store answers, its schema is at
the revisions this version needs, and the scheduler (when there is one) runs; 503 otherwise,
naming what is wrong, so an orchestrator takes the replica out of service instead of
restarting it. The OpenAPI document is at `/openapi.json`; the interactive docs are off because
they load scripts from a CDN and the pages must work offline.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse, Response
from fastapi.staticfiles import StaticFiles
from sqlalchemy import Engine, text

from aftercast import __version__
from aftercast.config import Config
from aftercast.errors import AftercastError
from aftercast.store.db import schema_revisions
from aftercast.web import api, pages
from aftercast.web.metrics import Metrics
from aftercast.web.service import Service, service

STATIC = Path(__file__).parent / "static"


def _readiness(state: Service) -> tuple[bool, dict[str, Any]]:
    checks: dict[str, Any] = {}
    try:
        with state.engine.connect() as connection:
            connection.execute(text("SELECT 1"))
        current, needed = schema_revisions(state.engine)
        checks["store"] = "ok"
        checks["migrations"] = "ok" if current == needed else f"at {current}, needs {needed}"
    except Exception as exc:  # any failure to reach the store means "not ready"
        checks["store"] = f"unreachable: {type(exc).__name__}"
        checks["migrations"] = "unknown"
    if state.scheduler is None:
        checks["scheduler"] = "not used"
    else:
        checks["scheduler"] = "running" if getattr(state.scheduler, "running", False) else "stopped"
    ready = (
        checks["store"] == "ok"
        and checks["migrations"] == "ok"
        and checks["scheduler"] in ("running", "not used")
    )
    return ready, checks


def _health_routes(app: FastAPI) -> None:
    @app.get("/healthz", tags=["health"], summary="The process answers")
    def healthz() -> dict[str, str]:
        return {"status": "ok", "version": __version__}

    @app.get(
        "/readyz",
        tags=["health"],
        summary="Store reachable, schema current, scheduler up",
        responses={503: {"description": "Not ready; `checks` says why"}},
    )
    def readyz(request: Request) -> JSONResponse:
        ready, checks = _readiness(service(request))
        return JSONResponse({"ready": ready, "checks": checks}, status_code=200 if ready else 503)

    @app.get(
        "/metrics",
        tags=["health"],
        summary="Prometheus / OpenMetrics text",
        response_class=Response,
    )
    def metrics(request: Request) -> Response:
        body, content_type = service(request).metrics.exposition(request.headers.get("accept"))
        return Response(body, media_type=content_type)


def create_app(
    engine: Engine, config: Config, metrics: Metrics | None = None, scheduler: Any | None = None
) -> FastAPI:
    """The web application over `engine`; pass the daemon's metrics and scheduler if any."""
    app = FastAPI(
        title="aftercast",
        version=__version__,
        description="Push forecasts and actuals; read windows, pairs and alerts.",
        docs_url=None,
        redoc_url=None,
    )
    app.state.service = Service(
        engine=engine, config=config, metrics=metrics or Metrics(engine), scheduler=scheduler
    )

    @app.exception_handler(AftercastError)
    def user_error(_request: Request, exc: AftercastError) -> JSONResponse:
        # e.g. the store's schema is behind: the request cannot be served until `init` runs.
        return JSONResponse({"detail": str(exc)}, status_code=409)

    _health_routes(app)
    app.include_router(api.router)
    app.include_router(pages.router)
    app.mount("/static", StaticFiles(directory=STATIC), name="static")
    return app
