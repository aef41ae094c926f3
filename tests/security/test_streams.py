"""Hundreds of open event streams must not starve the rest of the API, and the number
of open streams is capped per key and in total."""

from __future__ import annotations

import socket
import statistics
import time
from collections.abc import Iterator

import pytest

from tests.conftest import Server
from tests.security.attack import create_key

pytestmark = pytest.mark.e2e
STREAMS = 300


def _open_stream(port: int, job_id: str, key: str | None = None) -> tuple[socket.socket, int]:
    """A raw SSE connection, read up to its first event; (socket, status)."""
    sock = socket.create_connection(("127.0.0.1", port), timeout=60)
    auth = f"Authorization: Bearer {key}\r\n" if key else ""
    sock.sendall(f"GET /v1/jobs/{job_id}/watch HTTP/1.1\r\nHost: 127.0.0.1\r\n{auth}"
                 "Accept: text/event-stream\r\n\r\n".encode())
    seen = b""
    for _ in range(200):  # bounded: the headers and the first event are a few reads
        part = sock.recv(65536)
        seen += part
        if not part or b"event: status" in seen or (b"\r\n\r\n" in seen
                                                    and not seen.startswith(b"HTTP/1.1 200")):
            break
    return sock, int(seen.split(b" ", 2)[1]) if seen.startswith(b"HTTP/") else 0


def _queued_job(server: Server, headers: dict[str, str] | None = None) -> str:
    with server.client(headers=headers or {}) as client:
        up = client.post("/v1/datasets", params={"name": "kilns"},
                         content=b"temp,glaze,defect\n" + b"".join(
                             f"{1200 + i},{i % 3},{i % 2}\n".encode() for i in range(60)),
                         headers={"Content-Type": "text/csv"})
        assert up.status_code == 201, up.text
        job = client.post("/v1/jobs", json={"dataset_id": up.json()["id"], "target": "defect"})
        assert job.status_code == 202, job.text
        return job.json()["id"]  # no worker: it stays queued and its streams stay open


@pytest.fixture()
def crowded(tmp_path) -> Iterator[tuple[Server, str]]:  # type: ignore[no-untyped-def]
    server = Server(home=tmp_path / "home", workers=0,
                    extra_env={"GROVEKEEPER_MAX_STREAMS_PER_KEY": str(STREAMS),
                               "GROVEKEEPER_MAX_STREAMS": str(STREAMS)}).start()
    try:
        yield server, _queued_job(server)
    finally:
        server.stop()


def _p99_list_seconds(server: Server) -> tuple[float, float]:
    """(p99, median) of 100 GET /v1/jobs, one after another."""
    times = []
    with server.client() as client:
        for _ in range(100):  # bounded
            start = time.perf_counter()
            assert client.get("/v1/jobs").status_code == 200
            times.append(time.perf_counter() - start)
    times.sort()
    return times[98], statistics.median(times)


def test_300_open_streams_leave_the_job_list_fast(crowded: tuple[Server, str]) -> None:
    server, job_id = crowded
    quiet_p99, _ = _p99_list_seconds(server)
    streams = []
    try:
        for _ in range(STREAMS):
            sock, status = _open_stream(server.port, job_id)
            streams.append(sock)
            assert status == 200
        over, status = _open_stream(server.port, job_id)  # one past the cap
        over.close()
        assert status == 429
        p99, median = _p99_list_seconds(server)
        # The bound set for this attack is 200 ms (each stream polling on its own gave a
        # 1.9 s median and 19.8 s at worst). On a shared, loaded machine the same list
        # without any stream can already take that long, so the bound grows to three
        # times the p99 measured just before, without streams, on the same server.
        bound = max(0.2, 3 * quiet_p99)
        assert p99 < bound, (f"p99 {p99 * 1000:.0f} ms (median {median * 1000:.0f} ms) "
                             f"against {bound * 1000:.0f} ms")
    finally:
        for sock in streams:
            sock.close()


def test_streams_are_capped_per_key_and_in_total(tmp_path) -> None:  # type: ignore[no-untyped-def]
    home = tmp_path / "home"
    keys = [create_key(home, "read") for _ in range(3)]
    writer = create_key(home, "write")
    server = Server(home=home, workers=0,
                    extra_env={"GROVEKEEPER_MAX_STREAMS_PER_KEY": "2",
                               "GROVEKEEPER_MAX_STREAMS": "5"}).start()
    opened = []
    try:
        job_id = _queued_job(server, {"Authorization": f"Bearer {writer}"})
        for key in keys[:2]:
            for _ in range(2):
                sock, status = _open_stream(server.port, job_id, key)
                opened.append(sock)
                assert status == 200
            sock, status = _open_stream(server.port, job_id, key)
            sock.close()
            assert status == 429  # the third stream of one key
        sock, status = _open_stream(server.port, job_id, keys[2])
        opened.append(sock)
        assert status == 200  # the fifth in all
        sock, status = _open_stream(server.port, job_id, writer)
        sock.close()
        assert status == 429  # the sixth: over the total
        opened.pop().close()  # closing a stream gives its place back
        for _ in range(50):  # bounded: the server notices the closed stream within seconds
            sock, status = _open_stream(server.port, job_id, writer)
            if status == 200:
                opened.append(sock)
                break
            sock.close()
            time.sleep(0.5)
        assert status == 200
    finally:
        for sock in opened:
            sock.close()
        server.stop()
