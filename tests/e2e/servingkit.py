"""A real server with a few small trained models on it, for the serving tests: models
listed, predictions with kept ids, channels."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import lightgbm as lgb
import numpy as np
import pandas as pd

from examples.demo_data import kilns
from service.auth import create_key
from tests.conftest import Server, fresh_database, wait_for_job

COSTS = {"false_positive_cost": 1.0, "false_negative_cost": 5.0}
# A column the models never see: order numbers that look numeric, leading zeros included.
ORDER = "order_no"


def order_numbers(n: int) -> list[str]:
    return [f"{k:05d}" if k % 3 else f"{k:03d}" for k in range(n)]


@dataclass
class Served:
    server: Server
    db_url: str
    dataset_id: str
    other_dataset_id: str
    # "a", "b": all features; "narrow": fewer features; "costly": with decision costs
    models: dict[str, dict]
    jobs: dict[str, dict]
    rows: pd.DataFrame  # fresh rows to predict, with an order_no column
    admin_key: str
    write_key: tuple[str, str]  # (key id, secret)

    def client(self, key: str | None = None) -> httpx.Client:
        return self.server.client(
            headers={"Authorization": f"Bearer {key or self.admin_key}"})

    def stored_table(self, dataset_id: str) -> pd.DataFrame:
        """The dataset as the server stored it (its Parquet file)."""
        (path,) = self.server.home.rglob(f"{dataset_id}.parquet")
        return pd.read_parquet(path)

    def booster(self, model_id: str) -> lgb.Booster:
        with self.client() as client:
            text = client.get(f"/v1/models/{model_id}/file").text
        return lgb.Booster(model_str=text)


def upload(client, frame: pd.DataFrame, name: str) -> str:  # type: ignore[no-untyped-def]
    response = client.post("/v1/datasets", params={"name": name},
                           content=frame.to_csv(index=False).encode(),
                           headers={"Content-Type": "text/csv"})
    assert response.status_code == 201, response.text
    return response.json()["id"]


def job_body(dataset_id: str, **fields) -> dict:  # type: ignore[no-untyped-def]
    return {"dataset_id": dataset_id, "target": "defect", "budget": {"trials": 3},
            "cv": {"folds": 3}, "exclude": ["firing_id"], **fields}


def job(client, dataset_id: str, **fields) -> str:  # type: ignore[no-untyped-def]
    response = client.post("/v1/jobs", json=job_body(dataset_id, **fields))
    assert response.status_code == 202, response.text
    return response.json()["id"]


@contextlib.contextmanager
def served(kind: str, tmp: Path) -> Iterator[Served]:
    with fresh_database(kind, tmp) as url:
        # Small scoring chunks, so a few thousand rows already take several.
        server = Server(home=tmp / "home", db_url=url, workers=1,
                        extra_env={"GROVEKEEPER_SCORING_CHUNK_ROWS": "700"}).start()
        try:
            # Keys exist, so every change is made by a known key (channel history names it).
            _, admin = create_key(url, scope="admin")
            write = create_key(url, scope="write")
            with server.client(headers={"Authorization": f"Bearer {admin}"}) as client:
                ds = upload(client, kilns(n_rows=400, seed=1), "kilns")
                other = upload(client, kilns(n_rows=200, seed=5), "kilns-later")
                ids = {"a": job(client, ds, seed=1), "b": job(client, ds, seed=2),
                       "narrow": job(client, other, seed=3,
                                     exclude=["firing_id", "glaze_thickness_mm"]),
                       "costly": job(client, ds, seed=4, decision=COSTS)}
                jobs = {k: wait_for_job(client, j) for k, j in ids.items()}
                assert all(j["status"] == "succeeded" for j in jobs.values()), (
                    jobs, server.log()[-3000:])
                models = {k: client.get(f"/v1/models/{j['model_id']}").json()
                          for k, j in jobs.items()}
            rows = kilns(n_rows=60, seed=9).drop(columns=["defect"])
            rows.insert(0, ORDER, order_numbers(len(rows)))
            yield Served(server=server, db_url=url, dataset_id=ds, other_dataset_id=other,
                         models=models, jobs=jobs, rows=rows, admin_key=admin,
                         write_key=write)
        finally:
            server.stop()


def features_frame(booster: lgb.Booster, model: dict, rows: pd.DataFrame) -> pd.DataFrame:
    """The rows built with plain pandas for LightGBM's own predict: LightGBM maps category
    levels by value through the pandas_categorical list saved in the model file, and a
    date is seconds since the epoch."""
    out = {}
    for f in model["feature_schema"]["features"]:
        values = rows[f["name"]]
        if f["kind"] == "categorical":
            out[f["name"]] = pd.Categorical(values.astype(object))
        elif f["kind"] == "datetime":
            out[f["name"]] = (pd.to_datetime(values) - pd.Timestamp(0)).dt.total_seconds()
        else:
            out[f["name"]] = pd.to_numeric(values).astype("float64")
    frame = pd.DataFrame(out)
    assert list(frame.columns) == booster.feature_name()
    return frame


def lightgbm_positive(booster: lgb.Booster, model: dict, rows: pd.DataFrame) -> np.ndarray:
    """LightGBM's own Booster.predict: the probability of the positive class."""
    return np.asarray(booster.predict(features_frame(booster, model, rows)))
