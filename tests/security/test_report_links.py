"""Signed report links on a real server with keys: the report opens without a header,
and nothing else does.

Two finished jobs on one server; a read key mints links for the first. Every link on the
page works through the signed prefix with no ``Authorization`` header; another job,
another job's model, a change, an altered link and an expired one are refused with a
problem document. A second API process on the same database accepts the first one's
links (the secret lives in the database).
"""

from __future__ import annotations

import re
import subprocess
import sys
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import urljoin, urlsplit

import httpx
import pytest
import sqlalchemy as sa

from examples.demo_data import kilns
from service import links
from service.db import session_scope
from service.tables import ServerSecret
from tests.conftest import ROOT, Server, child_env, wait_for_job
from tests.security.attack import create_key

pytestmark = pytest.mark.e2e


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict]:
    home = tmp_path_factory.mktemp("links") / "home"
    admin = create_key(home, "admin")
    reader = create_key(home, "read")
    server = Server(home=home).start()
    try:
        with server.client(headers={"Authorization": f"Bearer {admin}"}) as client:
            csv = kilns(n_rows=300, seed=3).to_csv(index=False).encode()
            up = client.post("/v1/datasets", params={"name": "kilns"}, content=csv,
                             headers={"Content-Type": "text/csv"}).json()
            ids = [client.post("/v1/jobs", json={"dataset_id": up["id"], "target": "defect",
                                                 "budget": {"trials": 2}, "seed": s}
                               ).json()["id"] for s in (1, 2)]
            jobs = [wait_for_job(client, i) for i in ids]
        assert [j["status"] for j in jobs] == ["succeeded", "succeeded"], server.log()
        yield {"server": server, "home": home, "admin": admin, "reader": reader,
               "jobs": jobs}
    finally:
        server.stop()


def _mint(setup: dict, job_id: str, **body: int) -> httpx.Response:
    with setup["server"].client(
            headers={"Authorization": f"Bearer {setup['reader']}"}) as client:
        return client.post(f"/v1/jobs/{job_id}/report-links", json=body or None)


def _bare(url: str, method: str = "GET") -> httpx.Response:
    """A request with no Authorization header at all, as a browser sends it."""
    return httpx.request(method, url, timeout=60, follow_redirects=False)


def _refused(response: httpx.Response, status: int, code: str) -> None:
    assert response.status_code == status, (response.status_code, response.text)
    assert response.headers["content-type"].startswith("application/problem+json")
    assert response.json()["code"] == code, response.json()


def test_a_read_key_mints_a_link_that_opens_the_report_and_every_link_on_it(
        setup: dict) -> None:
    job = setup["jobs"][0]
    before = datetime.now(UTC)
    minted = _mint(setup, job["id"])
    assert minted.status_code == 200, minted.text
    url, expires_at = minted.json()["url"], datetime.fromisoformat(minted.json()["expires_at"])
    # The default validity is links.DEFAULT_SECONDS from the request (whole seconds).
    assert -1 <= (expires_at - before).total_seconds() - links.DEFAULT_SECONDS <= 60
    assert urlsplit(url).path.endswith(f"/jobs/{job['id']}/report")

    # Without the link the page needs a key; with it, no header at all.
    _refused(_bare(f"{setup['server'].base}/v1/jobs/{job['id']}/report"), 401, "unauthorized")
    page = _bare(url)
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    assert job["id"] in page.text
    targets = sorted(set(re.findall(r'(?:href|src)="([^"#]+)"', page.text)))
    assert any(t.startswith("plots/") for t in targets), targets
    opened = {}
    for target in targets:
        full = urljoin(url, target.replace("&amp;", "&"))
        assert urlsplit(full).path.startswith(links.PREFIX), (target, full)
        answer = _bare(full)
        assert answer.status_code == 200, (target, answer.status_code, answer.text[:300])
        opened[target] = answer
    # The page links the job's JSON and the model's JSON: both are the real resources.
    jsons = [a.json() for a in opened.values()
             if a.headers["content-type"].startswith("application/json")]
    assert any(d.get("id") == job["id"] for d in jsons), targets
    assert any(d.get("id") == job["model_id"] for d in jsons), targets


