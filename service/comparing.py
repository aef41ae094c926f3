"""Champion and challenger: two stored models scored on the same rows of a table, with
the paired bootstrap difference (tuner/compare.py); and the promotion rule built on it."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

import tuner
from service.jobrequest import JobRequest
from service.storage import LocalStore
from service.tables import Model
from tuner.compare import paired_comparison


def _truth(model: Model, frame: pd.DataFrame) -> np.ndarray:
    values = frame[model.target]
    if model.task == "regression":
        return pd.to_numeric(values).to_numpy(dtype="float64")
    classes = list(model.classes or [])
    lookup = {str(c): k for k, c in enumerate(classes)}
    codes = np.array([lookup.get(str(v), -1) for v in values])
    if (codes < 0).any():
        bad = values[codes < 0].iloc[0]
        raise ValueError(f"target value {bad!r} is not one of the model's classes {classes}")
    return codes


def _scores(store: LocalStore, model: Model, frame: pd.DataFrame) -> np.ndarray:
    booster = tuner.load_booster(store.local_path(model.file_key, model.sha256),
                                 expected_sha256=model.sha256)
    schema = tuner.FeatureSchema.from_dict(model.feature_schema)
    matrix, _ = schema.frame_from_table(frame, unseen="missing")
    return tuner.predict(booster, model.task, matrix)


def compare(store: LocalStore, first: Model, second: Model, frame: pd.DataFrame, *,
            seen_by: dict[str, str | None], seed: int = 0) -> dict[str, Any]:
    """Both models on ``frame``'s rows. ``seen_by[model_id]`` says why a model may have
    been trained on some of these rows (None when it was not); such a comparison is
    reported but never decides a promotion.

    Returns:
        ``{"models", "metric", "rows", "scores", "difference", "interval", "better",
        "comparable", "reasons"}``; ``better`` names the better model beyond noise, or None.
    """
    out: dict[str, Any] = {"models": [first.id, second.id], "rows": int(len(frame)),
                           "reasons": []}
    if first.task != second.task or first.target != second.target:
        out["reasons"].append(f"the models predict different things ({first.task} "
                              f"'{first.target}' vs {second.task} '{second.target}')")
    preds: list[np.ndarray | None] = []
    for model in (first, second):
        if model.target not in frame.columns:
            out["reasons"].append(f"the rows lack the target '{model.target}'")
            preds.append(None)
            continue
        try:
            preds.append(_scores(store, model, frame))
        except tuner.PredictionInputError as exc:
            out["reasons"].append(f"{model.id} cannot score these rows: {exc}")
            preds.append(None)
    for model in (first, second):
        if seen_by.get(model.id):
            out["reasons"].append(f"{model.id} was trained on some of these rows "
                                  f"({seen_by[model.id]})")
    if preds[0] is None or preds[1] is None or first.task != second.task or (
            first.target != second.target):
        out["comparable"] = False
        out["better"] = None
        return out
    y = _truth(first, frame)
    result = paired_comparison(first.metric, first.task, y, preds[0], preds[1], seed=seed)
    out.update(metric=result["metric"], direction=result["direction"],
               scores=dict(zip((first.id, second.id), result["scores"], strict=True)),
               difference=result["difference"], interval=result["interval"],
               resamples=result["resamples"])
    out["better"] = {1: second.id, 0: first.id}.get(result["better"])
    out["comparable"] = not any(seen_by.get(m.id) for m in (first, second))
    out["difference_is"] = f"{second.id} minus {first.id}"
    return out


def _same_holdout(mine: JobRequest, theirs: JobRequest) -> bool:
    """Two job requests on one dataset whose hold-outs are the same rows (the split
    depends on these settings alone)."""
    def split(r: JobRequest) -> tuple[Any, ...]:
        return (r.target, r.seed, r.holdout_fraction, r.cv.strategy, r.cv.group_column,
                r.cv.time_column)
    return split(mine) == split(theirs)


def promote(url: str, store: LocalStore, *, job_id: str, model_id: str,
            frame: pd.DataFrame, holdout_rows: Any) -> dict[str, Any] | None:
    """Apply a succeeded job's ``promote`` request; the answer goes under the job's
    ``promotion``. ``holdout_rows``: the job's hold-out, as rows of ``frame``."""
    from service import channels, repository
    from service.db import session_scope
    from service.errors import NotFound, ServiceError

    with session_scope(url) as session:
        job = repository.get_job(session, job_id)
        request = JobRequest.load(job.spec["request"])
        wanted = request.promote
        if wanted is None:
            return None
        name, rule = wanted.channel, wanted.rule
        out: dict[str, Any] = {"channel": name, "rule": rule, "model_id": model_id,
                               "moved": False}
        try:
            current_id: str | None = repository.channel_model_id(session, name)
        except NotFound:
            current_id = None
        new = repository.get_model(session, model_id)
        session.expunge(new)
        current = None
        if current_id is not None:
            current = repository.get_model(session, current_id)
            current_job = repository.get_job(session, current.job_id)
            session.expunge(current)
            seen = None
            if current_job.dataset_id == job.dataset_id:
                theirs = JobRequest.load(current_job.spec["request"])
                if theirs.final_refit == "all":
                    seen = "it was refit on every row of this dataset"
                elif not _same_holdout(request, theirs):
                    seen = "its job split this dataset differently"
            new_seen = ("the new model was refit on every row, hold-out included"
                        if request.final_refit == "all" else None)
    if current is None:
        out["reason"] = "the channel was empty"
    elif len(holdout_rows) == 0 and rule != "always":
        out["previous_model_id"] = current.id
        out["reason"] = "the job has no hold-out to compare the two models on"
        return out
    else:
        out["previous_model_id"] = current.id
        out["comparison"] = (compare(store, current, new, frame.iloc[holdout_rows],
                                     seen_by={current.id: seen, new.id: new_seen})
                             if len(holdout_rows) else {"comparable": False, "reasons": [
                                 "no hold-out"], "better": None})
        comparison = out["comparison"]
        if rule == "always":
            out["reason"] = "rule 'always'"
        elif not comparison["comparable"]:
            out["reason"] = "not comparable: " + "; ".join(comparison["reasons"])
        elif comparison["better"] == new.id:
            out["reason"] = "better beyond noise on the job's hold-out"
        else:
            out["reason"] = "not better beyond noise on the job's hold-out"
            return out
        if rule != "always" and not comparison["comparable"]:
            return out
    try:
        channels.switch(url, name, model_id, force=rule == "always", action="promote",
                        job_id=job_id)
        out["moved"] = True
    except ServiceError as exc:
        out["reason"] = f"refused: {exc.detail}"
    return out
