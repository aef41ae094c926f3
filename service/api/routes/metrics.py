"""``GET /metrics`` in the Prometheus text format."""

from __future__ import annotations

from fastapi import APIRouter, FastAPI, Request
from fastapi.responses import Response
from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

from service.telemetry import ApiMetrics, MetricsMiddleware

router = APIRouter(tags=["operations"])

EXAMPLE = (
    "# HELP grovekeeper_queue_depth Jobs waiting for a worker\n"
    "# TYPE grovekeeper_queue_depth gauge\n"
    "grovekeeper_queue_depth 2.0\n"
    "# HELP grovekeeper_trials_total Finished trials by final state\n"
    "# TYPE grovekeeper_trials_total counter\n"
    'grovekeeper_trials_total{state="complete"} 37.0\n'
)


@router.get(
    "/metrics",
    response_class=Response,
    summary="Prometheus metrics",
    description=(
        "Jobs by status, queue depth, finished trials by state and their duration "
        "(read from the database, so they cover every worker), prediction latency and "
        "uploads (this API process since it started), and `grovekeeper_database_up`."
    ),
    responses={200: {"content": {CONTENT_TYPE_LATEST: {"example": EXAMPLE}}}},
)
def metrics(request: Request) -> Response:
    registry = request.app.state.metrics.registry
    return Response(generate_latest(registry), media_type=CONTENT_TYPE_LATEST)


def install(app: FastAPI) -> None:
    """Give ``app`` its own registry and the middleware that feeds it."""
    app.state.metrics = ApiMetrics(app.state.settings.db_url)
    app.add_middleware(MetricsMiddleware, metrics=app.state.metrics)
