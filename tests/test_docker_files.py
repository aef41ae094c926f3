"""docker/ stays consistent with the code: no Docker engine here, so check the files."""

from __future__ import annotations

import re

import yaml

from service.cli import build_parser
from tests.conftest import ROOT

DOCKER = ROOT / "docker"


def test_compose_runs_postgres_the_api_and_two_workers_on_one_database() -> None:
    compose = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    services = compose["services"]
    ours = {name: s for name, s in services.items() if name != "postgres"}
    assert sorted(s["command"][0] for s in ours.values()) == ["api", "worker", "worker"]
    urls = {s["environment"]["GROVEKEEPER_DATABASE_URL"] for s in ours.values()}
    assert len(urls) == 1 and next(iter(urls)).startswith("postgresql+psycopg://")
    assert "@postgres:5432/" in next(iter(urls))
    pg = services["postgres"]["environment"]
    assert f"{pg['POSTGRES_USER']}:{pg['POSTGRES_PASSWORD']}@" in next(iter(urls))
    # Every process sees the same artifacts (uploads land in the API, workers read them).
    assert len({tuple(s["volumes"]) for s in ours.values()}) == 1
    assert len({s["environment"]["GROVEKEEPER_ARTIFACTS"] for s in ours.values()}) == 1
    for service in ours.values():
        assert service["depends_on"]["postgres"]["condition"] == "service_healthy"


def test_dockerfile_is_slim_non_root_with_a_healthcheck() -> None:
    text = (DOCKER / "Dockerfile").read_text()
    assert re.search(r"^FROM python:3\.1\d-slim$", text, re.M)
    user = re.search(r"^USER (\S+)$", text, re.M)
    assert user and user.group(1) not in ("root", "0")
    assert "HEALTHCHECK" in text and "/healthz" in text
    entry = (DOCKER / "entrypoint.sh").read_text()
    # Every grovekeeper sub-command the entry point runs exists.
    commands = set(build_parser()._subparsers._group_actions[0].choices)  # type: ignore[union-attr]
    used = set(re.findall(r"exec grovekeeper (\w+)|^  grovekeeper (\w+)", entry, re.M))
    used = {name for pair in used for name in pair if name}
    assert used and used <= commands, used - commands
