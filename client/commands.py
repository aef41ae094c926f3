"""The client commands' bodies: datasets, jobs, leaderboard (parser: client_cli.py).

Results go to stdout in a form a script can use (an id, a table, CSV, JSON); progress
and notes go to stderr; failures raise ClientError with their exit code.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import time
from pathlib import Path
from typing import Any

from client import http as client
from client.http import Api, ClientError, fmt, table
from client.job_options import job_request
from client.progress import ProgressView
from vocabulary import FINISHED_STATUSES as FINISHED


def _api(args: argparse.Namespace) -> Api:
    return Api(args.url, args.api_key, timeout=args.timeout)


def _emit(data: Any) -> None:
    sys.stdout.write(json.dumps(data, indent=2) + "\n")


def _note(text: str) -> None:
    print(text, file=sys.stderr)


def winner_warnings(model: dict[str, Any]) -> list[str]:
    """What the evaluation of the winner flagged (optimism gap, overfitting, ...)."""
    evaluation = (model.get("details") or {}).get("evaluation") or {}
    found = list(evaluation.get("warnings") or [])
    if evaluation.get("error"):
        found.append(f"the evaluation failed: {evaluation['error']}")
    return found


def warn(data: list[str] | None = None, winner: list[str] | None = None) -> None:
    """Warnings go to stderr, so stdout stays what a script reads."""
    for message in data or ():
        _note(f"warning (data): {message}")
    for message in winner or ():
        _note(f"warning (winner): {message}")


# -- datasets --------------------------------------------------------------------


def cmd_upload(args: argparse.Namespace) -> int:
    path = Path(args.file)
    if not path.is_file():
        raise ClientError(client.USAGE, f"no such file: {path}")
    parquet = path.suffix.lower() in (".parquet", ".pq")
    media = "application/vnd.apache.parquet" if parquet else "text/csv"
    name = args.name or path.stem
    params = {"name": name}
    if args.kind:
        params["kinds"] = ",".join(f"{column}:{kind}" for column, kind in args.kind)
    with _api(args) as api, path.open("rb") as body:
        dataset = api.post("/v1/datasets", params=params, content=body,
                           headers={"Content-Type": media})
    _note(f"uploaded {path.name}: {dataset['rows']} rows, {dataset['n_columns']} columns")
    for warning in dataset.get("warnings", []):
        _note(f"warning: {warning}")
    _emit(dataset) if args.format == "json" else print(dataset["id"])
    return client.OK


def cmd_datasets(args: argparse.Namespace) -> int:
    with _api(args) as api:
        if args.format == "csv":
            sys.stdout.write(api.request("GET", "/v1/datasets", params={
                "limit": min(args.limit, 1000), "format": "csv"}).text)
            return client.OK
        page = api.items("/v1/datasets", most=args.limit)
    if args.format == "json":
        _emit(page)
        return client.OK
    header = ["id", "name", "rows", "n_columns", "created_at"]
    sys.stdout.write(table(header, [[d[h] for h in header] for d in page["items"]]))
    return client.OK


# -- jobs ------------------------------------------------------------------------


def cmd_tune(args: argparse.Namespace) -> int:
    printing = getattr(args, "print", "job")
    if printing == "model" and not args.wait:
        raise ClientError(client.USAGE, "--print model needs --wait: the model exists only "
                                        "once the job has succeeded")
    with _api(args) as api:
        job = api.post("/v1/jobs", json=job_request(args))
        _note(f"queued {job['id']}: {job['task']} on {job['target']!r}, "
              f"metric {job['metric']}")
        warn(data=job.get("warnings"))
        if not args.wait:
            _emit(job) if args.format == "json" else print(job["id"])
            return client.OK
        job = _follow(api, job["id"], args.interval)
        # The worker reads the rows, so the data warnings are there once it has the job.
        warn(data=job.get("warnings"))
        model = api.get(f"/v1/models/{job['model_id']}") if job.get("model_id") else None
    if model is not None:
        warn(winner=winner_warnings(model))
    if printing == "model":
        code = _final(job)  # raises for a job without a model: nothing on stdout
        _emit(model) if args.format == "json" else print(job["model_id"])
        return code
    _emit(job) if args.format == "json" else print(job["id"])
    return _final(job)


def cmd_watch(args: argparse.Namespace) -> int:
    with _api(args) as api:
        job = _follow(api, args.job_id, args.interval)
    _emit(job) if args.format == "json" else print(job["status"])
    return _final(job)


def _follow(api: Api, job_id: str, interval: float) -> dict[str, Any]:
    """Follow the job's stream (GET /v1/jobs/{id}/watch) until its final event; a
    dropped stream is reopened after ``interval`` seconds."""
    view = ProgressView(sys.stderr)
    try:
        while True:
            job: dict[str, Any] = api.get(f"/v1/jobs/{job_id}")
            view.update(job)
            if job["status"] in FINISHED:
                return job
            # A refused (429) or dropped stream is no failure: look again after a pause.
            with contextlib.suppress(ClientError):
                for event, data in api.events(f"/v1/jobs/{job_id}/watch"):
                    if event == "status":
                        job = {**job, "status": data["status"], "progress": data["progress"]}
                    elif event == "trial":
                        job = api.get(f"/v1/jobs/{job_id}")  # the best score so far too
                    view.update(job)
                    if data.get("final"):
                        break
            if job["status"] not in FINISHED:
                time.sleep(interval)
    except KeyboardInterrupt:
        view.close()
        raise ClientError(client.INTERRUPTED, f"stopped watching; {job_id} goes on "
                          f"(cancel it with 'grovekeeper cancel {job_id}')") from None
    finally:
        view.close()


def _final(job: dict[str, Any]) -> int:
    if job["status"] == "succeeded":
        _note(f"{job['id']} succeeded: best {job['metric']} "
              f"{fmt(job['progress']['best_score'])}, model {job['model_id']}")
        return client.OK
    raise ClientError(client.JOB_FAILED, f"{job['id']} {job['status']}"
                      + (f": {job['error']}" if job.get("error") else ""))


def cmd_status(args: argparse.Namespace) -> int:
    with _api(args) as api:
        job = api.get(f"/v1/jobs/{args.job_id}")
        model = api.get(f"/v1/models/{job['model_id']}") if job.get("model_id") else None
    warn(data=job.get("warnings"), winner=winner_warnings(model) if model else None)
    if args.format == "json":
        _emit(job)
        return client.OK
    p = job["progress"]
    rows = [("id", job["id"]), ("status", job["status"]), ("dataset_id", job["dataset_id"]),
            ("target", job["target"]), ("task", job["task"]), ("metric", job["metric"]),
            *((k, p[k]) for k in ("trials_completed", "trials_pruned", "trials_failed",
                                  "trials_budget", "best_score", "best_trial_number",
                                  "elapsed_seconds", "eta_seconds")),
            ("model_id", job["model_id"]), ("error", job["error"])]
    # A job the worker found bad input in names the fields, as a refused request does.
    rows += [(f"field {e['field']}", e["message"])
             for e in (job.get("problem") or {}).get("errors", [])]
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        print(f"{key.ljust(width)}  {fmt(value) or '-'}")
    return client.OK


def cmd_cancel(args: argparse.Namespace) -> int:
    with _api(args) as api:
        job = api.post(f"/v1/jobs/{args.job_id}/cancel")
    print(job["status"])
    return client.OK


def cmd_jobs(args: argparse.Namespace) -> int:
    params: dict[str, Any] = {"limit": args.limit}
    if args.status:
        params["status"] = args.status
    with _api(args) as api:
        if args.format == "csv":
            sys.stdout.write(api.request("GET", "/v1/jobs", params={
                **params, "limit": min(args.limit, 1000), "format": "csv"}).text)
            return client.OK
        page = api.items("/v1/jobs", params={"status": args.status} if args.status else {},
                         most=args.limit)
    if args.format == "json":
        _emit(page)
        return client.OK
    header = ["id", "status", "target", "metric", "done", "budget", "best", "model_id"]
    rows = [[j["id"], j["status"], j["target"], j["metric"],
             j["progress"]["trials_completed"] + j["progress"]["trials_pruned"],
             j["progress"]["trials_budget"], j["progress"]["best_score"], j["model_id"]]
            for j in page["items"]]
    sys.stdout.write(table(header, rows))
    return client.OK


def cmd_board(args: argparse.Namespace) -> int:
    params: dict[str, Any] = {} if args.limit is None else {"limit": args.limit}
    with _api(args) as api:
        if args.format == "csv":
            sys.stdout.write(api.request("GET", f"/v1/jobs/{args.job_id}/leaderboard",
                                         params={**params, "format": "csv"}).text)
            return client.OK
        board = api.items(f"/v1/jobs/{args.job_id}/leaderboard", most=args.limit)
    if args.format == "json":
        _emit(board)
        return client.OK
    names = sorted({n for r in board["items"] for n in r["params"]})
    header = ["rank", "trial", board["metric"], "std", "rounds", *names]
    rows = [[r["rank"], r["number"], r["score"], r["score_std"], r["boosting_rounds"],
             *(r["params"].get(n) for n in names)] for r in board["items"]]
    sys.stdout.write(table(header, rows))
    _note(f"{board['total']} finished trials, {board['direction']} {board['metric']}")
    return client.OK


# -- deleting --------------------------------------------------------------------

#: What the API deletes (DELETE routes; admin keys): the command's word → its path.
DELETABLE = {"dataset": "/v1/datasets", "model": "/v1/models"}


def cmd_delete(args: argparse.Namespace) -> int:
    with _api(args) as api:
        api.request("DELETE", f"{DELETABLE[args.kind]}/{args.id}")
    _note(f"deleted {args.kind} {args.id}")
    return client.OK
