"""Finishing a job: refit the winner, evaluate it on the hold-out, store the model."""

from __future__ import annotations

import logging
import traceback
from typing import Any

import numpy as np

import tuner
import tuner.decision
import tuner.drift
from service import repository
from service.db import session_scope
from service.errors import describe_failure
from service.jobspec import RunPlan
from service.storage import ArtifactStore
from tuner.evaluation.gain import gain_over_defaults
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


def gain_safely(fitted: tuner.FittedModel, run: RunPlan, url: str, job_id: str,
                best: tuner.TrialRecord) -> dict[str, Any]:
    """The winner against trial 0 (LightGBM's defaults) on the hold-out; never fatal."""
    try:
        with session_scope(url) as session:
            study_name = repository.get_job(session, job_id).study_name
        zero = next((r for r in tuner.load_trial_records(url, study_name) if r.number == 0),
                    None)
        return gain_over_defaults(fitted, run.data, run.plan, run.config, zero,
                                  winner=best.number, seed=run.config.seed)
    except Exception as exc:  # noqa: BLE001 - a description of the model, like evaluation
        log.error("job %s: gain over defaults failed:\n%s", job_id, traceback.format_exc())
        return {"available": False, "reason": f"comparison failed: {exc!r}"}


def decide_safely(fitted: tuner.FittedModel, run: RunPlan, best: tuner.TrialRecord,
                  costs: dict[str, float] | None, job_id: str) -> dict[str, Any] | None:
    """The binary model's decision threshold (tuner/decision.py); None for other tasks.

    Out-of-fold predictions refit each fold of the chosen trial, so a failure there falls
    back to the cost ratio and says so rather than costing the model.
    """
    if fitted.task != "binary":
        return None
    # Probabilities count as calibrated only when the model says it applied a calibration.
    calibrated = bool((fitted.calibration or {}).get("applied"))
    rows = run.plan.holdout_idx
    holdout = None
    if len(rows):
        prob = tuner.predict(fitted.booster, "binary", run.data.X.iloc[rows])
        weight = None if run.data.weight is None else run.data.weight[rows]
        holdout = (run.data.y[rows], prob, weight)
    try:
        oof = None
        if costs and not calibrated:
            positions, prob = tuner.decision.out_of_fold(
                run.data, run.plan, fitted.params, list(best.best_iterations))
            oof = (run.data.y[positions], prob)
        out = tuner.decision.decide(costs, calibrated=calibrated, oof=oof, holdout=holdout)
    except Exception as exc:  # noqa: BLE001 - see the docstring
        log.error("job %s: decision threshold failed:\n%s", job_id, traceback.format_exc())
        out = tuner.decision.decide(costs, calibrated=True, oof=None, holdout=holdout)
        out["error"] = f"out-of-fold threshold failed ({exc!r}); used the cost ratio"
    if costs and not (fitted.refit or {}).get("served_is_scored", True):
        out["holdout_note"] = ("the served model was refit on every row, hold-out "
                               "included: its hold-out cost is optimistic")
    return out


def drift_reference(fitted: tuner.FittedModel, run: RunPlan) -> dict[str, Any] | None:
    """The training rows' bins per feature (tuner/drift.py), kept with the model."""
    from tuner._lgb import frame_matrix

    try:
        matrix = frame_matrix(fitted.booster, run.data.X.iloc[run.plan.train_idx])
        if not isinstance(matrix, np.ndarray):
            return None
        specs = fitted.schema.to_dict()["features"]
        return tuner.drift.reference_bins(
            matrix, [f["name"] for f in specs], [f["kind"] for f in specs],
            [len(f.get("levels") or []) for f in specs])
    except Exception:  # noqa: BLE001 - drift summaries describe; they never cost the model
        log.error("drift reference failed:\n%s", traceback.format_exc())
        return None


def fit_and_store(url: str, store: ArtifactStore, job_id: str, run: RunPlan,
                  best: tuner.TrialRecord) -> str:
    """Refit ``best``, evaluate it, save the model file and its row; returns the model id.

    The file is written first and its row second; a failed row write deletes the file, so
    no row ever points at a missing file and no file outlives a failed save for long.
    """
    fitted = tuner.fit_final(run.data, run.plan, run.config, best)
    evaluation = evaluate_safely(fitted, run, url, job_id)
    gain = gain_safely(fitted, run, url, job_id, best)
    if gain.get("available") and not gain["helped"] and not gain["same_trial"]:
        evaluation.setdefault("warnings", []).append(gain["verdict"])
    with session_scope(url) as session:
        costs = repository.get_job(session, job_id).spec["request"].get("decision")
    decision = decide_safely(fitted, run, best, costs, job_id)
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
                         "final_refit": fitted.refit, "calibration": fitted.calibration,
                         "gain_over_defaults": gain,
                         "drift_reference": drift_reference(fitted, run)},
                decision=decision,
                sha256=sha,
                file_key=key,
                size_bytes=size,
            )
    except Exception:
        store.delete(key)
        raise
    return model_id
