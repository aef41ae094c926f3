"""A live API with one dataset, one finished job and its model, shared by a module.

The model is trained in this process by a real ``Worker`` (two trials on 150 rows), so
prediction cases have something real to hit without a worker process running beside.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa

from examples.demo_data import kilns
from service.db import session_scope
from service.settings import Settings
from service.tables import ApiKey, Dataset, Job, Model, Trial
from service.worker.process import Worker
from tests.service.conftest import LiveApi, live_api

PROBLEM = "application/problem+json"
#: Small limits so "too big" cases stay small: 1 MB bodies, 50 prediction rows.
LIMITS = {"max_upload_mb": 1, "max_prediction_rows": 50}


def _rows(y: list[str]) -> bytes:
    return ("x,y\n" + "".join(f"{i},{v}\n" for i, v in enumerate(y))).encode()


EXTRA_DATASETS = {
    "constant": _rows(["1"] * 30),
    "infinite": _rows(["inf", "-inf"] + [str(i * 0.5) for i in range(28)]),
    "tiny": _rows(["0", "1", "0"]),
}


@dataclass
class Seeded:
    api: LiveApi
    dataset_id: str
    job_id: str
    model_id: str
    row: dict[str, Any]  # one valid prediction row
    columns: list[str]
    extra: dict[str, str]  # datasets for job cases: constant, infinite, tiny

    def snapshot(self) -> tuple[dict[str, int], list[Path]]:
        """Row counts of every table and the files under the home: what a request wrote."""
        counts = {}
        with session_scope(self.api.settings.db_url) as session:
            for table in (Dataset, Job, Model, Trial, ApiKey):
                counts[table.__tablename__] = session.scalar(
                    sa.select(sa.func.count()).select_from(table))
        return counts, self.api.files()


def seed(api: LiveApi, headers: dict[str, str] | None = None) -> Seeded:
    frame = kilns(n_rows=150, seed=4)
    with api.client(headers=headers or {}) as client:
        ds = client.post("/v1/datasets", params={"name": "kilns"},
                         content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"})
        assert ds.status_code == 201, ds.text
        job = client.post("/v1/jobs", json={"dataset_id": ds.json()["id"], "target": "defect",
                                             "budget": {"trials": 2}, "cv": {"folds": 2}})
        assert job.status_code == 202, job.text
        extra = {}
        for name, body in EXTRA_DATASETS.items():
            made = client.post("/v1/datasets", params={"name": name}, content=body,
                               headers={"Content-Type": "text/csv"})
            assert made.status_code == 201, made.text
            extra[name] = made.json()["id"]
    assert Worker(api.settings).run_once()
    with api.client(headers=headers or {}) as client:
        done = client.get(f"/v1/jobs/{job.json()['id']}").json()
    assert done["status"] == "succeeded", done
    row = frame.drop(columns=["defect"]).iloc[0].to_dict()
    row = {k: None if pd.isna(v) else (v.item() if hasattr(v, "item") else v)
           for k, v in row.items()}
    return Seeded(api=api, dataset_id=ds.json()["id"], job_id=done["id"],
                  model_id=done["model_id"], row=row, columns=list(frame.columns), extra=extra)


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Seeded]:
    home = tmp_path_factory.mktemp("bad") / "home"
    with live_api(Settings(home=home, **LIMITS)) as api:
        yield seed(api)
