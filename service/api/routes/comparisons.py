"""Comparisons: two models scored by a worker on one dataset's rows, paired."""

from __future__ import annotations

from fastapi import APIRouter, Response

from service import repository
from service.api.deps import SessionDep
from service.api.schemas import ComparisonCreate, ComparisonOut, as_utc
from service.errors import NotFound, Unprocessable
from service.tables import Comparison, Model

router = APIRouter(prefix="/v1/comparisons", tags=["comparisons"])


def to_out(c: Comparison) -> ComparisonOut:
    return ComparisonOut(id=c.id, models=list(c.model_ids), dataset_id=c.dataset_id,
                         status=c.status, result=c.result, error=c.error,
                         created_at=as_utc(c.created_at), started_at=as_utc(c.started_at),
                         finished_at=as_utc(c.finished_at))


@router.post("", status_code=202, response_model=ComparisonOut,
             summary="Compare two models on a dataset's rows (a worker computes it)")
def submit_comparison(body: ComparisonCreate, response: Response,
                      session: SessionDep) -> ComparisonOut:
    """Both models' scores on the job metric of the first model, and the paired
    difference (second minus first) with a 95% percentile-bootstrap interval. A model
    whose job tuned on this dataset may have been trained on some of its rows: the
    comparison says so and is marked not comparable."""
    if body.models[0] == body.models[1]:
        raise Unprocessable("compare two different models",
                            errors=[{"field": "models", "message": "the same model twice"}])
    models: list[Model] = []
    for i, model_id in enumerate(body.models):
        try:
            models.append(repository.get_model(session, model_id))
        except NotFound as exc:
            raise Unprocessable(str(exc), errors=[{"field": f"models[{i}]",
                                                   "message": "no such model"}]) from exc
    if models[0].task != models[1].task:
        message = f"the models are of different tasks ({models[0].task}, {models[1].task})"
        raise Unprocessable(message, errors=[{"field": "models", "message": message}])
    try:
        repository.get_dataset(session, body.dataset_id)
    except NotFound as exc:
        raise Unprocessable(str(exc), errors=[{"field": "dataset_id",
                                               "message": "no such dataset"}]) from exc
    made = repository.add_comparison(session, id=repository.new_id("cmp"),
                                     model_ids=list(body.models), dataset_id=body.dataset_id)
    response.headers["Location"] = f"/v1/comparisons/{made.id}"
    return to_out(made)


@router.get("/{comparison_id}", response_model=ComparisonOut)
def get_comparison(comparison_id: str, session: SessionDep) -> ComparisonOut:
    return to_out(repository.get_comparison(session, comparison_id))
