"""RFC 9457 problem documents for every error the API answers."""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

import tuner
from service.db import describe_outage, is_transient
from service.errors import TYPE_BASE, ServiceError, input_problem, problem_body
from service.storage import is_disk_full

log = logging.getLogger("grovekeeper.api")
PROBLEM = "application/problem+json"
# Seconds a client is asked to wait while the database is unreachable; a restart of
# PostgreSQL takes a few seconds.
RETRY_AFTER_SECONDS = 5


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
    body = problem_body(status, title, detail, code=code, errors=errors)
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
    body = input_problem(exc)  # the same document a job the worker finds bad keeps
    return ProblemResponse(body, status_code=422, media_type=PROBLEM)


def _entry(e: Mapping[str, Any]) -> dict[str, Any]:
    if e.get("type") in ("json_invalid", "json_type"):
        # The location of a JSON syntax error is a character offset, not a field.
        offset = [p for p in e.get("loc", ()) if isinstance(p, int)]
        where = f" at character {offset[0]}" if offset else ""
        reason = (e.get("ctx") or {}).get("error", "")
        return {"field": "body", "message": f"the body is not valid JSON{where}"
                + (f": {reason}" if reason else "")}
    return {"field": _field(tuple(e.get("loc", ()))), "message": e["msg"]}


async def _validation_error(_: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError | ValidationError)
    errors = [_entry(e) for e in exc.errors()]
    fields = ", ".join(dict.fromkeys(e["field"] for e in errors))
    return problem(422, "Invalid request", f"invalid fields: {fields}", code="validation_error",
                   errors=errors)


async def _http_error(_: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    title = {400: "Bad request", 404: "Not found", 405: "Method not allowed",
             413: "Payload too large", 415: "Unsupported media type"}.get(
        exc.status_code, "Request failed"
    )
    code = title.lower().replace(" ", "_")
    return problem(exc.status_code, title, str(exc.detail), code=code,
                   headers=dict(exc.headers or {}))


def database_unavailable(exc: BaseException) -> JSONResponse:
    """503 with ``Retry-After``: the request was fine, the database is away for now."""
    return problem(503, "Database unavailable",
                   f"{describe_outage(exc)}; try again shortly", code="database_unavailable",
                   headers={"Retry-After": str(RETRY_AFTER_SECONDS)})


def disk_full() -> JSONResponse:
    """507: the server has no room left for what it was asked to store; nothing was kept."""
    return problem(507, "Insufficient storage",
                   "the server ran out of disk space while storing this; nothing was kept. "
                   "Try again once an operator has freed space", code="disk_full")


async def _unexpected(_: Request, exc: Exception) -> JSONResponse:
    if is_disk_full(exc):
        log.error("disk full: %s", type(exc).__name__)
        return disk_full()
    if is_transient(exc):
        log.warning("database unavailable: %s", type(exc).__name__)
        return database_unavailable(exc)
    log.exception("unhandled error", exc_info=exc)
    return problem(500, "Internal error", "the server failed; see its log", code="internal_error")


class CatchAll:
    """Outermost guard: an unexpected exception becomes a 500 problem document.

    Starlette's own handler for ``Exception`` answers and then re-raises, so the server
    logs the error twice and drops the connection; this one answers and keeps serving.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def watch(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, watch)
        except Exception as exc:  # noqa: BLE001 - the last line of defence
            if is_disk_full(exc):
                log.error("disk full: %s", type(exc).__name__)
                if not started:
                    await disk_full()(scope, receive, send)
                return
            if is_transient(exc):
                log.warning("database unavailable: %s", type(exc).__name__)
                if not started:
                    await database_unavailable(exc)(scope, receive, send)
                return
            log.exception("unhandled error", exc_info=exc)
            if not started:
                response = problem(500, "Internal error", "the server failed; see its log",
                                   code="internal_error")
                await response(scope, receive, send)


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
    app.add_middleware(CatchAll)
    document(app)


# -- OpenAPI: say what error answers really look like ------------------------------

PROBLEM_SCHEMA: dict[str, Any] = {
    "title": "Problem",
    "type": "object",
    "description": "An RFC 9457 problem document.",
    "required": ["type", "title", "status", "detail", "code"],
    "properties": {
        "type": {"type": "string"},
        "title": {"type": "string"},
        "status": {"type": "integer"},
        "detail": {"type": "string"},
        "code": {"type": "string", "description": "stable, machine-readable error code"},
        "errors": {
            "type": "array",
            "description": "the fields at fault",
            "items": {
                "type": "object",
                "required": ["field", "message"],
                "properties": {"field": {"type": "string"}, "message": {"type": "string"}},
            },
        },
    },
}
_ERRORS = {
    "400": "Malformed request (for example broken multipart data)",
    "401": "No API key, or an unknown or revoked one",
    "403": "The key's scope does not allow this method",
    "404": "No such resource",
    "405": "Method not allowed",
    "409": "Conflicts with the resource's state",
    "413": "Body or batch over the configured limit",
    "415": "Content type or file format not accepted",
    "422": "A field is invalid; `errors` names each one",
    "500": "Server failure (never a client mistake)",
    "503": "The database is unreachable for now; retry after `Retry-After` seconds",
    "507": "No disk space left to store an upload; nothing was kept",
}
_PUBLIC = ("/healthz", "/readyz")


def _example(code: str) -> dict[str, Any]:
    title = _ERRORS.get(code, "Database unreachable").split(" (")[0].split(";")[0]
    slug = {"503": "not_ready"}.get(code, title.lower().replace(" ", "_").replace(",", ""))
    return {"type": TYPE_BASE + slug, "title": title, "status": int(code),
            "detail": title, "code": slug}


def document(app: FastAPI) -> None:
    """Replace FastAPI's JSON 422 schema with problem documents on every operation."""
    build = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is not None:
            return app.openapi_schema
        spec = build()
        components = spec.setdefault("components", {}).setdefault("schemas", {})
        components["Problem"] = PROBLEM_SCHEMA
        for name in ("HTTPValidationError", "ValidationError"):
            components.pop(name, None)
        ref = {"$ref": "#/components/schemas/Problem"}
        for path, item in spec.get("paths", {}).items():
            for operation in item.values():
                responses = operation.setdefault("responses", {})
                codes = ["500"] if path in _PUBLIC else list(_ERRORS)
                if path == "/readyz":
                    codes.append("503")
                for code in codes:
                    description = _ERRORS.get(code, "Database unreachable")
                    responses[code] = {"description": description,
                                       "content": {PROBLEM: {"schema": ref,
                                                             "example": _example(code)}}}
        app.openapi_schema = spec
        return spec

    app.openapi = openapi  # type: ignore[method-assign]
