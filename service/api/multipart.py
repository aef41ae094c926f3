"""A streaming multipart/form-data reader for uploads.

Starlette's form parser spools a file part to the system temp folder before any route
code can look at its size. This one writes the ``file`` part straight to our own
temporary file while counting it, and stops (413) the moment it passes the limit; the
other fields are small text held in memory, each bounded.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from python_multipart.multipart import MultipartParser, parse_options_header

from service.api.spool import Spool
from service.errors import BadRequest, PayloadTooLarge, Unprocessable

MAX_PARTS = 8
MAX_FIELD_BYTES = 64 << 10


@dataclass
class Form:
    fields: dict[str, str] = field(default_factory=dict)
    filename: str | None = None
    content_type: str = ""
    size: int = 0
    sha256: str = ""
    has_file: bool = False


class _Reader:
    def __init__(self, limit: int, spool: Spool) -> None:
        self.form = Form()
        self.limit = limit
        self.spool = spool
        self.parts = 0
        self.headers: dict[bytes, bytes] = {}
        self._field, self._value = b"", b""
        self.name: str | None = None
        self.buffer = bytearray()
        self.in_file = False

    # -- parser callbacks ---------------------------------------------------------
    def on_part_begin(self) -> None:
        self.parts += 1
        if self.parts > MAX_PARTS:
            raise Unprocessable(f"a multipart upload may have at most {MAX_PARTS} fields",
                                errors=[{"field": "body", "message": "too many fields"}])
        self.headers, self.buffer, self.in_file, self.name = {}, bytearray(), False, None

    def on_header_field(self, data: bytes, start: int, end: int) -> None:
        self._field += data[start:end]

    def on_header_value(self, data: bytes, start: int, end: int) -> None:
        self._value += data[start:end]

    def on_header_end(self) -> None:
        self.headers[self._field.strip().lower()] = self._value.strip()
        self._field, self._value = b"", b""

    def on_headers_finished(self) -> None:
        _, options = parse_options_header(self.headers.get(b"content-disposition", b""))
        self.name = options.get(b"name", b"").decode("utf-8", "replace")
        if self.name == "file":
            if self.form.has_file:
                raise BadRequest("a multipart upload carries one file; this one has more "
                                 "files than that")
            self.in_file = self.form.has_file = True
            filename = options.get(b"filename")
            self.form.filename = filename.decode("utf-8", "replace") if filename else None
            self.form.content_type = self.headers.get(b"content-type", b"").decode("latin-1")

    def on_part_data(self, data: bytes, start: int, end: int) -> None:
        chunk = data[start:end]
        if self.in_file:
            self.form.size += len(chunk)
            if self.form.size > self.limit:
                raise PayloadTooLarge(
                    f"upload exceeds the limit of {self.limit // (1 << 20)} MB")
            self.spool.add(chunk)
            return
        self.buffer += chunk
        if len(self.buffer) > MAX_FIELD_BYTES:
            raise Unprocessable(f"form field {self.name!r} is longer than "
                                f"{MAX_FIELD_BYTES >> 10} KB",
                                errors=[{"field": self.name or "body", "message": "too long"}])

    def on_part_end(self) -> None:
        if not self.in_file and self.name:
            self.form.fields[self.name] = self.buffer.decode("utf-8", "replace")


async def read_form(request: Any, dest: Path, *, limit: int, scanner: Any = None) -> Form:
    """Stream ``request``'s multipart body: the ``file`` part to ``dest`` (at most
    ``limit`` bytes, written, hashed and fed to ``scanner`` by a :class:`Spool`), the other
    fields into ``Form.fields``."""
    _, options = parse_options_header(request.headers.get("content-type", ""))
    boundary = options.get(b"boundary")
    if not boundary:
        raise BadRequest("multipart/form-data without a boundary")
    with open(dest, "wb") as out, Spool(out, scanner) as spool:
        reader = _Reader(limit, spool)
        callbacks = {name: getattr(reader, name) for name in (
            "on_part_begin", "on_part_data", "on_part_end", "on_header_field",
            "on_header_value", "on_header_end", "on_headers_finished")}
        parser = MultipartParser(boundary, callbacks)  # type: ignore[arg-type]
        try:
            async for chunk in request.stream():
                parser.write(chunk)
                await spool.settle()
            parser.finalize()
        except (PayloadTooLarge, Unprocessable, BadRequest):
            raise
        except Exception as exc:
            if type(exc).__module__.startswith("python_multipart"):
                raise BadRequest(f"malformed multipart body: {exc}") from None
            raise
        reader.form.sha256 = await spool.finish()
    return reader.form