def test_a_link_opens_nothing_of_another_job_and_changes_nothing(setup: dict) -> None:
    first, second = setup["jobs"]
    url = _mint(setup, first["id"]).json()["url"]
    base = url[: url.index("/jobs/")]  # .../v1/links/{token}
    _refused(_bare(f"{base}/jobs/{second['id']}/report"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/jobs/{second['id']}"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/models/{second['model_id']}"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/models/{second['model_id']}/file"), 403, "link_out_of_scope")
    # Paths of its own job that the page does not link are closed too.
    _refused(_bare(f"{base}/jobs/{first['id']}/trials"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/datasets/{first['dataset_id']}"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/audit"), 403, "link_out_of_scope")
    # Reads only: no cancel, no prediction, no delete through a link.
    _refused(_bare(f"{base}/jobs/{first['id']}/cancel", "POST"), 403, "link_out_of_scope")
    _refused(_bare(f"{base}/models/{first['model_id']}/predictions", "POST"), 403,
             "link_out_of_scope")
    _refused(_bare(f"{base}/jobs/{first['id']}", "DELETE"), 403, "link_out_of_scope")
    with setup["server"].client(
            headers={"Authorization": f"Bearer {setup['admin']}"}) as client:
        assert client.get(f"/v1/jobs/{first['id']}").json()["status"] == "succeeded"


def test_an_altered_link_is_refused(setup: dict) -> None:
    first, second = setup["jobs"]
    url = _mint(setup, first["id"]).json()["url"]
    token = urlsplit(url).path.split("/")[3]
    job_id, expires, sig = token.split(".")
    flipped = sig[:-2] + ("A" if sig[-2] != "A" else "B") + sig[-1]
    for bad in (f"{job_id}.{expires}.{flipped}",  # another signature
                f"{job_id}.{int(expires) + 3600}.{sig}",  # a later expiry
                f"{second['id']}.{expires}.{sig}",  # another job under this signature
                f"{job_id}.{expires}", "not-a-token"):
        altered = url.replace(token, bad).replace(f"/jobs/{job_id}/",
                                                  f"/jobs/{bad.split('.')[0]}/")
        _refused(_bare(altered), 401, "link_invalid")


def test_an_expired_link_is_refused(setup: dict) -> None:
    job = setup["jobs"][0]
    url = f"sqlite:///{setup['home'] / 'grovekeeper.db'}"
    with session_scope(url) as session:  # the server's own secret, from its database
        secret = bytes.fromhex(session.scalar(
            sa.select(ServerSecret.value).where(ServerSecret.name == links.SECRET_NAME)))
    past = int(datetime.now(UTC).timestamp()) - 1
    path = links.report_path(links.token(secret, job["id"], past), job["id"])
    _refused(_bare(setup["server"].base + path), 401, "link_expired")
    # The same secret a minute ahead opens the page: the expiry alone made the difference.
    ahead = links.report_path(links.token(secret, job["id"], past + 60), job["id"])
    assert _bare(setup["server"].base + ahead).status_code == 200


def test_minting_needs_a_key_a_known_job_and_a_bounded_lifetime(setup: dict) -> None:
    job = setup["jobs"][0]
    _refused(_bare(f"{setup['server'].base}/v1/jobs/{job['id']}/report-links", "POST"), 401,
             "unauthorized")
    _refused(_mint(setup, "job_0000000000000000"), 404, "not_found")
    too_long = _mint(setup, job["id"], expires_in=links.MAX_SECONDS + 1)
    assert too_long.status_code == 422
    assert any("expires_in" in str(e.get("field")) for e in too_long.json()["errors"])
    short = _mint(setup, job["id"], expires_in=120)
    expires_at = datetime.fromisoformat(short.json()["expires_at"])
    assert 0 < (expires_at - datetime.now(UTC)).total_seconds() <= 120


def test_another_api_process_on_the_same_database_accepts_the_link(setup: dict,
                                                                    tmp_path: Path) -> None:
    job = setup["jobs"][0]
    url = _mint(setup, job["id"]).json()["url"]
    other = Server(home=setup["home"], workers=0).start()
    try:
        path = urlsplit(url).path
        assert _bare(other.base + path).status_code == 200
        assert _bare(other.base + path.replace("/report", "/plots/history.svg")
                     ).status_code == 200
    finally:
        other.stop()


def test_the_report_command_prints_a_link_and_opens_it(setup: dict, tmp_path: Path) -> None:
    job = setup["jobs"][0]
    opened = tmp_path / "opened.txt"
    # webbrowser honours $BROWSER: a command that writes down the URL it was given.
    catcher = tmp_path / "catch.py"
    catcher.write_text(f"import sys; open({str(opened)!r}, 'w').write(sys.argv[1])\n")
    done = subprocess.run(
        [sys.executable, "-m", "service", "report", job["id"], "--open",
         "--url", setup["server"].base, "--api-key", setup["reader"], "--expires-in", "300"],
        env=child_env(setup["home"], BROWSER=f"{sys.executable} {catcher} %s"), cwd=ROOT,
        capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    url = done.stdout.strip()
    assert url.count("\n") == 0 and url.startswith(setup["server"].base + links.PREFIX)
    assert "until" in done.stderr
    assert opened.read_text() == url
    assert _bare(url).status_code == 200
    refused = subprocess.run(
        [sys.executable, "-m", "service", "report", "job_0000000000000000",
         "--url", setup["server"].base, "--api-key", setup["reader"]],
        env=child_env(setup["home"]), cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert refused.returncode == 4 and refused.stdout == ""
    assert "not_found" in refused.stderr and refused.stderr.count("\n") == 1
