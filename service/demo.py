"""``grovekeeper demo``: the whole job end to end on the embedded default.

Writes the two demo tables into a temporary home, starts a real server with two
workers on a free loopback port, uploads both tables, tunes them side by side,
then prints each leaderboard, the winners' scores and a prediction, and where each
job's report page is. The server's and workers' own log lines go to a file the demo
names at the start, so the terminal tells the story and nothing else.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any, cast

import httpx

from client.progress import describe
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
    print(f"\n  leaderboard ({board['metric']}, {board['direction']}), best "
          f"{min(5, board['total'])} of "
          f"{board['total']} finished trials:")
    rows = [{"rank": r["rank"], "trial": r["number"], "score": r["score"],
             "std": r["score_std"], "rounds": r["boosting_rounds"],
             "leaves": r["params"].get("num_leaves"),
             "learning_rate": r["params"].get("learning_rate")} for r in board["items"]]
    print_table(rows, ["rank", "trial", "score", "std", "rounds", "leaves", "learning_rate"])
    model = client.get(f"/v1/models/{job['model_id']}").json()
    cv = model["cv"]
    holdout = model["holdout"]  # metric name -> score; the row count sits beside it
    spread = f" ± {cv['std']:.4f}" if cv.get("std") is not None else ""
    print(f"  winner: model {model['id']}, trial {model['trial_number']}, "
          f"{model['boosting_rounds']} rounds, CV {cv['metric']} {cv['mean']:.4f}{spread}")
    print(f"  hold-out ({model['holdout_rows']} rows the search never saw): "
          + ", ".join(f"{k} {v:.4g}" for k, v in holdout.items()))
    evaluation = (model.get("details") or {}).get("evaluation") or {}
    for warning in evaluation.get("warnings") or []:
        print(f"  warning: {warning}")
    answer = client.post(f"/v1/models/{job['model_id']}/predictions",
                         json={"rows": [sample]}).json()
    shown = {k: sample[k] for k in list(sample)[:5]}
    print(f"  prediction for {shown} ...: {answer['predictions'][0]}", end="")
    if answer.get("probabilities"):
        probs = dict(zip(answer["classes"], answer["probabilities"][0], strict=True))
        print("  probabilities " + ", ".join(f"{k}: {v:.3f}" for k, v in probs.items()), end="")
    print()


def default_log() -> Path:
    """Beside the temporary home, not in it, so it outlives the demo's clean-up."""
    stamp = time.strftime("%Y%m%d-%H%M%S")
    return Path(tempfile.gettempdir()) / f"grovekeeper-demo-{stamp}.log"


def _make_key(home: Path) -> str:
    """An admin key in the demo's own database, as a deployment others reach has."""
    from service.auth import create_key
    from service.db import init_db
    from service.settings import Settings

    settings = Settings(home=home)
    settings.ensure_dirs()
    init_db(settings.db_url)
    return create_key(settings.db_url, scope="admin")[1]


def report_location(client: httpx.Client, job_id: str, *, keyed: bool) -> str:
    """Where the job's report page is: a signed link on a server with keys (a browser
    cannot send the key), else the page's own URL."""
    if not keyed:
        return f"{client.base_url}".rstrip("/") + f"/v1/jobs/{job_id}/report"
    answer = client.post(f"/v1/jobs/{job_id}/report-links", json={"expires_in": 3600})
    answer.raise_for_status()
    return cast(str, answer.json()["url"])  # httpx's json() is untyped


