"""HTTP source against a real server on loopback: timeouts retried and reported, formats, headers.

The server is `http.server` from the standard library in a thread, answering GETs from a script
(hang past the client's timeout, answer 503, or answer with a body). Retry rules checked here
are those the source documents (timeouts, 408, 429 and 5xx retried; other 4xx not), after
RFC 9110's meaning of those codes. Metrics are parsed with prometheus-client's own parser.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import Engine, text

from aftercast.sources.pull import add_listener, pull_all, remove_listener
from aftercast.web.metrics import Metrics
from tests.conftest import make_config

CSV_BODY = b"series_id,observed_at,value\ns1,2026-01-01,10\ns1,2026-01-02,11\ns2,2026-01-01,oops\n"


@dataclass
class Answer:
    status: int = 200
    body: bytes = CSV_BODY
    hang: float = 0.0
    need_header: tuple[str, str] | None = None


@dataclass
class GetServer:
    """Answers GETs from `script` (then `default`); records every request's headers."""

    script: list[Answer] = field(default_factory=list)
    default: Answer = field(default_factory=Answer)
    seen: list[dict[str, str]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._release = threading.Event()
        self.server = ThreadingHTTPServer(("127.0.0.1", 0), self._handler())
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/export"

    def _handler(self) -> type[BaseHTTPRequestHandler]:
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802
                owner.seen.append({k.lower(): v for k, v in self.headers.items()})
                answer = owner.script.pop(0) if owner.script else owner.default
                if answer.hang and owner._release.wait(answer.hang):
                    return
                status = answer.status
                if (
                    answer.need_header
                    and self.headers.get(answer.need_header[0]) != (answer.need_header[1])
                ):
                    status = 401
                self.send_response(status)
                self.send_header("content-length", str(len(answer.body)))
                self.end_headers()
                self.wfile.write(answer.body)

            def log_message(self, format: str, *args: Any) -> None:
                pass

        return Handler

    def __enter__(self) -> GetServer:
        threading.Thread(target=self.server.serve_forever, daemon=True).start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._release.set()
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def store(tmp_path: Path) -> Iterator[Engine]:
    from aftercast.store.db import make_engine, migrate

    engine = make_engine(f"sqlite:///{tmp_path / 'a.db'}")
    migrate(engine)
    yield engine
    engine.dispose()


def _source(url: str, **extra: Any) -> dict[str, Any]:
    return {
        "type": "http",
        "name": "pos",
        "kind": "actuals",
        "url": url,
        "format": "csv",
        "timeout_seconds": 0.4,
        "retries": 2,
        "backoff_seconds": 0,
        **extra,
    }


def test_a_timeout_is_retried_and_the_rows_arrive(store: Engine) -> None:
    with GetServer(script=[Answer(hang=3.0)]) as server:
        config = make_config(str(store.url), sources=[_source(server.url)])
        clock = time.monotonic()
        (result,) = pull_all(store, config)
        spent = time.monotonic() - clock
    assert result.ok and result.attempts == 2 and len(server.seen) == 2
    assert (result.accepted, result.rejected) == (2, 1)
    assert spent < 3.0  # the first attempt was abandoned at its timeout, not waited out


def test_a_source_that_keeps_timing_out_is_reported_and_others_still_run(
    store: Engine, tmp_path: Path
) -> None:
    drop = tmp_path / "drop"
    drop.mkdir()
    (drop / "a.csv").write_bytes(CSV_BODY)
    metrics = Metrics(store)
    add_listener(metrics.record_source)
    try:
        with GetServer(default=Answer(hang=3.0)) as server:
            config = make_config(
                str(store.url),
                sources=[
                    _source(server.url, retries=1),
                    {
                        "type": "folder",
                        "name": "drop",
                        "kind": "actuals",
                        "path": str(drop),
                        "settle_seconds": 0,
                    },
                ],
            )
            results = {r.name: r for r in pull_all(store, config)}
    finally:
        remove_listener(metrics.record_source)
    failed = results["pos"]
    assert not failed.ok and failed.attempts == 2 and "timeout" in str(failed.error)
    assert results["drop"].ok and results["drop"].accepted == 2
    with store.connect() as connection:
        row = connection.execute(
            text(
                "SELECT consecutive_failures, last_error, last_success_at FROM source_state "
                "WHERE name = 'pos'"
            )
        ).one()
    assert row[0] == 1 and "timeout" in row[1] and row[2] is None
    body, _ = metrics.exposition(None)
    samples = {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for family in text_string_to_metric_families(body.decode())
        for s in family.samples
    }
    assert (
        samples[("aftercast_source_pulls_total", (("outcome", "failed"), ("source", "pos")))] == 1
    )
    assert samples[("aftercast_source_consecutive_failures", (("source", "pos"),))] == 1
    assert samples[("aftercast_source_lag_seconds", (("source", "pos"),))] >= 0
    assert samples[("aftercast_source_consecutive_failures", (("source", "drop"),))] == 0


def test_retry_statuses_and_permanent_failures(store: Engine) -> None:
    with GetServer(script=[Answer(status=503, body=b"busy"), Answer(status=429, body=b"")]) as s:
        config = make_config(str(store.url), sources=[_source(s.url)])
        (result,) = pull_all(store, config)
    assert result.ok and result.attempts == 3  # 503 and 429 are worth another try (RFC 9110)
    with GetServer(default=Answer(status=404, body=b"gone")) as s:
        config = make_config(str(store.url), sources=[_source(s.url, name="gone")])
        (result,) = pull_all(store, config)
    assert not result.ok and result.attempts == 1 and "404" in str(result.error)
    with GetServer(default=Answer(status=503, body=b"busy")) as s:
        config = make_config(str(store.url), sources=[_source(s.url, name="once", retries=0)])
        (result,) = pull_all(store, config)
    assert not result.ok and str(result.error).endswith("gave up after 1 attempt")


def test_json_rows_under_a_key_with_a_header_from_the_environment(
    store: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("POS_TOKEN", "Bearer s3cret")
    rows = [
        {"series_id": "s1", "observed_at": "2026-01-01", "value": 3.5},
        {"series_id": "s2", "observed_at": "2026-01-01", "value": {"nested": 1}},
        7,
    ]
    body = json.dumps({"data": {"rows": rows}}).encode()
    answer = Answer(body=body, need_header=("Authorization", "Bearer s3cret"))
    with GetServer(default=answer) as server:
        config = make_config(
            str(store.url),
            sources=[
                _source(
                    server.url,
                    format="json",
                    records_key="data.rows",
                    headers_from_env={"Authorization": "POS_TOKEN"},
                )
            ],
        )
        (result,) = pull_all(store, config)
    assert result.ok, result.error
    assert (result.accepted, result.rejected) == (1, 2)  # a nested value and a non-object
    monkeypatch.delenv("POS_TOKEN")
    (again,) = pull_all(store, config.model_copy(), now=int(time.time()) + 3600)
    assert not again.ok and "POS_TOKEN" in str(again.error)


def test_a_body_over_max_bytes_is_refused(store: Engine) -> None:
    with GetServer(default=Answer(body=CSV_BODY * 50)) as server:
        config = make_config(str(store.url), sources=[_source(server.url, max_bytes=100)])
        (result,) = pull_all(store, config)
    assert not result.ok and "max_bytes" in str(result.error)


def test_json_lines_body_reads_like_a_file_line_by_line(store: Engine) -> None:
    """A bad line is that row's rejection at its line number, not the pull's failure; blank
    lines are skipped, as in a JSON Lines file."""
    lines = [
        '{"series_id": "s1", "observed_at": "2026-01-01", "value": 1}',
        "",
        "{oops",
        "   ",
        '{"series_id": "s1", "observed_at": "2026-01-02", "value": 2}',
        "",
    ]
    answer = Answer(body="\r\n".join(lines).encode())
    with GetServer(default=answer) as server:
        config = make_config(str(store.url), sources=[_source(server.url, format="jsonl")])
        (result,) = pull_all(store, config)
    assert result.ok, result.error
    assert (result.accepted, result.rejected) == (2, 1)
    with store.connect() as connection:
        rows = connection.execute(text("SELECT row_number, reason FROM quarantine")).all()
    assert [tuple(r) for r in rows] == [(3, "not a JSON object: {oops")]
