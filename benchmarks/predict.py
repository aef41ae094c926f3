"""Prediction over HTTP vs the floor the libraries set.

Single row: p50/p99 of one JSON row over a keep-alive connection vs (p50 of a trivial
JSON echo route on the same server + p50 of Booster.predict on one row in-process).
Batch: 100,000 CSV rows in and out vs read_csv + Booster.predict + to_csv in-process.
"""

from __future__ import annotations

import io
import statistics
import tempfile
import time
from pathlib import Path

import httpx
import lightgbm as lgb
import numpy as np
import pandas as pd

from benchmarks._common import (
    Row,
    live_server,
    median_time,
    part_main,
    upload_and_tune,
    worker_process,
)
from benchmarks.data import wide_table


def _percentiles(samples: list[float]) -> tuple[float, float]:
    arr = np.array(samples)
    return float(np.percentile(arr, 50)), float(np.percentile(arr, 99))


def _latencies(client: httpx.Client, path: str, body: dict, n: int) -> list[float]:
    out = []
    for _ in range(n):
        start = time.perf_counter()
        response = client.post(path, json=body)
        out.append(time.perf_counter() - start)
        response.raise_for_status()
    return out


def run(quick: bool = False) -> list[Row]:
    n_single = 200 if quick else 2000
    n_batch = 10_000 if quick else 100_000
    repeat = 1 if quick else 3
    train = wide_table(3000, seed=1)
    with tempfile.TemporaryDirectory(prefix="gk-bench-predict-") as tmp:
        home = Path(tmp) / "home"
        with live_server(home, bench_routes=True) as server:
            with httpx.Client(base_url=server.base, timeout=600) as client:
                with worker_process(home):
                    job = upload_and_tune(client, train.to_csv(index=False).encode(),
                                          "target", trials=2)
                model_id = job["model_id"]
                text = client.get(f"/v1/models/{model_id}/file").text
                row = train.drop(columns=["target"]).iloc[0].to_dict()
                row = {k: (v.item() if hasattr(v, "item") else v) for k, v in row.items()}
                body = {"rows": [row]}
                path = f"/v1/models/{model_id}/predictions"
                _latencies(client, path, body, 50)  # warm-up: model load, connection
                _latencies(client, "/bench/echo", body, 50)
                served = _latencies(client, path, body, n_single)
                echo = _latencies(client, "/bench/echo", body, n_single)

                batch = wide_table(n_batch, seed=2).drop(columns=["target"])
                batch_csv = batch.to_csv(index=False).encode()

                def over_http() -> None:
                    r = client.post(path, content=batch_csv,
                                    headers={"Content-Type": "text/csv"})
                    r.raise_for_status()

                http_batch = median_time(over_http, repeat)

    booster = lgb.Booster(model_str=text)
    one = pd.DataFrame([row])
    cats = [c for c in one.columns if c.startswith("cat")]
    one[cats] = one[cats].astype("category")
    for _ in range(50):
        booster.predict(one)
    raw = []
    for _ in range(n_single):
        start = time.perf_counter()
        booster.predict(one)
        raw.append(time.perf_counter() - start)

    def in_process() -> None:
        frame = pd.read_csv(io.BytesIO(batch_csv))
        frame[cats] = frame[cats].astype("category")
        pd.DataFrame({"prediction": booster.predict(frame)}).to_csv(index=False)

    floor_batch = median_time(in_process, repeat)
    p50, p99 = _percentiles(served)
    floor = statistics.median(echo) + statistics.median(raw)
    ms = 1000.0
    return [
        Row("predict 1 row p50", p50 * ms, floor * ms, 1.5, unit="ms",
            note=f"floor = echo p50 {statistics.median(echo) * ms:.2f} ms + "
                 f"Booster.predict p50 {statistics.median(raw) * ms:.2f} ms"),
        Row("predict 1 row p99", p99 * ms, floor * ms, 4.0, unit="ms"),
        Row(f"predict {n_batch:,} rows CSV", http_batch, floor_batch, 1.5,
            note="floor = read_csv + category cast + Booster.predict + to_csv in-process"),
    ]


if __name__ == "__main__":
    part_main(run, __doc__)
