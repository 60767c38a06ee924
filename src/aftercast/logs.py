"""Structured log lines: one JSON object per event, each carrying the cycle id.

The daemon writes its log to standard error as JSON lines (time, level, logger, event, cycle_id and
the event's own fields), which container runtimes and log shippers read without a parser of our
own. The cycle id comes from a context variable, so every line emitted while a monitoring cycle
runs - by any stage and any library logger - names that cycle; lines outside a cycle carry null.
`log_event` is the one call code uses: an event name in the trade's words plus keyword fields.
"""

from __future__ import annotations

import json
import logging
import math
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import IO, Any

_CYCLE_ID: ContextVar[int | None] = ContextVar("aftercast_cycle_id", default=None)
_FIELDS = "aftercast_fields"
# LogRecord attributes that are bookkeeping, not event fields.
_STANDARD = set(vars(logging.makeLogRecord({}))) | {"message", "asctime", "color_message"}


@contextmanager
def cycle_scope(cycle_id: int | None) -> Iterator[None]:
    """Tag every log line emitted inside the block (in this thread) with `cycle_id`."""
    token = _CYCLE_ID.set(cycle_id)
    try:
        yield
    finally:
        _CYCLE_ID.reset(token)


def current_cycle_id() -> int | None:
    return _CYCLE_ID.get()


def log_event(logger: logging.Logger, event: str, level: int = logging.INFO, **fields: Any) -> None:
    """Log one event with its fields (numbers, text, lists, mappings) as one JSON line."""
    logger.log(level, event, extra={_FIELDS: fields})


def _plain(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None  # strict JSON has no NaN
    if isinstance(value, str | int | bool) or value is None:
        return value
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | set):
        return [_plain(v) for v in value]
    if hasattr(value, "item"):  # numpy scalars
        return _plain(value.item())
    return str(value)


class JsonFormatter(logging.Formatter):
    """Formats a record as one line of JSON; newlines in messages are escaped, never emitted."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "event": record.getMessage(),
            "cycle_id": getattr(record, "cycle_id", None),
        }
        fields = getattr(record, _FIELDS, None)
        if fields:
            line.update({k: _plain(v) for k, v in fields.items() if k not in line})
        # Library loggers (uvicorn, apscheduler) pass their context as plain `extra` attributes.
        for key, value in vars(record).items():
            if key not in _STANDARD and key not in line and key not in (_FIELDS, "cycle_id"):
                line[key] = _plain(value)
        if record.exc_info and record.exc_info[0] is not None:
            line["error"] = f"{record.exc_info[0].__name__}: {record.exc_info[1]}"
            line["traceback"] = self.formatException(record.exc_info)
        return json.dumps(line, ensure_ascii=False, allow_nan=False, default=str)


class TextFormatter(logging.Formatter):
    """One plain line per warning for a person at a terminal: `aftercast: warning: ...`.

    The line starts with what it is about (a config key, or a source and its file), as every
    error line of the command line does, then the reason; never a traceback.
    """

    def format(self, record: logging.LogRecord) -> str:
        # Fields of `log_event`, or a plain `extra={"source": ...}` of `log.exception`.
        plain = {k: getattr(record, k) for k in ("source", "key") if hasattr(record, k)}
        fields = {**plain, **(getattr(record, _FIELDS, None) or {})}
        about = [str(fields["key"])] if fields.get("key") else []
        if fields.get("source"):
            about.append(f"source {fields['source']!r}")
        reason = fields.get("error") or fields.get("detail")
        if reason is None and record.exc_info and record.exc_info[0] is not None:
            reason = f"{record.exc_info[0].__name__}: {record.exc_info[1]}"
        text = ": ".join([*about, str(reason or record.getMessage())])
        level = "warning" if record.levelno == logging.WARNING else record.levelname.lower()
        return f"aftercast: {level}: " + " ".join(text.splitlines())


@contextmanager
def warnings_to_stderr(as_json: bool, stream: IO[str] | None = None) -> Iterator[None]:
    """While a one-shot command runs, its warnings go to standard error, never standard output.

    Standard output holds only the command's result (`--json`: one JSON document), so a script
    can read it whatever went wrong on the way. With `as_json` each warning is a JSON line
    naming its source or config key; otherwise one plain line (`TextFormatter`).
    """
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setLevel(logging.WARNING)
    handler.setFormatter(JsonFormatter() if as_json else TextFormatter())
    handler.addFilter(_CycleFilter())
    logger = logging.getLogger("aftercast")
    logger.addHandler(handler)
    try:
        yield
    finally:
        logger.removeHandler(handler)


class _CycleFilter(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "cycle_id", None) is None:
            record.cycle_id = _CYCLE_ID.get()
        return True


def configure_logging(level: str | int = "INFO", stream: IO[str] | None = None) -> logging.Handler:
    """Send every logger's records to `stream` (standard error) as JSON lines; returns the handler.

    Replaces the handlers of the root logger and of uvicorn's loggers, which would otherwise print
    their own text format, so that one process writes one format.
    """
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter())
    handler.addFilter(_CycleFilter())
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level)
    for name in ("uvicorn", "uvicorn.error", "uvicorn.access", "apscheduler"):
        library = logging.getLogger(name)
        library.handlers.clear()
        library.propagate = True
    # Their routine lines ("running job", alembic's context on every readiness probe) would
    # drown the events; our own lines say when a job ran. Warnings still come through.
    for name in ("apscheduler", "alembic"):
        logging.getLogger(name).setLevel(logging.WARNING)
    return handler
