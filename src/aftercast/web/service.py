"""What every request handler needs: the store, the config, the metrics and the scheduler.

One `Service` is made per application by `create_app` and kept on `app.state`; handlers get it
with `service(request)`. `scheduler` is whatever drives the cycles (the daemon's APScheduler, or
None when the web application runs on its own) and only needs a `running` attribute.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

from fastapi import HTTPException
from sqlalchemy import Engine
from starlette.requests import Request

from aftercast.config import Config, WindowConfig
from aftercast.web.data import FleetCache
from aftercast.web.metrics import Metrics


@dataclass
class Service:
    engine: Engine
    config: Config
    metrics: Metrics
    scheduler: Any | None = None
    fleet: FleetCache = field(default_factory=FleetCache)
    started_at: float = field(default_factory=time.time)


def service(request: Request) -> Service:
    found: Service = request.app.state.service
    return found


def window_or_404(config: Config, name: str | None) -> WindowConfig:
    """The named window (the default one when no name is given); 404 for an unknown name."""
    windows = config.all_windows()
    for window in windows:
        if name is None or window.name == name:
            return window
    known = ", ".join(w.name for w in windows)
    raise HTTPException(404, f"no window {name!r}; configured: {known}")
