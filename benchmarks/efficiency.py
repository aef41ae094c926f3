"""Search efficiency: a whole tuning job on a small table vs a plain notebook search.

The service runs a 40-trial job (5-fold CV, early stopping) over HTTP with a live server
and one worker. The floor is what most notebooks do: a sequential Optuna study (TPE, no
pruning) whose objective is ``lgb.cv`` with early stopping on two LightGBM threads, over
the same rows, folds and search ranges, followed by one final fit. Both are timed whole.

Scores: each side's best parameters are re-scored by one common procedure, ``lgb.cv`` on
fresh stratified folds of the same rows that neither search selected on (re-scoring on
the script's own folds would hand the script its selection bias, and each side's own
score is averaged differently). The service's best must be within one standard error
(fold std / sqrt(folds)) of the script's best, in the median run.

The script runs in a child process with the environment a notebook has (no
``OMP_WAIT_POLICY``), so its OpenMP threads behave as they would there.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path
from typing import Any

import httpx
import lightgbm as lgb
import optuna
import pandas as pd

import tuner
from benchmarks._common import (
    ROOT,
    Row,
    all_items,
    live_server,
    part_main,
    upload_and_tune,
    worker_process,
)
from examples.demo_data import kilns
from service.api.schemas import JobCreate
from service.jobspec import RunPlan, build_run
from tuner.space import DEFAULT_SPACE, suggest

optuna.logging.set_verbosity(optuna.logging.WARNING)

#: What the service is asked for: two trials at once on one thread each (small tables
#: gain nothing from a second thread per trial) and the default median pruner.
SERVICE_JOB: dict[str, Any] = {"max_parallel_trials": 2, "pruner": "median"}
# The script boosts and stops as the service's trials do (tuner.SearchConfig's defaults).
_SEARCH = {f.name: f.default for f in dataclasses.fields(tuner.SearchConfig)}
MAX_ROUNDS, PATIENCE = _SEARCH["max_rounds"], _SEARCH["early_stopping_rounds"]


def _request(trials: int, seed: int) -> dict[str, Any]:
    return JobCreate(dataset_id="ds_bench", target="defect", exclude=["firing_id"],
                     budget={"trials": trials}, seed=seed, **SERVICE_JOB).model_dump(mode="json")


def _cv_params(params: dict[str, Any], threads: int, seed: int) -> dict[str, Any]:
    return {"objective": "binary", "metric": "auc", "verbosity": -1, "num_threads": threads,
            "seed": seed, "feature_pre_filter": False, **params}


def _cv(run: RunPlan, params: dict[str, Any], threads: int, seed: int,
        fold_seed: int | None = None) -> tuple[float, float, int]:
    """``lgb.cv`` on the search rows: (mean AUC, its standard error, rounds).

    The service's folds, or with ``fold_seed`` fresh stratified ones over the same rows.
    """
    X = run.data.X.iloc[run.plan.train_idx].reset_index(drop=True)
    y = run.data.y[run.plan.train_idx]
    n_folds = len(run.plan.folds)
    split: dict[str, Any] = ({"folds": list(run.plan.folds)} if fold_seed is None else
                             {"nfold": n_folds, "stratified": True, "seed": fold_seed})
    result = lgb.cv(_cv_params(params, threads, seed), lgb.Dataset(X, y, free_raw_data=False),
                    num_boost_round=MAX_ROUNDS, **split,
                    callbacks=[lgb.early_stopping(PATIENCE, verbose=False)])
    mean, std = result["valid auc-mean"][-1], result["valid auc-stdv"][-1]
    return float(mean), float(std) / math.sqrt(n_folds), len(result["valid auc-mean"])


def notebook_search(run: RunPlan, trials: int, seed: int, threads: int = 2) -> dict[str, Any]:
    """The floor: sequential TPE, ``lgb.cv`` per trial on ``threads`` threads, no pruning."""
    def objective(trial: optuna.Trial) -> float:
        # The service's ranges exactly (its min_data_in_leaf clamp for small tables too),
        # drawn the way a notebook would, one suggest_* per parameter.
        params = suggest(trial, DEFAULT_SPACE, n_train_rows=run.plan.min_fit_rows)
        score, _, rounds = _cv(run, params, threads=threads, seed=seed)
        trial.set_user_attr("rounds", rounds)
        return score

    start = time.perf_counter()
    study = optuna.create_study(direction="maximize",
                                sampler=optuna.samplers.TPESampler(seed=seed))
    study.optimize(objective, n_trials=trials)
    best = study.best_trial
    X = run.data.X.iloc[run.plan.train_idx]
    lgb.train(_cv_params(best.params, threads, seed),
              lgb.Dataset(X, run.data.y[run.plan.train_idx]),
              num_boost_round=best.user_attrs["rounds"])
    return {"seconds": time.perf_counter() - start, "params": best.params,
            "value": best.value}


def _csv(quick: bool) -> bytes:
    return kilns(n_rows=400 if quick else 1000, seed=5).to_csv(index=False).encode()


def _frame(quick: bool) -> pd.DataFrame:
    """The table as the service reads the uploaded CSV (same dtypes, same features)."""
    with tempfile.TemporaryDirectory(prefix="gk-bench-efficiency-") as tmp:
        path = Path(tmp) / "kilns.csv"
        path.write_bytes(_csv(quick))
        return tuner.read_table(path, "csv")


def _script_child(quick: bool, trials: int, seed: int, threads: int = 2) -> dict[str, Any]:
    """Run :func:`notebook_search` in a child with a notebook's environment."""
    env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
    env["PYTHONPATH"] = str(ROOT)
    args = json.dumps({"quick": quick, "trials": trials, "seed": seed, "threads": threads})
    out = subprocess.run([sys.executable, "-m", "benchmarks.efficiency", "--script", args],
                         env=env, cwd=ROOT, check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _service_job(client: httpx.Client, csv: bytes, trials: int, seed: int) -> dict[str, Any]:
    job = upload_and_tune(client, csv, "defect", trials=trials, exclude=["firing_id"],
                          seed=seed, **SERVICE_JOB)
    seconds = (datetime.fromisoformat(job["finished_at"])
               - datetime.fromisoformat(job["started_at"])).total_seconds()
    board = client.get(f"/v1/jobs/{job['id']}/leaderboard", params={"limit": 1}).json()
    best = board["items"][0]
    trials_rows = all_items(client, f"/v1/jobs/{job['id']}/trials")
    pruned = sum(r["state"] == "pruned" for r in trials_rows)
    return {"seconds": seconds, "params": best["params"], "value": best["score"],
            "pruned": pruned}


def run(quick: bool = False) -> list[Row]:
    trials, repeats = (4, 1) if quick else (40, 3)
    frame, csv = _frame(quick), _csv(quick)
    services, scripts, singles = [], [], []
    with tempfile.TemporaryDirectory(prefix="gk-bench-efficiency-") as tmp:
        home = Path(tmp) / "home"
        with live_server(home) as server, httpx.Client(base_url=server.base,
                                                       timeout=900) as client:
            with worker_process(home):
                for seed in range(repeats):
                    services.append(_service_job(client, csv, trials, seed))
                    scripts.append(_script_child(quick, trials, seed))
                    if not quick:  # the stricter floor: the same script on one thread
                        singles.append(_script_child(quick, trials, seed, threads=1))
    # Re-score both winners the same way, on folds neither chose on (one thread: only the
    # scores matter here).
    gaps, notes = [], []
    for seed, (svc, nb) in enumerate(zip(services, scripts, strict=True)):
        run_plan = build_run(_request(trials, seed), frame)
        fresh = 1000 + seed
        svc_score, _, _ = _cv(run_plan, svc["params"], threads=1, seed=seed, fold_seed=fresh)
        nb_score, se, _ = _cv(run_plan, nb["params"], threads=1, seed=seed, fold_seed=fresh)
        gaps.append((nb_score - svc_score) / se if se > 0 else 0.0)
        notes.append(f"seed {seed}: service {svc_score:.4f} vs script {nb_score:.4f} "
                     f"(SE {se:.4f}; own best {svc['value']:.4f} vs {nb['value']:.4f}; "
                     f"{svc['pruned']} pruned)")
    svc_time = statistics.median(s["seconds"] for s in services)
    nb_time = statistics.median(s["seconds"] for s in scripts)
    times = ", ".join(f"{s['seconds']:.1f}/{n['seconds']:.1f}"
                      for s, n in zip(services, scripts, strict=True))
    single = ""
    if singles:
        one = statistics.median(s["seconds"] for s in singles)
        single = (f"; the same script on 1 thread (informational, not the target's floor): "
                  f"{one:.1f} s, service/that = {svc_time / one:.2f}x")
    return [
        Row(f"{trials}-trial job, {len(frame)} rows: service vs notebook script", svc_time,
            nb_time, 0.5, note=f"median of {repeats}; service/script s per run: {times}; "
            f"service {SERVICE_JOB}, script TPE + lgb.cv on 2 threads, no pruning{single}"),
        Row("best CV AUC shortfall vs script (in SEs)", statistics.median(gaps), 1.0, 1.0,
            unit="SE", note=f"median of {repeats}, worst {max(gaps):.2f}; negative = service "
            "better; AUC on fresh folds. " + "; ".join(notes)),
    ]


def _script_main(args: str) -> None:
    opts = json.loads(args)
    frame = _frame(opts["quick"])
    result = notebook_search(build_run(_request(opts["trials"], opts["seed"]), frame),
                             opts["trials"], opts["seed"], threads=opts["threads"])
    print(json.dumps(result))


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--script":
        _script_main(sys.argv[2])
    else:
        part_main(run, __doc__)
