"""Running a stage's independent write transactions side by side where the store allows it.

A cycle spends most of its time waiting on the database: while PostgreSQL sums a window or
writes a batch of pairs on one core, aftercast's own Python work (scoring the next batch,
running detection's tests) can use the other. PostgreSQL takes concurrent writers on rows
they do not share, which is how several replicas already run their shards at once, so work
split by series runs on two connections there. SQLite has one writer at a time: there every
call below runs in the calling thread, one after the other, exactly as before.

Each unit of work is its own transaction on its own pooled connection, so a crash leaves
each unit committed or not, as a sequential run would. The first error is raised to the
caller once the units already running have finished; units not yet started are not started.
"""

from __future__ import annotations

import contextvars
import ctypes
import ctypes.util
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ThreadPoolExecutor, wait
from contextlib import contextmanager
from typing import TypeVar

from sqlalchemy import Engine

T = TypeVar("T")
R = TypeVar("R")

# Two: the machines aftercast is sized for have two cores, one for the database and one for
# the Python side; more workers would only queue on the same two cores and hold more batches
# in memory.
WORKERS = 2


def _malloc_trim() -> Callable[[int], int] | None:
    """glibc's malloc_trim, where the C library has it (None elsewhere)."""
    name = ctypes.util.find_library("c")
    try:
        return getattr(ctypes.CDLL(name), "malloc_trim", None) if name else None
    except OSError:
        return None


_TRIM = _malloc_trim()


def give_back_memory() -> None:
    """Return the heap the worker threads freed to the system.

    glibc gives each thread its own heap (arena) and keeps what a thread freed there for
    later, so after two workers each held a batch the process would go on carrying both
    batches' worth of memory into the next stage; malloc_trim releases the free pages.
    """
    if _TRIM is not None:
        _TRIM(0)


def writers(engine: Engine) -> int:
    """How many write transactions the store takes at once: WORKERS on PostgreSQL, else 1."""
    return WORKERS if engine.dialect.name == "postgresql" else 1


def _in_context(function: Callable[[T], R]) -> Callable[[T], R]:
    """`function` run in a copy of the caller's context (log lines keep their cycle id)."""
    context = contextvars.copy_context()
    return lambda item: context.copy().run(function, item)


def each(engine: Engine, items: Iterable[T], function: Callable[[T], R]) -> list[R]:
    """`function(item)` for every item, up to `writers(engine)` at once; results in order."""
    items = list(items)
    if writers(engine) == 1 or len(items) < 2:
        return [function(item) for item in items]
    run = _in_context(function)
    with ThreadPoolExecutor(max_workers=writers(engine)) as pool:
        futures: list[Future[R]] = []
        running: set[Future[R]] = set()
        for item in items:
            if len(running) == writers(engine):
                done, running = wait(running, return_when=FIRST_COMPLETED)
                for future in done:
                    future.result()  # an error stops here; leaving the pool waits for the rest
            futures.append(pool.submit(run, item))
            running.add(futures[-1])
        results = [future.result() for future in futures]
    give_back_memory()
    return results


@contextmanager
def alongside(engine: Engine, function: Callable[[], R]) -> Iterator[Callable[[], R]]:
    """Run `function` next to the block where the store allows it (before it, where not);
    the block gets a callable that waits for the result, raising `function`'s error."""
    if writers(engine) == 1:
        result = function()
        yield lambda: result
        return
    with ThreadPoolExecutor(max_workers=1) as pool:
        future = pool.submit(_in_context(lambda _: function()), None)
        try:
            yield future.result
        finally:
            wait([future])
            give_back_memory()
