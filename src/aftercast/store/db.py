"""Engines, transactions and schema migrations.

SQLite runs in WAL mode so readers (the web pages) never block the cycle's writer, and write
transactions start with BEGIN IMMEDIATE so two writers queue on the lock instead of failing
half-way with "database is locked". PostgreSQL needs nothing special. The schema is managed by
Alembic: `migrate` upgrades to head, `check_current` refuses to work on an old schema.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config as AlembicConfig
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, Engine, create_engine, event, make_url, text
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError, OperationalError

from aftercast.errors import AftercastError, ConfigError, SchemaOutdatedError

MIGRATIONS = Path(__file__).parent / "migrations"


def make_engine(url: str, echo: bool = False) -> Engine:
    """An engine for `url`; SQLite gets WAL, a busy timeout and IMMEDIATE write transactions."""
    try:
        if url.startswith("sqlite"):
            engine = create_engine(url, echo=echo, connect_args={"timeout": 60})
            _tune_sqlite(engine)
        else:
            engine = create_engine(
                url, echo=echo, pool_pre_ping=True, connect_args=_server_args(url)
            )
    except (ArgumentError, NoSuchModuleError) as exc:
        raise ConfigError(f"config key store.url: {_first_line(exc)}") from None
    except ImportError as exc:
        # A URL without a driver (postgresql://) means SQLAlchemy's default one, psycopg2,
        # which aftercast does not install: say which URL form works instead.
        raise ConfigError(
            f"config key store.url: {url.split('://', 1)[0]}:// needs the driver "
            f"{exc.name or 'module'}, which is not installed; "
            "for PostgreSQL use postgresql+psycopg://..."
        ) from None
    return engine


def _server_args(url: str) -> dict[str, Any]:
    """Session settings for PostgreSQL through psycopg 3.

    psycopg prepares a statement run five times on a connection, and PostgreSQL may then plan
    it once for any parameters. The cycle's statements take arrays of ids whose length decides
    the plan (index probes for a few, a scan for many), so each is planned for its own values:
    planning is microseconds next to statements that read thousands of rows. JIT compilation
    is off for the session: the cycle's statements are large but simple, and compiling each
    anew cost about half a second apiece (their expressions are evaluated once per row).
    """
    parsed = make_url(url)
    if parsed.get_driver_name() != "psycopg":
        return {}
    given = parsed.query.get("options", "")  # the URL's own session options are kept
    given = given if isinstance(given, str) else " ".join(given)
    return {"prepare_threshold": None, "options": f"{given} -c jit=off".strip()}


def _tune_sqlite(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy's "begin" event emit BEGIN itself (pysqlite's own handling is off).
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute("PRAGMA temp_store=MEMORY")
        cursor.execute("PRAGMA cache_size=-131072")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection: Connection) -> None:
        statement = "BEGIN IMMEDIATE" if connection.info.get("write") else "BEGIN"
        connection.exec_driver_sql(statement)


@contextmanager
def write(engine: Engine) -> Iterator[Connection]:
    """A write transaction: committed on success, rolled back on any error."""
    with engine.connect() as connection:
        connection.info["write"] = True
        try:
            with connection.begin():
                yield connection
        finally:
            connection.info["write"] = False


def _alembic_config(connection: Connection) -> AlembicConfig:
    config = AlembicConfig()
    config.set_main_option("script_location", str(MIGRATIONS))
    config.attributes["connection"] = connection
    return config


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _cannot_open(engine: Engine, exc: DBAPIError) -> AftercastError:
    # Drivers explain over several lines (psycopg adds "Is the server running..."); the
    # first names the cause, and the command line promises one line.
    url = engine.url.render_as_string(hide_password=True)
    return AftercastError(f"store {url}: cannot open ({_first_line(exc.orig or exc)})")


@contextmanager
def _connection(engine: Engine) -> Iterator[Connection]:
    """A connection to the store; a store that cannot be opened at all is one line naming it."""
    try:
        connection = engine.connect()
    except DBAPIError as exc:  # server down, wrong credentials, bad path, not a database file
        raise _cannot_open(engine, exc) from None
    with connection:
        yield connection


def migrate(engine: Engine) -> str:
    """Create or upgrade the schema to the newest revision; returns that revision."""
    with _connection(engine):  # pooled, so `write` below takes the same connection again
        pass
    try:
        with write(engine) as connection:
            config = _alembic_config(connection)
            command.upgrade(config, "heads")
            return ",".join(sorted(ScriptDirectory.from_config(config).get_heads()))
    except OperationalError as exc:  # opened, but read-only or locked past the busy timeout
        raise _cannot_open(engine, exc) from None


def schema_revisions(engine: Engine) -> tuple[str | None, str]:
    """(revisions the store is at, newest revisions this version knows), comma-joined.

    Revisions may branch from a common parent (independent features add their own tables);
    the store is current when it is at every head.
    """
    with _connection(engine) as connection:
        heads_now = MigrationContext.configure(connection).get_current_heads()
        heads = ScriptDirectory.from_config(_alembic_config(connection)).get_heads()
    current = ",".join(sorted(heads_now)) if heads_now else None
    return current, ",".join(sorted(heads))


def check_current(engine: Engine) -> None:
    """Raise SchemaOutdatedError, with the fix, unless the store is at the newest revision."""
    current, head = schema_revisions(engine)
    if current is None:
        raise SchemaOutdatedError(
            f"store {engine.url.render_as_string(hide_password=True)} has no aftercast schema: "
            "run `aftercast init` first"
        )
    if current != head:
        raise SchemaOutdatedError(
            f"store schema is at revision {current}, this aftercast needs {head}: "
            "run `aftercast init` to migrate"
        )


def refresh_statistics(engine: Engine, tables: tuple[str, ...]) -> None:
    """Bring PostgreSQL's planner statistics of `tables` up to the rows just written.

    A day's bulk writes land beyond the value ranges the statistics know (autovacuum analyzes a
    large table only after a tenth of it changed), so the planner estimated a day's 420,000
    pairs as 4,000 and hashed whole tables for each batch of matching where an index probe per
    key was right: at 100,000 series an ANALYZE of forecasts, actuals and pairs took under a
    second and halved matching (bench/EXPLAIN.md). It samples a fixed number of rows, so its
    cost does not grow with the store. SQLite's planner is left as it is: its plans are fixed
    where they mattered (CROSS JOIN order, row-value IN) and `ANALYZE` there reads every row.
    """
    if engine.dialect.name != "postgresql" or not tables:
        return
    with engine.begin() as connection:
        connection.execute(text(f"ANALYZE {', '.join(tables)}"))
