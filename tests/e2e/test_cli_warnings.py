"""The client commands against a real server: warnings reach the terminal (stderr) from
``tune``, ``status`` and ``model``; ``tune --wait --print model`` puts only the model id on
stdout; ``predict --explain --keep``; ``delete`` where the API deletes."""

from __future__ import annotations

import io
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from examples.demo_data import kilns
from tests.conftest import ROOT, Server, child_env

pytestmark = pytest.mark.e2e


def gk(server: Server, *args: str) -> subprocess.CompletedProcess[str]:
    env = child_env(server.home, GROVEKEEPER_URL=server.base)
    return subprocess.run([sys.executable, "-m", "service", *args], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=300)


def _warnings(stderr: str, kind: str) -> list[str]:
    prefix = f"warning ({kind}): "
    return [ln[len(prefix):] for ln in stderr.splitlines() if ln.startswith(prefix)]


@pytest.fixture(scope="module")
def tuned(server: Server, tmp_path_factory: pytest.TempPathFactory) -> dict:
    table = tmp_path_factory.mktemp("cli") / "kilns.csv"
    kilns(n_rows=400, seed=6).to_csv(table, index=False)
    dataset_id = gk(server, "upload", str(table)).stdout.strip()
    tune = gk(server, "tune", dataset_id, "--target", "defect", "--trials", "3", "--seed",
              "4", "--wait", "--interval", "0.2", "--print", "model")
    assert tune.returncode == 0, tune.stderr + server.log()
    with server.client() as client:
        model = client.get(f"/v1/models/{tune.stdout.strip()}").json()
        job = client.get(f"/v1/jobs/{model['job_id']}").json()
    return {"table": table, "dataset_id": dataset_id, "tune": tune, "model": model,
            "job": job}


def _winner(model: dict) -> list[str]:
    return list(model["details"]["evaluation"].get("warnings") or [])


def test_tune_print_model_puts_only_the_model_id_on_stdout(tuned: dict) -> None:
    tune, model, job = tuned["tune"], tuned["model"], tuned["job"]
    assert tune.stdout == model["id"] + "\n"
    # The kiln table has an id column: the data warnings name it, on stderr.
    assert job["warnings"] and _warnings(tune.stderr, "data") == job["warnings"]
    assert _warnings(tune.stderr, "winner") == _winner(model)


def test_print_model_needs_wait(server: Server, tuned: dict) -> None:
    done = gk(server, "tune", tuned["dataset_id"], "--target", "defect", "--print", "model")
    assert done.returncode == 2 and done.stdout == ""
    assert "--wait" in done.stderr and len(done.stderr.strip().splitlines()) == 1


def test_status_and_model_print_both_kinds_of_warning(server: Server, tuned: dict) -> None:
    job, model = tuned["job"], tuned["model"]
    for args in (["status", job["id"]], ["model", model["id"]],
                 ["status", job["id"], "--format", "json"]):
        done = gk(server, *args)
        assert done.returncode == 0, done.stderr
        assert _warnings(done.stderr, "data") == job["warnings"], args
        assert _warnings(done.stderr, "winner") == _winner(model), args
        assert "warning" not in done.stdout.split("\n", 1)[0]  # stdout stays the answer


def test_predict_explain_and_keep_match_the_api(server: Server, tuned: dict) -> None:
    model_id, table = tuned["model"]["id"], tuned["table"]
    done = gk(server, "predict", model_id, str(table), "--explain", "--keep",
              "firing_id,kiln")
    assert done.returncode == 0, done.stderr
    ours = pd.read_csv(io.StringIO(done.stdout))
    with server.client() as client:
        direct = client.post(f"/v1/models/{model_id}/predictions",
                             params={"explain": "true", "keep": "firing_id,kiln"},
                             content=table.read_bytes(),
                             headers={"Content-Type": "text/csv", "Accept": "text/csv"})
    assert direct.status_code == 200, direct.text
    pd.testing.assert_frame_equal(ours, pd.read_csv(io.StringIO(direct.text)))
    assert list(ours.columns[:2]) == ["firing_id", "kiln"]
    source = pd.read_csv(table)
    assert ours["firing_id"].tolist() == source["firing_id"].tolist()
    plain = pd.read_csv(io.StringIO(gk(server, "predict", model_id, str(table)).stdout))
    assert len(ours.columns) > len(plain.columns) + 2  # the contributions are there


def test_delete_a_model_and_a_dataset(server: Server, tuned: dict, tmp_path: Path) -> None:
    spare = tmp_path / "spare.csv"
    kilns(n_rows=50, seed=1).to_csv(spare, index=False)
    dataset_id = gk(server, "upload", str(spare)).stdout.strip()
    gone = gk(server, "delete", "dataset", dataset_id)
    assert gone.returncode == 0 and gone.stdout == "", gone.stderr
    assert f"deleted dataset {dataset_id}" in gone.stderr
    model_id = tuned["model"]["id"]
    assert gk(server, "delete", "model", model_id).returncode == 0
    with server.client() as client:
        assert client.get(f"/v1/datasets/{dataset_id}").status_code == 404
        assert client.get(f"/v1/models/{model_id}").status_code == 404
    again = gk(server, "delete", "model", model_id)
    assert again.returncode == 4 and "not_found" in again.stderr
    unknown = gk(server, "delete", "job", "job_1")
    assert unknown.returncode == 2
