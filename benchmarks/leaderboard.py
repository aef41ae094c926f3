"""The leaderboard of a job with 5,000 finished trials vs one SQL query of their scores."""

from __future__ import annotations

import random
import sqlite3
import tempfile
from pathlib import Path

import httpx

from benchmarks._common import Row, live_server, median_time, part_main
from service import repository
from service.db import dispose_engines, init_db, session_scope
from service.tables import Trial


def _fill(url: str, job_id: str, n: int) -> None:
    rng = random.Random(0)
    with session_scope(url) as session:
        repository.add_job(session, id=job_id, dataset_id="ds_bench", study_name="bench",
                           status="succeeded", spec={"request": {}, "effective": {
                               "target": "y", "task": "binary", "metric": "roc_auc",
                               "direction": "maximize", "budget": {"trials": n}}})
        session.add_all(
            Trial(job_id=job_id, number=i, state="complete" if i % 7 else "pruned",
                  params={"learning_rate": rng.random(), "num_leaves": rng.randint(8, 256),
                          "min_data_in_leaf": rng.randint(5, 100)},
                  score=rng.random(), score_std=rng.random() / 10,
                  fold_scores=[rng.random() for _ in range(5)],
                  best_iterations=[rng.randint(1, 999) for _ in range(5)],
                  boosting_rounds=rng.randint(1, 999), duration_seconds=rng.random(),
                  train_seconds=rng.random())
            for i in range(n)
        )


def run(quick: bool = False) -> list[Row]:
    n = 500 if quick else 5000
    repeat = 5 if quick else 25
    with tempfile.TemporaryDirectory(prefix="gk-bench-board-") as tmp:
        home = Path(tmp) / "home"
        home.mkdir()
        db_path = home / "grovekeeper.db"
        url = f"sqlite:///{db_path}"
        init_db(url)
        _fill(url, "job_bench", n)
        dispose_engines()
        with live_server(home) as server, httpx.Client(base_url=server.base) as client:
            def board() -> None:
                client.get("/v1/jobs/job_bench/leaderboard", params={"limit": 20}
                           ).raise_for_status()

            board()
            served = median_time(board, repeat)
        conn = sqlite3.connect(db_path)

        def query() -> None:
            conn.execute("SELECT score FROM gk_trials WHERE job_id = ?", ("job_bench",)
                         ).fetchall()

        query()
        floor = median_time(query, repeat)
        conn.close()
    ms = 1000.0
    return [Row(f"leaderboard of {n:,} trials, limit 20", served * ms, floor * ms, 3.0,
                unit="ms", note=f"floor = one SQL query reading the {n:,} trial scores")]


if __name__ == "__main__":
    part_main(run, __doc__)
