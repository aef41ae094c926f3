"""Keys that change while servers run, and the audit trail: two real ``grovekeeper serve``
processes on one database (SQLite and PostgreSQL), keys made and revoked with the real
``grovekeeper keys`` command."""

from __future__ import annotations

import subprocess
import sys
import time
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path

import pytest
import sqlalchemy as sa

from examples.demo_data import kilns
from service import channels, repository
from service.api.audit import action_for
from service.auth import create_key
from service.db import get_engine, init_db, session_scope
from service.tables import ApiKey, AuditEntry, Dataset, Job
from tests.conftest import ROOT, Server, child_env

pytestmark = pytest.mark.e2e


def keys_command(home: Path, url: str, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "service", "keys", *args],
                          env=child_env(home, url), cwd=ROOT, capture_output=True, text=True,
                          check=True, timeout=120)


def key_row(url: str, key_id: str) -> ApiKey:
    with session_scope(url) as session:
        row = session.get(ApiKey, key_id)
        assert row is not None
        session.expunge(row)
        return row


def test_revocation_and_expiry_reach_a_second_api_process_at_its_next_request(
        db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    init_db(db_url)
    admin_id, admin = create_key(db_url, scope="admin")
    a = Server(home=home, db_url=db_url, workers=0).start()
    b = Server(home=home, db_url=db_url, workers=0).start()
    try:
        made = keys_command(home, db_url, "create", "--scope", "write")
        secret = made.stdout.strip()
        key_id = made.stderr.split()[1]
        auth = {"Authorization": f"Bearer {secret}"}
        with a.client(headers=auth) as ca, b.client(headers=auth) as cb:
            assert ca.get("/v1/datasets").status_code == 200  # both processes cache it
            assert cb.get("/v1/datasets").status_code == 200
            used = key_row(db_url, key_id).last_used_at
            assert used is not None
            assert cb.get("/v1/datasets").status_code == 200
            # Stamped at most once a minute: the second request wrote nothing.
            assert key_row(db_url, key_id).last_used_at == used
            keys_command(home, db_url, "revoke", key_id)
            first = cb.get("/v1/datasets")  # the very next request of the other process
            assert first.status_code == 401, first.text
            assert ca.get("/v1/datasets").status_code == 401
        listing = keys_command(home, db_url, "list").stdout
        assert key_id in listing and admin_id in listing

        made = keys_command(home, db_url, "create", "--scope", "read", "--expires-in", "30s")
        short = {"Authorization": f"Bearer {made.stdout.strip()}"}
        with b.client(headers=short) as cb:
            first = cb.get("/v1/datasets")
            assert first.status_code == 200, first.text
            expires = key_row(db_url, made.stderr.split()[1]).expires_at
            assert expires is not None
            expires = expires if expires.tzinfo else expires.replace(tzinfo=UTC)
            time.sleep(max(0.0, (expires - datetime.now(UTC)).total_seconds()) + 0.5)
            late = cb.get("/v1/datasets")
            assert late.status_code == 401 and "expired" in late.json()["detail"], late.text
        with a.client(headers={"Authorization": f"Bearer {admin}"}) as ca:
            assert ca.get("/v1/datasets").status_code == 200  # others keep working
    finally:
        a.stop()
        b.stop()


def test_every_kind_of_change_leaves_an_audit_row_readable_by_admin_keys_only(
        db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    init_db(db_url)
    admin_id, admin = create_key(db_url, scope="admin")
    writer_id, writer = create_key(db_url, scope="write")
    server = Server(home=home, db_url=db_url, workers=0).start()
    try:
        with server.client(headers={"Authorization": f"Bearer {admin}"}) as client:
            body = kilns(n_rows=200, seed=3).to_csv(index=False).encode()
            dataset = client.post("/v1/datasets", params={"name": "kilns"}, content=body,
                                  headers={"Content-Type": "text/csv"}).json()
            bad = client.post("/v1/jobs", json={"dataset_id": dataset["id"], "target": "nope"})
            assert bad.status_code == 422  # refused: no change, no row
            job = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                                "target": "defect",
                                                "budget": {"trials": 2}}).json()
            assert client.post(f"/v1/jobs/{job['id']}/cancel").status_code == 202
            assert client.delete(f"/v1/datasets/{dataset['id']}").status_code == 204
            keys_command(home, db_url, "revoke", writer_id)
            with server.client(headers={"Authorization": f"Bearer {writer}"}) as other:
                assert other.get("/v1/audit").status_code == 401  # revoked
            seen: list[dict] = []
            page = client.get("/v1/audit", params={"limit": 2}).json()
            total = page["total"]
            while True:
                seen += page["items"]
                if page["next"] is None:
                    break
                page = client.get("/v1/audit", params={"limit": 2,
                                                       "cursor": page["next"]}).json()
        assert len(seen) == total
        # One row per change: none twice (the row rides in the change's transaction; the
        # answer's status is added to that same row afterwards).
        counts = Counter(e["action"] for e in seen)
        assert counts["key.create"] == 2 and set(counts.values()) == {1, 2}, counts
        by_action = {e["action"]: e for e in seen}
        assert set(by_action) == {"key.create", "key.revoke", "dataset.upload", "job.create",
                                  "job.cancel", "dataset.delete"}, seen
        assert by_action["dataset.upload"]["target"] == dataset["id"]
        assert by_action["job.create"]["target"] == job["id"]
        assert by_action["job.cancel"]["target"] == job["id"]
        assert by_action["dataset.delete"]["target"] == dataset["id"]
        assert by_action["key.revoke"]["target"] == writer_id
        for action in ("dataset.upload", "job.create", "job.cancel", "dataset.delete"):
            assert by_action[action]["key_id"] == admin_id
        assert [by_action[a]["status"] for a in ("dataset.upload", "job.create",
                                                 "job.cancel", "dataset.delete")] == [
            201, 202, 202, 204]
        assert [e["id"] for e in seen] == sorted((e["id"] for e in seen), reverse=True)
    finally:
        server.stop()


