"""Artifact store: uploaded datasets and model files under GROVEKEEPER_HOME.

Keys are generated ids (``datasets/ds_….parquet``), never user-supplied names, so
nothing a client sends reaches the file system. Writes go to a temporary file
first and are renamed into place, so a crash never leaves a half-written artifact.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

CHUNK = 1 << 20


class ArtifactMissing(FileNotFoundError):
    pass


class ArtifactCorrupt(OSError):
    pass


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(CHUNK):
            digest.update(block)
    return digest.hexdigest()


class LocalStore:
    """Files in one folder; every process that shares the folder shares the store."""

    def __init__(self, root: Path, tmp_dir: Path) -> None:
        self.root = root
        self.tmp_dir = tmp_dir

    def path(self, key: str) -> Path:
        if key.startswith("/") or ".." in Path(key).parts:
            raise ValueError(f"bad artifact key {key!r}")
        return self.root / key

    @contextmanager
    def temp_path(self, suffix: str = "") -> Iterator[Path]:
        """A temporary file on the store's file system, removed unless moved away."""
        self.tmp_dir.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(dir=self.tmp_dir, suffix=suffix)
        os.close(fd)
        tmp = Path(name)
        try:
            yield tmp
        finally:
            tmp.unlink(missing_ok=True)

    def put(self, tmp: Path, key: str) -> None:
        """Move a finished temporary file into place atomically."""
        target = self.path(key)
        target.parent.mkdir(parents=True, exist_ok=True)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)

    def put_bytes(self, data: bytes, key: str) -> None:
        with self.temp_path() as tmp:
            tmp.write_bytes(data)
            self.put(tmp, key)

    def copy_in(self, source: Path, key: str) -> None:
        with self.temp_path() as tmp:
            shutil.copyfile(source, tmp)
            self.put(tmp, key)

    def local_path(self, key: str, expected_sha256: str | None = None) -> Path:
        path = self.path(key)
        if not path.exists():
            raise ArtifactMissing(key)
        if expected_sha256 is not None and sha256_file(path) != expected_sha256:
            raise ArtifactCorrupt(f"{key}: sha256 does not match the recorded value")
        return path

    def delete(self, key: str) -> None:
        self.path(key).unlink(missing_ok=True)

    def exists(self, key: str) -> bool:
        return self.path(key).exists()
