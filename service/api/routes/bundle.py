"""``GET /v1/models/{id}/bundle``: the model with everything needed to use it elsewhere."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import Response

from service import repository
from service.api.deps import SessionDep, StoreDep
from service.bundle import build_bundle
from service.errors import NotFound
from service.tables import Dataset

router = APIRouter(prefix="/v1/models", tags=["models"])


@router.get(
    "/{model_id}/bundle",
    response_class=Response,
    summary="The model as one zip: model, schema, metrics, parameters, manifest, predict.py",
    description=(
        "Unzip it and run `python predict.py rows.csv`: with lightgbm and pandas alone it "
        "reproduces this service's CSV predictions."
    ),
    responses={200: {"content": {"application/zip": {
        "schema": {"type": "string", "format": "binary"},
        "example": "(zip: mdl_…/model.txt, schema.json, metrics.json, params.json, "
                   "manifest.json, predict.py, README.txt)"}}}},
)
def get_bundle(model_id: str, session: SessionDep, store: StoreDep) -> Response:
    model = repository.get_model(session, model_id)
    job = repository.get_job(session, model.job_id)
    try:
        dataset: Dataset | None = repository.get_dataset(session, job.dataset_id)
    except NotFound:
        dataset = None  # deleted since; the manifest still names its id
    path = store.local_path(model.file_key, model.sha256)
    data = build_bundle(model, job, dataset, path.read_bytes())
    return Response(data, media_type="application/zip", headers={
        "Content-Disposition": f'attachment; filename="{model_id}-bundle.zip"',
        "X-Model-Sha256": model.sha256})
