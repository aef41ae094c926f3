"""Big tables: a default job on a million rows against one LightGBM fit and the Bayes limit.

``python -m benchmarks.bigtable`` generates, seeded, a binary table whose true probability
of every row is known (:func:`make_table`), hides 20% of it, uploads the other 80% over
HTTP to ``grovekeeper serve`` started with its defaults, runs a job with only
``dataset_id`` and ``target``, scores the hidden rows through the prediction route and
prints, for 1,000,000 and 100,000 rows (``--rows N ...`` for other sizes, e.g. a smoke run):

- the job's wall time (submission to ``succeeded``) as a ratio to one LightGBM fit with
  default parameters (100 rounds, all cores) on the same uploaded rows;
- the hidden rows' log loss above the Bayes-optimal log loss (the mean of
  ``-log p(y | x)`` under the true probabilities: no model can do better in
  expectation), for the job's model and for LightGBM's defaults, and the share of the
  defaults' gap the job closed;
- the peak resident memory of the API process and of the worker, next to the table's
  in-memory size.

The machine it runs on may be shared: every ratio is against a floor measured in the
same run.
"""

from __future__ import annotations

import argparse
import io
import os
import re
import sys
import tempfile
import time
from pathlib import Path

# Before LightGBM loads OpenMP: idle threads that spin starve the server's workers.
os.environ.setdefault("OMP_WAIT_POLICY", "passive")

import httpx  # noqa: E402
import lightgbm as lgb  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from benchmarks._common import LiveServer, Row, live_server, print_table  # noqa: E402

TARGET = "failed"
LEVELS = 48  # levels of the large categorical column
MISSING = 0.03


