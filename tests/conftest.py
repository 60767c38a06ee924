"""Shared fixtures: stores on SQLite and PostgreSQL, and small input files.

`store_url` runs a test on both stores: SQLite always, PostgreSQL when
`AFTERCAST_TEST_POSTGRES_URL` is set (each test gets a fresh database, dropped afterwards).
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml
from sqlalchemy import create_engine, text

from aftercast.config import Config, parse_config
from aftercast.store.db import make_engine, migrate

POSTGRES_ENV = "AFTERCAST_TEST_POSTGRES_URL"
COMPOSE_FILE = Path(__file__).resolve().parents[1] / "deploy" / "compose.yaml"
# The status JSON row of the CONTRACT in the shared design document, in its order.
STATUS_CONTRACT = [
    *("series_id", "model", "horizon", "n", "me", "mae", "mse", "rmse"),
    *("mape", "smape", "wape", "mase", "coverage", "width", "interval_score"),
    *("window_start", "window_end"),
]


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    return f"sqlite:///{tmp_path / 'aftercast.db'}"


@pytest.fixture
def pg_url() -> Iterator[str]:
    base = os.environ.get(POSTGRES_ENV)
    if not base:
        pytest.skip(f"{POSTGRES_ENV} is not set: PostgreSQL tests need a server URL")
    name = f"aftercast_t_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    url = base.rsplit("/", 1)[0] + f"/{name}"
    try:
        yield url
    finally:
        with admin.connect() as connection:
            connection.execute(
                text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = :n"),
                {"n": name},
            )
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
        admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest) -> str:
    """The URL of a fresh, empty store: SQLite, then PostgreSQL when configured."""
    fixture = "sqlite_url" if request.param == "sqlite" else "pg_url"
    return str(request.getfixturevalue(fixture))


def make_config(url: str, **sections: object) -> Config:
    """A validated config on `url`, with any extra sections given as plain mappings."""
    return parse_config({"store": {"url": url}, **sections}, "test config")


@pytest.fixture
def config(store_url: str) -> Config:
    return make_config(store_url)


@pytest.fixture
def engine(config: Config):  # type: ignore[no-untyped-def]
    """A migrated store on each backend."""
    engine = make_engine(config.store.url)
    migrate(engine)
    yield engine
    engine.dispose()


def write_csv(path: Path, header: str, *rows: str) -> Path:
    """Write a small CSV file: `header` and `rows` are comma-separated lines."""
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    """deploy/compose.yaml, parsed (its one document)."""
    (document,) = [d for d in yaml.safe_load_all(COMPOSE_FILE.read_text()) if d is not None]
    return dict(document)