def _model_row(url: str, job_id: str, model_id: str, features: list[str]) -> None:
    """A model row as a worker stores it, minus the training (only channels read it here)."""
    with session_scope(url) as session:
        repository.add_model(
            session, id=model_id, job_id=job_id, task="binary", metric="roc_auc", params={},
            boosting_rounds=1, trial_number=0, cv={}, holdout={}, target="defect",
            feature_schema={"features": [{"name": f, "kind": "numeric"} for f in features]},
            feature_importance=[], sha256="0" * 64, file_key=f"models/{model_id}.txt",
            size_bytes=1)


def test_channel_moves_leave_one_audit_row_each_with_key_and_models(
        db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    init_db(db_url)
    admin_id, admin = create_key(db_url, scope="admin")
    writer_id, writer = create_key(db_url, scope="write")
    server = Server(home=home, db_url=db_url, workers=0).start()
    try:
        with server.client(headers={"Authorization": f"Bearer {writer}"}) as client:
            body = kilns(n_rows=200, seed=3).to_csv(index=False).encode()
            dataset = client.post("/v1/datasets", params={"name": "kilns"}, content=body,
                                  headers={"Content-Type": "text/csv"}).json()
            job = client.post("/v1/jobs", json={
                "dataset_id": dataset["id"], "target": "defect", "budget": {"trials": 2},
                "promote": {"channel": "live", "rule": "always"}}).json()
        _model_row(db_url, job["id"], "mdl_a", ["x", "y"])
        _model_row(db_url, job["id"], "mdl_b", ["x", "y"])
        _model_row(db_url, job["id"], "mdl_wide", ["x", "y", "z"])
        with server.client(headers={"Authorization": f"Bearer {admin}"}) as client:
            assert client.put("/v1/channels/live", json={"model_id": "mdl_a"}).status_code == 200
            assert client.put("/v1/channels/live", json={"model_id": "mdl_b"}).status_code == 200
            # Refused (callers would have to add a column): no move, so no row.
            assert client.put("/v1/channels/live",
                              json={"model_id": "mdl_wide"}).status_code == 409
            assert client.post("/v1/channels/live/rollback").status_code == 200
            # The job asked to be promoted: what its worker does once the model is stored.
            channels.switch(db_url, "live", "mdl_b", force=True, action="promote",
                            job_id=job["id"])
            rows = [e for e in client.get("/v1/audit", params={"limit": 100}).json()["items"]
                    if e["action"].startswith("channel.")]
    finally:
        server.stop()
    rows.reverse()  # oldest first
    assert [(e["action"], e["target"], e["key_id"], e["detail"]) for e in rows] == [
        ("channel.set", "live", admin_id, {"from": None, "to": "mdl_a"}),
        ("channel.set", "live", admin_id, {"from": "mdl_a", "to": "mdl_b"}),
        ("channel.rollback", "live", admin_id, {"from": "mdl_b", "to": "mdl_a"}),
        # The key that queued the job asking for the promotion.
        ("channel.promote", "live", writer_id,
         {"from": "mdl_a", "to": "mdl_b", "forced": True, "job_id": job["id"]}),
    ]
    assert [e["status"] for e in rows] == [200, 200, 200, None]  # the promotion had no answer
    assert [e["method"] for e in rows] == ["PUT", "PUT", "POST", None]


_REFUSE_AUDIT = {
    "sqlite": ["CREATE TRIGGER refuse_audit BEFORE INSERT ON gk_audit "
               "BEGIN SELECT RAISE(ABORT, 'audit refused'); END"],
    "postgresql": ["CREATE FUNCTION refuse_audit() RETURNS trigger AS $$ BEGIN "
                   "RAISE EXCEPTION 'audit refused'; END $$ LANGUAGE plpgsql",
                   "CREATE TRIGGER refuse_audit BEFORE INSERT ON gk_audit FOR EACH ROW "
                   "EXECUTE FUNCTION refuse_audit()"],
}


def test_a_change_whose_audit_row_cannot_be_written_does_not_happen(
        db_url: str, tmp_path: Path) -> None:
    """The row is written in the change's own transaction: when the database refuses the
    row (a trigger here), the change is rolled back with it."""
    home = tmp_path / "home"
    init_db(db_url)
    _, admin = create_key(db_url, scope="admin")
    server = Server(home=home, db_url=db_url, workers=0).start()
    try:
        with server.client(headers={"Authorization": f"Bearer {admin}"}) as client:
            body = kilns(n_rows=200, seed=3).to_csv(index=False).encode()
            dataset = client.post("/v1/datasets", params={"name": "kilns"}, content=body,
                                  headers={"Content-Type": "text/csv"}).json()
            engine = get_engine(db_url)
            with engine.begin() as conn:
                for statement in _REFUSE_AUDIT[engine.dialect.name]:
                    conn.execute(sa.text(statement))
            job = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                                "target": "defect", "budget": {"trials": 2}})
            upload = client.post("/v1/datasets", params={"name": "again"}, content=body,
                                 headers={"Content-Type": "text/csv"})
            gone = client.delete(f"/v1/datasets/{dataset['id']}")
    finally:
        server.stop()
    assert job.status_code >= 500 and upload.status_code >= 500 and gone.status_code >= 500
    with session_scope(db_url) as session:
        assert session.scalar(sa.select(sa.func.count()).select_from(Job)) == 0
        assert list(session.scalars(sa.select(Dataset.id))) == [dataset["id"]]
        actions = session.scalars(sa.select(AuditEntry.action).order_by(AuditEntry.id))
        assert list(actions) == ["key.create", "dataset.upload"]
    # The refused upload kept no file either.
    assert len(list((home / "datasets").iterdir())) == 1


