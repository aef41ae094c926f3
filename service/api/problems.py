"""RFC 9457 problem documents for every error the API answers."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException

import tuner
from service.errors import ServiceError

log = logging.getLogger("grovekeeper.api")
PROBLEM = "application/problem+json"
TYPE_BASE = "https://grovekeeper.invalid/problems/"


class ProblemResponse(JSONResponse):
    """A problem document ending in a newline, so curl's output never runs into the prompt."""

    media_type = PROBLEM

    def render(self, content: Any) -> bytes:
        return super().render(content) + b"\n"


def problem(
    status: int,
    title: str,
    detail: str,
    *,
    code: str,
    errors: list[dict[str, Any]] | None = None,
    headers: dict[str, str] | None = None,
) -> JSONResponse:
    body: dict[str, Any] = {
        "type": TYPE_BASE + code,
        "title": title,
        "status": status,
        "detail": detail,
        "code": code,
    }
    if errors:
        body["errors"] = errors
    return ProblemResponse(body, status_code=status, media_type=PROBLEM, headers=headers)


def _field(loc: tuple[Any, ...]) -> str:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header")]
    out = ""
    for part in parts:
        out += f"[{part}]" if part.isdigit() else (f".{part}" if out else part)
    return out or "body"


async def _service_error(_: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, ServiceError)
    return problem(exc.status, exc.title, exc.detail, code=exc.code, errors=exc.errors)


async def _tuner_input_error(_: Request, exc: Exception) -> JSONResponse:
    errors = list(getattr(exc, "errors", None) or [])
    return problem(422, "Invalid input", str(exc), code="invalid_input", errors=errors)


async def _validation_error(_: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError | ValidationError)
    errors = [{"field": _field(tuple(e.get("loc", ()))), "message": e["msg"]} for e in exc.errors()]
    fields = ", ".join(dict.fromkeys(e["field"] for e in errors))
    return problem(422, "Invalid request", f"invalid fields: {fields}", code="validation_error",
                   errors=errors)


async def _http_error(_: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    title = {404: "Not found", 405: "Method not allowed", 413: "Payload too large"}.get(
        exc.status_code, "Request failed"
    )
    code = title.lower().replace(" ", "_")
    return problem(exc.status_code, title, str(exc.detail), code=code,
                   headers=dict(exc.headers or {}))


async def _unexpected(_: Request, exc: Exception) -> JSONResponse:
    log.exception("unhandled error", exc_info=exc)
    return problem(500, "Internal error", "the server failed; see its log", code="internal_error")


def install(app: FastAPI) -> None:
    """Handlers are looked up along the exception's MRO, so base classes cover subclasses."""
    app.add_exception_handler(ServiceError, _service_error)
    for cls in (tuner.DatasetError, tuner.SearchSpaceError, tuner.PredictionInputError,
                tuner.ConfigError):
        app.add_exception_handler(cls, _tuner_input_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(ValidationError, _validation_error)  # bodies we parse ourselves
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(Exception, _unexpected)
