"""Builds the FastAPI application."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI

from service.api import problems
from service.api.predictors import PredictorCache
from service.api.deps import AuthDep
from service.api.routes import datasets, health, jobs, models
from service.auth import KeyChecker
from service.db import init_db
from service.settings import Settings
from service.storage import ArtifactStore


def create_app(settings: Settings, *, init: bool = True) -> FastAPI:
    """The API on ``settings``; ``init`` creates the schema (off when ``serve`` did it)."""

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        if init:
            settings.ensure_dirs()
            init_db(settings.db_url)
        yield

    app = FastAPI(
        title="Grovekeeper",
        version="0.1.0",
        summary="Tunes gradient-boosted trees on uploaded tables and serves the winners.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    app.state.predictors = PredictorCache(app.state.store)
    app.state.keys = KeyChecker(settings.db_url)
    problems.install(app)
    app.include_router(health.router)
    for router in (datasets.router, jobs.router, models.router):
        app.include_router(router, dependencies=[AuthDep])
    return app
