"""HTTP source: a GET with requests, answering CSV, JSON or JSON Lines rows.

Timeouts bound every attempt; timeouts, refused connections, 408, 429 and 5xx answers are
retried `retries` times with a doubling pause (a `Retry-After` the server sends is honoured up
to a minute); any other answer is a failure at once. Header values come from the config, where
`${NAME}` is read from the environment at start-up, or from `headers_from_env`, read at every
pull so that a rotated token is picked up without a restart. A body larger than `max_bytes` is
refused rather than held in memory. `clean_records` is shared with the push endpoints: it turns
a JSON array into rows the way the JSON Lines reader does.
"""

from __future__ import annotations

import io
import json
import os
import time
from collections.abc import Iterator
from itertools import chain
from typing import Any

import pandas as pd
import requests

from aftercast.errors import InputFileError
from aftercast.ingest.files import PRE_REJECTED, Chunk, jsonl_chunks, set_aside_invalid_text
from aftercast.ingest.files import csv_chunks as read_csv_chunks
from aftercast.settings.sources import HttpSettings
from aftercast.sources.base import Batch, Source, SourceError, SourceState

RETRY_STATUSES = {408, 429, 500, 502, 503, 504}
MAX_PAUSE_SECONDS = 60.0


def clean_records(items: list[Any]) -> list[dict[str, Any]]:
    """Rows from a parsed JSON array: nested values become JSON text, non-objects are kept as
    unparseable rows so that they are quarantined with their number instead of vanishing."""
    rows: list[dict[str, Any]] = []
    for item in items:
        if not isinstance(item, dict):
            rows.append({PRE_REJECTED: f"not a JSON object: {json.dumps(item)[:200]}"})
            continue
        rows.append(
            {
                str(key): json.dumps(value) if isinstance(value, dict | list) else value
                for key, value in item.items()
            }
        )
    return rows


def csv_chunks(body: bytes, chunk_rows: int, label: str) -> Iterator[Chunk]:
    """CSV bytes as chunks of text values, read as `aftercast ingest` reads a CSV file.

    An empty body yields nothing; a body that is not CSV raises InputFileError naming `label`.
    """
    if not body.strip():
        return iter(())
    return read_csv_chunks(io.BytesIO(body), chunk_rows, label)


def _records_at(document: Any, key: str | None) -> list[Any]:
    for part in key.split(".") if key else []:
        if not isinstance(document, dict) or part not in document:
            raise SourceError(f"records_key {key!r}: the answer has no {part!r}")
        document = document[part]
    if not isinstance(document, list):
        raise SourceError("the answer is not a JSON array of rows (set records_key?)")
    return document


def _frames(records: list[dict[str, Any]], chunk_rows: int) -> Iterator[Chunk]:
    for start in range(0, len(records), chunk_rows):
        frame = pd.DataFrame.from_records(records[start : start + chunk_rows])
        yield Chunk(set_aside_invalid_text(frame), start + 1)


class HttpSource(Source):
    settings_type = HttpSettings
    settings: HttpSettings

    def _headers(self) -> dict[str, str]:
        headers = {k: v.get_secret_value() for k, v in self.settings.headers.items()}
        for header, variable in self.settings.headers_from_env.items():
            if variable not in os.environ:
                raise SourceError(f"headers_from_env.{header}: variable {variable} is not set")
            headers[header] = os.environ[variable]
        return headers

    def _pause(self, attempt: int, response: requests.Response | None) -> float:
        hint = response.headers.get("Retry-After", "") if response is not None else ""
        if hint.isdigit():
            return min(float(hint), MAX_PAUSE_SECONDS)
        return min(self.settings.backoff_seconds * 2**attempt, MAX_PAUSE_SECONDS)

    def _read(self, response: requests.Response) -> bytes:
        body = bytearray()
        for block in response.iter_content(1 << 16):
            body.extend(block)
            if len(body) > self.settings.max_bytes:
                raise SourceError(f"the answer is larger than max_bytes={self.settings.max_bytes}")
        return bytes(body)

    def fetch(self) -> tuple[bytes, int]:
        """The body of a successful answer and the number of attempts it took."""
        headers, timeout = self._headers(), self.settings.timeout_seconds
        attempts = self.settings.retries + 1
        problem = ""
        for attempt in range(attempts):
            response = None
            try:
                response = requests.get(
                    self.settings.url, headers=headers, timeout=(timeout, timeout), stream=True
                )
                with response:
                    if response.status_code < 300:
                        return self._read(response), attempt + 1
                    problem = f"HTTP {response.status_code} {response.reason}"
                    if response.status_code not in RETRY_STATUSES:
                        raise SourceError(f"GET {self.settings.url}: {problem}", attempt + 1)
            except requests.Timeout:
                problem = f"no answer within {timeout:g}s (timeout)"
            except requests.ConnectionError as exc:
                problem = f"cannot connect ({type(exc).__name__})"
            except requests.RequestException as exc:
                raise SourceError(f"GET {self.settings.url}: {exc}", attempt + 1) from None
            if attempt + 1 < attempts:
                time.sleep(self._pause(attempt, response))
        tries = "1 attempt" if attempts == 1 else f"{attempts} attempts"
        raise SourceError(f"GET {self.settings.url}: {problem}; gave up after {tries}", attempts)

    def _chunks(self, body: bytes) -> Iterator[Chunk]:
        if self.settings.format == "csv":
            return csv_chunks(body, self.chunk_rows, self.settings.url)
        try:
            text = body.decode("utf-8")
            if self.settings.format == "jsonl":  # read as a file is: each line its own row
                return jsonl_chunks(io.StringIO(text), self.chunk_rows)
            items = _records_at(json.loads(text), self.settings.records_key) if text else []
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise SourceError(
                f"GET {self.settings.url}: not {self.settings.format}: {exc}"
            ) from None
        return _frames(clean_records(items), self.chunk_rows)

    def batches(self, state: SourceState) -> Iterator[Batch]:
        body, self.attempts = self.fetch()
        chunks = self._chunks(body)
        try:
            first = next(chunks, None)
        except InputFileError as exc:
            raise SourceError(str(exc), self.attempts) from None
        if first is None or first.frame.empty:
            return  # nothing new is not a failure
        yield Batch(label=self.settings.url, chunks=chain([first], chunks))
