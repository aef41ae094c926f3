"""Logging: readable text by default, JSON lines when asked for.

``log_context(job_id=..., trial=...)`` attaches ids to every record logged inside it
(same thread), so a worker's lines can be filtered by job without each call passing them.
"""

from __future__ import annotations

import contextlib
import json
import logging
import sys
from collections.abc import Iterator, Mapping
from contextvars import ContextVar
from datetime import UTC, datetime
from types import MappingProxyType
from typing import Any

CONTEXT_KEYS = ("job_id", "trial", "worker_id")
_context: ContextVar[Mapping[str, Any]] = ContextVar(
    "grovekeeper_log_context", default=MappingProxyType({})
)


@contextlib.contextmanager
def log_context(**fields: Any) -> Iterator[None]:
    token = _context.set({**_context.get(), **fields})
    try:
        yield
    finally:
        _context.reset(token)


class ContextFilter(logging.Filter):
    """Copies the current log context onto each record (an explicit ``extra`` wins)."""

    def filter(self, record: logging.LogRecord) -> bool:
        for key, value in _context.get().items():
            if not hasattr(record, key):
                setattr(record, key, value)
        return True


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        for key in CONTEXT_KEYS:
            if hasattr(record, key):
                entry[key] = getattr(record, key)
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry)


class TextFormatter(logging.Formatter):
    """Human text; the ids, when present, follow the message as ``key=value``."""

    def __init__(self) -> None:
        super().__init__("%(asctime)s %(levelname)s %(name)s: %(message)s")

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        ids = " ".join(f"{k}={getattr(record, k)}" for k in ("job_id", "trial")
                       if hasattr(record, k))
        return f"{text} [{ids}]" if ids else text


def configure(fmt: str = "text", level: int = logging.INFO) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter() if fmt == "json" else TextFormatter())
    handler.addFilter(ContextFilter())
    root = logging.getLogger("grovekeeper")
    root.handlers[:] = [handler]
    root.setLevel(level)
    root.propagate = False
