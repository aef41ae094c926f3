"""Faults made real: a PostgreSQL restart, a network partition in a namespace, a full disk.

Each helper cleans up after itself (the server is running again, the namespace and its
links are gone, the small file system is unmounted) even when the test fails.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import shutil
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from tests.conftest import PG_ADMIN_URL, _pg_connect


@contextlib.contextmanager
def restartable_database() -> Iterator[str]:
    """A throw-away PostgreSQL database whose admin connection is opened anew to drop it
    (a restart in between closes every session)."""
    name = f"gk_test_{secrets.token_hex(4)}"
    with _pg_connect() as admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    base = PG_ADMIN_URL.split("://", 1)[1].rsplit("/", 1)[0]
    try:
        yield f"postgresql+psycopg://{base}/{name}"
    finally:
        from service import db

        db.dispose_engines()
        ensure_postgres_up()
        with _pg_connect() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def pg_cluster() -> tuple[str, str]:
    """(version, name) of the local PostgreSQL cluster on port 5432."""
    out = subprocess.run(["pg_lsclusters", "--no-header"], capture_output=True, text=True,
                         check=True).stdout
    for line in out.splitlines():
        parts = line.split()
        if len(parts) >= 3 and parts[2] == "5432":
            return parts[0], parts[1]
    raise RuntimeError(f"no PostgreSQL cluster on port 5432:\n{out}")


def can_restart_postgres() -> bool:
    return os.geteuid() == 0 and shutil.which("pg_ctlcluster") is not None


def wait_for_postgres(timeout: float = 60) -> None:
    deadline = time.monotonic() + timeout
    while True:
        try:
            _pg_connect().close()
            return
        except Exception:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)


def restart_postgres() -> None:
    """``pg_ctlcluster restart`` (fast shutdown: open sessions are terminated)."""
    version, name = pg_cluster()
    subprocess.run(["pg_ctlcluster", "--skip-systemctl-redirect", "-m", "fast", version, name,
                    "restart"], check=True, capture_output=True, timeout=120)
    wait_for_postgres()


def ensure_postgres_up() -> None:
    version, name = pg_cluster()
    try:
        wait_for_postgres(timeout=5)
    except Exception:  # noqa: BLE001 - start it again, whatever stopped it
        subprocess.run(["pg_ctlcluster", "--skip-systemctl-redirect", version, name, "start"],
                       capture_output=True, timeout=120)
        wait_for_postgres()


def worker_pids(serve_pid: int) -> list[int]:
    """The ``grovekeeper worker`` children of a ``serve`` process."""
    pids = []
    for proc in Path("/proc").iterdir():
        if not proc.name.isdigit():
            continue
        try:
            ppid = int((proc / "stat").read_text().rsplit(")", 1)[1].split()[1])
            argv = (proc / "cmdline").read_bytes().split(b"\0")
        except (OSError, IndexError, ValueError):
            continue  # gone meanwhile
        if ppid == serve_pid and b"worker" in argv:
            pids.append(int(proc.name))
    return sorted(pids)


@contextlib.contextmanager
def tmpfs(path: Path, size: str) -> Iterator[Path]:
    """A small tmpfs mounted at ``path`` (root only), unmounted afterwards."""
    path.mkdir(parents=True, exist_ok=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                   check=True, capture_output=True)
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


def can_make_namespaces() -> bool:
    return os.geteuid() == 0 and shutil.which("ip") is not None


def _ip(*args: str) -> None:
    subprocess.run(["ip", *args], check=True, capture_output=True)


@dataclass
class Partitionable:
    """A network namespace joined to this one by a veth pair on addresses made for it."""

    name: str
    host_link: str
    host_address: str
    inner_address: str

    def cut(self) -> None:
        _ip("link", "set", self.host_link, "down")

    def heal(self) -> None:
        _ip("link", "set", self.host_link, "up")

    def command(self, argv: list[str]) -> list[str]:
        return ["ip", "netns", "exec", self.name, *argv]


@contextlib.contextmanager
def namespace() -> Iterator[Partitionable]:
    """``ip netns add`` + a veth pair on 169.254.X.1/.2 (/30, link-local: never routed
    beyond this machine); everything is deleted afterwards."""
    tag = secrets.token_hex(3)
    name, host_link, inner_link = f"gkp{tag}", f"gkh{tag}", f"gki{tag}"
    octet = 1 + int(tag, 16) % 250
    host_address, inner_address = f"169.254.{octet}.1", f"169.254.{octet}.2"
    _ip("netns", "add", name)
    try:
        _ip("link", "add", host_link, "type", "veth", "peer", "name", inner_link)
        _ip("link", "set", inner_link, "netns", name)
        _ip("addr", "add", f"{host_address}/30", "dev", host_link)
        _ip("link", "set", host_link, "up")
        _ip("netns", "exec", name, "ip", "addr", "add", f"{inner_address}/30", "dev", inner_link)
        _ip("netns", "exec", name, "ip", "link", "set", inner_link, "up")
        _ip("netns", "exec", name, "ip", "link", "set", "lo", "up")
        yield Partitionable(name, host_link, host_address, inner_address)
    finally:
        subprocess.run(["ip", "link", "del", host_link], capture_output=True)
        subprocess.run(["ip", "netns", "del", name], capture_output=True)


class TcpProxy:
    """Forwards connections on ``listen`` (host, port 0 = any) to ``target``, byte for byte,
    in threads; the partitioned worker reaches PostgreSQL (loopback only) through it."""

    def __init__(self, listen_host: str, target: tuple[str, int]) -> None:
        self.target = target
        self.server = socket.create_server((listen_host, 0))
        self.port = self.server.getsockname()[1]
        self.open: list[socket.socket] = []
        self.closed = threading.Event()
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while not self.closed.is_set():
            try:
                client, _ = self.server.accept()
            except OSError:
                return
            try:
                upstream = socket.create_connection(self.target, timeout=5)
            except OSError:
                client.close()
                continue
            upstream.settimeout(None)
            self.open += [client, upstream]
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(src: socket.socket, dst: socket.socket) -> None:
        try:
            while data := src.recv(65536):
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)

    def close(self) -> None:
        self.closed.set()
        self.server.close()
        for s in self.open:
            with contextlib.suppress(OSError):
                s.close()
