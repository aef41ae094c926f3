"""CSV answers for list endpoints (``Accept: text/csv`` or ``?format=csv``)."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterable, Sequence
from datetime import datetime
from typing import Any

from fastapi import Request
from fastapi.responses import Response

CSV = "text/csv; charset=utf-8"


def wants_csv(request: Request, fmt: str | None) -> bool:
    if fmt is not None:
        return fmt.lower() == "csv"
    accept = request.headers.get("accept", "")
    return "text/csv" in accept and "application/json" not in accept


def _cell(value: Any) -> Any:
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, dict | list):
        return json.dumps(value, separators=(",", ":"))
    return "" if value is None else value


def csv_response(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> Response:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([_cell(v) for v in row])
    return Response(buffer.getvalue(), media_type=CSV)
