"""What the report page shows, on a real server: every parameter of a custom search space,
the settings, the dataset and model with their links, a print stylesheet, and a cancelled
job drawn apart from a failed one."""

from __future__ import annotations

import re
from html import unescape

import pytest
import sqlalchemy as sa

from examples.demo_data import kilns
from service.db import session_scope
from service.tables import Job
from tests.conftest import Server, wait_for_job

pytestmark = pytest.mark.e2e
# A parameter outside the default space and a narrowed default one.
SPACE = {"scale_pos_weight": {"low": 1, "high": 20},
         "num_leaves": {"low": 8, "high": 16}}


@pytest.fixture(scope="module")
def jobs(server: Server) -> dict:
    csv = kilns(n_rows=300, seed=5).to_csv(index=False).encode()
    with server.client() as client:
        up = client.post("/v1/datasets", params={"name": "kiln firings"}, content=csv,
                         headers={"Content-Type": "text/csv"}).json()
        tuned = client.post("/v1/jobs", json={
            "dataset_id": up["id"], "target": "defect", "budget": {"trials": 4},
            "seed": 11, "search_space": SPACE, "cv": {"folds": 3}}).json()
        tuned = wait_for_job(client, tuned["id"])
        # Queued behind nothing that could finish it: cancelled before or while it runs.
        stopped = client.post("/v1/jobs", json={
            "dataset_id": up["id"], "target": "defect", "budget": {"trials": 500}}).json()
        client.post(f"/v1/jobs/{stopped['id']}/cancel").raise_for_status()
        stopped = wait_for_job(client, stopped["id"])
        failed = client.post("/v1/jobs", json={
            "dataset_id": up["id"], "target": "defect", "budget": {"trials": 500}}).json()
        client.post(f"/v1/jobs/{failed['id']}/cancel").raise_for_status()
        wait_for_job(client, failed["id"])
        board = client.get(f"/v1/jobs/{tuned['id']}/leaderboard").json()
        model = client.get(f"/v1/models/{tuned['model_id']}").json()
    assert tuned["status"] == "succeeded", server.log()
    assert stopped["status"] == "cancelled"
    # A failure written as the worker writes one (status and error on the job row): the
    # page is drawn from that row alone.
    url = f"sqlite:///{server.home / 'grovekeeper.db'}"
    with session_scope(url) as session:
        session.execute(sa.update(Job).where(Job.id == failed["id"]).values(
            status="failed", error="every trial failed: LightGBM refused the data"))
    return {"tuned": tuned, "stopped": stopped, "failed": failed, "board": board,
            "model": model, "dataset": up}


def _page(server: Server, job_id: str) -> str:
    with server.client() as client:
        answer = client.get(f"/v1/jobs/{job_id}/report")
    assert answer.status_code == 200, answer.text
    return answer.text


def _text(html: str) -> str:
    return unescape(re.sub(r"<[^>]+>", " ", html))


def test_every_parameter_of_a_custom_space_is_shown(server: Server, jobs: dict) -> None:
    html = _page(server, jobs["tuned"]["id"])
    spec = jobs["tuned"]["spec"]["search_space"]
    assert "scale_pos_weight" in spec
    space = html.split("id='space'>")[1].split("</table>")[0]
    for name in spec:
        assert f"<td>{name}</td>" in space, name
    row = space.split("<td>scale_pos_weight</td>")[1].split("</tr>")[0]
    assert "1 – 20" in _text(row)
    winner = jobs["model"]["params"]["scale_pos_weight"]
    assert f"{winner:.4g}" in _text(row)
    # Every leaderboard row names every tuned parameter, not a fixed few.
    board = html.split("<table id='leaderboard'>")[1].split("</table>")[0]
    cells = re.findall(r"<td class='params'>(.*?)</td>", board)
    assert len(cells) == len(jobs["board"]["items"])
    for cell, row in zip(cells, jobs["board"]["items"], strict=True):
        assert {p.split("=")[0] for p in unescape(cell).split(", ")} == set(row["params"])
    assert ">rounds</th>" in board and not re.search(r"\btrees\b", _text(board))


def test_settings_dataset_model_and_links(server: Server, jobs: dict) -> None:
    tuned, model = jobs["tuned"], jobs["model"]
    html = _page(server, tuned["id"])
    settings = _text(html.split('id="settings"')[1].split("</section>")[0])
    cv = tuned["spec"]["cv"]
    assert f"{cv['folds']} folds, {cv['strategy']}" in settings, settings
    assert f"seed {tuned['spec']['seed']}" in " ".join(settings.split())
    assert f"{tuned['spec']['budget']['trials']} trials" in settings
    assert f"{len(tuned['spec']['search_space'])} parameters tuned" in settings
    assert "kiln firings" in settings and jobs["dataset"]["id"] in settings
    assert "kiln firings" in _text(html.split('class="sub"')[1].split("</p>")[0])
    links = dict((text, href) for href, text in re.findall(
        r'<a href="([^"]+)">([^<]+)</a>', html.split('id="links"')[1].split("</nav>")[0]))
    assert links == {
        "job (JSON)": f"../{tuned['id']}",
        "leaderboard (CSV)": "leaderboard?format=csv",
        "model (JSON)": f"../../models/{model['id']}",
        "model file (LightGBM text)": f"../../models/{model['id']}/file",
        "bundle (zip with predict.py)": f"../../models/{model['id']}/bundle"}
    assert f"{model['boosting_rounds']} boosting round" in _text(html)
    # The page prints: a print stylesheet that hides what only a screen needs.
    printed = html.split("@media print{")[1]
    assert re.search(r"#links[^{]*\{display:none\}", printed), printed[:300]


def test_cancelled_is_drawn_apart_from_failed(server: Server, jobs: dict) -> None:
    stopped = _page(server, jobs["stopped"]["id"])
    failed = _page(server, jobs["failed"]["id"])
    assert '<span class="status cancelled">cancelled</span>' in stopped
    assert '<span class="status failed">failed</span>' in failed
    state_of = {name: html.split('id="state"')[0].rsplit("<section", 1)[1]
                for name, html in (("stopped", stopped), ("failed", failed))}
    assert "stopped" in state_of["stopped"] and "error" in state_of["failed"]
    assert "Failed" not in _text(stopped.split("<main>")[1])
    assert "Cancelled" in _text(stopped) and "LightGBM refused the data" in _text(failed)
    # Their colours differ: each status has its own rule in the stylesheet.
    css = stopped.split("<style>")[1].split("</style>")[0]
    colour = {s: re.search(r"\.status\." + s + r"\{([^}]*)\}", css).group(1)
              for s in ("cancelled", "failed")}
    assert colour["cancelled"] != colour["failed"], colour
