"""Loaded models kept in memory, so a prediction never re-reads the model file, nor
(once loaded) its database row: a stored model is never changed (only deleted, which a
channel prevents for the models callers use)."""

from __future__ import annotations

import threading
from collections import OrderedDict

import tuner
from service.api.drift import DriftRecorder
from service.storage import LocalStore
from service.tables import Model

CAPACITY = 16


class PredictorCache:
    def __init__(self, store: LocalStore, capacity: int = CAPACITY,
                 recorder: DriftRecorder | None = None) -> None:
        self.store = store
        self.recorder = recorder
        self.capacity = capacity
        self._items: OrderedDict[str, tuner.Predictor] = OrderedDict()
        self._lock = threading.Lock()

    def cached(self, model_id: str) -> tuner.Predictor | None:
        """The loaded predictor, without touching the database (models never change)."""
        with self._lock:
            found = self._items.get(model_id)
            if found is not None:
                self._items.move_to_end(model_id)
            return found

    def forget(self, model_id: str) -> None:
        """Drop a deleted model (this process only; others drop it when it falls out)."""
        with self._lock:
            self._items.pop(model_id, None)

    def get(self, model: Model) -> tuner.Predictor:
        found = self.cached(model.id)
        if found is not None:
            return found
        path = self.store.local_path(model.file_key)
        booster = tuner.load_booster(path, expected_sha256=model.sha256)
        threshold = float((model.decision or {}).get("threshold", 0.5))
        predictor = tuner.Predictor(
            booster, tuner.FeatureSchema.from_dict(model.feature_schema), model.task,
            model.classes, threshold=threshold,
        )
        reference = (model.details or {}).get("drift_reference")
        if reference and self.recorder is not None:
            predictor.observer = self.recorder.observer(model.id, reference)
        with self._lock:
            self._items[model.id] = predictor
            while len(self._items) > self.capacity:
                self._items.popitem(last=False)
        return predictor
