"""Builds the FastAPI application."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI
from fastapi.middleware.cors import CORSMiddleware

from service.api import openapi_examples, problems
from service.api.audit import AuditTrail
from service.api.deps import AdminDep, AuthDep, ReadDep
from service.api.drift import DriftRecorder
from service.api.guard import RequestGuard
from service.api.jobwatch import WatchHub
from service.api.predictors import PredictorCache
from service.api.routes import (
    audit,
    bundle,
    channels,
    comparisons,
    datasets,
    docs,
    health,
    jobs,
    links,
    metrics,
    models,
    scorings,
    watch,
)
from service.api.routes import report as report_routes
from service.auth import KeyChecker
from service.db import init_db
from service.links import LinkSigner
from service.settings import Settings
from service.storage import ArtifactStore


def create_app(settings: Settings, *, init: bool = True, loopback_only: bool = True) -> FastAPI:
    """The API on ``settings``; ``init`` creates the schema (off when ``serve`` did it).

    ``loopback_only`` says the server listens on loopback alone; only then may it serve
    requests without a key, and only while no key has ever existed (service/auth.py).
    """

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        if init:
            settings.ensure_dirs()
            init_db(settings.db_url)
        yield
        app.state.drift.close()  # what this process counted since the last flush

    app = FastAPI(
        title="Grovekeeper",
        version="0.1.0",
        summary="Tunes gradient-boosted trees on uploaded tables and serves the winners.",
        lifespan=lifespan,
        docs_url=None,  # served by routes/docs.py, with its scripts from this server
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    app.state.drift = DriftRecorder(settings.db_url, settings.drift_flush_seconds)
    app.state.predictors = PredictorCache(app.state.store, recorder=app.state.drift)
    app.state.keys = KeyChecker(settings.db_url, open_without_keys=loopback_only)
    app.state.links = LinkSigner(settings.db_url)
    app.state.watch_hub = WatchHub(settings.db_url, per_key=settings.max_streams_per_key,
                                   total=settings.max_streams)
    origins = [o.strip() for o in settings.cors_origins.split(",") if o.strip()]
    app.state.cors_origins = set(origins)
    # Size, key, host and origin checks before routing, so no body is read first;
    # added before problems.install so that its catch-all wraps the guard too.
    app.add_middleware(RequestGuard)
    problems.install(app)
    if origins:  # closed by default: no CORS headers at all unless origins are configured
        app.add_middleware(CORSMiddleware, allow_origins=origins, allow_methods=["*"],
                           allow_headers=["Authorization", "Content-Type", "Accept"])
    app.include_router(health.router)
    app.include_router(docs.router)
    for router in (datasets.router, jobs.router, models.router, channels.router,
                   scorings.router, comparisons.router):
        app.include_router(router, dependencies=[AuthDep])
    # Practitioner-facing additions: live events, bundles, /metrics, documented examples.
    for router in (watch.router, bundle.router):
        app.include_router(router, dependencies=[AuthDep])
    # Like /readyz, no key: a scraper needs no secret, and it must still answer (with
    # grovekeeper_database_up 0) when the database, which holds the keys, is down.
    app.include_router(metrics.router)
    metrics.install(app)
    openapi_examples.install(app)
    app.include_router(report_routes.router, dependencies=[AuthDep])
    app.include_router(links.router, dependencies=[ReadDep])
    app.include_router(audit.router, dependencies=[AdminDep])
    # Every successful change is recorded with the key that made it (service/api/audit.py).
    app.add_middleware(AuditTrail, url=settings.db_url)
    return app
