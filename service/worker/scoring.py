"""A batch scoring run: the stored dataset read in chunks (pyarrow ``iter_batches``),
each chunk checked, predicted and appended to one Parquet result, so memory stays at a
chunk's worth whatever the number of rows."""

from __future__ import annotations

import logging
import threading
import traceback

import pyarrow as pa
import pyarrow.parquet as pq

import tuner
from service import repository
from service.db import session_scope
from service.storage import ArtifactStore, sha256_file
from service.tables import JobStatus

log = logging.getLogger("grovekeeper.worker")


class Stopped(Exception):
    """The run was cancelled, or another worker took it over."""


def run_scoring(url: str, store: ArtifactStore, scoring_id: str, worker_id: str,
                shutdown: threading.Event, chunk_rows: int) -> None:
    with session_scope(url) as session:
        scoring = repository.get_scoring(session, scoring_id)
        model = repository.get_model(session, scoring.model_id)
        dataset = repository.get_dataset(session, scoring.dataset_id)
        keep, unseen = list(scoring.keep), scoring.unseen
        model_key, model_sha = model.file_key, model.sha256
        schema = tuner.FeatureSchema.from_dict(model.feature_schema)
        predictor = tuner.Predictor(
            tuner.load_booster(store.local_path(model_key, model_sha), expected_sha256=model_sha),
            schema, model.task, model.classes,
            threshold=float((model.decision or {}).get("threshold", 0.5)))
        data_path = store.local_path(dataset.file_key, dataset.file_sha256)
    key = f"scorings/{scoring_id}.parquet"
    try:
        with store.temp_path(".parquet") as tmp:
            rows = _score(url, predictor, data_path, tmp, keep=keep, unseen=unseen,
                          scoring_id=scoring_id, worker_id=worker_id, shutdown=shutdown,
                          chunk_rows=chunk_rows)
            sha = sha256_file(tmp)
            store.put(tmp, key)
        with session_scope(url) as session:
            repository.finish_scoring(session, scoring_id=scoring_id, worker_id=worker_id,
                                      status=JobStatus.SUCCEEDED.value, rows_done=rows,
                                      result_key=key, result_sha256=sha)
    except Stopped:
        with session_scope(url) as session:
            cancelled = repository.get_scoring(session, scoring_id).cancel_requested
            if cancelled:
                repository.finish_scoring(session, scoring_id=scoring_id, worker_id=worker_id,
                                          status=JobStatus.CANCELLED.value)
    except Exception as exc:  # noqa: BLE001 - the run fails with its reason; the worker lives
        log.error("scoring %s failed:\n%s", scoring_id, traceback.format_exc())
        with session_scope(url) as session:
            repository.finish_scoring(session, scoring_id=scoring_id, worker_id=worker_id,
                                      status=JobStatus.FAILED.value, error=str(exc)[:2000])


def _score(url: str, predictor: tuner.Predictor, source: object, dest: object, *,
           keep: list[str], unseen: str, scoring_id: str, worker_id: str,
           shutdown: threading.Event, chunk_rows: int) -> int:
    parquet = pq.ParquetFile(source)
    present = set(parquet.schema_arrow.names)
    features = [n for n in predictor.schema.columns if n in present]  # input columns
    columns = list(dict.fromkeys([*keep, *features]))
    done = 0
    writer: pq.ParquetWriter | None = None
    try:
        for batch in parquet.iter_batches(batch_size=chunk_rows, columns=columns):
            frame = batch.to_pandas()
            try:
                matrix, _ = predictor.schema.frame_from_table(frame, unseen=unseen)
            except tuner.PredictionInputError as exc:
                # Row numbers in the message count from this chunk; say where it starts.
                raise ValueError(f"rows from {done}: {exc}") from exc
            answer = predictor.predict_columns(matrix)
            table = pa.Table.from_pandas(answer, preserve_index=False)
            for i, name in enumerate(keep):  # the stored values, untouched
                table = table.add_column(i, name, batch.column(batch.schema.get_field_index(
                    name)))
            if writer is None:
                writer = pq.ParquetWriter(dest, table.schema)
            writer.write_table(table)
            done += batch.num_rows
            with session_scope(url) as session:
                stop = repository.scoring_progress(session, scoring_id=scoring_id,
                                                   worker_id=worker_id, rows_done=done)
            if stop or shutdown.is_set():
                raise Stopped
        if writer is None:  # no rows: an empty table with the answer's columns
            writer = pq.ParquetWriter(dest, pa.schema([("prediction", pa.float64())]))
    finally:
        if writer is not None:
            writer.close()
    return done
