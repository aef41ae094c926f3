"""Saving and loading models, and serving predictions against the saved schema."""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path
from typing import Any

import lightgbm as lgb
import numpy as np
import optuna
import pandas as pd

from tuner._lgb import frame_matrix, predict
from tuner._rows import RowEncoder
from tuner.errors import ArtifactError
from tuner.evaluation.explain import contribution_scale, contributions
from tuner.model import FittedModel
from tuner.schema import FeatureSchema

__all__ = ["Predictor", "load_booster", "model_metadata", "save_model"]


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def save_model(fitted: FittedModel, path: str | os.PathLike[str]) -> str:
    """Write the booster as LightGBM's text model, atomically.

    The text goes to a temporary file in the same directory, which then replaces ``path``,
    so a reader never sees half a model even if the writer dies.

    Args:
        fitted: The model from :func:`tuner.model.fit_final`.
        path: Destination file; missing parent directories are created.

    Returns:
        The SHA-256 hex digest of the written bytes (pass it to :func:`load_booster`).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    data = fitted.booster.model_to_string().encode("utf-8")
    fd, temp = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, target)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise
    return _sha256(data)


def load_booster(path: str | os.PathLike[str], expected_sha256: str | None = None) -> lgb.Booster:
    """Load a model written by :func:`save_model`, checking its digest when given.

    Raises:
        ArtifactError: The file is missing or unreadable, its digest differs, or LightGBM
            cannot parse it.
    """
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise ArtifactError(f"cannot read model file {path}: {exc.strerror or exc}") from None
    if expected_sha256 is not None and _sha256(data) != expected_sha256.lower():
        raise ArtifactError(f"model file {path} does not match its recorded SHA-256")
    try:
        return lgb.Booster(model_str=data.decode("utf-8"))
    except (lgb.basic.LightGBMError, UnicodeDecodeError) as exc:
        raise ArtifactError(f"model file {path} is not a valid LightGBM model: {exc}") from None


def model_metadata(fitted: FittedModel) -> dict[str, Any]:
    """Everything besides the trees needed to serve and describe a model, JSON-ready."""
    return {
        "task": fitted.task,
        "metric": fitted.metric,
        "classes": fitted.classes,
        "schema": fitted.schema.to_dict(),
        "params": fitted.params,
        "boosting_rounds": fitted.boosting_rounds,
        "cv": fitted.cv,
        "holdout": fitted.holdout,
        "feature_importance": fitted.feature_importance,
        "calibration": fitted.calibration,
        "versions": {"lightgbm": lgb.__version__, "optuna": optuna.__version__,
                     "pandas": pd.__version__},
    }


class Predictor:
    """Predictions in original labels, from raw rows or tables checked against the schema."""

    def __init__(self, booster: lgb.Booster, schema: FeatureSchema, task: str,
                 classes: list[Any] | None, threshold: float = 0.5) -> None:
        """Bind a booster to the schema, task and classes it was trained with.

        ``threshold`` (binary): class 1 is predicted when its probability exceeds it (the
        model's decision threshold, tuner/decision.py).
        """
        self.booster = booster
        self.schema = schema
        self.task = task
        self.classes = classes
        self.threshold = threshold
        # Called with each batch of rows in model input form (drift summaries); never
        # allowed to fail a prediction.
        self.observer: Any = None
        self._rows = RowEncoder(schema, booster)

    @classmethod
    def from_metadata(cls, booster: lgb.Booster, metadata: dict[str, Any]) -> Predictor:
        """Build from a booster and the dict of :func:`model_metadata`."""
        return cls(booster, FeatureSchema.from_dict(metadata["schema"]), metadata["task"],
                   metadata["classes"])

    def _observe(self, matrix: Any) -> None:
        if self.observer is None:
            return
        try:
            if not isinstance(matrix, np.ndarray):
                matrix = frame_matrix(self.booster, matrix)
            if isinstance(matrix, np.ndarray):
                self.observer(matrix)
        except Exception:  # noqa: BLE001, S110 - a summary is never worth a failed answer
            pass

    def _binary_labels(self, p1: np.ndarray, threshold: float | None) -> np.ndarray:
        cut = self.threshold if threshold is None else threshold
        return (p1 > cut).astype("int64")

    def predict_frame(self, frame: pd.DataFrame,
                      threshold: float | None = None) -> dict[str, Any]:
        """Predict a frame already in training form (from the schema's ``frame_from_*``).

        Returns:
            ``{"predictions": [...]}`` with original class labels (binary: class 1 when its
            probability exceeds 0.5) or float values, plus ``"probabilities"`` for
            classification: one list per row, aligned with ``classes``.
        """
        return self._answer(predict(self.booster, self.task, frame), threshold)

    def predict_columns(self, frame: pd.DataFrame,
                        threshold: float | None = None) -> pd.DataFrame:
        """A table answer for a frame in training form: ``prediction``, then one
        ``probability_<class>`` column per class for classification.

        Built from arrays, without the per-value Python objects of :meth:`predict_frame`,
        which cost more than LightGBM's own predict on large batches.
        """
        pred = predict(self.booster, self.task, frame)
        self._observe(frame)
        if self.task == "regression":
            return pd.DataFrame({"prediction": pred})
        probs = np.column_stack([1.0 - pred, pred]) if pred.ndim == 1 else pred
        classes = self.classes or list(range(probs.shape[1]))
        codes = (self._binary_labels(probs[:, 1], threshold) if pred.ndim == 1
                 else np.argmax(probs, axis=1))
        labels = np.asarray(classes, dtype=object)[codes]
        out = pd.DataFrame({"prediction": labels})
        for k, label in enumerate(classes):
            out[f"probability_{label}"] = probs[:, k]
        return out

    def _answer(self, pred: np.ndarray, threshold: float | None = None) -> dict[str, Any]:
        if self.task == "multiclass" and pred.ndim == 1:
            pred = pred.reshape(-1, len(self.classes or ()) or 1)
        if self.task == "regression":
            return {"predictions": [float(v) for v in pred]}
        probs = np.column_stack([1.0 - pred, pred]) if pred.ndim == 1 else pred
        labels = (self._binary_labels(pred, threshold) if pred.ndim == 1
                  else np.argmax(probs, axis=1))
        classes = self.classes or list(range(probs.shape[1]))
        return {
            "predictions": [classes[int(k)] for k in labels],
            "probabilities": [[float(p) for p in row] for row in probs],
        }

    def explain_frame(self, frame: pd.DataFrame) -> dict[str, Any]:
        """Per-row TreeSHAP contributions for a frame in training form.

        See :mod:`tuner.evaluation.explain`.

        Returns:
            ``{"contributions": [{"bias", "features": {name: value}}], "contribution_scale"}``;
            per row, bias plus the feature values equal the raw score.
        """
        return {"contributions": contributions(self.booster, self.task, frame,
                                               list(self.schema.names)),
                "contribution_scale": contribution_scale(self.booster, self.task)}

    def predict_rows(self, rows: list[dict[str, Any]], unseen: str = "error",
                     explain: bool = False, threshold: float | None = None) -> dict[str, Any]:
        """Validate JSON-like rows and predict them (``explain``: add contributions).

        Raises:
            PredictionInputError: The rows do not match the schema.
        """
        fast = None if explain else self._rows.encode(rows)
        if fast is not None:
            matrix, ignored = fast
            pred = np.asarray(self.booster.predict(matrix), dtype="float64")
            self._observe(matrix)
            return {**self._answer(pred, threshold), "ignored_columns": ignored}
        frame, ignored = self.schema.frame_from_rows(rows, unseen=unseen)
        self._observe(frame)
        out = {**self.predict_frame(frame, threshold), "ignored_columns": ignored}
        return {**out, **self.explain_frame(frame)} if explain else out

    def predict_table(self, df: pd.DataFrame, unseen: str = "error") -> dict[str, Any]:
        """Validate a table (e.g. an uploaded CSV) and predict it.

        Raises:
            PredictionInputError: Columns are missing or hold invalid values.
        """
        frame, ignored = self.schema.frame_from_table(df, unseen=unseen)
        return {**self.predict_frame(frame), "ignored_columns": ignored}
