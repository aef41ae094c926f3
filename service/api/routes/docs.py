"""The interactive API page (/docs) with its scripts served from this server.

FastAPI's default page loads Swagger UI from a public CDN, so every visit told an
outside host that this server exists and ran whatever script it was given. The same
files ship in the ``fastapi-offline`` package (Swagger UI 5, which reads OpenAPI 3.1);
they are served here under /docs/assets, and the page asks no outside validator.

/docs and /openapi.json need no key: they describe the API's shape (the same for every
server of this version), never data. SECURITY.md says so, and how to hide them.
"""

from __future__ import annotations

from pathlib import Path

import fastapi_offline
from fastapi import APIRouter, HTTPException
from fastapi.openapi.docs import get_swagger_ui_html, get_swagger_ui_oauth2_redirect_html
from fastapi.responses import FileResponse, HTMLResponse

ASSETS = Path(fastapi_offline.__file__).parent / "static"
FILES = {"swagger-ui-bundle.js": "text/javascript", "swagger-ui.css": "text/css",
         "favicon.png": "image/png"}
router = APIRouter(include_in_schema=False)


@router.get("/docs")
def docs_page() -> HTMLResponse:
    return get_swagger_ui_html(
        openapi_url="/openapi.json", title="Grovekeeper API",
        swagger_js_url="/docs/assets/swagger-ui-bundle.js",
        swagger_css_url="/docs/assets/swagger-ui.css",
        swagger_favicon_url="/docs/assets/favicon.png",
        oauth2_redirect_url="/docs/oauth2-redirect",
        swagger_ui_parameters={"validatorUrl": None})


@router.get("/docs/oauth2-redirect")
def docs_redirect() -> HTMLResponse:
    return get_swagger_ui_oauth2_redirect_html()


@router.get("/docs/assets/{name}")
def docs_asset(name: str) -> FileResponse:
    if name not in FILES:  # a fixed list: no path from the request reaches the disk
        raise HTTPException(404, f"no asset {name!r}")
    return FileResponse(ASSETS / name, media_type=FILES[name],
                        headers={"Cache-Control": "public, max-age=86400"})
