"""Prometheus metrics: job and trial figures from the database, request figures in-process.

Workers are separate processes (often on other machines), so counting trials in memory
would count only what this process saw. Job and trial figures are therefore read from
the database at scrape time, in a few aggregate queries over indexed columns. What only
the API sees (prediction latency, uploads) is kept in this process's registry.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Iterator
from typing import Any

import sqlalchemy as sa
from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)

from service.db import session_scope
from service.tables import Channel, DriftCounts, Job, JobStatus, Model, Trial

log = logging.getLogger("grovekeeper.metrics")

# Trials range from well under a second (small tables) to minutes (large ones).
TRIAL_BUCKETS = (0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0, 900.0)
PREDICTION_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0)
TRIAL_STATES = ("complete", "pruned", "failed")


class DatabaseCollector:
    """Reads job and trial figures from the database each time Prometheus scrapes."""

    def __init__(self, db_url: str) -> None:
        self.db_url = db_url

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily("grovekeeper_database_up",
                               "1 when the last scrape could read the database, else 0")
        try:
            families = self._read()
        except Exception as exc:  # noqa: BLE001 - an unreachable database is a metric, not a 500
            log.warning("metrics: database unreachable: %s", type(exc).__name__)
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        yield from families

    def _read(self) -> list[Metric]:
        with session_scope(self.db_url) as session:
            by_status = dict(session.execute(
                sa.select(Job.status, sa.func.count()).group_by(Job.status)).all())
            by_state = dict(session.execute(
                sa.select(Trial.state, sa.func.count()).group_by(Trial.state)).all())
            duration = Trial.duration_seconds
            columns: list[Any] = [
                sa.func.sum(sa.case((duration <= b, 1), else_=0)) for b in TRIAL_BUCKETS
            ]
            columns += [sa.func.count(duration), sa.func.sum(duration)]
            histogram_row = session.execute(
                sa.select(*columns).where(duration.is_not(None))).one()
        jobs = GaugeMetricFamily("grovekeeper_jobs", "Jobs by status", labels=["status"])
        for status in JobStatus:
            jobs.add_metric([status.value], int(by_status.get(status.value, 0)))
        queue = GaugeMetricFamily("grovekeeper_queue_depth", "Jobs waiting for a worker")
        queue.add_metric([], int(by_status.get(JobStatus.QUEUED.value, 0)))
        trials = CounterMetricFamily("grovekeeper_trials", "Finished trials by final state",
                                     labels=["state"])
        for state in TRIAL_STATES:
            trials.add_metric([state], int(by_state.get(state, 0)))
        *cumulative, count, total = histogram_row
        buckets = [(_le(b), int(n or 0)) for b, n in zip(TRIAL_BUCKETS, cumulative, strict=True)]
        buckets.append(("+Inf", int(count or 0)))
        hist = HistogramMetricFamily("grovekeeper_trial_duration_seconds",
                                     "Wall time of finished trials (all folds)")
        hist.add_metric([], buckets, sum_value=float(total or 0.0))
        return [jobs, queue, trials, hist, self._drift()]

    def _drift(self) -> Metric:
        """PSI per feature of the models behind a channel only, so the number of series
        stays bounded by the channels, not by every model ever trained."""
        from tuner.drift import psi

        gauge = GaugeMetricFamily(
            "grovekeeper_feature_psi",
            "Population stability index of the rows scored against the training rows, per "
            "feature of each channel's current model", labels=["channel", "model_id", "feature"])
        with session_scope(self.db_url) as session:
            pairs = session.execute(sa.select(Channel.name, Channel.model_id)).all()
            for channel, model_id in pairs:
                details = session.scalar(sa.select(Model.details).where(Model.id == model_id))
                reference = (details or {}).get("drift_reference")
                days = session.scalars(sa.select(DriftCounts.counts)
                                       .where(DriftCounts.model_id == model_id)).all()
                if not reference or not days:
                    continue
                for j, entry in enumerate(reference["features"]):
                    actual = [sum(d[j][b] for d in days) for b in range(len(entry["counts"]))]
                    gauge.add_metric([channel, model_id, entry["name"]],
                                     psi(entry["counts"], actual))
        return gauge


def _le(bound: float) -> str:
    return repr(float(bound))


class ApiMetrics:
    """One registry per app, so several apps in one test process never share counters."""

    def __init__(self, db_url: str) -> None:
        self.registry = CollectorRegistry()
        self.registry.register(DatabaseCollector(db_url))
        self.prediction_seconds = Histogram(
            "grovekeeper_prediction_seconds", "Time to answer a prediction request",
            ["format", "outcome"], buckets=PREDICTION_BUCKETS, registry=self.registry)
        self.uploads = Counter("grovekeeper_uploads", "Dataset uploads by outcome",
                               ["outcome"], registry=self.registry)
        self.upload_bytes = Counter("grovekeeper_upload_bytes",
                                    "Bytes received in dataset upload bodies",
                                    registry=self.registry)


PREDICT_PATH = re.compile(r"^/v1/(models|channels)/[^/]+/predictions/?$")
UPLOAD_PATH = re.compile(r"^/v1/datasets/?$")


class MetricsMiddleware:
    """Pure ASGI middleware: times predictions and counts upload bodies as they stream by.

    Pure ASGI (not BaseHTTPMiddleware) so upload bodies still stream to disk unbuffered.
    """

    def __init__(self, app: Any, metrics: ApiMetrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope["method"] != "POST":
            await self.app(scope, receive, send)
            return
        path = scope["path"]
        if PREDICT_PATH.match(path):
            await self._timed(scope, receive, send)
        elif UPLOAD_PATH.match(path):
            await self._counted(scope, receive, send)
        else:
            await self.app(scope, receive, send)

    async def _timed(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        status = {"code": 500}
        content_type = dict(scope["headers"]).get(b"content-type", b"").lower()
        fmt = "csv" if content_type.startswith(b"text/csv") else "json"

        async def watch(message: dict[str, Any]) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        start = time.perf_counter()
        try:
            await self.app(scope, receive, watch)
        finally:
            outcome = "ok" if status["code"] < 400 else "error"
            self.metrics.prediction_seconds.labels(fmt, outcome).observe(
                time.perf_counter() - start)

    async def _counted(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        status = {"code": 500}

        async def counting_receive() -> dict[str, Any]:
            message: dict[str, Any] = await receive()
            if message["type"] == "http.request":
                self.metrics.upload_bytes.inc(len(message.get("body", b"")))
            return message

        async def watch(message: dict[str, Any]) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, counting_receive, watch)
        finally:
            self.metrics.uploads.labels("accepted" if status["code"] < 400 else "rejected").inc()