def run_demo(*, trials: int = 30, keep: bool = False, log: Path | None = None,
             with_key: bool = False, serve: bool = False) -> int:
    home = Path(tempfile.mkdtemp(prefix="grovekeeper-demo-"))
    tables = write_demo_tables(home / "input")
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    log = log or default_log()
    key = _make_key(home / "data") if with_key else None
    print(f"Grovekeeper demo: home {home}, server {base}")
    print(f"server and worker logs: {log}")
    log_file = log.open("ab")
    server = subprocess.Popen(
        [sys.executable, "-m", "service", "serve", "--home", str(home / "data"),
         "--port", str(port), "--workers", "2"],
        stdout=log_file, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
    )
    started = time.monotonic()
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    try:
        try:
            wait_ready(base, server)
        except RuntimeError as exc:
            print(f"{exc}; see {log}", file=sys.stderr)
            return 1
        with httpx.Client(base_url=base, timeout=60, headers=headers) as client:
            jobs = []
            for name, target, question in JOBS:
                body = tables[name].read_bytes()
                dataset = client.post("/v1/datasets", params={"name": name}, content=body,
                                      headers={"Content-Type": "text/csv"}).json()
                print(f"\nuploaded {name}: {dataset['rows']} rows, "
                      f"{len(dataset['columns'])} columns")
                for warning in dataset["warnings"]:
                    print(f"  warning: {warning}")
                created = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                                        "target": target, "seed": 7,
                                                        "budget": {"trials": trials}})
                created.raise_for_status()
                jobs.append((name, question, created.json()))
            print(f"\ntuning both tables, {trials} trials each:")
            finished = _wait_all(client, [(name, j) for name, _, j in jobs])
            samples = {name: _sample_row(tables[name], target) for name, target, _ in JOBS}
            pages = []
            for (name, question, _), job in zip(jobs, finished, strict=True):
                print(f"\n{name}: {question}\n  job {job['id']} {job['status']} "
                      f"({job['task']}, {job['progress']['elapsed_seconds']:.0f} s)")
                if job["status"] != "succeeded":
                    print(f"  error: {job['error']}; see {log}")
                    return 1
                _report(client, job, samples[name])
                pages.append((name, report_location(client, job["id"], keyed=bool(key))))
            print(f"\ndemo finished in {time.monotonic() - started:.0f} s")
            print("report pages" + (" (signed links, valid for an hour):" if key else ":"))
            for name, url in pages:
                print(f"  {name}: {url}")
            if serve:
                print("the server keeps running for them; press Ctrl-C to stop it")
                _serve_until_interrupted(server)
            else:
                print("they open while the server runs: 'grovekeeper demo --serve' keeps it "
                      "running after the demo")
        return 0
    finally:
        server.terminate()
        try:
            server.wait(timeout=60)
        except subprocess.TimeoutExpired:
            server.kill()
        log_file.close()
        if not keep:
            shutil.rmtree(home, ignore_errors=True)


def _serve_until_interrupted(server: subprocess.Popen[bytes]) -> None:
    try:
        server.wait()
    except KeyboardInterrupt:
        print()


def _sample_row(path: Path, target: str) -> dict[str, Any]:
    import pandas as pd

    row = pd.read_csv(path, nrows=1).drop(columns=[target]).iloc[0]
    # read_csv names the columns from the header row: text.
    return {str(k): (None if pd.isna(v) else v.item() if hasattr(v, "item") else v)
            for k, v in row.items()}


def _wait_all(client: httpx.Client,
              jobs: list[tuple[str, dict[str, Any]]]) -> list[dict[str, Any]]:
    """One progress line per job each time its trial counts or status change."""
    last: dict[str, str] = {}
    width = max(len(name) for name, _ in jobs)
    while True:
        current = [(name, client.get(f"/v1/jobs/{j['id']}").json()) for name, j in jobs]
        for name, job in current:
            p = job["progress"]
            key = (f"{job['status']} {p['trials_completed']} {p['trials_pruned']} "
                   f"{p['trials_failed']}")
            if last.get(name) != key:
                last[name] = key
                print(f"  {name.ljust(width)}  {describe(job, bar=False)}", flush=True)
        if all(j["status"] in ("succeeded", "failed", "cancelled") for _, j in current):
            return [j for _, j in current]
        time.sleep(1.0)
