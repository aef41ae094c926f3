"""Domain errors raised by routes and the repository; the API turns each into an
RFC 9457 problem document (see service/api/problems.py)."""

from __future__ import annotations

from typing import Any


class ServiceError(Exception):
    status = 500
    code = "internal_error"
    title = "Internal error"

    def __init__(self, detail: str, *, errors: list[dict[str, Any]] | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = errors or []


class BadRequest(ServiceError):
    status = 400
    code = "bad_request"
    title = "Bad request"


class Unauthorized(ServiceError):
    status = 401
    code = "unauthorized"
    title = "Authentication required"


class Forbidden(ServiceError):
    status = 403
    code = "forbidden"
    title = "Not allowed for this key"


class NotFound(ServiceError):
    status = 404
    code = "not_found"
    title = "Not found"


class Conflict(ServiceError):
    status = 409
    code = "conflict"
    title = "Conflict"


class PayloadTooLarge(ServiceError):
    status = 413
    code = "payload_too_large"
    title = "Payload too large"


class UnsupportedMediaType(ServiceError):
    status = 415
    code = "unsupported_media_type"
    title = "Unsupported media type"


class Unprocessable(ServiceError):
    status = 422
    code = "invalid_input"
    title = "Invalid input"

    def __init__(
        self, detail: str, *, errors: list[dict[str, Any]] | None = None, code: str | None = None
    ) -> None:
        super().__init__(detail, errors=errors)
        if code:
            self.code = code


class InsufficientStorage(ServiceError):
    status = 507
    code = "disk_full"
    title = "Insufficient storage"


#: The problem documents' ``type`` is this plus their ``code``.
TYPE_BASE = "https://grovekeeper.invalid/problems/"


def problem_body(status: int, title: str, detail: str, *, code: str,
                 errors: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    """An RFC 9457 problem document, as the API answers it and as a failed job keeps it."""
    body: dict[str, Any] = {"type": TYPE_BASE + code, "title": title, "status": status,
                            "detail": detail, "code": code}
    if errors:
        body["errors"] = errors
    return body


def input_problem(exc: BaseException) -> dict[str, Any]:
    """The 422 problem document of a bad-input error of the tuner (a ValueError with
    ``.errors``): the API answers it at submission, a job the worker finds bad keeps it."""
    errors = list(getattr(exc, "errors", None) or [])
    return problem_body(422, "Invalid input", str(exc), code="invalid_input", errors=errors)


def describe_failure(exc: BaseException) -> str:
    """What went wrong, in words any reader of the job may see.

    An exception's own text can hold file paths, database hosts or user names; that
    detail goes to the log only. This names the kind of cause.
    """
    import sqlalchemy.exc

    from service.storage import ArtifactCorrupt, ArtifactMissing

    if isinstance(exc, ArtifactMissing | FileNotFoundError):
        return "a stored file the job needs is missing (see the worker log)"
    if isinstance(exc, ArtifactCorrupt):
        return "a stored file the job needs failed its checksum (see the worker log)"
    if isinstance(exc, MemoryError):
        return "the worker ran out of memory"
    if isinstance(exc, sqlalchemy.exc.OperationalError | sqlalchemy.exc.InterfaceError):
        return "the database could not be reached or refused a query (see the worker log)"
    if isinstance(exc, PermissionError):
        return "the worker was not allowed to read or write a file (see the worker log)"
    if isinstance(exc, OSError):
        return "a file or network operation failed (see the worker log)"
    return f"an unexpected {type(exc).__name__} in the worker (see the worker log)"
