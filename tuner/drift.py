"""Do the rows being scored still look like the training rows? Per-feature binned counts
and the population stability index (PSI).

Rows are counted in the model's input form (tuner/_lgb.py ``frame_matrix``: numbers as
floats, categories as their training codes, missing as NaN). A numeric feature gets up
to ten bins cut at the deciles of its training values; a categorical one a bin per
training level; both one more bin for missing values. PSI = sum over bins of
(a - e) * ln(a / e) with a and e the scored and training shares, a share of zero taken
as 1e-4 so that an empty bin counts without dividing by zero. The usual reading (common
practice, no single source): below 0.1 stable, 0.1 to 0.25 moderate, above 0.25
significant.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["EMPTY_SHARE", "bin_counts", "psi", "reading", "reference_bins"]

EMPTY_SHARE = 1e-4
DECILES = np.linspace(0.1, 0.9, 9)


def reference_bins(matrix: np.ndarray, names: list[str], kinds: list[str],
                   levels: list[int]) -> dict[str, Any]:
    """The training bins and counts of each feature (JSON-ready).

    Args:
        matrix: Training rows in model input form, one column per feature.
        names, kinds: The features and their kinds (``categorical`` or other).
        levels: Per feature, the number of training levels (0 for non-categorical).
    """
    features = []
    for j, (name, kind) in enumerate(zip(names, kinds, strict=True)):
        column = matrix[:, j]
        present = column[~np.isnan(column)]
        if kind == "categorical":
            entry: dict[str, Any] = {"name": name, "kind": kind, "levels": int(levels[j])}
        else:
            edges = np.unique(np.quantile(present, DECILES)) if len(present) else np.array([])
            entry = {"name": name, "kind": kind, "edges": [float(e) for e in edges]}
        entry["counts"] = [int(c) for c in _count(column, entry)]
        features.append(entry)
    return {"rows": int(matrix.shape[0]), "features": features}


def _count(column: np.ndarray, entry: dict[str, Any]) -> np.ndarray:
    missing = np.isnan(column)
    if entry["kind"] == "categorical":
        n = entry["levels"]
        codes = np.where(missing, n, column).astype(np.int64)
        codes[(codes < 0) | (codes > n)] = n  # an unknown code counts as missing
    else:
        n = len(entry["edges"]) + 1
        codes = np.where(missing, n, np.searchsorted(entry["edges"],
                                                     np.where(missing, 0.0, column),
                                                     side="right"))
    return np.bincount(codes, minlength=n + 1)


def bin_counts(matrix: np.ndarray, reference: dict[str, Any]) -> list[np.ndarray]:
    """Per feature, the counts of ``matrix``'s rows in the reference bins (missing last)."""
    return [_count(matrix[:, j], entry) for j, entry in enumerate(reference["features"])]


def psi(expected: Any, actual: Any) -> float:
    """Population stability index of ``actual`` counts against ``expected`` counts."""
    e = np.asarray(expected, dtype="float64")
    a = np.asarray(actual, dtype="float64")
    e = np.maximum(e / e.sum(), EMPTY_SHARE)
    a = np.maximum(a / a.sum(), EMPTY_SHARE)
    return float(np.sum((a - e) * np.log(a / e)))


def reading(value: float) -> str:
    """The usual reading of a PSI value (common practice)."""
    if value < 0.1:
        return "stable"
    return "moderate" if value <= 0.25 else "significant"
