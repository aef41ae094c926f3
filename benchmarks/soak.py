"""A bounded soak: mixed load on ``grovekeeper serve --workers 2`` for N minutes, loopback.

    python -m benchmarks.soak --minutes 20      # the full run
    python -m benchmarks.soak --minutes 3       # a short look

One writer uploads small tables and queues small jobs (a few trials each); readers ask for
predictions, leaderboards, the jobs list and single jobs, back to back. Every ten seconds
the RSS and open file descriptors of every process (serve and its workers) and the sizes
of the SQLite database and its WAL are sampled.

It prints: errors (any non-2xx answer or failed request), p50/p99 latency per route in the
first and in the last window (5 minutes, or a quarter of a shorter run), RSS and open fds
of each process at the start (after the warm-up job), after the warm-up minutes
(``--warmup-minutes``, default 2: caches, pools and allocator arenas fill up in them) and
at the end, and the database and WAL sizes at the start, the largest seen and at the end;
the machine's load average beside them. Targets: zero errors, p99 drift (last/first)
<= 1.5x, RSS growth <= 10% after warm-up, and a WAL that stays bounded (it is checkpointed
and truncated, see service/db.py). On a shared machine the absolute numbers move with the
neighbours' load; the ratios are what to read. Every sample is also written as JSON
(``--samples``) for a closer look.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import httpx

from examples.demo_data import kilns
from service.demo import wait_ready

ROOT = Path(__file__).resolve().parents[1]


@dataclass
class Log:
    lock: threading.Lock = field(default_factory=threading.Lock)
    calls: list[tuple[float, str, float, bool]] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    latest_job: str | None = None
    #: (when, items on the page) of each jobs-list answer: its cost follows the page,
    #: which fills up to the default limit as jobs accumulate.
    listed: list[tuple[float, int]] = field(default_factory=list)

    def add(self, route: str, started: float, response: httpx.Response | None,
            error: str | None = None) -> None:
        took = time.monotonic() - started
        ok = response is not None and 200 <= response.status_code < 300
        with self.lock:
            self.calls.append((started, route, took, ok))
            if not ok:
                self.errors.append(f"{route}: {error or response.status_code}"  # type: ignore[union-attr]
                                   + (f" {response.text[:200]}" if response is not None else ""))


def call(log: Log, client: httpx.Client, route: str, method: str, path: str,
         **kwargs: object) -> httpx.Response | None:
    started = time.monotonic()
    try:
        response = client.request(method, path, **kwargs)  # type: ignore[arg-type]
    except httpx.HTTPError as exc:
        log.add(route, started, None, repr(exc))
        return None
    log.add(route, started, response)
    return response


def pids_of(serve: int) -> dict[str, int]:
    found = {"serve": serve}
    n = 0
    for proc in sorted(Path("/proc").iterdir(), key=lambda p: p.name):
        if not proc.name.isdigit():
            continue
        try:
            ppid = int((proc / "stat").read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, IndexError, ValueError):
            continue
        if ppid == serve:
            n += 1
            found[f"worker {n}"] = int(proc.name)
    return found


def rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return 0.0


def fds(pid: int) -> int:
    return len(os.listdir(f"/proc/{pid}/fd"))


def load_average() -> float:
    """The one-minute load average (what ``uptime`` shows first)."""
    return float(Path("/proc/loadavg").read_text().split()[0])


def sample(serve: int, db: Path) -> dict[str, object]:
    procs = {}
    for name, pid in pids_of(serve).items():
        try:
            procs[name] = (pid, rss_mib(pid), fds(pid))
        except OSError:
            continue
    wal = db.with_name(db.name + "-wal")
    return {"t": time.monotonic(), "procs": procs, "load": load_average(),
            "db": db.stat().st_size if db.exists() else 0,
            "wal": wal.stat().st_size if wal.exists() else 0}


def writer(base: str, log: Log, frame_csv: bytes, stop: threading.Event) -> None:
    with httpx.Client(base_url=base, timeout=60) as client:
        while not stop.is_set():
            r = call(log, client, "POST /v1/datasets", "POST", "/v1/datasets",
                     params={"name": "kilns"}, content=frame_csv,
                     headers={"Content-Type": "text/csv"})
            if r is not None and r.status_code == 201:
                job = call(log, client, "POST /v1/jobs", "POST", "/v1/jobs", json={
                    "dataset_id": r.json()["id"], "target": "defect",
                    "exclude": ["firing_id"], "cv": {"folds": 3}, "budget": {"trials": 3}})
                if job is not None and job.status_code == 202:
                    log.latest_job = job.json()["id"]
            stop.wait(8.0)  # about what two workers finish: the queue stays short


def reader(base: str, log: Log, model_id: str, job_id: str, rows: list[dict],
           stop: threading.Event, which: int) -> None:
    with httpx.Client(base_url=base, timeout=60) as client:
        i = which
        while not stop.is_set():
            kind = i % 4
            i += 1
            if kind == 0:
                call(log, client, "POST predictions", "POST",
                     f"/v1/models/{model_id}/predictions", json={"rows": rows})
            elif kind == 1:
                call(log, client, "GET leaderboard", "GET", f"/v1/jobs/{job_id}/leaderboard",
                     params={"limit": 10})
            elif kind == 2:
                started = time.monotonic()
                r = call(log, client, "GET /v1/jobs", "GET", "/v1/jobs")
                if r is not None and r.status_code == 200:
                    log.listed.append((started, len(r.json()["items"])))
            else:
                call(log, client, "GET /v1/jobs/{id}", "GET",
                     f"/v1/jobs/{log.latest_job or job_id}")


def pct(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))] * 1000


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--minutes", type=float, default=20.0)
    parser.add_argument("--readers", type=int, default=3)
    parser.add_argument("--warmup-minutes", type=float, default=2.0,
                        help="RSS growth is also read from this point on")
    parser.add_argument("--samples", type=Path, default=None,
                        help="write every sample here as JSON (default: in the run's home)")
    args = parser.parse_args(argv)
    home = Path(tempfile.mkdtemp(prefix="gk-soak-"))
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    base = f"http://127.0.0.1:{port}"
    env = {**os.environ, "GROVEKEEPER_HOME": str(home), "OMP_WAIT_POLICY": "passive",
           "PYTHONPATH": str(ROOT)}
    env.pop("GROVEKEEPER_DATABASE_URL", None)
    serve_log = open(home / "serve.log", "ab")  # noqa: SIM115 - closed at the end
    proc = subprocess.Popen([sys.executable, "-m", "service", "serve", "--port", str(port),
                             "--workers", "2"], env=env, cwd=ROOT, stdout=serve_log,
                            stderr=subprocess.STDOUT)
    log = Log()
    samples: list[dict[str, object]] = []
    db = home / "grovekeeper.db"
    try:
        wait_ready(base, proc)
        frame = kilns(n_rows=400, seed=5)
        frame_csv = frame.to_csv(index=False).encode()
        # Through JSON, so missing values travel as null (NaN is not JSON).
        rows = json.loads(frame.drop(columns=["defect"]).head(20).to_json(orient="records"))
        # Warm-up: one job to the end, so the model is there to predict with.
        with httpx.Client(base_url=base, timeout=60) as client:
            ds = client.post("/v1/datasets", params={"name": "warm-up"}, content=frame_csv,
                             headers={"Content-Type": "text/csv"}).json()
            job = client.post("/v1/jobs", json={"dataset_id": ds["id"], "target": "defect",
                                                "exclude": ["firing_id"], "cv": {"folds": 3},
                                                "budget": {"trials": 5}}).json()
            while (state := client.get(f"/v1/jobs/{job['id']}").json())["status"] not in (
                    "succeeded", "failed", "cancelled"):
                time.sleep(0.5)
            assert state["status"] == "succeeded", state
            model_id, job_id = state["model_id"], job["id"]
            client.post(f"/v1/models/{model_id}/predictions", json={"rows": rows})
        stop = threading.Event()
        threads = [threading.Thread(target=writer, args=(base, log, frame_csv, stop))]
        threads += [threading.Thread(target=reader,
                                     args=(base, log, model_id, job_id, rows, stop, k))
                    for k in range(args.readers)]
        start = time.monotonic()
        end = start + args.minutes * 60
        samples.append(sample(proc.pid, db))
        for t in threads:
            t.start()
        while time.monotonic() < end:
            time.sleep(min(10.0, max(0.0, end - time.monotonic())))
            samples.append(sample(proc.pid, db))
        stop.set()
        for t in threads:
            t.join(timeout=120)
        samples.append(sample(proc.pid, db))
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
        serve_log.close()
    report(log, samples, start, end, args.minutes, args.warmup_minutes)
    out = args.samples or home / "soak-samples.json"
    rebased = [{**x, "t": float(x["t"]) - start} for x in samples]  # type: ignore[arg-type]
    out.write_text(json.dumps(rebased))
    print(f"samples: {out}")
    return 0 if not log.errors else 1


def slope(points: list[tuple[float, float]]) -> float:
    """Least-squares slope of y over x; nan with fewer than two points."""
    if len(points) < 2:
        return float("nan")
    mx = sum(x for x, _ in points) / len(points)
    my = sum(y for _, y in points) / len(points)
    var = sum((x - mx) ** 2 for x, _ in points)
    return sum((x - mx) * (y - my) for x, y in points) / var if var else float("nan")


def report(log: Log, samples: list[dict[str, object]], start: float, end: float,
           minutes: float, warmup_minutes: float = 2.0) -> None:
    window = min(5.0, minutes / 4) * 60
    loads = [float(x["load"]) for x in samples]  # type: ignore[arg-type]
    print(f"soak: {minutes:g} min, {len(log.calls)} requests, {len(log.errors)} errors; "
          f"windows: first and last {window / 60:g} min; load average (1 min) "
          f"{loads[0]:.1f} at start, {sum(loads) / len(loads):.1f} mean, {max(loads):.1f} "
          f"highest, {loads[-1]:.1f} at end ({os.cpu_count()} cores)")
    for line in log.errors[:10]:
        print(f"  error: {line}")
    print(f"\n{'route':<22} {'n first':>8} {'p50 first':>10} {'p99 first':>10} "
          f"{'n last':>7} {'p50 last':>9} {'p99 last':>9} {'p99 drift':>9}")
    for route in sorted({c[1] for c in log.calls}):
        first = [c[2] for c in log.calls if c[1] == route and c[0] < start + window]
        last = [c[2] for c in log.calls if c[1] == route and c[0] >= end - window]
        drift = pct(last, 0.99) / pct(first, 0.99) if first and last else float("nan")
        print(f"{route:<22} {len(first):>8} {pct(first, .5):>9.1f}ms {pct(first, .99):>9.1f}ms "
              f"{len(last):>7} {pct(last, .5):>8.1f}ms {pct(last, .99):>8.1f}ms "
              f"{drift:>8.2f}x")
    first_s, last_s = samples[0], samples[-1]
    # The first sample at or after the warm-up minutes (the last one if the run is shorter).
    since = [float(x["t"]) - start for x in samples]  # type: ignore[arg-type]
    warm_s = next((x for x, t in zip(samples, since, strict=True)
                   if t >= warmup_minutes * 60), last_s)
    warm_at = (float(warm_s["t"]) - start) / 60  # type: ignore[arg-type]
    print(f"\n{'process':<10} {'RSS start':>10} {f'RSS {warm_at:.0f} min':>10} {'RSS end':>9} "
          f"{'growth':>7} {'after warm-up':>13} {'MiB/min':>8} {'fds start':>10} "
          f"{'fds end':>8}")
    later = [(t, x) for t, x in zip(since, samples, strict=True)
             if t >= warmup_minutes * 60]
    procs_first: dict = first_s["procs"]  # type: ignore[assignment]
    procs_warm: dict = warm_s["procs"]  # type: ignore[assignment]
    procs_last: dict = last_s["procs"]  # type: ignore[assignment]
    total_a = total_w = total_b = 0.0
    for name in procs_first:
        if name not in procs_last or name not in procs_warm:
            print(f"{name:<10} (gone by the end)")
            continue
        _, rss_a, fd_a = procs_first[name]
        _, rss_w, _ = procs_warm[name]
        pid_b, rss_b, fd_b = procs_last[name]
        total_a, total_w, total_b = total_a + rss_a, total_w + rss_w, total_b + rss_b
        # Least-squares slope of RSS after the warm-up: a leak keeps climbing, warm-up
        # growth levels off.
        series = [(t / 60, x["procs"][name][1]) for t, x in later  # type: ignore[index]
                  if name in x["procs"]]  # type: ignore[operator]
        print(f"{name:<10} {rss_a:>8.0f}Mi {rss_w:>8.0f}Mi {rss_b:>7.0f}Mi "
              f"{100 * (rss_b / rss_a - 1):>6.1f}% {100 * (rss_b / rss_w - 1):>12.1f}% "
              f"{slope(series):>8.2f} {fd_a:>10} {fd_b:>8}")
    if total_a:
        print(f"{'all':<10} {total_a:>8.0f}Mi {total_w:>8.0f}Mi {total_b:>7.0f}Mi "
              f"{100 * (total_b / total_a - 1):>6.1f}% {100 * (total_b / total_w - 1):>12.1f}%")
    walmax = max(int(s["wal"]) for s in samples)  # type: ignore[call-overload]
    print(f"\nSQLite db: {int(first_s['db']) / 2**20:.1f} MiB -> {int(last_s['db']) / 2**20:.1f}"  # type: ignore[call-overload]
          f" MiB; WAL: {int(first_s['wal']) / 2**20:.1f} MiB at start, "  # type: ignore[call-overload]
          f"{walmax / 2**20:.1f} MiB largest, {int(last_s['wal']) / 2**20:.1f} MiB at end")  # type: ignore[call-overload]
    if len(samples) > 2:
        step = max(1, len(samples) // 12)
        print("minute:              " + " ".join(f"{t / 60:>5.1f}" for t in since[::step]))
        print("RSS, all (MiB):      " + " ".join(
            f"{sum(v[1] for v in x['procs'].values()):>5.0f}"  # type: ignore[attr-defined]
            for x in samples[::step]))
        print("load average:        " + " ".join(
            f"{float(x['load']):>5.1f}" for x in samples[::step]))  # type: ignore[arg-type]
        # The jobs list by band between those minutes: its latency against its page size.
        edges = [float(x["t"]) for x in samples[::step]]  # type: ignore[arg-type]
        bands = list(zip(edges, [*edges[1:], end], strict=True))
        lists = [c for c in log.calls if c[1] == "GET /v1/jobs"]
        print("jobs on a list page: " + " ".join(
            f"{max([n for t, n in log.listed if a <= t < b], default=0):>5}"
            for a, b in bands))
        print("GET /v1/jobs p50 ms: " + " ".join(
            f"{pct([c[2] for c in lists if a <= c[0] < b], 0.5):>5.1f}" for a, b in bands))


if __name__ == "__main__":
    raise SystemExit(main())
