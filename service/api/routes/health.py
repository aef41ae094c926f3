"""Liveness and readiness."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from service.api.deps import SettingsDep
from service.api.problems import RETRY_AFTER_SECONDS, problem
from service.db import describe_outage, ping

router = APIRouter(tags=["operations"])


@router.get("/healthz")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get("/readyz", response_model=None)
def readyz(settings: SettingsDep) -> dict[str, str] | JSONResponse:
    try:
        ping(settings.db_url)
    except Exception as exc:  # noqa: BLE001 - any driver error means "not ready"
        return problem(503, "Not ready", f"database unreachable: {describe_outage(exc)}",
                       code="not_ready", headers={"Retry-After": str(RETRY_AFTER_SECONDS)})
    return {"status": "ready"}
