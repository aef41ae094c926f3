"""Drift bins and the population stability index."""

from __future__ import annotations

import numpy as np
import pytest

from tuner.drift import bin_counts, psi, reading, reference_bins

RNG = np.random.default_rng(3)


def test_psi_matches_a_direct_numpy_computation_on_the_same_bins() -> None:
    train = RNG.normal(0, 1, 5000)
    scored = RNG.normal(0.5, 1.2, 3000)
    train[:50] = np.nan  # missing values get their own bin
    ref = reference_bins(train[:, None], ["x"], ["numeric"], [0])
    (counts,) = bin_counts(scored[:, None], ref)
    # Direct: deciles of the training values as edges, shares per bin, then
    # sum((a - e) * ln(a / e)).
    present = train[~np.isnan(train)]
    edges = np.quantile(present, np.linspace(0.1, 0.9, 9))
    e = np.r_[np.histogram(present, np.r_[-np.inf, edges, np.inf])[0], 50] / 5000
    a = np.r_[np.histogram(scored, np.r_[-np.inf, edges, np.inf])[0], 0] / 3000
    a = np.maximum(a, 1e-4)
    expected = float(np.sum((a - e) * np.log(a / e)))
    assert list(ref["features"][0]["counts"]) == list(e * 5000)
    assert psi(ref["features"][0]["counts"], counts) == pytest.approx(expected, rel=1e-12)


def test_categorical_bins_and_readings() -> None:
    codes = RNG.integers(0, 3, 1000).astype(float)
    ref = reference_bins(codes[:, None], ["c"], ["categorical"], [3])
    assert ref["features"][0]["counts"] == list(np.bincount(codes.astype(int), minlength=4))
    (same,) = bin_counts(RNG.integers(0, 3, 1000).astype(float)[:, None], ref)
    (shifted,) = bin_counts(np.r_[np.zeros(900), np.full(100, np.nan)][:, None], ref)
    assert psi(ref["features"][0]["counts"], same) < 0.1
    assert psi(ref["features"][0]["counts"], shifted) > 0.25
    assert [reading(v) for v in (0.05, 0.1, 0.2, 0.25, 0.3)] == [
        "stable", "moderate", "moderate", "moderate", "significant"]
