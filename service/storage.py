"""Artifact store: uploaded datasets and model files, local or behind an fsspec URL.

By default the store is a folder (GROVEKEEPER_HOME); GROVEKEEPER_ARTIFACTS may name any
fsspec URL (``file:///mnt/shared/gk``, ``s3://bucket/gk`` with s3fs installed, ...) so that
workers on other machines read the same files.

Keys are generated ids (``datasets/ds_….parquet``), never user-supplied names, so
nothing a client sends reaches the file system. Writes are atomic where the file system
allows it: a local (or mounted) folder gets a temporary file, fsync and ``os.replace``;
on other fsspec file systems the bytes are uploaded under a temporary key and moved into
place. Object stores have no rename (fsspec's move is copy + delete) but make each
single upload visible all at once, so a reader never sees half an object either way.
Reads of a remote artifact go through a local cache folder; every read that knows the
recorded sha256 checks it, so a corrupt or truncated copy is refused, not used.
"""

from __future__ import annotations

import hashlib
import os
import secrets
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import fsspec
from fsspec.implementations.local import LocalFileSystem

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


def _check_key(key: str) -> str:
    if key.startswith("/") or ".." in Path(key).parts or "://" in key:
        raise ValueError(f"bad artifact key {key!r}")
    return key


class ArtifactStore:
    """Files under one root; every process that reaches the root shares the store."""

    def __init__(self, root: str | Path, tmp_dir: Path, cache_dir: Path | None = None) -> None:
        self.url = str(root)
        self.fs, base = fsspec.core.url_to_fs(self.url)
        self.is_local = isinstance(self.fs, LocalFileSystem)
        self.base = base.rstrip("/")
        self.root = Path(base)  # meaningful for local stores only
        self.tmp_dir = tmp_dir
        self.cache_dir = cache_dir or tmp_dir.parent / "cache"

    def path(self, key: str) -> Path:
        """The local file of ``key``; only for a local store (use local_path to read)."""
        if not self.is_local:
            raise ValueError(f"artifact store {self.url!r} is not a local folder")
        return self.root / _check_key(key)

    def _remote(self, key: str) -> str:
        return f"{self.base}/{_check_key(key)}"

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
        """Move a finished temporary file into place atomically (see the module notes)."""
        if not self.is_local:
            target = self._remote(key)
            staged = f"{target}.tmp-{secrets.token_hex(6)}"
            self.fs.makedirs(target.rsplit("/", 1)[0], exist_ok=True)
            self.fs.put_file(str(tmp), staged)
            try:
                self.fs.mv(staged, target)
            except BaseException:
                if self.fs.exists(staged):
                    self.fs.rm(staged)
                raise
            return
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
        """A local file holding ``key``'s bytes, checked against ``expected_sha256``."""
        path = self.path(key) if self.is_local else self._fetch(key, expected_sha256)
        if not path.exists():
            raise ArtifactMissing(key)
        if expected_sha256 is not None and sha256_file(path) != expected_sha256:
            raise ArtifactCorrupt(f"{key}: sha256 does not match the recorded value")
        return path

    def _fetch(self, key: str, expected_sha256: str | None) -> Path:
        # Keys are never rewritten (new ids for new files), so a cached copy whose hash
        # matches is the artifact; one that does not is fetched again.
        cached = self.cache_dir / _check_key(key)
        if cached.exists() and (expected_sha256 is None
                                or sha256_file(cached) == expected_sha256):
            return cached
        remote = self._remote(key)
        if not self.fs.exists(remote):
            raise ArtifactMissing(key)
        cached.parent.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(dir=cached.parent, suffix=".part")
        os.close(fd)
        try:
            self.fs.get_file(remote, name)
            os.replace(name, cached)
        finally:
            Path(name).unlink(missing_ok=True)
        return cached

    def delete(self, key: str) -> None:
        if self.is_local:
            self.path(key).unlink(missing_ok=True)
            return
        (self.cache_dir / _check_key(key)).unlink(missing_ok=True)
        if self.fs.exists(self._remote(key)):
            self.fs.rm(self._remote(key))

    def exists(self, key: str) -> bool:
        return self.path(key).exists() if self.is_local else bool(
            self.fs.exists(self._remote(key)))


# The foundation's name; a store built from a plain folder is exactly that.
LocalStore = ArtifactStore
