"""A comparison run: two models scored on one stored dataset (service/comparing.py)."""

from __future__ import annotations

import logging
import traceback

import pandas as pd

from service import comparing, repository
from service.db import session_scope
from service.storage import ArtifactStore
from service.tables import JobStatus

log = logging.getLogger("grovekeeper.worker")


def run_comparison(url: str, store: ArtifactStore, comparison_id: str, worker_id: str) -> None:
    try:
        with session_scope(url) as session:
            comparison = repository.get_comparison(session, comparison_id)
            first, second = (repository.get_model(session, m) for m in comparison.model_ids)
            dataset = repository.get_dataset(session, comparison.dataset_id)
            seen_by = {}
            for model in (first, second):
                job = repository.get_job(session, model.job_id)
                seen_by[model.id] = ("its job tuned on this dataset"
                                     if job.dataset_id == dataset.id else None)
            path = store.local_path(dataset.file_key, dataset.file_sha256)
            for row in (first, second):
                session.expunge(row)
        frame = pd.read_parquet(path)
        result = comparing.compare(store, first, second, frame, seen_by=seen_by)
        with session_scope(url) as session:
            repository.finish_comparison(session, comparison_id=comparison_id,
                                         worker_id=worker_id,
                                         status=JobStatus.SUCCEEDED.value, result=result)
    except Exception as exc:  # noqa: BLE001 - the run fails with its reason; the worker lives
        log.error("comparison %s failed:\n%s", comparison_id, traceback.format_exc())
        with session_scope(url) as session:
            repository.finish_comparison(session, comparison_id=comparison_id,
                                         worker_id=worker_id, status=JobStatus.FAILED.value,
                                         error=str(exc)[:2000])
