"""The worker's call into tuner.evaluate: the winner's intervals, diagnostics, importance."""

from __future__ import annotations

import logging
import traceback
from typing import Any

import tuner
from service import repository
from service.db import session_scope
from service.jobspec import RunPlan
from tuner.evaluate import evaluate_model

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
        return {"error": f"evaluation failed: {exc!r}", "warnings": []}
