"""Crash safety: SIGKILL at random points of ingest and cycle, restart, and nothing differs.

The invented bakery feed is replayed step by step (ingest a file, or run a cycle) on SQLite and,
when configured, PostgreSQL. Apart from the first step of each kind (which measures how many
database statements that kind of step issues), every step is first run in a forked child
process that SIGKILLs itself just before a randomly chosen statement or commit: anywhere from
before its first write to after its last. The parent then plays the restarted process: it runs
the same step again on the same store, as an operator or the daemon would. After every step,
and after a final further cycle and delivery pass, the store must equal that of an
uninterrupted run of the same feed (computed once, in this process, on a separate SQLite store):
data, pairs, windows, alerts and notifications, with natural keys in place of surrogate ids.
"""

from __future__ import annotations

import os
import signal
import time
import traceback
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import Engine, event

from aftercast.config import Config
from aftercast.cycle import run_cycle
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.replay import Step, assert_same_store, daily_steps, run_step, store_snapshot

MIN_KILLS_PER_STORE = 10  # >= 20 trials over the two stores; each store runs about 25
DAY = 86_400


def crash_config(url: str, folder: Path) -> Config:
    """A file channel and a route to it, so that alerts become notifications that are sent."""
    return make_config(
        url,
        channels=[{"name": "local", "type": "file", "path": str(folder / "alerts.jsonl")}],
        routes=[{"name": "audit", "channels": ["local"]}],
    )


def final_pass(engine: Engine, config: Config, last: int) -> None:
    """The further cycle after restart, and a delivery pass once any crashed claim has lapsed."""
    from aftercast.notify.deliver import deliver_due

    run_cycle(engine, config, last + DAY)
    deliver_due(engine, config, int(time.time()) + 3600)


@pytest.fixture(scope="module")
def feed(tmp_path_factory: pytest.TempPathFactory) -> tuple[list[Step], list[dict[str, Any]]]:
    """The steps, and the uninterrupted run's snapshot after each step (the last: final pass)."""
    folder = tmp_path_factory.mktemp("crash-reference")
    steps = daily_steps(folder / "feed")
    url = f"sqlite:///{folder / 'reference.db'}"
    engine = make_engine(url)
    migrate(engine)
    config = crash_config(url, folder)
    snapshots = []
    for step in steps:
        run_step(engine, config, step)
        snapshots.append(store_snapshot(engine))
    final_pass(engine, config, max(s.now for s in steps if s.now is not None))
    snapshots.append(store_snapshot(engine))
    engine.dispose()
    return steps, snapshots


class StatementCounter:
    """Counts statements and commits on an engine: the kill points a step has."""

    def __init__(self, engine: Engine) -> None:
        self.count = 0
        event.listen(engine, "before_cursor_execute", self._tick)
        event.listen(engine, "commit", self._tick)

    def _tick(self, *_args: Any) -> None:
        self.count += 1

    def measure(self, engine: Engine, config: Config, step: Step) -> int:
        start = self.count
        run_step(engine, config, step)
        return self.count - start


def run_killed(url: str, config: Config, step: Step, kill_at: int) -> bool:
    """Run `step` in a forked child that SIGKILLs itself at kill point `kill_at`.

    Returns True when the child was killed, False when it finished the step first.
    """
    pid = os.fork()
    if pid == 0:  # the child: a process of its own with its own engine and connections
        try:
            engine = make_engine(url)
            seen = iter(range(1, 10**9))

            def maybe_die(*_args: Any) -> None:
                if next(seen) >= kill_at:
                    os.kill(os.getpid(), signal.SIGKILL)

            event.listen(engine, "before_cursor_execute", maybe_die)
            event.listen(engine, "commit", maybe_die)
            run_step(engine, config, step)
        except BaseException:
            traceback.print_exc()
            os._exit(1)
        os._exit(0)
    _, status = os.waitpid(pid, 0)
    if os.WIFSIGNALED(status):
        assert os.WTERMSIG(status) == signal.SIGKILL
        return True
    assert os.WEXITSTATUS(status) == 0
    return False


def trials(
    url: str, folder: Path, steps: list[Step], snapshots: list[dict[str, Any]], seed: int
) -> Iterator[tuple[int, int, bool]]:
    """Replay with a crash before each step of an already measured kind; yields the trials."""
    rng = np.random.default_rng(seed)
    config = crash_config(url, folder)
    engine = make_engine(url)
    migrate(engine)
    counter = StatementCounter(engine)
    points: dict[str, int] = {}
    for index, step in enumerate(steps):
        finished = False
        if step.kind in points:
            kill_at = int(rng.integers(1, points[step.kind] + 1))
            engine.dispose()  # the child must not share the parent's connections
            killed = run_killed(url, config, step, kill_at)
            finished = not killed
            yield index, kill_at, killed
        if not finished:  # the restarted process runs the interrupted step again
            points[step.kind] = max(1, counter.measure(engine, config, step))
        assert_same_store(store_snapshot(engine), snapshots[index])
    final_pass(engine, config, max(s.now for s in steps if s.now is not None))
    assert_same_store(store_snapshot(engine), snapshots[-1])
    engine.dispose()


def test_sigkill_anywhere_then_restart_equals_an_uninterrupted_run(
    store_url: str, tmp_path: Path, feed: tuple[list[Step], list[dict[str, Any]]]
) -> None:
    steps, snapshots = feed
    done = pd.DataFrame(
        list(trials(store_url, tmp_path, steps, snapshots, seed=7)),
        columns=["step", "kill_at", "killed"],
    )
    assert done["killed"].sum() >= MIN_KILLS_PER_STORE, done
    kinds = {steps[i].kind for i in done.loc[done["killed"], "step"]}
    assert {"forecasts", "actuals", "cycle"} <= kinds  # ingest and cycle were both interrupted
