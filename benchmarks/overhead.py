"""What a job costs beyond LightGBM's own training.

Job wall time of a real job (queue, storage, scheduling, bookkeeping included) vs the
sum of the LightGBM training times its trials recorded; and Optuna's storage
bookkeeping per trial on SQLite, measured as a no-training search on a SQLite file
minus the same search in memory.
"""

from __future__ import annotations

import tempfile
import time
from datetime import datetime
from pathlib import Path

import httpx
import optuna

import tuner
from benchmarks._common import (
    Row,
    all_items,
    live_server,
    part_main,
    upload_and_tune,
    worker_process,
)
from benchmarks.data import wide_table
from tuner.space import DEFAULT_SPACE, suggest

optuna.logging.set_verbosity(optuna.logging.WARNING)


def _job_overhead(trials: int, n_rows: int) -> Row:
    frame = wide_table(n_rows, seed=3)
    with tempfile.TemporaryDirectory(prefix="gk-bench-overhead-") as tmp:
        home = Path(tmp) / "home"
        with live_server(home) as server, httpx.Client(base_url=server.base,
                                                       timeout=600) as client:
            with worker_process(home):
                job = upload_and_tune(client, frame.to_csv(index=False).encode(), "target",
                                      trials=trials)
            rows = all_items(client, f"/v1/jobs/{job['id']}/trials")
    train = sum(r.get("train_seconds") or 0.0 for r in rows)
    in_trials = sum(r.get("duration_seconds") or 0.0 for r in rows)
    wall = (datetime.fromisoformat(job["finished_at"])
            - datetime.fromisoformat(job["started_at"])).total_seconds()
    n = max(1, len(rows))
    # Where the rest goes: inside trials (sampling, storage, predicting the fold) and
    # outside them (loading the data, the refit, the evaluation, the model file).
    return Row(f"job of {trials} trials, wall vs training", wall, train, 1.10,
               note=f"{len(rows)} trials, {train / n:.2f} s of LightGBM training per trial; "
               f"{(in_trials - train) / n * 1000:.0f} ms/trial more inside trials, "
               f"{wall - in_trials:.1f} s outside them (start, refit, evaluation)")


def _bookkeeping(n: int) -> tuple[float, float]:
    def objective(trial: optuna.Trial) -> float:
        # The storage writes of a 5-fold CV trial: its sampled parameters, a report after
        # each fold but the last (tuner.objective), and one record attribute.
        params = suggest(trial, DEFAULT_SPACE, n_train_rows=1000)
        for step in range(4):
            trial.report(0.5 + 0.01 * step, step=step)
        trial.set_user_attr("record", {"params": params, "fold_scores": [0.5] * 5,
                                       "best_iterations": [100] * 5, "train_seconds": 1.0})
        return 0.5

    def timed(study: optuna.Study) -> float:
        start = time.perf_counter()
        study.optimize(objective, n_trials=n)
        return (time.perf_counter() - start) / n

    memory = timed(optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0)))
    with tempfile.TemporaryDirectory(prefix="gk-bench-optuna-") as tmp:
        url = f"sqlite:///{tmp}/optuna.db"
        tuner.init_storage(url)
        study = tuner.open_study(url, "bench", direction="maximize", seed=0, create=True)
        study.optimize(objective, n_trials=1)  # trial 0 (the enqueued defaults)
        sqlite = timed(study)
    return sqlite, memory


def run(quick: bool = False) -> list[Row]:
    sqlite, memory = _bookkeeping(20 if quick else 100)
    ms = 1000.0
    rows = [Row("optuna storage bookkeeping per trial (SQLite)", (sqlite - memory) * ms, 15.0,
                1.0, unit="ms", note=f"SQLite {sqlite * ms:.1f} ms/trial minus in-memory "
                f"{memory * ms:.1f} ms/trial; floor column = the 15 ms budget")]
    rows.append(_job_overhead(trials=8 if quick else 60, n_rows=1500 if quick else 6000))
    return rows


if __name__ == "__main__":
    part_main(run, __doc__)
