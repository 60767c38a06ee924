"""The file channel: appends each notification as one JSON line to a local file.

Each line is the same CloudEvent the webhook channel POSTs, so a script that reads the file can
later read a webhook instead, and the other way round. The line goes out in a single `write` on
a file opened for appending, then is fsynced, so concurrent writers do not interleave within a
line and a crash never leaves half a notification behind a delivered outcome. A line cut short
(a full disk, a crash mid-write) is ended with a newline before the next line is written, so it
is the only line lost and its notification, not delivered, is sent again. Readers skip lines
that are not JSON and drop repeats by the event `id`, as webhook receivers do. Used by the demo
and by air-gapped sites.
"""

from __future__ import annotations

import errno
import os
from pathlib import Path

from aftercast.notify.base import Channel, DeliveryOutcome, Notification
from aftercast.notify.render import render_event_json
from aftercast.settings.channels import FileChannelConfig

# Errors a retry cannot fix: the path itself is wrong or forbidden.
PERMANENT_ERRNOS = frozenset({errno.EACCES, errno.EPERM, errno.EISDIR, errno.ENOTDIR, errno.EROFS})


class FileChannel(Channel):
    """Appends each notification as a CloudEvent line to `path`."""

    type = "file"
    config_model = FileChannelConfig

    def __init__(self, config: FileChannelConfig) -> None:
        super().__init__(config)
        self.path = Path(config.path)

    def _send(self, notification: Notification) -> DeliveryOutcome:
        line = (render_event_json(notification) + "\n").encode("utf-8")
        try:
            self._append(line)
        except OSError as exc:
            detail = f"cannot append to {self.path}: {exc.strerror or type(exc).__name__}"
            if exc.errno in PERMANENT_ERRNOS:
                return DeliveryOutcome.dead(detail)
            return DeliveryOutcome.retry(detail)
        return DeliveryOutcome.delivered(f"appended {len(line)} bytes to {self.path}")

    def _append(self, line: bytes) -> None:
        folder = self.path.parent
        folder.mkdir(parents=True, exist_ok=True)
        created = not self.path.exists()
        fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            size = os.fstat(fd).st_size
            if size and os.pread(fd, 1, size - 1) != b"\n":
                line = b"\n" + line  # end a line an earlier write left cut short
            written = os.write(fd, line)
            if written != len(line):
                raise OSError(errno.EIO, f"short write ({written} of {len(line)} bytes)")
            os.fsync(fd)
        finally:
            os.close(fd)
        if created:
            _fsync_folder(folder)  # so the new file's name survives a crash too


def _fsync_folder(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
