"""Folder source: files dropped into a directory, each ingested once by its content hash.

Files matching `glob` are read with the same chunked readers as `aftercast ingest` (CSV, Parquet,
JSON Lines by extension). A file's SHA-256 is recorded once its rows are stored, so the same
content is never read twice, whatever its name; with `after: move` the file is then moved into
`done_folder` (or `failed_folder` when it cannot be read at all), so the drop folder shows what
is still waiting. Files modified in the last `settle_seconds` are left for the next pull, as the
writer may not have finished them. A file that cannot be opened (no permission, or removed
between listing and reading) is that file's failure, with a warning naming it and the source:
the other files are read all the same, and it is tried again at the next pull.
"""

from __future__ import annotations

import logging
import shutil
import stat
import time
from collections.abc import Iterator
from pathlib import Path

from aftercast.errors import InputFileError
from aftercast.ingest.files import Chunk, content_hash, read_chunks
from aftercast.logs import log_event
from aftercast.settings.sources import FolderSettings
from aftercast.sources.base import Batch, Source, SourceError, SourceState

log = logging.getLogger("aftercast.sources")


def _move(path: Path, folder: Path, digest: str, source: str) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
        target = folder / path.name
        if target.exists():  # same name, other content: keep both
            target = folder / f"{path.stem}.{digest[:12]}{path.suffix}"
        shutil.move(str(path), target)
    except OSError as exc:  # its rows are stored and its hash kept: only the tidying failed
        reason = f"{path}: not moved to {folder} ({exc.strerror or exc})"
        log_event(
            log, "file not moved", logging.WARNING, source=source, batch=str(path), error=reason
        )


def _unreadable(reason: str) -> Iterator[Chunk]:
    raise InputFileError(reason)
    yield  # a generator: the reason is raised where the batch is read, like any unreadable file


def _hashes(files: list[Path]) -> tuple[dict[Path, str], dict[Path, str]]:
    """Each file's content hash, and the reason for each file that could not be read."""
    digests: dict[Path, str] = {}
    unreadable: dict[Path, str] = {}
    for path in files:
        try:
            digests[path] = content_hash(path)
        except OSError as exc:  # no permission, or removed since it was listed
            unreadable[path] = f"{path}: cannot read ({exc.strerror or exc})"
    return digests, unreadable


class FolderSource(Source):
    settings_type = FolderSettings
    settings: FolderSettings

    def _candidates(self) -> list[Path]:
        root = Path(self.settings.path)
        if not root.is_dir():
            raise SourceError(f"folder {root} does not exist or is not a directory")
        fresh = time.time() - self.settings.settle_seconds
        settled = []
        for path in root.glob(self.settings.glob):
            try:
                status = path.stat()
            except OSError:  # removed since it was listed: nothing is there to read
                continue
            if stat.S_ISREG(status.st_mode) and status.st_mtime <= fresh:
                settled.append((status.st_mtime, path.name, path))
        return [path for *_, path in sorted(settled)]

    def batches(self, state: SourceState) -> Iterator[Batch]:
        files = self._candidates()
        digests, unreadable = _hashes(files)
        seen = state.seen_hashes(sorted(set(digests.values())))
        root = Path(self.settings.path)
        name = self.settings.name
        done = Path(self.settings.done_folder or root / "done")
        failed = Path(self.settings.failed_folder or root / "failed")
        for path in files:
            if path in unreadable:  # not recorded nor moved: tried again at the next pull
                yield Batch(label=str(path), chunks=_unreadable(unreadable[path]))
                continue
            digest = digests[path]
            if digest in seen:
                if self.settings.after == "move":
                    _move(path, done, digest, name)
                continue
            seen.add(digest)  # two names, one content in the same pull: read it once

            def succeeded(path: Path = path, digest: str = digest) -> None:
                state.record_file(digest, str(path), "ingested", None)
                if self.settings.after == "move":
                    _move(path, done, digest, name)

            def not_read(reason: str, path: Path = path, digest: str = digest) -> None:
                state.record_file(digest, str(path), "unreadable", reason)
                if self.settings.after == "move":
                    _move(path, failed, digest, name)

            yield Batch(
                label=str(path),
                chunks=read_chunks(path, self.chunk_rows),
                digest=digest,
                succeeded=succeeded,
                failed=not_read,
            )
