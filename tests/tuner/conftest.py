"""Shared fixtures for the tuner tests: small synthetic tables and search settings."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest

CLAY_BODIES = ["earthenware", "porcelain", "raku", "stoneware"]


def _frame(task: str, n_rows: int = 300, seed: int = 0) -> pd.DataFrame:
    """A pottery-firing table whose target depends on a few columns, plus noise."""
    rng = np.random.default_rng(seed)
    temp = rng.normal(1200, 80, n_rows)
    clay = rng.choice(CLAY_BODIES, n_rows)
    glazed = rng.random(n_rows) < 0.5
    day = pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 365, n_rows), unit="D")
    signal = (temp - 1200) / 80 + np.where(clay == "porcelain", 1.0, 0.0) - 0.7 * glazed
    signal = signal + rng.normal(0, 0.7, n_rows)
    frame = pd.DataFrame({
        "temp_c": temp,
        "clay_body": pd.Series(clay, dtype="str"),
        "glazed": pd.Series(np.where(glazed, "true", "false"), dtype="str"),
        "fired_on": pd.Series(day.strftime("%Y-%m-%d"), dtype="str"),
        "kiln": rng.integers(0, 12, n_rows),
        "weight": rng.uniform(0.5, 2.0, n_rows),
    })
    if task == "binary":
        frame["cracked"] = pd.Series(np.where(signal > 0.3, "yes", "no"), dtype="str")
    elif task == "multiclass":
        frame["grade"] = np.digitize(signal, [-0.6, 0.6])  # 0, 1, 2
    else:
        frame["shrinkage"] = 5 + signal + rng.normal(0, 0.2, n_rows)
    return frame


TARGETS = {"binary": "cracked", "multiclass": "grade", "regression": "shrinkage"}


@pytest.fixture
def make_frame() -> Callable[..., pd.DataFrame]:
    """Factory: ``make_frame(task, n_rows=300, seed=0)``."""
    return _frame


@pytest.fixture
def storage_url(tmp_path) -> str:
    """A fresh SQLite storage file per test."""
    return f"sqlite:///{tmp_path / 'studies.db'}"
