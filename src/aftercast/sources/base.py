"""The contract every pulled source keeps: batches of raw rows, read as its settings say.

A source type is a settings model in `aftercast.settings.sources` (`type: Literal[...]` so the
config can tell them apart) and a module here with a `Source` subclass whose `batches` yields
what it found as `Batch`es: chunks of raw rows for the ingest path, plus what to remember once
they are stored (a file's content hash, a query's new watermark). The source never writes rows
itself, so counts and rejection reasons are those of `ingest --json`, and a source that fails
half-way leaves its watermark where it was.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any, ClassVar, Protocol

from aftercast.ingest.files import Chunk
from aftercast.settings.sources import SourceSettings


class SourceState(Protocol):
    """What a source may remember between pulls (kept in the store, per source name)."""

    def watermark(self) -> Any: ...

    def set_watermark(self, value: Any) -> None: ...

    def seen_hashes(self, hashes: list[str]) -> set[str]: ...

    def record_file(self, digest: str, path: str, outcome: str, detail: str | None) -> None: ...


def _nothing(*_args: Any) -> None:
    return None


@dataclass
class Batch:
    """Raw rows from one place (a file, a query, a response), and what to do once stored.

    `succeeded` runs after the rows are committed (record the file, advance the watermark);
    `failed(reason)` runs when the batch could not be read as a whole.
    """

    label: str
    chunks: Iterator[Chunk]
    digest: str | None = None
    succeeded: Callable[[], None] = _nothing
    failed: Callable[[str], None] = _nothing


class SourceError(Exception):
    """A pull failed as a whole (unreachable server, bad query); the message is one line."""

    def __init__(self, message: str, attempts: int = 1) -> None:
        super().__init__(message)
        self.attempts = attempts


@dataclass
class SourceResult:
    """What one pull of one source did, for the log, the metrics and the run log."""

    name: str
    type: str
    kind: str
    ok: bool = True
    batches: int = 0
    batches_failed: int = 0
    accepted: int = 0
    rejected: int = 0
    unchanged: int = 0
    revised: int = 0
    attempts: int = 0
    seconds: float = 0.0
    error: str | None = None
    rejected_reasons: dict[str, int] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)  # per-batch failures, first few

    def as_json(self) -> dict[str, Any]:
        from dataclasses import asdict

        return asdict(self)


class Source(ABC):
    """One configured source; `batches` is called once per pull."""

    settings_type: ClassVar[type[SourceSettings]]

    def __init__(self, settings: SourceSettings, chunk_rows: int) -> None:
        self.settings = settings
        self.chunk_rows = chunk_rows
        self.attempts = 1  # tries the last pull took (a retrying source sets it)

    @abstractmethod
    def batches(self, state: SourceState) -> Iterator[Batch]:
        """Yield the new rows as batches; raise SourceError when the source cannot be read."""
