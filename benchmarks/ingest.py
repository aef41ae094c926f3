"""Uploading a large CSV over HTTP vs reading it with pandas and writing Parquet in-process."""

from __future__ import annotations

import tempfile
import time
from functools import partial
from pathlib import Path

import httpx
import pandas as pd

from benchmarks._common import Row, live_server, median_time, part_main
from benchmarks.data import wide_table


def run(quick: bool = False) -> list[Row]:
    n_rows = 50_000 if quick else 1_000_000
    repeat = 1 if quick else 3
    with tempfile.TemporaryDirectory(prefix="gk-bench-ingest-") as tmp:
        folder = Path(tmp)
        csv_path = folder / "table.csv"
        wide_table(n_rows).to_csv(csv_path, index=False)

        def read(engine: str) -> pd.DataFrame:
            return pd.read_csv(csv_path, engine=engine)  # type: ignore[arg-type]

        engine_times = {e: median_time(lambda e=e: read(e), repeat) for e in ("c", "pyarrow")}
        engine = min(engine_times, key=engine_times.get)  # type: ignore[arg-type]
        frame = read(engine)
        table_bytes = int(frame.memory_usage(deep=True).sum())
        write = median_time(partial(frame.to_parquet, folder / "out.parquet", index=False),
                            repeat)
        floor = engine_times[engine] + write
        del frame  # free it before the server parses its own copy

        uploads = []
        with live_server(folder / "home") as server:
            for _ in range(repeat):
                with open(csv_path, "rb") as body, httpx.Client(timeout=600) as client:
                    start = time.perf_counter()
                    response = client.post(f"{server.base}/v1/datasets",
                                           params={"name": "bench"}, content=body,
                                           headers={"Content-Type": "text/csv"})
                    uploads.append(time.perf_counter() - start)
                response.raise_for_status()
            peak = server.peak_rss_bytes()
    uploads.sort()
    upload = uploads[len(uploads) // 2]
    mib = 1 << 20
    return [
        Row(f"ingest {n_rows:,} x 20 CSV upload", upload, floor, 1.5,
            note=f"floor = pandas read_csv ({engine} engine, fastest of "
                 + ", ".join(f"{k} {v:.2f} s" for k, v in engine_times.items())
                 + f") + to_parquet {write:.2f} s"),
        Row("ingest server peak RSS", peak / mib, table_bytes / mib, 3.0, unit="MiB",
            note="floor = in-memory size of the parsed table (memory_usage(deep=True))"),
    ]


if __name__ == "__main__":
    part_main(run, __doc__)
