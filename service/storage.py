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

import errno
import hashlib
import logging
import os
import secrets
import shutil
import socket
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import fsspec
from fsspec.implementations.local import LocalFileSystem

CHUNK = 1 << 20
log = logging.getLogger("grovekeeper.storage")
# Temporary files carry the writing process's id and a tag of its machine, so a sweep can
# tell a live writer's file from one left by a crash (``sweep_temp``); files written by
# another machine sharing the folder are never this machine's to judge.
_HOST_TAG = hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]
_TEMP_PREFIX = "gk-{pid}-" + _HOST_TAG + "-"


def is_disk_full(exc: BaseException | None) -> bool:
    """Whether ``exc`` (or what caused it) is a full disk or an exhausted quota."""
    seen = 0
    while exc is not None and seen < 8:
        if isinstance(exc, OSError) and (exc.errno in (errno.ENOSPC, errno.EDQUOT)
                                         or "No space left on device" in str(exc)):
            return True
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return False


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
        # A local store keeps its temporary files on its own file system, so the final
        # os.replace is a rename there (never a copy across mounts).
        self.tmp_dir = self.root / "tmp" if self.is_local else tmp_dir
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
        fd, name = tempfile.mkstemp(dir=self.tmp_dir, suffix=suffix,
                                    prefix=_TEMP_PREFIX.format(pid=os.getpid()))
        os.close(fd)
        tmp = Path(name)
        try:
            yield tmp
        finally:
            tmp.unlink(missing_ok=True)

    def put(self, tmp: Path, key: str) -> None:
        """Move a finished temporary file into place atomically (see the module notes)."""
        if not self.is_local:
            remote = self._remote(key)
            staged = f"{remote}.tmp-{secrets.token_hex(6)}"
            self.fs.makedirs(remote.rsplit("/", 1)[0], exist_ok=True)
            self.fs.put_file(str(tmp), staged)
            try:
                self.fs.mv(staged, remote)
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

    def sweep_temp(self) -> list[Path]:
        """Delete temporary files whose writer is gone (a crash mid-upload or mid-save),
        including the model writer's own ``.gk-….tmp`` beside them. A file of a process
        still running on this machine is left alone."""
        if not self.is_local or not self.tmp_dir.exists():
            return []
        swept = []
        for path in [*self.tmp_dir.glob("gk-*"), *self.tmp_dir.glob(".gk-*")]:
            if path.is_file() and not _writer_alive(path):
                path.unlink(missing_ok=True)
                swept.append(path)
        if swept:
            log.warning("removed %d temporary file(s) left by a crash", len(swept))
        return swept

    def exists(self, key: str) -> bool:
        return self.path(key).exists() if self.is_local else bool(
            self.fs.exists(self._remote(key)))


def _writer_alive(path: Path) -> bool:
    parts = path.name.lstrip(".").split("-")
    if parts[0] == "gk" and len(parts) > 3 and parts[1].isdigit():
        if parts[2] != _HOST_TAG:
            return True  # another machine's file: assume its writer lives
        pid = int(parts[1])
        if pid == os.getpid():
            return True
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            return True
        return True
    return False


# The foundation's name; a store built from a plain folder is exactly that.
LocalStore = ArtifactStore
