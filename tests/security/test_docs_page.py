"""/docs loads nothing from another host: its scripts and styles come from this server."""

from __future__ import annotations

import re

import pytest

from tests.conftest import Server

pytestmark = pytest.mark.e2e


def test_docs_page_uses_only_local_assets(server: Server) -> None:
    with server.client() as client:
        page = client.get("/docs")
        assert page.status_code == 200
        urls = re.findall(r"""(?:src|href|url)\s*[=:]\s*['"]([^'"]+)['"]""", page.text)
        assert urls, page.text
        assert not [u for u in urls if "//" in u], urls  # no absolute, outside address
        assets = [u for u in urls if u.startswith("/docs/assets/")]
        assert {a.rsplit("/", 1)[1] for a in assets} >= {"swagger-ui-bundle.js",
                                                          "swagger-ui.css"}
        for url in assets:
            got = client.get(url)
            assert got.status_code == 200 and len(got.content) > 1000, url
        assert '"validatorUrl": null' in page.text  # no outside validator either
        assert client.get("/docs/assets/..%2Fcore.py").status_code == 404
        assert client.get("/openapi.json").json()["openapi"].startswith("3.1")
