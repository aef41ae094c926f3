"""Tools for attacking a real server on loopback: raw sockets, so that nothing between
the test and the server (a client library's own limits or retries) hides what the
server does, and the server process's memory as the kernel reports it."""

from __future__ import annotations

import select
import socket
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

from tests.conftest import ROOT, child_env

MB = 1 << 20


def vm_hwm_mb(pid: int) -> float:
    """The peak resident set size of ``pid`` so far (VmHWM in /proc/PID/status), in MB."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise AssertionError(f"no VmHWM for pid {pid}")


def create_key(home: Path, scope: str = "admin") -> str:
    done = subprocess.run([sys.executable, "-m", "service", "keys", "create", "--scope", scope],
                          env=child_env(home), cwd=ROOT, capture_output=True, text=True,
                          timeout=60, check=True)
    return done.stdout.strip()


def _status(data: bytes) -> int:
    line = data.split(b"\r\n", 1)[0].split()
    return int(line[1]) if len(line) > 1 and line[1].isdigit() else 0


def send_big_body(port: int, path: str, *, total: int, chunked: bool,
                  headers: dict[str, str] | None = None, prefix: bytes = b"",
                  each_megabyte: Callable[[], None] | None = None) -> tuple[int, int]:
    """POST ``prefix`` then ``total`` bytes to ``path`` in 1 MB pieces, stopping as soon as
    the server answers; ``each_megabyte`` runs before every piece. Returns (status, bytes
    sent); status 0 means no answer arrived."""
    sock = socket.create_connection(("127.0.0.1", port), timeout=20)
    fields = {"Host": "127.0.0.1", "Content-Type": "application/json", **(headers or {})}
    lines = ["POST " + path + " HTTP/1.1", *(f"{k}: {v}" for k, v in fields.items())]
    lines.append("Transfer-Encoding: chunked" if chunked
                 else f"Content-Length: {total + len(prefix)}")
    block = b" " * MB  # JSON whitespace: a parser would have to read all of it
    sent, answer = 0, b""
    try:
        sock.sendall(("\r\n".join(lines) + "\r\n\r\n").encode())
        if prefix:
            sock.sendall(b"%x\r\n%s\r\n" % (len(prefix), prefix) if chunked else prefix)
        for _ in range(total // MB):  # bounded: one pass per megabyte
            if each_megabyte is not None:
                each_megabyte()
            if select.select([sock], [], [], 0)[0]:
                break  # the server has answered (or closed): stop sending
            sock.sendall(b"%x\r\n%s\r\n" % (len(block), block) if chunked else block)
            sent += len(block)
        else:
            if chunked:
                sock.sendall(b"0\r\n\r\n")
    except OSError:
        pass  # the server closed the connection while we were still sending
    try:
        for _ in range(100):
            part = sock.recv(65536)
            if not part:
                break
            answer += part
            if b"\r\n\r\n" in answer:
                break
    except OSError:
        pass
    finally:
        sock.close()
    return _status(answer), sent


def bytes_under(*folders: Path) -> int:
    """The total size of the files under ``folders`` right now."""
    total = 0
    for folder in folders:
        for path in folder.rglob("*"):
            try:
                if path.is_file():
                    total += path.stat().st_size
            except FileNotFoundError:
                pass  # removed while we looked
    return total
