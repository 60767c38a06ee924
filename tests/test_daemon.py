"""`aftercast run` as a real process: health, SIGTERM and SIGINT exit 0 within 30 s, JSON logs.

Outside references: the 30-second bound is what container runtimes and systemd allow before
SIGKILL (Kubernetes' default terminationGracePeriodSeconds, systemd's TimeoutStopSec in
deploy/); exit status 0 on a requested stop is what both treat as a clean stop. Job options
(max_instances, coalesce, misfire_grace_time) are APScheduler 3's documented job settings, read
back from the scheduler. Log lines must each parse with the standard library's `json`.
"""

from __future__ import annotations

import io
import json
import logging
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest
import requests
from alembic import command

from aftercast.cli import main
from aftercast.config import parse_config
from aftercast.daemon import Jobs, build_scheduler, open_store
from aftercast.errors import SchemaOutdatedError
from aftercast.logs import JsonFormatter, configure_logging, cycle_scope, log_event
from aftercast.store.db import _alembic_config, make_engine, write
from aftercast.web.metrics import Metrics
from tests.test_sources_http import Answer, GetServer

STOP_SECONDS = 30


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _start(folder: Path, *args: str) -> tuple[subprocess.Popen[bytes], str]:
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if k != "AFTERCAST_CONFIG"}
    process = subprocess.Popen(
        [sys.executable, "-m", "aftercast", *args, "run", "--port", str(port)],
        cwd=folder,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise AssertionError(process.stderr.read().decode() if process.stderr else "")
        try:
            if requests.get(f"{url}/healthz", timeout=1).status_code == 200:
                return process, url
        except requests.ConnectionError:
            time.sleep(0.1)
    process.kill()
    raise AssertionError("aftercast run did not answer /healthz within 60 s")


def _stop(process: subprocess.Popen[bytes], signum: int) -> tuple[int, float, list[dict]]:
    clock = time.monotonic()
    process.send_signal(signum)
    try:
        _, err = process.communicate(timeout=STOP_SECONDS + 5)
    except subprocess.TimeoutExpired:
        process.kill()
        raise
    spent = time.monotonic() - clock
    lines = [json.loads(line) for line in err.decode().splitlines() if line.strip()]
    assert process.returncode is not None
    return process.returncode, spent, lines


def test_run_with_no_config_serves_and_stops_cleanly_on_sigterm(tmp_path: Path) -> None:
    process, url = _start(tmp_path)
    ready = requests.get(f"{url}/readyz", timeout=10)
    assert ready.status_code == 200, ready.text
    assert ready.json()["checks"]["scheduler"] == "running"
    deadline = time.monotonic() + 20  # the first cycle runs at start
    while "aftercast_cycles_total{" not in requests.get(f"{url}/metrics", timeout=5).text:
        assert time.monotonic() < deadline
        time.sleep(0.2)
    code, spent, lines = _stop(process, signal.SIGTERM)  # what a container stop sends
    assert code == 0 and spent < STOP_SECONDS
    assert all("cycle_id" in line and "event" in line for line in lines)  # one JSON object each
    finished = [line for line in lines if line["event"] == "cycle finished"]
    failed = [line.get("error") for line in lines if line["event"] == "cycle failed"]
    assert finished and isinstance(finished[0]["cycle_id"], int), failed
    assert lines[-1]["event"] == "daemon stopped"


def test_sigint_during_a_long_pull_still_exits_0_in_time(tmp_path: Path) -> None:
    with GetServer(default=Answer(hang=120)) as server:
        config = {
            "schedule": {"shutdown_grace_seconds": 3},
            "sources": [
                {
                    "type": "http",
                    "name": "slow",
                    "kind": "actuals",
                    "url": server.url,
                    "timeout_seconds": 100,
                    "retries": 0,
                    "schedule": 3600,
                }
            ],
        }
        path = tmp_path / "aftercast.yaml"
        path.write_text(json.dumps(config), encoding="utf-8")  # JSON is YAML
        process, _url = _start(tmp_path, "--config", str(path))
        deadline = time.monotonic() + 20
        while not server.seen:  # the pull is in progress, hanging on the server
            assert time.monotonic() < deadline
            time.sleep(0.1)
        code, spent, lines = _stop(process, signal.SIGINT)  # Ctrl-C takes the same path
    assert code == 0 and spent < STOP_SECONDS
    assert any(line["event"] == "daemon stopped" and line["clean"] is False for line in lines)


def test_a_bad_or_busy_port_is_one_line_and_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run", "--port", "http"]) == 2
    assert "not a TCP port" in capsys.readouterr().err
    with socket.create_server(("127.0.0.1", 0)) as busy:
        assert main(["run", "--port", str(busy.getsockname()[1])]) == 2
    err = capsys.readouterr().err
    assert "cannot listen" in err and len(err.strip().splitlines()) == 1


def test_every_job_runs_alone_coalesces_and_has_a_misfire_grace(tmp_path: Path) -> None:
    config = parse_config(
        {
            "store": {"url": f"sqlite:///{tmp_path / 'a.db'}"},
            "schedule": {"cycle": {"cron": "*/10 * * * *"}, "misfire_grace_seconds": 120},
            "sources": [
                {
                    "type": "folder",
                    "name": "drop",
                    "kind": "actuals",
                    "path": str(tmp_path),
                    "schedule": 60,
                },
                {
                    "type": "http",
                    "name": "api",
                    "kind": "forecasts",
                    "url": "http://127.0.0.1:9",
                    "schedule": "0 6 * * *",
                },
            ],
        }
    )
    engine = make_engine(config.store.url)
    scheduler = build_scheduler(Jobs(engine, config, Metrics()), config)
    scheduler.start(paused=True)
    try:
        jobs = {job.id: job for job in scheduler.get_jobs()}
        assert {"cycle", "source:drop", "source:api", "delivery"} <= set(jobs)
        for job in jobs.values():
            assert (job.max_instances, job.coalesce, job.misfire_grace_time) == (1, True, 120)
        assert (
            str(jobs["cycle"].trigger) == "cron[month='*', day='*', day_of_week='*', "
            "hour='*', minute='*/10']"
        )
        assert jobs["source:drop"].trigger.interval.total_seconds() == 60
    finally:
        scheduler.shutdown(wait=False)


def test_run_refuses_an_old_schema_but_creates_a_new_store(tmp_path: Path) -> None:
    old = parse_config({"store": {"url": f"sqlite:///{tmp_path / 'old.db'}"}})
    engine = make_engine(old.store.url)
    with write(engine) as connection:
        command.upgrade(_alembic_config(connection), "0001")
    with pytest.raises(SchemaOutdatedError, match="aftercast init"):
        open_store(old)
    fresh = parse_config({"store": {"url": f"sqlite:///{tmp_path / 'new.db'}"}})
    open_store(fresh).dispose()


def test_log_lines_are_json_with_the_cycle_id() -> None:
    stream = io.StringIO()
    handler = configure_logging(stream=stream)
    log = logging.getLogger("aftercast.test")
    try:
        with cycle_scope(42):
            log_event(log, "stage done", rows=3, share=float("nan"), names=("a", "b"))
        log_event(log, "outside")
        try:
            raise ValueError("line one\nline two")
        except ValueError:
            log.exception("went wrong")
    finally:
        logging.getLogger().removeHandler(handler)
    lines = stream.getvalue().splitlines()
    assert len(lines) == 3  # one line per event, even with a multi-line error
    first, second, third = (json.loads(line) for line in lines)
    assert (first["event"], first["cycle_id"], first["rows"]) == ("stage done", 42, 3)
    assert first["share"] is None and first["names"] == ["a", "b"]  # strict JSON: no NaN
    assert second["cycle_id"] is None
    assert third["error"].startswith("ValueError") and "traceback" in third
    record = logging.makeLogRecord({"msg": "plain", "levelname": "INFO"})
    assert json.loads(JsonFormatter().format(record))["event"] == "plain"