def make_table(n_rows: int, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    """A sensor table of ``n_rows`` rows and its true probability of ``failed == 1``.

    16 numeric readings (normal, uniform, skewed), 3 categorical columns (48, 6 and 3
    levels). The log-odds add non-linear terms (sine, thresholds, a square), numeric
    interactions, a per-level effect of the 48-level column and a category × reading
    interaction. About 3% of feature values are missing; a missing value contributes
    nothing to the log-odds, so the true probability is a function of what the table
    shows and the Bayes-optimal loss is reachable in principle. About 38% positives.
    """
    rng = np.random.default_rng(seed)
    x = np.empty((n_rows, 16))
    x[:, :8] = rng.normal(size=(n_rows, 8))
    x[:, 8:12] = rng.uniform(-2, 2, size=(n_rows, 4))
    x[:, 12:16] = rng.lognormal(0, 0.6, size=(n_rows, 4))
    bay = rng.integers(0, LEVELS, n_rows)
    crop = rng.integers(0, 6, n_rows)
    shift = rng.integers(0, 3, n_rows)
    seen = rng.random((n_rows, 19)) >= MISSING  # False: the value is missing
    xs = np.where(seen[:, :16], x, np.nan)
    v = np.where(seen[:, :16], x, 0.0)  # a missing reading adds nothing
    logs = np.where(seen[:, 12:16], np.log(np.where(seen[:, 12:16], x[:, 12:16], 1.0)), 0.0)
    bay_effect = np.random.default_rng(seed + 1).normal(0, 0.6, LEVELS)
    crop_effect = np.array([0.0, 0.4, -0.3, 0.2, -0.5, 0.1])
    logit = (
        -0.75
        + 0.8 * v[:, 0] - 0.6 * v[:, 1] + 0.4 * v[:, 2]
        + 0.7 * np.sin(2 * v[:, 3])
        + 0.5 * (v[:, 4] > 0.5) - 0.4 * (v[:, 5] < -1)
        + 0.35 * v[:, 6] * v[:, 7]
        + 0.3 * (v[:, 8] ** 2 - 1.3) * seen[:, 8]
        + 0.5 * v[:, 9] * (v[:, 10] > 0)
        + 0.6 * logs[:, 0] - 0.4 * logs[:, 1]
        + 0.25 * np.abs(v[:, 11]) * seen[:, 11]
        + np.where(seen[:, 16], bay_effect[bay], 0.0)
        + np.where(seen[:, 17], crop_effect[crop], 0.0)
        + np.where(seen[:, 17] & (crop == 2), 0.6 * v[:, 0], 0.0)
        + np.where(seen[:, 18], 0.25 * (shift - 1), 0.0)
    )
    p = 1 / (1 + np.exp(-logit))
    y = (rng.random(n_rows) < p).astype("int64")
    frame = pd.DataFrame(xs, columns=[f"reading_{i:02d}" for i in range(16)])
    # A level name per code; missing where the column is missing.
    frame["bay"] = pd.Series(np.where(seen[:, 16], np.char.add("bay-", bay.astype(str)), None),
                             dtype="str")
    frame["crop"] = pd.Series(np.where(seen[:, 17], np.char.add("crop-", crop.astype(str)),
                                       None), dtype="str")
    frame["shift"] = pd.Series(np.where(seen[:, 18], np.array(["early", "day", "late"])[shift],
                                        None), dtype="str")
    frame[TARGET] = y
    return frame, p


def log_loss(y: np.ndarray, p: np.ndarray) -> float:
    p = np.clip(p, 1e-15, 1 - 1e-15)
    return float(-np.mean(y * np.log(p) + (1 - y) * np.log(1 - p)))


def _default_fit(train: pd.DataFrame, hidden: pd.DataFrame) -> tuple[float, float]:
    """Seconds of one LightGBM fit with default parameters (100 rounds, all cores) on the
    uploaded rows, and its log loss on the hidden rows."""
    def matrix(frame: pd.DataFrame) -> pd.DataFrame:
        out = frame.drop(columns=[TARGET])
        for col in ("bay", "crop", "shift"):
            out[col] = pd.Categorical(out[col], categories=sorted(train[col].dropna().unique()))
        return out

    X, X_hidden = matrix(train), matrix(hidden)
    started = time.perf_counter()
    booster = lgb.train({"objective": "binary", "verbosity": -1},
                        lgb.Dataset(X, label=train[TARGET].to_numpy()), num_boost_round=100)
    seconds = time.perf_counter() - started
    return seconds, log_loss(hidden[TARGET].to_numpy(), booster.predict(X_hidden))


def _children(pid: int) -> list[int]:
    out: list[int] = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        text = (task / "children").read_text().split()
        out.extend(int(c) for c in text)
    return out


def _rss(pid: int, field: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) * 1024
    return 0


def _served_proba(client: httpx.Client, model_id: str, hidden: pd.DataFrame) -> np.ndarray:
    """Class-1 probabilities of the hidden rows from the prediction route (CSV, chunks)."""
    out = []
    features = hidden.drop(columns=[TARGET])
    for start in range(0, len(features), 50_000):
        body = features.iloc[start:start + 50_000].to_csv(index=False).encode()
        r = client.post(f"/v1/models/{model_id}/predictions", content=body,
                        headers={"Content-Type": "text/csv"})
        r.raise_for_status()
        answer = pd.read_csv(io.StringIO(r.text))
        column = [c for c in answer.columns if c.startswith("probability")][-1]
        out.append(answer[column].to_numpy(dtype="float64"))
    return np.concatenate(out)


def run_size(n_rows: int, seed: int = 0) -> list[Row]:
    frame, p = make_table(n_rows, seed)
    hidden_mask = np.random.default_rng(seed + 7).random(n_rows) < 0.2
    train, hidden = frame[~hidden_mask].reset_index(drop=True), frame[hidden_mask]
    y_hidden = hidden[TARGET].to_numpy()
    bayes = log_loss(y_hidden, p[hidden_mask])
    floor, default_loss = _default_fit(train, hidden)
    table_bytes = int(train.memory_usage(deep=True).sum())
    buffer = io.BytesIO()
    train.to_parquet(buffer, index=False)
    label = f"{n_rows:,} rows"
    with tempfile.TemporaryDirectory() as home, \
            live_server(Path(home), workers=None, log=Path(home) / "serve.log") as server:
        worker = _wait_for_worker(server, Path(home) / "serve.log")
        idle = _rss(worker, "VmRSS")
        with httpx.Client(base_url=server.base, timeout=600) as client:
            up = client.post("/v1/datasets", params={"name": "bigtable"},
                             content=buffer.getvalue(),
                             headers={"Content-Type": "application/vnd.apache.parquet"})
            up.raise_for_status()
            started = time.perf_counter()
            job = client.post("/v1/jobs", json={"dataset_id": up.json()["id"],
                                                "target": TARGET})
            job.raise_for_status()
            job_id = job.json()["id"]
            while True:
                current = client.get(f"/v1/jobs/{job_id}").json()
                if current["status"] in ("succeeded", "failed", "cancelled"):
                    break
                time.sleep(1.0)
            wall = time.perf_counter() - started
            if current["status"] != "succeeded":
                raise RuntimeError(f"job {current['status']}: {current['error']}")
            tuned_loss = log_loss(y_hidden, _served_proba(client, current["model_id"], hidden))
        worker_peak = _rss(worker, "VmHWM")
        api_peak = server.peak_rss_bytes()
    spec = current["spec"]
    gap_default, gap_tuned = default_loss - bayes, tuned_loss - bayes
    closed = 1 - gap_tuned / gap_default if gap_default > 0 else float("nan")
    by_fidelity = current["progress"].get("trials_by_fidelity") or {}
    note = (f"{current['progress']['trials_completed']} complete, "
            f"{current['progress']['trials_pruned']} pruned trials (by fidelity reached: "
            f"{', '.join(f'{k}: {v}' for k, v in by_fidelity.items()) or 'n/a'}); folds scored "
            f"{spec['cv']['folds']}; parallel trials {spec['max_parallel_trials']}, threads "
            f"{spec['num_threads']}")
    mib = 1024 ** 2
    target_time = 75.0 if n_rows >= 1_000_000 else 150.0
    target_gap = 1 / 3 if n_rows >= 1_000_000 else 1 / 2  # gap left of the defaults'
    return [
        Row(f"{label}: job wall time / one default fit", wall, floor, target_time, note=note),
        Row(f"{label}: log loss above Bayes, tuned / defaults", gap_tuned, gap_default,
            target_gap, unit="nats",
            note=f"Bayes {bayes:.5f}, defaults {default_loss:.5f} (+{gap_default / bayes:.2%}),"
                 f" tuned {tuned_loss:.5f} (+{gap_tuned / bayes:.2%}); closed {closed:.0%}"
                 " of the defaults' gap"),
        Row(f"{label}: worker peak RSS above idle / table in memory", worker_peak - idle,
            table_bytes, 3.0, unit="B",
            note=f"worker peak {worker_peak / mib:.0f} MiB (idle {idle / mib:.0f} MiB: "
                 f"ready, its libraries loaded, before the upload), table "
                 f"{table_bytes / mib:.0f} MiB"),
        Row(f"{label}: API peak RSS", api_peak / mib, table_bytes / mib, 1e9, unit="MiB",
            informational=True),
    ]


def _wait_for_worker(server: LiveServer, log: Path) -> int:
    """The worker's pid once it says it is ready: its libraries loaded, polling for work
    (service/worker/process.py). Its RSS from then on is a ready worker's idle memory."""
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        text = log.read_text(errors="replace") if log.exists() else ""
        found = re.search(r"worker \S+:(\d+) ready", text)
        if found and int(found.group(1)) in _children(server.proc.pid):
            time.sleep(1.0)  # its first poll of the queue
            return int(found.group(1))
        if server.proc.poll() is not None:
            break
        time.sleep(0.2)
    raise RuntimeError("serve started no ready worker")


def main() -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.bigtable", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 100_000],
                        help="table sizes to run (default 1,000,000 and 100,000)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rows: list[Row] = []
    for n in args.rows:
        started = time.perf_counter()
        rows.extend(run_size(n, args.seed))
        print(f"[{n:,} rows done in {time.perf_counter() - started:.0f} s]", file=sys.stderr)
    print_table(rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
