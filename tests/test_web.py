"""The HTTP API on a real uvicorn server on loopback: auth, push ingestion, reads, health, metrics.

Outside references: RFC 6750 section 3 (a request without a valid bearer token gets 401 with a
`WWW-Authenticate: Bearer` challenge); RFC 9110 section 15.5.14 (413 Content Too Large) and
15.5.16 (415); prometheus-client's own text and OpenMetrics parsers read `/metrics`; what a push
answers must equal what `aftercast ingest --json` prints for the same rows (the issue's
requirement), checked by running that command; window rows must equal `aftercast status --json`.
The data is the invented bakery scenario (input only, never a check value).
"""

from __future__ import annotations

import contextlib
import io
import json
import socket
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import requests
import uvicorn
from fastapi import FastAPI
from prometheus_client.openmetrics.parser import (
    text_string_to_metric_families as parse_openmetrics,
)
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import Engine, text

from aftercast.cli import main
from aftercast.config import Config
from aftercast.ingest import ingest_path
from aftercast.matching import match
from aftercast.periods import parse_instant
from aftercast.scenario import ScenarioSpec, generate, write
from aftercast.store.db import make_engine, migrate
from aftercast.web.app import create_app
from tests.conftest import STATUS_CONTRACT, make_config

TOKEN = "test-token-0123456789"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
NOW = "2026-07-12T00:00:00Z"


class LiveServer:
    """uvicorn serving `app` on a free loopback port in a thread (no signal handlers)."""

    def __init__(self, app: FastAPI) -> None:
        with socket.socket() as probe:
            probe.bind(("127.0.0.1", 0))
            self.port = int(probe.getsockname()[1])
        settings = uvicorn.Config(
            app, host="127.0.0.1", port=self.port, log_level="warning", lifespan="off"
        )
        self.server = uvicorn.Server(settings)
        self.thread = threading.Thread(target=self.server.run, daemon=True)
        self.url = f"http://127.0.0.1:{self.port}"

    def __enter__(self) -> LiveServer:
        self.thread.start()
        deadline = time.monotonic() + 20
        while not self.server.started:
            if time.monotonic() > deadline or not self.thread.is_alive():
                raise RuntimeError("uvicorn did not start")
            time.sleep(0.02)
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(10)


@dataclass
class Fleet:
    engine: Engine
    config: Config
    folder: Path
    url: str
    series: list[str]


def seeded_store(
    folder: Path, url: str | None = None, **config_sections: Any
) -> tuple[Engine, Config]:
    """A store (SQLite unless `url`) holding a small bakery scenario, matched at NOW."""
    url = url or f"sqlite:///{folder / 'aftercast.db'}"
    config = make_config(url, api={"token": TOKEN}, **config_sections)
    engine = make_engine(config.store.url)
    migrate(engine)
    files = write(generate(ScenarioSpec(n_series=6, days=40, horizons=3)), folder / "data")
    ingest_path(engine, config, "series", files.series)
    for path in (*files.forecasts, *files.actuals):
        ingest_path(engine, config, "forecasts" if "forecasts" in str(path) else "actuals", path)
    match(engine, parse_instant(NOW))  # the stage the pages read; later stages are not needed
    return engine, config


@pytest.fixture(scope="module")
def fleet(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Fleet]:
    folder = tmp_path_factory.mktemp("fleet")
    engine, config = seeded_store(folder)
    with engine.connect() as connection:
        keys = list(connection.execute(text("SELECT key FROM series ORDER BY key")).scalars())
    with LiveServer(create_app(engine, config)) as live:
        yield Fleet(engine, config, folder, live.url, keys)
    engine.dispose()


