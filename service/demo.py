"""``grovekeeper demo``: the whole job end to end on the embedded default.

Writes the two demo tables into a temporary home, starts a real server with two
workers on a free loopback port, uploads both tables, tunes them side by side,
then prints each leaderboard, the winners' scores and a prediction.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx

from examples.demo_data import write_demo_tables

JOBS = (
    ("kilns", "defect", "Kiln firings: will this firing come out with a defect?"),
    ("greenhouse", "yield_kg_per_m2", "Greenhouse bays: how many kg per square metre?"),
)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_ready(base: str, proc: subprocess.Popen[bytes], timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"server exited with {proc.returncode}")
        try:
            if httpx.get(f"{base}/readyz", timeout=2).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.2)
    raise RuntimeError("server did not become ready")


def print_table(rows: list[dict[str, Any]], columns: list[str]) -> None:
    cells = [[_fmt(r.get(c)) for c in columns] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in cells)) for i, c in enumerate(columns)]
    print("  " + "  ".join(c.rjust(w) for c, w in zip(columns, widths, strict=True)))
    for row in cells:
        print("  " + "  ".join(v.rjust(w) for v, w in zip(row, widths, strict=True)))


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return "" if value is None else str(value)


def _report(client: httpx.Client, job: dict[str, Any], sample: dict[str, Any]) -> None:
    job_id = job["id"]
    board = client.get(f"/v1/jobs/{job_id}/leaderboard", params={"limit": 5}).json()
    print(f"\n  leaderboard ({board['metric']}, {board['direction']}), best 5 of "
          f"{board['count']} finished trials:")
    rows = [{"rank": r["rank"], "trial": r["number"], "score": r["score"],
             "std": r["score_std"], "rounds": r["boosting_rounds"],
             "leaves": r["params"].get("num_leaves"),
             "learning_rate": r["params"].get("learning_rate")} for r in board["data"]]
    print_table(rows, ["rank", "trial", "score", "std", "rounds", "leaves", "learning_rate"])
    model = client.get(f"/v1/models/{job['model_id']}").json()
    cv = model["cv"]
    holdout = {k: v for k, v in model["holdout"].items() if isinstance(v, int | float)}
    print(f"  winner: trial {model['trial_number']}, CV {cv['metric']} "
          f"{cv['mean']:.4f} ± {cv['std']:.4f}")
    print("  hold-out (rows the search never saw): "
          + ", ".join(f"{k} {v:.4g}" for k, v in holdout.items()))
    answer = client.post(f"/v1/models/{job['model_id']}/predictions",
                         json={"rows": [sample]}).json()
    shown = {k: sample[k] for k in list(sample)[:5]}
    print(f"  prediction for {shown} ...: {answer['predictions'][0]}", end="")
    if answer.get("probabilities"):
        probs = dict(zip(answer["classes"], answer["probabilities"][0], strict=True))
        print("  probabilities " + ", ".join(f"{k}: {v:.3f}" for k, v in probs.items()), end="")
    print()


def run_demo(*, trials: int = 30, keep: bool = False) -> int:
    home = Path(tempfile.mkdtemp(prefix="grovekeeper-demo-"))
    tables = write_demo_tables(home / "input")
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    print(f"Grovekeeper demo: home {home}, server {base}")
    server = subprocess.Popen(
        [sys.executable, "-m", "service", "serve", "--home", str(home / "data"),
         "--port", str(port), "--workers", "2"],
    )
    started = time.monotonic()
    try:
        wait_ready(base, server)
        with httpx.Client(base_url=base, timeout=60) as client:
            jobs = []
            for name, target, question in JOBS:
                body = tables[name].read_bytes()
                dataset = client.post("/v1/datasets", params={"name": name}, content=body,
                                      headers={"Content-Type": "text/csv"}).json()
                print(f"\nuploaded {name}: {dataset['rows']} rows, "
                      f"{len(dataset['columns'])} columns; warnings: {dataset['warnings']}")
                job = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                                    "target": target, "seed": 7,
                                                    "budget": {"trials": trials}})
                job.raise_for_status()
                jobs.append((name, question, job.json()))
            finished = _wait_all(client, [j for _, _, j in jobs])
            samples = {name: _sample_row(tables[name], target) for name, target, _ in JOBS}
            for (name, question, _), job in zip(jobs, finished, strict=True):
                print(f"\n{name}: {question}\n  job {job['id']} {job['status']} "
                      f"({job['task']}, {job['progress']['elapsed_seconds']:.0f} s)")
                if job["status"] != "succeeded":
                    print(f"  error: {job['error']}")
                    return 1
                _report(client, job, samples[name])
        print(f"\ndemo finished in {time.monotonic() - started:.0f} s")
        return 0
    finally:
        server.terminate()
        try:
            server.wait(timeout=60)
        except subprocess.TimeoutExpired:
            server.kill()
        if not keep:
            shutil.rmtree(home, ignore_errors=True)


def _sample_row(path: Path, target: str) -> dict[str, Any]:
    import pandas as pd

    row = pd.read_csv(path, nrows=1).drop(columns=[target]).iloc[0]
    return {k: (None if pd.isna(v) else v.item() if hasattr(v, "item") else v)
            for k, v in row.items()}


def _wait_all(client: httpx.Client, jobs: list[dict[str, Any]]) -> list[dict[str, Any]]:
    last = ""
    while True:
        current = [client.get(f"/v1/jobs/{j['id']}").json() for j in jobs]
        line = " | ".join(
            f"{j['status']} {j['progress']['trials_completed']}+"
            f"{j['progress']['trials_pruned']}p/{j['progress']['trials_budget']}"
            for j in current
        )
        if line != last:
            print(f"  progress: {line}", flush=True)
            last = line
        if all(j["status"] in ("succeeded", "failed", "cancelled") for j in current):
            return current
        time.sleep(1.0)
