"""What every benchmark part shares: result rows, timing, a live server, the table."""

from __future__ import annotations

import argparse
import contextlib
import os
import socket
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

from service.demo import wait_ready

ROOT = Path(__file__).resolve().parents[1]


@dataclass(frozen=True)
class Row:
    """One figure: ``value`` against ``floor``; passes when value/floor <= target."""

    name: str
    value: float
    floor: float
    target: float
    unit: str = "s"
    note: str = ""
    #: Reported for context only: no target of the issue, never fails --strict.
    informational: bool = False

    @property
    def ratio(self) -> float:
        return self.value / self.floor if self.floor > 0 else float("inf")

    @property
    def passed(self) -> bool:
        return self.informational or self.ratio <= self.target

    @property
    def result(self) -> str:
        if self.informational:
            return "info"
        return "pass" if self.passed else "FAIL"


def median_time(fn: Callable[[], object], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class LiveServer:
    base: str
    proc: subprocess.Popen[bytes]

    def peak_rss_bytes(self) -> int:
        """The server process's high-water resident memory (Linux /proc VmHWM)."""
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
        return 0

    def rss_bytes(self) -> int:
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        return 0


@contextmanager
def live_server(home: Path, *, workers: int | None = 0, bench_routes: bool = False,
                env: dict[str, str] | None = None,
                log: Path | None = None) -> Iterator[LiveServer]:
    """``grovekeeper serve`` (or the benchmark server with its echo route) on loopback.

    ``log``: a file that receives the server's and its workers' log lines (default:
    discarded).
    """
    port = free_port()
    child = _child_env(home, **(env or {}))
    if bench_routes:
        cmd = [sys.executable, "-m", "benchmarks._server", str(port)]
    else:
        # workers=None: serve's own default (what suits the machine)
        cmd = [sys.executable, "-m", "service", "serve", "--port", str(port),
               *([] if workers is None else ["--workers", str(workers)])]
    with open(log, "ab") if log is not None else contextlib.nullcontext() as sink:
        proc = subprocess.Popen(cmd, env=child, cwd=ROOT, stdout=subprocess.DEVNULL,
                                stderr=sink if sink is not None else subprocess.DEVNULL)
    base = f"http://127.0.0.1:{port}"
    try:
        wait_ready(base, proc)
    except RuntimeError:
        proc.kill()
        raise
    try:
        yield LiveServer(base=base, proc=proc)
    finally:
        _stop(proc)


def _stop(proc: subprocess.Popen[bytes]) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=60)
    except subprocess.TimeoutExpired:
        proc.kill()


def _child_env(home: Path, **extra: str) -> dict[str, str]:
    child = dict(os.environ)
    child.update({"PYTHONPATH": str(ROOT), "GROVEKEEPER_HOME": str(home),
                  "OMP_WAIT_POLICY": "passive", **extra})
    child.pop("GROVEKEEPER_DATABASE_URL", None)
    return child


def part_main(run: Callable[[bool], list[Row]], doc: str | None) -> None:
    """The command line of one benchmark part: ``--quick`` for a small smoke run."""
    parser = argparse.ArgumentParser(description=doc)
    parser.add_argument("--quick", action="store_true", help="small smoke run")
    print_table(run(parser.parse_args().quick))


def print_table(rows: list[Row], out: Callable[[str], None] = print) -> None:
    header = ("figure", "value", "floor", "ratio", "target", "result")
    cells = [
        (r.name, f"{r.value:.4g} {r.unit}", f"{r.floor:.4g} {r.unit}", f"{r.ratio:.2f}x",
         f"<= {r.target:.2f}x", r.result)
        for r in rows
    ]
    widths = [max(len(h), *(len(c[i]) for c in cells)) if cells else len(h)
              for i, h in enumerate(header)]
    out("  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True)))
    out("  ".join("-" * w for w in widths))
    for c in cells:
        out("  ".join(v.ljust(w) for v, w in zip(c, widths, strict=True)))
    for r in rows:
        if r.note:
            out(f"  {r.name}: {r.note}")


@contextmanager
def worker_process(home: Path) -> Iterator[subprocess.Popen[bytes]]:
    """One ``grovekeeper worker`` on the same home as a live server."""
    child = _child_env(home, GROVEKEEPER_POLL_SECONDS="0.2")
    proc = subprocess.Popen([sys.executable, "-m", "service", "worker"], env=child, cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        yield proc
    finally:
        _stop(proc)


def upload_and_tune(client: httpx.Client, csv_bytes: bytes, target: str, trials: int,
                    **job: object) -> dict:
    """Upload a table, run a job to the end, return the finished job."""
    dataset = client.post("/v1/datasets", params={"name": "bench"}, content=csv_bytes,
                          headers={"Content-Type": "text/csv"})
    dataset.raise_for_status()
    response = client.post("/v1/jobs", json={"dataset_id": dataset.json()["id"],
                                             "target": target, "budget": {"trials": trials},
                                             **job})
    response.raise_for_status()
    job_id = response.json()["id"]
    while True:
        current = client.get(f"/v1/jobs/{job_id}").json()
        if current["status"] in ("succeeded", "failed", "cancelled"):
            if current["status"] != "succeeded":
                raise RuntimeError(f"benchmark job {current['status']}: {current['error']}")
            return current
        time.sleep(0.2)


def all_items(client: httpx.Client, path: str, **params: object) -> list[dict]:
    """Every item of a list, walking its pages by their ``next`` cursor."""
    items: list[dict] = []
    query: dict[str, object] = {**params, "limit": 1000}
    while True:
        page = client.get(path, params=query)
        page.raise_for_status()
        body = page.json()
        items.extend(body["items"])
        if body["next"] is None:
            return items
        query["cursor"] = body["next"]
