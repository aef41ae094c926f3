"""One way to page every list: `{"items", "total", "next"}`, opaque cursors, `?limit=`.

A cursor is the sort key of the last item of a page (keyset paging), so rows added
while a caller walks the pages never shift a page or repeat an item. It is opaque to
callers: base64url of the list's name and the key as JSON, plus a short check digest,
so a cursor edited by hand, cut short or taken from another list is a 422 naming
`cursor` rather than a page that silently starts somewhere else. The digest is no
secret and no signature; a cursor grants nothing that the list itself does not.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
from collections.abc import Callable, Sequence
from datetime import datetime
from typing import Annotated, Any, Generic, TypeVar

from fastapi import Query
from pydantic import BaseModel

from service.errors import Unprocessable

T = TypeVar("T")
R = TypeVar("R")

DEFAULT_LIMIT = 100
MAX_LIMIT = 1000
_DIGEST_BYTES = 6

LimitQuery = Annotated[int, Query(ge=1, le=MAX_LIMIT,
                                  description="most items on one page")]
CursorQuery = Annotated[str | None, Query(
    max_length=2000, description="the `next` value of the previous page")]


class Page(BaseModel, Generic[T]):
    """A page of a list. `next` continues it as `?cursor=`; null on the last page."""

    items: list[T]
    total: int
    next: str | None = None


def _digest(list_name: str, payload: bytes) -> bytes:
    return hashlib.blake2b(payload, digest_size=_DIGEST_BYTES,
                           person=list_name.encode()[:16]).digest()


def _plain(value: Any) -> Any:
    return value.isoformat() if isinstance(value, datetime) else value


def encode(list_name: str, key: Sequence[Any]) -> str:
    """The cursor that continues ``list_name`` after the item whose sort key is ``key``."""
    payload = json.dumps([list_name, [_plain(v) for v in key]],
                         separators=(",", ":")).encode()
    raw = payload + _digest(list_name, payload)
    return base64.urlsafe_b64encode(raw).decode().rstrip("=")


def bad_cursor(message: str = "not a cursor this list gave out") -> Unprocessable:
    return Unprocessable(f"cursor: {message}; pass the 'next' value of an earlier page",
                         errors=[{"field": "cursor", "message": message}])


def decode(list_name: str, cursor: str, kinds: Sequence[type]) -> tuple[Any, ...]:
    """The sort key inside ``cursor``, each part converted to its kind in ``kinds``
    (``datetime`` from ISO text); any doubt is a 422 naming ``cursor``."""
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
    except (binascii.Error, ValueError) as exc:
        raise bad_cursor() from exc
    payload, check = raw[:-_DIGEST_BYTES], raw[-_DIGEST_BYTES:]
    if len(raw) <= _DIGEST_BYTES or _digest(list_name, payload) != check:
        raise bad_cursor()
    try:
        name, key = json.loads(payload)
    except (ValueError, TypeError) as exc:
        raise bad_cursor() from exc
    if name != list_name or not isinstance(key, list) or len(key) != len(kinds):
        raise bad_cursor()
    out: list[Any] = []
    for value, kind in zip(key, kinds, strict=True):
        out.append(_convert(value, kind))
    return tuple(out)


def _convert(value: Any, kind: type) -> Any:
    if value is None:
        return None
    try:
        if kind is datetime:
            return datetime.fromisoformat(value)
        if kind is float and isinstance(value, int | float) and not isinstance(value, bool):
            return float(value)
        if isinstance(value, kind) and not isinstance(value, bool):
            return value
    except (TypeError, ValueError) as exc:
        raise bad_cursor() from exc
    raise bad_cursor()


def cut(rows: Sequence[R], limit: int, list_name: str,
        key: Callable[[R], Sequence[Any]]) -> tuple[list[R], str | None]:
    """Split rows fetched with ``limit + 1`` into the page and the cursor of the next
    one (None when this page is the last)."""
    page = list(rows[:limit])
    if len(rows) > limit and page:
        return page, encode(list_name, key(page[-1]))
    return page, None