def daily_rows(
    series_id: str, days: int, actual: Any
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Day-ahead forecasts (point 10, 80% band 8-12, median 10) from 2026-07-01, and actuals."""
    forecasts = [
        {
            "series_id": series_id,
            "model": "m",
            "issued_at": f"2026-07-{d:02d}T06:00Z",
            "target_at": f"2026-07-{d + 1:02d}",
            "point": 10,
            "lower_80": 8,
            "upper_80": 12,
            "q_50": 10,
        }
        for d in range(1, days + 1)
    ]
    actuals = [
        {"series_id": series_id, "observed_at": f"2026-07-{d + 1:02d}", "value": actual(d)}
        for d in range(1, days + 1)
    ]
    return forecasts, actuals


def run_cli(*args: str) -> Any:
    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        code = main(list(args))
    assert code == 0
    return json.loads(out.getvalue())


def test_writes_need_the_bearer_token(fleet: Fleet) -> None:
    row = [{"series_id": "auth-check", "observed_at": "2026-07-01", "value": 1}]
    for headers in ({}, {"Authorization": "Bearer wrong"}, {"Authorization": TOKEN}):
        answer = requests.post(f"{fleet.url}/v1/actuals", json=row, headers=headers, timeout=10)
        assert answer.status_code == 401  # RFC 6750 s3: invalid or missing token
        assert answer.headers["WWW-Authenticate"].startswith("Bearer")
    denied = requests.post(f"{fleet.url}/v1/alerts/1/acknowledge", json={}, timeout=10)
    assert denied.status_code == 401
    ok = requests.post(f"{fleet.url}/v1/actuals", json=row, headers=AUTH, timeout=10)
    assert ok.status_code == 200 and ok.json()["accepted"] == 1


def test_a_store_without_a_token_refuses_every_write(tmp_path: Path) -> None:
    config = make_config(f"sqlite:///{tmp_path / 'n.db'}")
    engine = make_engine(config.store.url)
    migrate(engine)
    with LiveServer(create_app(engine, config)) as live:
        answer = requests.post(
            f"{live.url}/v1/actuals", json=[], timeout=10, headers={"Authorization": "Bearer "}
        )
    assert answer.status_code == 401


def test_push_answers_exactly_what_ingest_json_prints(fleet: Fleet, tmp_path: Path) -> None:
    csv = (
        "series_id,model,issued_at,target_at,point,lower_80,upper_80\n"
        "p1,m,2026-07-01T06:00Z,2026-07-02,10,8,12\n"
        "p1,m,2026-07-01T06:00Z,2026-07-01,10,8,12\n"  # target not after the issue period
        "p1,m,2026-07-01T06:00Z,2026-07-03,7,8,12\n"
    )  # lower above point
    path = tmp_path / "push.csv"
    path.write_text(csv, encoding="utf-8")
    other = tmp_path / "other.db"
    config_path = tmp_path / "c.yaml"
    config_path.write_text(f"store: {{url: 'sqlite:///{other}'}}\n", encoding="utf-8")
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["--config", str(config_path), "init"]) == 0
    expected = run_cli("--config", str(config_path), "ingest", "forecasts", str(path), "--json")

    pushed = requests.post(
        f"{fleet.url}/v1/forecasts",
        data=csv.encode(),
        timeout=10,
        headers={**AUTH, "Content-Type": "text/csv"},
    ).json()
    assert {k: v for k, v in pushed.items() if k not in ("source", "examples")} == {
        k: v for k, v in expected.items() if k != "source"
    }
    assert pushed["rejected"] == 2 and len(pushed["examples"]) == 2

    rows = [
        {"series_id": "p2", "observed_at": "2026-07-01", "value": 5},
        {"series_id": "p2", "observed_at": "2026-07-02", "value": "NaN"},
        {"series_id": "p2", "observed_at": None, "value": 1, "extra": [1, 2]},
    ]
    jsonl = tmp_path / "push.jsonl"
    jsonl.write_text("\n".join(json.dumps(r) for r in rows) + "\n", encoding="utf-8")
    expected = run_cli("--config", str(config_path), "ingest", "actuals", str(jsonl), "--json")
    pushed = requests.post(f"{fleet.url}/v1/actuals", json=rows, headers=AUTH, timeout=10).json()
    assert {k: v for k, v in pushed.items() if k not in ("source", "examples")} == {
        k: v for k, v in expected.items() if k != "source"
    }


def test_bodies_too_large_or_malformed_get_4xx(fleet: Fleet) -> None:
    url = f"{fleet.url}/v1/actuals"
    limit = fleet.config.api.max_body_bytes
    big = b"[" + b" " * (limit + 1) + b"]"
    answer = requests.post(
        url, data=big, timeout=30, headers={**AUTH, "Content-Type": "application/json"}
    )
    assert answer.status_code == 413  # RFC 9110 s15.5.14

    def chunked() -> Iterator[bytes]:  # no Content-Length: the server must count as it reads
        yield b"["
        for _ in range(limit // 65_536 + 2):
            yield b" " * 65_536
        yield b"]"

    answer = requests.post(
        url, data=chunked(), timeout=30, headers={**AUTH, "Content-Type": "application/json"}
    )
    assert answer.status_code == 413
    cases = [
        (b"{not json", "application/json", 400),
        (b'{"series_id": "x"}', "application/json", 422),
        (b"[]", "application/json", 422),
        (b"series_id,observed_at\n", "text/csv", 422),  # value column missing
        (b"x", "application/xml", 415),  # RFC 9110 s15.5.16
    ]
    for body, content_type, status in cases:
        answer = requests.post(
            url, data=body, timeout=10, headers={**AUTH, "Content-Type": content_type}
        )
        assert answer.status_code == status, (body, answer.text)
        assert answer.json()["detail"]


def _all_pages(url: str, params: dict[str, Any]) -> list[dict[str, Any]]:
    items: list[dict[str, Any]] = []
    offset = 0
    while True:
        page = requests.get(url, params={**params, "offset": offset}, timeout=10).json()
        items += page["items"]
        offset += page["limit"]
        if offset >= page["total"]:
            return items


def test_window_pages_add_up_to_status_json(fleet: Fleet, tmp_path: Path) -> None:
    config_path = tmp_path / "c.yaml"
    config_path.write_text(f"store: {{url: '{fleet.config.store.url}'}}\n", encoding="utf-8")
    expected = run_cli("--config", str(config_path), "status", "--json", "--now", NOW)
    pages = _all_pages(f"{fleet.url}/v1/windows", {"now": NOW, "limit": 7})
    contract = STATUS_CONTRACT
    key = lambda r: (r["series_id"], r["model"], str(r["horizon"]))  # noqa: E731
    got = sorted(({k: r[k] for k in contract} for r in pages), key=key)
    assert got == sorted(({k: r[k] for k in contract} for r in expected), key=key)
    one = requests.get(
        f"{fleet.url}/v1/windows",
        timeout=10,
        params={"now": NOW, "series_id": fleet.series[0], "horizon": "all"},
    ).json()
    assert one["total"] == len({r["model"] for r in expected if r["series_id"] == fleet.series[0]})


def test_series_and_pairs_pages_cover_everything_once(fleet: Fleet) -> None:
    series = _all_pages(f"{fleet.url}/v1/series", {"limit": 4})
    with fleet.engine.connect() as connection:
        keys = list(connection.execute(text("SELECT key FROM series ORDER BY key")).scalars())
    assert [s["series_id"] for s in series] == keys  # other tests push series too
    planning = requests.get(
        f"{fleet.url}/v1/series", timeout=10, params={"label": "team:planning"}
    ).json()
    assert all(s["labels"]["team"] == "planning" for s in planning["items"])
    assert (
        requests.get(f"{fleet.url}/v1/series", params={"label": "nocolon"}, timeout=10).status_code
        == 422
    )
    seen: list[int] = []
    after = 0
    while True:
        page = requests.get(
            f"{fleet.url}/v1/pairs", params={"after": after, "limit": 500}, timeout=10
        ).json()
        seen += [p["forecast_id"] for p in page["items"]]
        if page["next_after"] is None:
            break
        after = page["next_after"]
    with fleet.engine.connect() as connection:
        stored = list(
            connection.execute(text("SELECT forecast_id FROM pairs ORDER BY 1")).scalars()
        )
    assert seen == stored
    first = requests.get(f"{fleet.url}/v1/pairs", params={"limit": 1}, timeout=10).json()
    pair = first["items"][0]
    assert set(pair["intervals"]) == {"80", "95"} and set(pair["quantiles"]) == {"10", "50", "90"}
    assert pair["error"] == pytest.approx(pair["actual"] - pair["point"])  # CONTRACT: e = y - f


def test_health_readiness_and_metrics(fleet: Fleet, tmp_path: Path) -> None:
    assert requests.get(f"{fleet.url}/healthz", timeout=10).json()["status"] == "ok"
    ready = requests.get(f"{fleet.url}/readyz", timeout=10)
    assert ready.status_code == 200 and ready.json()["ready"] is True

    class Stopped:
        running = False

    empty = make_engine(f"sqlite:///{tmp_path / 'empty.db'}")  # no schema at all
    with LiveServer(create_app(empty, fleet.config, scheduler=Stopped())) as live:
        answer = requests.get(f"{live.url}/readyz", timeout=10)
    assert answer.status_code == 503
    assert answer.json()["checks"]["scheduler"] == "stopped"
    assert answer.json()["checks"]["migrations"] != "ok"

    requests.post(
        f"{fleet.url}/v1/actuals",
        headers=AUTH,
        timeout=10,
        json=[
            {"series_id": "m1", "observed_at": "2026-07-01", "value": 2},
            {"series_id": "m1", "observed_at": "later", "value": 2},
        ],
    )
    text_format = requests.get(f"{fleet.url}/metrics", timeout=10).text
    samples = {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for f in text_string_to_metric_families(text_format)
        for s in f.samples
    }
    assert samples[("aftercast_rows_ingested_total", (("kind", "actuals"), ("via", "push")))] >= 1
    assert (
        samples[
            (
                "aftercast_rows_rejected_total",
                (("kind", "actuals"), ("reason", "unparseable observed_at"), ("via", "push")),
            )
        ]
        >= 1
    )
    assert samples[("aftercast_store_up", ())] == 1
    assert all(name.startswith("aftercast_") for name, _ in samples)
    openmetrics = requests.get(
        f"{fleet.url}/metrics", timeout=10, headers={"Accept": "application/openmetrics-text"}
    )
    assert openmetrics.headers["content-type"].startswith("application/openmetrics-text")
    names = {f.name for f in parse_openmetrics(openmetrics.text)}
    assert {"aftercast_rows_ingested", "aftercast_cycle_duration_seconds"} <= names


def test_openapi_is_served_and_interactive_docs_are_off(fleet: Fleet) -> None:
    document = requests.get(f"{fleet.url}/openapi.json", timeout=10).json()
    assert {
        "/v1/forecasts",
        "/v1/actuals",
        "/v1/windows",
        "/v1/pairs",
        "/v1/alerts",
        "/v1/series",
        "/healthz",
        "/readyz",
        "/metrics",
    } <= set(document["paths"])
    assert requests.get(f"{fleet.url}/docs", timeout=10).status_code == 404  # would need a CDN


def test_every_endpoint_answers_on_each_store(engine: Engine, config: Config) -> None:
    """SQLite and, when configured, PostgreSQL: the same requests, the same answers."""
    config = make_config(config.store.url, api={"token": TOKEN})
    forecasts, actuals = daily_rows("pg/1", 5, lambda d: 9 + d)
    with LiveServer(create_app(engine, config)) as live:
        for kind, rows in (("forecasts", forecasts), ("actuals", actuals)):
            answer = requests.post(f"{live.url}/v1/{kind}", json=rows, headers=AUTH, timeout=10)
            assert answer.json()["accepted"] == 5
        match(engine, parse_instant(NOW))
        get = lambda path, **params: requests.get(  # noqa: E731
            f"{live.url}{path}", params=params, timeout=10
        )
        assert get("/v1/windows", now=NOW).json()["total"] == 2  # horizon 1 and "all"
        pairs = get("/v1/pairs").json()["items"]
        assert len(pairs) == 5 and sum(p["intervals"]["80"]["hit"] for p in pairs) == 3
        assert get("/v1/series", label="team:x").json()["total"] == 0
        assert get("/v1/alerts").status_code == 200
        assert get("/series/pg/1", now=NOW).status_code == 200
        assert get("/", now=NOW).status_code == 200
        assert get("/readyz").status_code == 200
        samples = {
            (s.name, tuple(sorted(s.labels.items()))): s.value
            for f in text_string_to_metric_families(get("/metrics").text)
            for s in f.samples
        }
    assert samples[("aftercast_store_up", ())] == 1
    outcomes = {dict(k[1])["outcome"] for k in samples if k[0] == "aftercast_notifications"}
    assert outcomes == {"pending", "retrying", "delivered", "dead"}
