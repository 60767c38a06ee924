"""Checks of deploy/compose.yaml: the stack, its mail catcher and the config it mounts.

Docker cannot run here, so the file is parsed (PyYAML) and held to the Compose Specification;
the mail catcher's command is run for real against smtplib on loopback, and the config the
stack mounts is loaded through aftercast's own loader.
"""

from __future__ import annotations

import os
import re
import smtplib
import socket
import subprocess
import sys
import time
from email.message import EmailMessage
from pathlib import Path
from typing import Any

import pytest
import yaml

from tests.test_deploy import (
    CONTAINER_PORT,
    DEPLOY,
    ROOT,
    config_references,
    free_port,
    secret_literals,
)


def test_compose_runs_aftercast_on_postgres_16_with_a_local_mail_catcher(
    compose: dict[str, Any],
) -> None:
    services = compose["services"]
    assert services["postgres"]["image"] == "postgres:16"
    app, mail = services["aftercast"], services["mailcatcher"]
    # Compose Specification: the mail catcher reuses the aftercast image, not another product.
    assert mail["image"] == app["image"] and mail["build"] == app["build"]
    assert (ROOT / "deploy" / app["build"]["context"] / app["build"]["dockerfile"]).is_file()
    assert mail["entrypoint"][:3] == ["python", "-m", "aiosmtpd"]
    assert app["command"][0] == "run" and f"{CONTAINER_PORT}:{CONTAINER_PORT}" in app["ports"]
    environment = app["environment"]
    assert "@postgres:5432/" in environment["AFTERCAST_STORE_URL"]
    listen = mail["entrypoint"][mail["entrypoint"].index("-l") + 1]
    assert listen.rsplit(":", 1)[1] in environment["AFTERCAST_SMTP_PORT"]
    assert "mailcatcher" in environment["AFTERCAST_SMTP_HOST"]
    assert app["depends_on"]["init"]["condition"] == "service_completed_successfully"
    assert services["init"]["command"] == ["init"]
    assert "/config" in {volume.split(":")[1] for volume in app["volumes"]}
    assert not secret_literals(compose)


def test_compose_mail_catcher_command_accepts_and_prints_a_message(compose: dict[str, Any]) -> None:
    command = list(compose["services"]["mailcatcher"]["entrypoint"])
    port = free_port()
    command[command.index("-l") + 1] = f"127.0.0.1:{port}"  # loopback here, not 0.0.0.0
    catcher = subprocess.Popen(
        [sys.executable, *command[1:]],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},  # as the Dockerfile sets it
    )
    try:
        deadline = time.monotonic() + 20
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                assert time.monotonic() < deadline and catcher.poll() is None, "no SMTP server"
                time.sleep(0.1)
        message = EmailMessage()
        message["From"], message["To"] = "aftercast@localhost", "oncall@localhost"
        message["Subject"] = "coverage alert shop-017/rye"
        message.set_content("80% interval covered 55%")
        with smtplib.SMTP("127.0.0.1", port, timeout=10) as client:
            client.send_message(message)
    finally:
        catcher.terminate()
        output, _ = catcher.communicate(timeout=20)
    assert "coverage alert shop-017/rye" in output


def compose_value(value: str) -> str:
    """What compose makes of `${NAME:-default}` with NAME unset (Compose Specification,
    interpolation): the default; any other value as written."""
    match = re.fullmatch(r"\$\{[A-Za-z_][A-Za-z0-9_]*:?-([^}]*)\}", value)
    return match.group(1) if match else value


def compose_config_path(compose: dict[str, Any], service: str) -> Path:
    """The file under deploy/ that a service reads as AFTERCAST_CONFIG, through its mount."""
    settings = compose["services"][service]
    inside = Path(settings["environment"]["AFTERCAST_CONFIG"])
    for volume in settings["volumes"]:
        source, target = volume.split(":")[:2]
        if inside.is_relative_to(target):
            return DEPLOY / source / inside.relative_to(target)
    raise AssertionError(f"{service}: {inside} is on no mounted volume")


def test_compose_config_mails_alerts_to_the_mail_catcher(
    compose: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    from aftercast.config import load_config

    services = compose["services"]
    path = compose_config_path(compose, "aftercast")
    # Every service that loads this config (the daemon, init) is given every variable it reads.
    for name, service in services.items():
        if "AFTERCAST_CONFIG" in service.get("environment", {}):
            assert compose_config_path(compose, name) == path
            assert config_references(path) <= set(service["environment"]), name
    environment = services["aftercast"]["environment"]
    for name in config_references(path):
        monkeypatch.setenv(name, compose_value(environment[name]))
    config = load_config(str(path))  # aftercast's own loader: ${NAME} substitution, validation
    catcher = services["mailcatcher"]["entrypoint"]
    port = int(catcher[catcher.index("-l") + 1].rsplit(":", 1)[1])
    emails = [c for c in config.channels if c.type == "email"]
    # The catcher is reached by its service name; it speaks plain SMTP, so no STARTTLS.
    assert [(c.host, c.smtp_port, c.security) for c in emails] == [("mailcatcher", port, "none")]
    assert not config.routes  # no routes: every alert goes to every channel
    # The channel follows the variables, so deploy/.env can point it at a real relay.
    monkeypatch.setenv("AFTERCAST_SMTP_HOST", "relay.example.org")
    monkeypatch.setenv("AFTERCAST_SMTP_PORT", "2626")
    (email,) = [c for c in load_config(str(path)).channels if c.type == "email"]
    assert (email.host, email.smtp_port) == ("relay.example.org", 2626)
    # Apart from the channel, the same keys as the config the other deployments share.
    raw = yaml.safe_load(path.read_text())
    assert raw.pop("channels") and raw == yaml.safe_load(
        (DEPLOY / "config/aftercast.yaml").read_text()
    )
    assert not secret_literals(raw)
