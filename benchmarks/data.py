"""Seeded tables for the benchmarks."""

from __future__ import annotations

import numpy as np
import pandas as pd


def wide_table(n_rows: int, seed: int = 0) -> pd.DataFrame:
    """20 columns: 14 float (some missing), 2 int, 4 categorical strings, and a binary target."""
    rng = np.random.default_rng(seed)
    cols: dict[str, object] = {}
    for i in range(14):
        values = rng.normal(size=n_rows)
        values[rng.random(n_rows) < 0.02] = np.nan
        cols[f"x{i:02d}"] = values.round(5)
    cols["count_a"] = rng.integers(0, 50, n_rows)
    cols["count_b"] = rng.integers(0, 1000, n_rows)
    for i, levels in enumerate((5, 12, 30, 80)):
        names = np.array([f"level_{j}" for j in range(levels)])
        cols[f"cat{i}"] = names[rng.integers(0, levels, n_rows)]
    frame = pd.DataFrame(cols)
    logit = (frame["x00"] - 0.5 * frame["x01"].fillna(0) ** 2 + 0.01 * frame["count_a"]
             + (frame["cat0"] == "level_1") * 0.8 - 0.5)
    frame["target"] = (rng.random(n_rows) < 1 / (1 + np.exp(-logit))).astype(int)
    return frame
