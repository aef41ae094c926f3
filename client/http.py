"""The HTTP side of the client commands: one-line errors and exit codes scripts rely on."""

from __future__ import annotations

import json
from collections.abc import Iterator, Sequence
from typing import Any

import httpx

# Exit codes of the client commands (also in `grovekeeper --help` epilogs).
OK = 0
JOB_FAILED = 1  # the job ended failed or cancelled
USAGE = 2  # bad arguments or an unreadable input file (argparse uses 2 as well)
UNREACHABLE = 3  # no answer from the server (refused, timed out)
REFUSED = 4  # the server answered 4xx: the request was wrong or not allowed
SERVER_ERROR = 5  # the server answered 5xx
INTERRUPTED = 130

EXIT_CODES = (
    "exit codes: 0 success; 1 the job ended failed or cancelled; 2 bad arguments or input "
    "file; 3 server unreachable; 4 request refused (4xx); 5 server error (5xx)"
)


class ClientError(Exception):
    """A failure with the exit code to leave with and a one-line reason."""

    def __init__(self, code: int, reason: str) -> None:
        super().__init__(reason)
        self.code = code
        self.reason = " ".join(reason.split())  # one line, whatever the server said


def _reason(response: httpx.Response) -> str:
    try:
        body = response.json()
    except (json.JSONDecodeError, UnicodeDecodeError):
        text = response.text.strip()[:200]
        return f"HTTP {response.status_code}: {text or response.reason_phrase}"
    if isinstance(body, dict) and "detail" in body:
        code = body.get("code") or body.get("title") or ""
        reason = f"HTTP {response.status_code} {code}: {body['detail']}"
        # The fields at fault, unless the detail already names them all.
        fields = [f"{e.get('field')}: {e.get('message')}" for e in body.get("errors") or []
                  if isinstance(e, dict) and f"{e.get('field')}: " not in reason]
        if fields:
            more = f" (+{len(fields) - 2} more)" if len(fields) > 2 else ""
            reason += " [" + "; ".join(fields[:2]) + more + "]"
        return reason
    return f"HTTP {response.status_code}: {str(body)[:200]}"


class Api:
    """A thin httpx client for one server; every failure becomes a ClientError."""

    def __init__(self, url: str, api_key: str | None, timeout: float = 60.0) -> None:
        headers = {"Authorization": f"Bearer {api_key}"} if api_key else {}
        self.url = url.rstrip("/")
        self.http = httpx.Client(base_url=self.url, headers=headers, timeout=timeout)

    def __enter__(self) -> Api:
        return self

    def __exit__(self, *_: object) -> None:
        self.http.close()

    def request(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        try:
            response = self.http.request(method, path, **kwargs)
        except httpx.TimeoutException as exc:
            raise ClientError(UNREACHABLE, f"{self.url} did not answer in time ({exc})") from exc
        except httpx.TransportError as exc:
            raise ClientError(UNREACHABLE, f"cannot reach {self.url}: {exc}") from exc
        if response.status_code >= 500:
            raise ClientError(SERVER_ERROR, _reason(response))
        if response.status_code >= 400:
            raise ClientError(REFUSED, _reason(response))
        return response

    def get(self, path: str, **kwargs: Any) -> Any:
        return self.request("GET", path, **kwargs).json()

    def items(self, path: str, params: dict[str, Any] | None = None,
              most: int | None = None) -> dict[str, Any]:
        """Up to ``most`` items of a list (all without it), walking its pages with
        ``next``: ``{"items", "total", "next"}`` as one page would be, plus any other
        fields of the first page (a leaderboard's metric and direction)."""
        params = dict(params or {})
        first: dict[str, Any] | None = None
        items: list[Any] = []
        while True:
            if most is not None:
                params["limit"] = min(most - len(items), 1000)
            page = self.get(path, params=params)
            first = first or page
            items.extend(page["items"])
            if page["next"] is None or (most is not None and len(items) >= most):
                return {**first, "items": items, "total": page["total"],
                        "next": page["next"]}
            params["cursor"] = page["next"]

    def events(self, path: str, **kwargs: Any) -> Iterator[tuple[str, dict[str, Any]]]:
        """A Server-Sent Events stream as (event, data) pairs, data parsed as JSON; ends
        when the server ends the stream. Keep-alive comments are passed on as
        ``("ping", {})`` so a caller can redraw between events."""
        try:
            with self.http.stream("GET", path, **kwargs) as response:
                if response.status_code >= 400:
                    response.read()
                    code = SERVER_ERROR if response.status_code >= 500 else REFUSED
                    raise ClientError(code, _reason(response))
                event, data = "message", []
                for line in response.iter_lines():
                    if line.startswith(":"):
                        yield "ping", {}
                    elif line.startswith("event:"):
                        event = line[6:].strip()
                    elif line.startswith("data:"):
                        data.append(line[5:].lstrip())
                    elif not line and data:
                        yield event, json.loads("\n".join(data))
                        event, data = "message", []
        except httpx.TimeoutException as exc:
            raise ClientError(UNREACHABLE, f"{self.url} did not answer in time ({exc})") from exc
        except httpx.TransportError as exc:
            raise ClientError(UNREACHABLE, f"cannot reach {self.url}: {exc}") from exc

    def post(self, path: str, **kwargs: Any) -> Any:
        return self.request("POST", path, **kwargs).json()


def fmt(value: Any) -> str:
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float):
        return f"{value:.4g}" if abs(value) < 1e-3 or abs(value) >= 1e5 else f"{value:.4f}"
    if value is None:
        return ""
    if isinstance(value, dict | list):
        return json.dumps(value, separators=(",", ":"))
    return str(value)


def table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """An aligned plain-text table: numbers right-aligned, text left-aligned."""
    cells = [[fmt(v) for v in row] for row in rows]
    numeric = [all(isinstance(r[i], int | float) and not isinstance(r[i], bool)
                   or r[i] is None for r in rows) and bool(rows) for i in range(len(header))]
    widths = [max([len(h), *(len(r[i]) for r in cells)]) for i, h in enumerate(header)]

    def line(values: Sequence[str]) -> str:
        parts = [v.rjust(w) if num else v.ljust(w)
                 for v, w, num in zip(values, widths, numeric, strict=True)]
        return "  ".join(parts).rstrip()

    return "\n".join([line(list(header)), *(line(r) for r in cells)]) + "\n"
