"""Trials per minute on one job with 1 and with 2 worker processes (``max_workers``).

    python -m benchmarks.scaling            # SQLite and PostgreSQL, 3,000 rows, 60 trials
    python -m benchmarks.scaling --quick    # 1,000 rows, 12 trials

Each run gets a fresh database and home. The workers are started (and have imported
LightGBM) before the job is queued; the rate is finished trials over the time from the
job's claim to its last finished trial, so process start-up and the final refit are not
counted. Target on 2 cores: 2 workers reach >= 1.6x the rate of 1. The ratio is what to
read: other work on the machine moves the absolute numbers.

The job fixes the learning rate and the tree size and prunes nothing, so every trial
costs about the same: in a full search a trial costs from 0.05 s to 3 s by the
configuration drawn, and which ones a run happens to draw moved trials per minute more
than the number of workers did.

The CPU seconds the workers used during the job are printed too: ``cpu/wall`` near the
number of workers means they ran in parallel, and trials per CPU-minute that stays flat
from 1 to 2 workers means sharing a study costs no extra work. On a busy machine with
Linux's autogroup scheduling (``/proc/sys/kernel/sched_autogroup_enabled``) all processes
of one session share one CPU share, so a second worker started in the same session gains
little; ``--sessions`` starts each worker in a session of its own, as separate machines or
containers would be.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import secrets
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import sqlalchemy as sa

from examples.demo_data import kilns
from service import repository
from service.api.schemas import JobCreate, as_utc
from service.db import dispose_engines, init_db, session_scope
from service.jobspec import build_run
from service.settings import Settings
from service.storage import ArtifactStore, sha256_file
from service.tables import Job, Trial

ROOT = Path(__file__).resolve().parents[1]


@contextlib.contextmanager
def database(kind: str, folder: Path, pg_admin: str) -> Iterator[str]:
    if kind == "sqlite":
        yield f"sqlite:///{folder / 'grovekeeper.db'}"
        return
    import psycopg

    admin = psycopg.connect(pg_admin, autocommit=True, connect_timeout=3)
    name = f"gk_bench_{secrets.token_hex(4)}"
    admin.execute(f'CREATE DATABASE "{name}"')
    try:
        yield f"postgresql+psycopg://{pg_admin.split('://', 1)[1].rsplit('/', 1)[0]}/{name}"
    finally:
        dispose_engines()
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.close()


def queue_job(url: str, home: Path, frame: pd.DataFrame, trials: int, workers: int) -> str:
    settings = Settings(home=home, database_url=url)
    settings.ensure_dirs()
    init_db(url)
    store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    dataset_id, job_id = repository.new_id("ds"), repository.new_id("job")
    key = f"datasets/{dataset_id}.parquet"
    with store.temp_path(".parquet") as tmp:
        frame.to_parquet(tmp, index=False)
        sha = sha256_file(tmp)
        store.put(tmp, key)
    request = JobCreate(dataset_id=dataset_id, target="defect", exclude=["firing_id"],
                        budget={"trials": trials}, max_workers=workers, pruner="none",
                        search_space={"learning_rate": 0.1, "num_leaves": 31},
                        ).model_dump(mode="json")
    run = build_run(request, frame)
    with session_scope(url) as session:
        repository.add_dataset(session, id=dataset_id, name="kilns", rows=len(frame),
                               n_columns=frame.shape[1], size_bytes=1, sha256=sha,
                               source_format="parquet", columns=[], warnings=[],
                               file_key=key, file_sha256=sha)
        repository.add_job(session, id=job_id, dataset_id=dataset_id, max_workers=workers,
                           spec={"request": request, "effective": run.effective},
                           study_name=f"grovekeeper-{job_id}", warnings=[])
    return job_id


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def start_workers(n: int, home: Path, url: str,
                  sessions: bool = False) -> list[subprocess.Popen[bytes]]:
    env = dict(os.environ, PYTHONPATH=str(ROOT), GROVEKEEPER_HOME=str(home),
               GROVEKEEPER_DATABASE_URL=url, OMP_WAIT_POLICY="passive",
               GROVEKEEPER_POLL_SECONDS="0.2", GROVEKEEPER_HEARTBEAT_SECONDS="1")
    procs = []
    for i in range(n):
        log = open(home / f"worker-{i}.log", "ab")  # noqa: SIM115 - closed right below
        procs.append(subprocess.Popen([sys.executable, "-m", "service", "worker"], env=env,
                                      stdout=log, stderr=subprocess.STDOUT, cwd=ROOT,
                                      start_new_session=sessions))
        log.close()
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:  # wait until each has imported and started polling
        if all("started on" in (home / f"worker-{i}.log").read_text() for i in range(n)):
            return procs
        time.sleep(0.2)
    raise RuntimeError("workers did not start")


def one_run(kind: str, n_workers: int, frame: pd.DataFrame, trials: int,
            pg_admin: str, sessions: bool) -> tuple[float, int, int, float, float]:
    """Returns (trials/min, finished trials, contributors, worker CPU s, wall s)."""
    with tempfile.TemporaryDirectory() as folder:
        home = Path(folder) / "home"
        home.mkdir()
        with database(kind, Path(folder), pg_admin) as url:
            init_db(url)
            procs = start_workers(n_workers, home, url, sessions)
            try:
                cpu0 = sum(cpu_seconds(p.pid) for p in procs)
                job_id = queue_job(url, home, frame, trials, n_workers)
                while True:
                    with session_scope(url) as session:
                        job = session.get(Job, job_id)
                        status, started = job.status, job.started_at
                    if status in ("succeeded", "failed", "cancelled"):
                        break
                    time.sleep(0.5)
                if status != "succeeded":
                    raise RuntimeError(f"job {status}")
                cpu = sum(cpu_seconds(p.pid) for p in procs) - cpu0  # includes the refit
                with session_scope(url) as session:
                    rows = session.execute(
                        sa.select(Trial.finished_at, Trial.worker_id)
                        .where(Trial.job_id == job_id,
                               Trial.state.in_(("complete", "pruned")))).all()
            finally:
                for proc in procs:
                    proc.terminate()
                for proc in procs:
                    proc.wait(timeout=60)
                dispose_engines()
    span = (max(as_utc(r[0]) for r in rows) - as_utc(started)).total_seconds()
    return len(rows) / span * 60, len(rows), len({r[1] for r in rows}), cpu, span


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--pg", default="postgresql://127.0.0.1:5432/test",
                        help="an existing PostgreSQL database to create throw-away ones from")
    parser.add_argument("--backends", default="sqlite,postgres")
    parser.add_argument("--sessions", action="store_true",
                        help="start each worker in its own session (own autogroup)")
    args = parser.parse_args(argv)
    rows, trials = (1000, 12) if args.quick else (3000, 60)
    frame = kilns(n_rows=rows, seed=11)
    print(f"one job, {trials} trials, {rows} rows, 5-fold CV; {os.cpu_count()} cores "
          f"(load average {os.getloadavg()[0]:.2f} at start)")
    print(f"{'backend':10} {'workers':>7} {'trials':>6} {'contrib':>7} {'trials/min':>10} "
          f"{'cpu/wall':>8} {'trials/cpu-min':>14}")
    ratios = {}
    for kind in args.backends.split(","):
        rates = {}
        for n in (1, 2):
            rate, done, contrib, cpu, wall = one_run(kind, n, frame, trials, args.pg,
                                                     args.sessions)
            rates[n] = rate
            print(f"{kind:10} {n:>7} {done:>6} {contrib:>7} {rate:>10.1f} {cpu / wall:>8.2f} "
                  f"{done / cpu * 60:>14.1f}", flush=True)
        ratios[kind] = rates[2] / rates[1]
    for kind, ratio in ratios.items():
        print(f"{kind}: 2 workers / 1 worker = {ratio:.2f}x (target >= 1.6x on 2 cores)")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
