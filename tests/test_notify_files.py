"""The file channel, the registry, and the outbox's JSON form of a notification.

Lines are checked against JSON Lines (jsonlines.org: one UTF-8 JSON value per line, "\\n"
terminated) and against what a real webhook receiver got for the same notification; strict
JSON against RFC 8259, which has no NaN or Infinity (the stdlib parser is told to refuse them).
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import pytest

from aftercast.notify import (
    CHANNEL_CONFIG_TYPES,
    CHANNELS,
    FileChannel,
    Notification,
    WebhookChannel,
    parse_channel_config,
)
from tests.servers import HttpRecorder, channel_of, sample_notification


def file_channel(path: Path) -> FileChannel:
    return channel_of(FileChannel, {"name": "local", "type": "file", "path": str(path)})


def refuse_constant(name: str) -> Any:
    raise ValueError(f"not JSON (RFC 8259): {name}")


def test_appends_one_json_line_per_delivery_creating_folders(tmp_path: Path) -> None:
    path = tmp_path / "deep" / "er" / "alerts.jsonl"
    channel = file_channel(path)
    for ident in ("a", "b"):
        outcome = channel.deliver(sample_notification(notification_id=ident))
        assert outcome.status == "delivered", outcome.detail
    raw = path.read_bytes()
    assert raw.endswith(b"\n") and raw.count(b"\n") == 2  # JSON Lines: "\n" after each value
    events = [json.loads(line, parse_constant=refuse_constant) for line in raw.splitlines()]
    assert [e["id"] for e in events] == ["a", "b"]
    assert all(e["specversion"] == "1.0" for e in events)


def test_a_line_left_cut_short_costs_only_itself(tmp_path: Path) -> None:
    """A write cut short (full disk, crash) leaves part of a line with no newline; the next
    delivery ends it first, so the notification sent again is a whole line of its own."""
    path = tmp_path / "alerts.jsonl"
    channel = file_channel(path)
    assert channel.deliver(sample_notification(notification_id="a")).status == "delivered"
    whole = path.read_bytes()
    path.write_bytes(whole + whole[: len(whole) // 2])  # "b" was cut off half-way
    assert channel.deliver(sample_notification(notification_id="b")).status == "delivered"
    lines = path.read_bytes().split(b"\n")
    assert lines[-1] == b"" and len(lines) == 4  # a, the cut-off part, b, end of file
    assert json.loads(lines[0])["id"] == "a" and json.loads(lines[2])["id"] == "b"
    with pytest.raises(json.JSONDecodeError):
        json.loads(lines[1])


def test_line_is_the_same_event_a_webhook_receives(tmp_path: Path) -> None:
    notification = sample_notification(series_id='store "17" é')
    path = tmp_path / "alerts.jsonl"
    file_channel(path).deliver(notification)
    with HttpRecorder() as server:
        hook = channel_of(WebhookChannel, {"name": "h", "type": "webhook", "url": server.url()})
        assert hook.deliver(notification).status == "delivered"
    assert path.read_bytes() == server.requests[0].body + b"\n"


def test_unwritable_path_is_dead_without_raising(tmp_path: Path) -> None:
    folder = tmp_path / "a-folder"
    folder.mkdir()
    outcome = file_channel(folder).deliver(sample_notification())  # a directory, not a file
    assert outcome.status == "dead" and str(folder) in outcome.detail


def test_notification_json_round_trip_is_strict_json() -> None:
    original = sample_notification(charts=2)
    evidence = {**original.alerts[0].evidence, "statistic": math.nan, "width": math.inf}
    first = dataclasses.replace(original.alerts[0], evidence=evidence)
    notification = sample_notification(charts=2, alerts=[first, *original.alerts[1:]])
    text = notification.to_json()
    parsed = json.loads(text, parse_constant=refuse_constant)  # no NaN/Infinity tokens
    assert parsed["alerts"][0]["evidence"]["statistic"] is None
    back = Notification.from_json(text)
    assert back.to_json() == text
    assert back.charts == original.charts and back.alerts[1] == original.alerts[1]


def test_reading_a_row_from_a_newer_writer_ignores_unknown_keys() -> None:
    row = json.loads(sample_notification().to_json())
    row["priority"] = "p1"
    row["alerts"][0]["runbook"] = "https://example.test/runbook"
    back = Notification.from_json(json.dumps(row))
    assert back.id == "ntf-0001" and len(back.alerts) == 2


def test_registry_covers_every_config_type() -> None:
    assert set(CHANNELS) == {"email", "webhook", "file"}
    for config_type in CHANNEL_CONFIG_TYPES:
        assert config_type.model_config.get("extra") == "forbid"
        kind = config_type.model_fields["type"].default
        assert CHANNELS[kind].config_model is config_type
    with pytest.raises(ValueError):
        parse_channel_config({"name": "x", "type": "pager"})
