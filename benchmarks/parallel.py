"""Parallel trials: trials per minute of one job, two trials at once vs one at a time.

One live server and one worker (``OMP_WAIT_POLICY=passive``, as ``serve`` sets it). The
same job runs with ``max_parallel_trials=2`` (two trials in threads, one LightGBM thread
each) and with ``max_parallel_trials=1, num_threads=2`` (one trial, both cores inside
LightGBM), alternating, several times; the rate is finished trials over the time from the
job's claim to its last finished trial, so the final refit is not counted. No pruning and
a fixed learning rate, so that trials cost about the same whichever order TPE samples them
in; the ratio of medians is what to read.

Small table (many short trials): target >= 1.3x. Large table: reported, no target.
"""

from __future__ import annotations

import os
import statistics
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import pandas as pd
import sqlalchemy as sa

from benchmarks._common import Row, live_server, part_main, upload_and_tune, worker_process
from benchmarks.data import wide_table
from examples.demo_data import kilns
from service.api.schemas import as_utc
from service.db import dispose_engines, session_scope
from service.tables import Trial

TWO_AT_ONCE: dict[str, Any] = {"max_parallel_trials": 2}
ONE_WITH_TWO_THREADS: dict[str, Any] = {"max_parallel_trials": 1, "num_threads": 2}
COMMON: dict[str, Any] = {"pruner": "none", "search_space": {"learning_rate": 0.1}}


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


@contextmanager
def _service(tmp: str) -> Iterator[tuple[httpx.Client, int, str]]:
    home = Path(tmp) / "home"
    with live_server(home) as server, httpx.Client(base_url=server.base,
                                                   timeout=1800) as client:
        with worker_process(home) as worker:
            yield client, worker.pid, f"sqlite:///{home / 'grovekeeper.db'}"


def _rate(client: httpx.Client, worker_pid: int, url: str, csv: bytes, target: str,
          trials: int, seed: int, settings: dict[str, Any], exclude: list[str]) -> tuple[float,
                                                                                    float]:
    """(trials per minute, worker CPU seconds per wall second) of one job."""
    cpu0, start = cpu_seconds(worker_pid), time.perf_counter()
    job = upload_and_tune(client, csv, target, trials=trials, seed=seed, exclude=exclude,
                          **COMMON, **settings)
    # Over the whole request (upload, claim, refit too): a rough share of cores in use.
    cpu = (cpu_seconds(worker_pid) - cpu0) / (time.perf_counter() - start)
    with session_scope(url) as session:
        done = session.execute(sa.select(Trial.finished_at).where(
            Trial.job_id == job["id"], Trial.state.in_(("complete", "pruned")))).scalars().all()
    span = (max(as_utc(t) for t in done) - as_utc(pd.Timestamp(job["started_at"]))
            ).total_seconds()
    return len(done) / span * 60, cpu


def _compare(name: str, frame: pd.DataFrame, target: str, trials: int, repeats: int,
             target_ratio: float, exclude: list[str], note: str = "",
             informational: bool = False) -> Row:
    csv = frame.to_csv(index=False).encode()
    results: dict[str, list[tuple[float, float]]] = {"two": [], "one": []}
    with tempfile.TemporaryDirectory(prefix="gk-bench-parallel-") as tmp:
        with _service(tmp) as (client, pid, url):
            for seed in range(repeats):  # alternate, so drifting load hits both alike
                results["two"].append(_rate(client, pid, url, csv, target, trials, seed,
                                            TWO_AT_ONCE, exclude))
                results["one"].append(_rate(client, pid, url, csv, target, trials, seed,
                                            ONE_WITH_TWO_THREADS, exclude))
        dispose_engines()
    two = statistics.median(r for r, _ in results["two"])
    one = statistics.median(r for r, _ in results["one"])
    runs = "; ".join(f"{a[0]:.0f} vs {b[0]:.0f} (cpu/wall {a[1]:.2f} vs {b[1]:.2f})"
                     for a, b in zip(results["two"], results["one"], strict=True))
    # Row passes when value/floor <= target: time per trial (1/rate) against the floor's.
    return Row(name, 60 / two, 60 / one, 1 / target_ratio, unit="s/trial",
               informational=informational,
               note=f"{two:.1f} vs {one:.1f} trials/min = {two / one:.2f}x (target >= "
               f"{target_ratio:.2f}x{note}); median of {repeats}, trials/min per run: {runs}")


def run(quick: bool = False) -> list[Row]:
    if quick:
        small = kilns(n_rows=400, seed=5)
        return [_compare("2 parallel trials vs 1 on 2 threads, 400 rows", small, "defect", 4,
                         1, 1.3, ["firing_id"])]
    small = kilns(n_rows=1000, seed=5)
    large = wide_table(50_000, seed=4)
    return [
        _compare("2 parallel trials vs 1 on 2 threads, 1,000 rows", small, "defect", 30, 3,
                 1.3, ["firing_id"]),
        _compare("2 parallel trials vs 1 on 2 threads, 50,000 rows", large, "target", 10, 1,
                 1.0, [], note="; informational", informational=True),
    ]


if __name__ == "__main__":
    part_main(run, __doc__)
