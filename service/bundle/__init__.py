"""A model's hand-off bundle: one zip with everything needed to use it elsewhere."""

from __future__ import annotations

import io
import json
import zipfile
from datetime import datetime
from importlib.metadata import version
from pathlib import Path
from typing import Any

from service.api.schemas import as_utc
from service.tables import Dataset, Job, Model

SNIPPET = Path(__file__).with_name("predict_script.py")

README = """Grovekeeper model {model_id} ({task}, target {target!r})

model.txt      the LightGBM text model (sha256 {sha256})
schema.json    task, classes and the features in model order, with categorical levels
metrics.json   cross-validation and hold-out scores, feature importance
params.json    the LightGBM parameters and boosting rounds of the refit
manifest.json  the job that produced it: request, effective settings, dataset, versions
predict.py     predictions with lightgbm and pandas alone:

    python predict.py new_rows.csv > predictions.csv
"""


def _json(value: Any) -> str:
    def default(obj: Any) -> Any:
        if isinstance(obj, datetime):
            return as_utc(obj).isoformat()
        raise TypeError(f"cannot serialise {type(obj).__name__}")

    return json.dumps(value, indent=2, default=default) + "\n"


def build_bundle(model: Model, job: Job, dataset: Dataset | None, model_text: bytes) -> bytes:
    """The zip's bytes; every file sits under a folder named after the model."""
    manifest = {
        "model_id": model.id,
        "model_sha256": model.sha256,
        "created_at": model.created_at,
        "job": {
            "id": job.id, "request": job.spec.get("request"),
            "effective": job.spec.get("effective"), "created_at": job.created_at,
            "started_at": job.started_at, "finished_at": job.finished_at,
            "trials_completed": job.trials_completed, "trials_pruned": job.trials_pruned,
            "trials_failed": job.trials_failed, "warnings": job.warnings,
        },
        "dataset": None if dataset is None else {
            "id": dataset.id, "name": dataset.name, "rows": dataset.rows,
            "sha256": dataset.sha256, "source_format": dataset.source_format,
        },
        "versions": {"lightgbm": version("lightgbm")},
    }
    files: dict[str, str | bytes] = {
        "model.txt": model_text,
        "schema.json": _json({"task": model.task, "target": model.target,
                              "classes": model.classes, **model.feature_schema}),
        "metrics.json": _json({"metric": model.metric, "cv": model.cv,
                               # Scores only, the row count beside them (as in the API).
                               "holdout": {k: v for k, v in (model.holdout or {}).items()
                                           if k != "rows"},
                               "holdout_rows": int((model.holdout or {}).get("rows") or 0),
                               "feature_importance": model.feature_importance}),
        "params.json": _json({"params": model.params, "boosting_rounds": model.boosting_rounds,
                              "trial_number": model.trial_number}),
        "manifest.json": _json(manifest),
        "predict.py": SNIPPET.read_bytes(),
        "README.txt": README.format(model_id=model.id, task=model.task, target=model.target,
                                    sha256=model.sha256),
    }
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name, content in files.items():
            archive.writestr(f"{model.id}/{name}", content)
    return buffer.getvalue()
