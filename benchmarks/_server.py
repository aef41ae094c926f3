"""The API plus a trivial JSON echo route: the HTTP floor for the latency benchmark."""

from __future__ import annotations

import sys
from typing import Any

import uvicorn

from service.api.app import create_app
from service.settings import Settings


def main() -> None:
    app = create_app(Settings())

    @app.post("/bench/echo")
    def echo(body: dict[str, Any]) -> dict[str, Any]:
        return body

    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), log_level="warning")


if __name__ == "__main__":
    main()
