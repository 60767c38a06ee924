"""schemathesis against the served OpenAPI document: generated requests never get a 5xx.

schemathesis reads `/openapi.json` from the real uvicorn server and generates requests for every
operation from its schema (bodies of arbitrary rows, odd query values), sent with the bearer
token so that writes reach the ingest path. Its own `not_a_server_error` check is the verdict.
Examples per operation are few, so the run stays well under a minute. It runs on both stores:
PostgreSQL refuses some text SQLite keeps (a NUL character), so a path can fail on one only.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis.internal.conjecture import utils as conjecture_utils
from schemathesis.checks import not_a_server_error

from aftercast.web.app import create_app
from tests.test_web import AUTH, LiveServer, seeded_store

EXAMPLES_PER_OPERATION = 25


def _more(self: Any) -> bool:
    """The `many.more()` step hypothesis-jsonschema 0.23 calls; newer hypothesis dropped it.

    Same steps as the iterator that replaced it: close the last element, decide whether to
    draw another, open it. Only installed when the running hypothesis lacks the method.
    """
    if self._depth is None:
        self._depth = self.data.depth
    if self._in_element:
        self._finish_element()
    if not self._decide():
        return False
    self.count += 1
    self._in_element, self._rejected = True, False
    return True


if not hasattr(conjecture_utils.many, "more"):
    conjecture_utils.many.more = _more  # type: ignore[attr-defined]


@pytest.fixture
def served(store_url: str, tmp_path: Path) -> Iterator[str]:
    """The API on each store: PostgreSQL refuses text SQLite takes (a NUL, say)."""
    engine, config = seeded_store(tmp_path, store_url)
    with LiveServer(create_app(engine, config)) as live:
        yield live.url
    engine.dispose()


def test_no_generated_request_gets_a_server_error(served: str) -> None:
    schemathesis.experimental.OPEN_API_3_1.enable()  # FastAPI serves OpenAPI 3.1
    schema = schemathesis.from_uri(f"{served}/openapi.json", base_url=served)
    operations = [result.ok() for result in schema.get_all_operations()]  # type: ignore[union-attr]
    assert len(operations) >= 10
    failures: list[str] = []
    for operation in operations:

        @given(case=operation.as_strategy())
        @settings(
            max_examples=EXAMPLES_PER_OPERATION,
            deadline=None,
            database=None,
            suppress_health_check=list(HealthCheck),
        )
        def check(case: schemathesis.Case) -> None:
            response = case.call(headers=AUTH, timeout=30)
            case.validate_response(response, checks=(not_a_server_error,))

        try:
            check()
        except Exception as exc:  # collect every operation's failure, then report them all
            failures.append(f"{operation.verbose_name}: {str(exc)[:2000]}")
    assert not failures, "\n\n".join(failures)
