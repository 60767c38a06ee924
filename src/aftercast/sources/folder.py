"""Folder source: files dropped into a directory, each ingested once by its content hash.

Files matching `glob` are read with the same chunked readers as `aftercast ingest` (CSV, Parquet,
JSON Lines by extension). A file's SHA-256 is recorded once its rows are stored, so the same
content is never read twice, whatever its name; with `after: move` the file is then moved into
`done_folder` (or `failed_folder` when it cannot be read at all), so the drop folder shows what
is still waiting. Files modified in the last `settle_seconds` are left for the next pull, as the
writer may not have finished them.
"""

from __future__ import annotations

import shutil
import time
from collections.abc import Iterator
from pathlib import Path

from aftercast.ingest.files import content_hash, read_chunks
from aftercast.settings.sources import FolderSettings
from aftercast.sources.base import Batch, Source, SourceError, SourceState


def _move(path: Path, folder: Path, digest: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    if target.exists():  # same name, other content: keep both
        target = folder / f"{path.stem}.{digest[:12]}{path.suffix}"
    shutil.move(str(path), target)


class FolderSource(Source):
    settings_type = FolderSettings
    settings: FolderSettings

    def _candidates(self) -> list[Path]:
        root = Path(self.settings.path)
        if not root.is_dir():
            raise SourceError(f"folder {root} does not exist or is not a directory")
        fresh = time.time() - self.settings.settle_seconds
        files = [p for p in root.glob(self.settings.glob) if p.is_file()]
        settled = [p for p in files if p.stat().st_mtime <= fresh]
        return sorted(settled, key=lambda p: (p.stat().st_mtime, p.name))

    def batches(self, state: SourceState) -> Iterator[Batch]:
        files = self._candidates()
        digests = {path: content_hash(path) for path in files}
        seen = state.seen_hashes(sorted(set(digests.values())))
        root = Path(self.settings.path)
        done = Path(self.settings.done_folder or root / "done")
        failed = Path(self.settings.failed_folder or root / "failed")
        for path, digest in digests.items():
            if digest in seen:
                if self.settings.after == "move":
                    _move(path, done, digest)
                continue
            seen.add(digest)  # two names, one content in the same pull: read it once

            def succeeded(path: Path = path, digest: str = digest) -> None:
                state.record_file(digest, str(path), "ingested", None)
                if self.settings.after == "move":
                    _move(path, done, digest)

            def unreadable(reason: str, path: Path = path, digest: str = digest) -> None:
                state.record_file(digest, str(path), "unreadable", reason)
                if self.settings.after == "move":
                    _move(path, failed, digest)

            yield Batch(
                label=str(path),
                chunks=read_chunks(path, self.chunk_rows),
                digest=digest,
                succeeded=succeeded,
                failed=unreadable,
            )
