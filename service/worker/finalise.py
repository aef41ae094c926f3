"""Finishing a job: refit the winner, evaluate it on the hold-out, store the model."""

from __future__ import annotations

import logging
import traceback
from typing import Any

import numpy as np

import tuner
import tuner.decision
import tuner.drift
from service import memory, queue, repository
from service.db import is_transient, session_scope, with_reconnect
from service.errors import describe_failure
from service.jobspec import RunPlan
from service.storage import ArtifactStore, is_disk_full
from tuner.evaluation.gain import gain_over_defaults
from tuner.evaluation.holdout import evaluate_model

log = logging.getLogger("grovekeeper.worker")


class JobFailed(Exception):  # noqa: N818 - the job's outcome, in words for its owner
    """The job fails for the reason given (words, never paths or hosts)."""


class Fenced(Exception):  # noqa: N818 - a state, not a failure
    """This worker's claim on the job was superseded; it must write nothing more."""


def check_claim(url: str, job_id: str, worker_id: str, epoch: int | None) -> None:
    def look() -> bool:
        with session_scope(url) as session:
            return queue.holds(session, job_id=job_id, worker_id=worker_id, epoch=epoch)

    if not with_reconnect(look, f"job {job_id}: checking the claim"):
        raise Fenced(job_id)


def evaluate_safely(fitted: tuner.FittedModel, run: RunPlan, url: str,
                    job_id: str, *, threshold: float = 0.5) -> dict[str, Any]:
    """``evaluate_model`` for a job's winner; a failure here never costs the model.

    The evaluation only describes the model, so a bug in it is logged and reported in
    the result (``error``) instead of failing a job whose search and refit succeeded.
    """
    try:
        with session_scope(url) as session:
            study_name = repository.get_job(session, job_id).study_name
        return evaluate_model(fitted, run.data, run.plan, run.config, storage_url=url,
                              study_name=study_name, seed=run.config.seed,
                              threshold=threshold)
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
    """The training rows' bins per feature (tuner/drift.py), kept with the model.

    Counted on a seeded sample of at most ``SAMPLE_ROWS`` training rows: PSI compares
    shares, and a float copy of every training row would cost a large table's worker
    more memory than the table itself. ``rows`` is the rows counted, ``sampled_from``
    the training rows they were drawn from.
    """
    from tuner._lgb import frame_matrix
    from tuner.evaluation.sampling import bounded

    try:
        rows = bounded(run.plan.train_idx, seed=run.config.seed)
        matrix = frame_matrix(fitted.booster, run.data.X.iloc[rows])
        if not isinstance(matrix, np.ndarray):
            return None
        # One entry per model column: a date's calendar parts are numbers each.
        columns = [(name, "numeric" if f.parts else f.kind, len(f.levels or ()))
                   for f in fitted.schema.features for name in f.model_names]
        reference = tuner.drift.reference_bins(
            matrix, [c[0] for c in columns], [c[1] for c in columns], [c[2] for c in columns])
        return {**reference, "sampled_from": int(len(run.plan.train_idx))}
    except Exception:  # noqa: BLE001 - drift summaries describe; they never cost the model
        log.error("drift reference failed:\n%s", traceback.format_exc())
        return None


def fit_and_store(url: str, store: ArtifactStore, job_id: str, run: RunPlan,
                  best: tuner.TrialRecord, *, worker_id: str | None = None,
                  epoch: int | None = None) -> str:
    """Refit ``best``, evaluate it, save the model file and its row; returns the model id.

    The file is written first and its row second; a failed row write deletes the file, so
    no row ever points at a missing file and no file outlives a failed save for long. The
    row is written only while ``worker_id`` still holds the job under ``epoch`` (raises
    ``Fenced`` otherwise, after deleting the file).
    """
    fitted = tuner.fit_final(run.data, run.plan, run.config, best)
    memory.trim()  # each step below refits on the search rows; what one freed goes first

    costs = None if run.request.decision is None else run.request.decision.model_dump()
    decision = decide_safely(fitted, run, best, costs, job_id)
    # The hold-out confusion matrix uses the threshold the model serves labels with.
    threshold = float((decision or {}).get("threshold", 0.5))
    evaluation = evaluate_safely(fitted, run, url, job_id, threshold=threshold)
    memory.trim()
    gain = gain_safely(fitted, run, url, job_id, best)
    memory.trim()
    if gain.get("available") and not gain["helped"] and not gain["same_trial"]:
        evaluation.setdefault("warnings", []).append(gain["verdict"])
    model_id = repository.new_id("mdl")
    key = f"models/{model_id}.txt"
    try:
        with store.temp_path(".txt") as tmp:
            sha = tuner.save_model(fitted, tmp)
            size = tmp.stat().st_size
            store.put(tmp, key)
    except OSError as exc:
        if not is_disk_full(exc):
            raise
        store.delete(key)  # in case the move landed before the error; no-op otherwise
        log.error("job %s: disk full while saving the model", job_id)
        raise JobFailed("disk full while saving the model") from exc
    fields = dict(
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
                 "final_refit": fitted.refit,
                 "calibration": fitted.calibration,
                 "gain_over_defaults": gain,
                 "drift_reference": drift_reference(fitted, run)},
        decision=decision,
        sha256=sha,
        file_key=key,
        size_bytes=size,
    )

    def write() -> bool:
        with session_scope(url) as session:
            if repository.model_exists(session, model_id):
                return True  # an earlier try committed before its connection broke
            if worker_id is not None and not queue.holds(
                    session, job_id=job_id, worker_id=worker_id, epoch=epoch):
                return False
            repository.add_model(session, **fields)
            return True

    try:
        stored = with_reconnect(write, f"job {job_id}: storing the model")
    except Exception as exc:
        # After a lost connection the row may have committed: an orphan file (swept by
        # retention) is better than a row pointing at a missing file.
        if not is_transient(exc):
            store.delete(key)
        raise
    if not stored:
        store.delete(key)
        log.warning("job %s: refused the late model from %s (claim epoch %s superseded)",
                    job_id, worker_id, epoch)
        raise Fenced(job_id)
    return model_id