def test_read_and_write_keys_may_not_read_the_audit_trail(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'gk.db'}"
    init_db(url)
    create_key(url, scope="admin")
    _, writer = create_key(url, scope="write")
    server = Server(home=tmp_path / "home", db_url=url, workers=0).start()
    try:
        with server.client(headers={"Authorization": f"Bearer {writer}"}) as client:
            r = client.get("/v1/audit")
            assert r.status_code == 403 and "admin" in r.json()["detail"]
    finally:
        server.stop()


@pytest.mark.parametrize(("method", "path", "expected"), [
    ("POST", "/v1/datasets", ("dataset.upload", None)),
    ("DELETE", "/v1/datasets/ds_1", ("dataset.delete", "ds_1")),
    ("POST", "/v1/jobs", ("job.create", None)),
    ("POST", "/v1/jobs/job_1/cancel", ("job.cancel", "job_1")),
    ("PUT", "/v1/channels/live", ("channel.set", "live")),
    ("POST", "/v1/channels/live/rollback", ("channel.rollback", "live")),
    ("POST", "/v1/models/mdl_1/scorings", ("scoring.create", "mdl_1")),
    ("POST", "/v1/models/mdl_1/predictions", None),
    ("POST", "/v1/channels/live/predictions", None),
    ("POST", "/v1/jobs/job_1/report-links", None),
])
def test_action_names(method: str, path: str, expected: tuple[str, str | None] | None) -> None:
    assert action_for(method, path) == expected
