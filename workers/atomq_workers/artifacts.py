"""Files a job attempt writes, under <store>/<job id>/attempt-<n>/.

Each attempt writes its own directory, so a rerun after a crash never interleaves
with the frames of the attempt it replaces; only the winning attempt's files are
recorded (with size and sha256) in the database.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO


@dataclass(frozen=True)
class WrittenArtifact:
    name: str
    media_type: str
    path: str  # relative to the store
    size: int
    sha256: str


class ArtifactWriter:
    def __init__(self, store: Path, job_id: int, attempt: int) -> None:
        self.store = store
        self.relative_dir = Path(str(job_id)) / f"attempt-{attempt}"
        self.directory = store / self.relative_dir
        self._files: dict[str, tuple[str, TextIO]] = {}

    def open(self, name: str, media_type: str) -> TextIO:
        """A text file for appending; callers flush after each record so a crash or cancel
        keeps everything written so far."""
        self.directory.mkdir(parents=True, exist_ok=True)
        handle = (self.directory / name).open("w")
        self._files[name] = (media_type, handle)
        return handle

    def close(self) -> list[WrittenArtifact]:
        """Close every file and describe it (size, sha256)."""
        written = []
        for name, (media_type, handle) in self._files.items():
            handle.close()
            path = self.directory / name
            written.append(
                WrittenArtifact(
                    name=name,
                    media_type=media_type,
                    path=str(self.relative_dir / name),
                    size=path.stat().st_size,
                    sha256=sha256_of(path),
                )
            )
        self._files.clear()
        return written


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
