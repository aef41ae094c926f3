"""Drift summaries of the rows an API process scores: binned counts per model and day,
kept in memory and added to the database every few seconds (a crash loses at most that
much). No row itself is kept."""

from __future__ import annotations

import logging
import threading
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy.exc import IntegrityError

from service import repository
from service.db import session_scope

if TYPE_CHECKING:
    import numpy as np

log = logging.getLogger("grovekeeper.api")


class DriftRecorder:
    def __init__(self, url: str, flush_seconds: float) -> None:
        self.url = url
        self.flush_seconds = flush_seconds
        self._lock = threading.Lock()
        self._flush_lock = threading.Lock()
        self._buffer: dict[tuple[str, str], tuple[int, list[np.ndarray]]] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def observer(self, model_id: str, reference: dict[str, Any]) -> Any:
        """The callback a model's Predictor calls with each batch in input form."""
        # Imported here: the API process loads numerical libraries only when it predicts.
        from tuner.drift import bin_counts

        def observe(matrix: np.ndarray) -> None:
            counts = bin_counts(matrix, reference)
            key = (model_id, datetime.now(UTC).date().isoformat())
            with self._lock:
                rows, total = self._buffer.get(key, (0, [c * 0 for c in counts]))
                self._buffer[key] = (rows + matrix.shape[0],
                                     [t + c for t, c in zip(total, counts, strict=True)])
                if self._thread is None:
                    self._thread = threading.Thread(target=self._run, daemon=True,
                                                    name="drift-flush")
                    self._thread.start()
        return observe

    def _run(self) -> None:
        while not self._stop.wait(self.flush_seconds):
            self.flush()

    def flush(self) -> None:
        with self._flush_lock:
            with self._lock:
                taken, self._buffer = self._buffer, {}
            for (model_id, day), (rows, counts) in taken.items():
                as_lists = [[int(v) for v in c] for c in counts]
                for _attempt in range(3):
                    try:
                        with session_scope(self.url) as session:
                            repository.add_drift_counts(session, model_id=model_id, day=day,
                                                        rows=rows, counts=as_lists)
                        break
                    except IntegrityError:  # another process created the row first
                        continue
                    except Exception:  # noqa: BLE001 - summaries never take the API down
                        log.warning("drift: could not flush %s %s", model_id, day,
                                    exc_info=True)
                        break

    def close(self) -> None:
        self._stop.set()
        self.flush()
