"""Finishing a job: refit the winner, evaluate it on the hold-out, store the model."""

from __future__ import annotations

import logging
import traceback
from typing import Any

import tuner
from service import repository
from service.db import session_scope
from service.errors import describe_failure
from service.jobspec import RunPlan
from service.storage import ArtifactStore
from tuner.evaluation.holdout import evaluate_model

log = logging.getLogger("grovekeeper.worker")


def evaluate_safely(fitted: tuner.FittedModel, run: RunPlan, url: str,
                    job_id: str) -> dict[str, Any]:
    """``evaluate_model`` for a job's winner; a failure here never costs the model.

    The evaluation only describes the model, so a bug in it is logged and reported in
    the result (``error``) instead of failing a job whose search and refit succeeded.
    """
    try:
        with session_scope(url) as session:
            study_name = repository.get_job(session, job_id).study_name
        return evaluate_model(fitted, run.data, run.plan, run.config, storage_url=url,
                              study_name=study_name, seed=run.config.seed)
    except Exception as exc:  # noqa: BLE001 - see the docstring
        log.error("job %s: evaluation failed:\n%s", job_id, traceback.format_exc())
        return {"error": f"evaluation failed: {describe_failure(exc)}", "warnings": []}


def fit_and_store(url: str, store: ArtifactStore, job_id: str, run: RunPlan,
                  best: tuner.TrialRecord) -> str:
    """Refit ``best``, evaluate it, save the model file and its row; returns the model id.

    The file is written first and its row second; a failed row write deletes the file, so
    no row ever points at a missing file and no file outlives a failed save for long.
    """
    fitted = tuner.fit_final(run.data, run.plan, run.config, best)
    evaluation = evaluate_safely(fitted, run, url, job_id)
    model_id = repository.new_id("mdl")
    key = f"models/{model_id}.txt"
    with store.temp_path(".txt") as tmp:
        sha = tuner.save_model(fitted, tmp)
        size = tmp.stat().st_size
        store.put(tmp, key)
    try:
        with session_scope(url) as session:
            repository.add_model(
                session,
                id=model_id,
                job_id=job_id,
                task=fitted.task,
                metric=fitted.metric,
                params=fitted.params,
                boosting_rounds=fitted.boosting_rounds,
                trial_number=best.number,
                cv=fitted.cv,
                holdout=fitted.holdout,
                feature_schema=fitted.schema.to_dict(),
                classes=fitted.classes,
                target=run.data.target,
                feature_importance=fitted.feature_importance,
                details={"manifest": run.effective, "evaluation": evaluation,
                         "selection": run.effective.get("selection_report"),
                         "final_refit": fitted.refit},
                sha256=sha,
                file_key=key,
                size_bytes=size,
            )
    except Exception:
        store.delete(key)
        raise
    return model_id
