"""Decision thresholds from the costs of the two mistakes."""

from __future__ import annotations

import numpy as np
import pytest

from tuner.decision import (
    cost_ratio_threshold,
    decide,
    expected_cost,
    threshold_from_costs,
)

RNG = np.random.default_rng(7)


def calibrated(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Perfectly calibrated probabilities: each label drawn with its own probability."""
    p = RNG.random(n)
    return (RNG.random(n) < p).astype(int), p


@pytest.mark.parametrize(("c_fp", "c_fn"), [(1.0, 5.0), (3.0, 1.0), (1.0, 1.0)])
def test_calibrated_threshold_is_the_cost_ratio(c_fp: float, c_fn: float) -> None:
    # Elkan (2001): with calibrated probabilities the cost-minimising cut is
    # c_FP / (c_FP + c_FN).
    ratio = c_fp / (c_fp + c_fn)
    assert cost_ratio_threshold(c_fp, c_fn) == ratio
    made = decide({"false_positive_cost": c_fp, "false_negative_cost": c_fn},
                  calibrated=True, oof=None, holdout=None)
    assert made["threshold"] == ratio and made["method"] == "cost_ratio"
    # And the empirical search lands there too on many calibrated rows (its own check of
    # the same fact, from the data alone).
    y, p = calibrated(200_000)
    found = threshold_from_costs(y, p, false_positive_cost=c_fp, false_negative_cost=c_fn)
    assert found == pytest.approx(ratio, abs=0.02)


def test_expected_cost_matches_numpy_and_search_is_minimal() -> None:
    y, p = calibrated(500)
    w = RNG.uniform(0.5, 2.0, 500)
    t = threshold_from_costs(y, p, false_positive_cost=2.0, false_negative_cost=3.0,
                             weight=w)
    # Direct numpy: weighted mean of c_FP over false positives and c_FN over false negatives.
    direct = lambda cut: float(  # noqa: E731
        np.sum(w * (2.0 * ((p > cut) & (y == 0)) + 3.0 * ((p <= cut) & (y == 1))))
        / np.sum(w))
    assert expected_cost(y, p, t, false_positive_cost=2.0, false_negative_cost=3.0,
                         weight=w) == pytest.approx(direct(t), abs=1e-12)
    # No cut on a fine grid does better than the one found.
    assert min(direct(c) for c in np.linspace(0, 1, 2001)) >= direct(t) - 1e-12


def test_out_of_fold_choice_and_holdout_report() -> None:
    y, p = calibrated(2000)
    oof, hold = (y[:1500], p[:1500] ** 2), (y[1500:], p[1500:] ** 2, None)  # miscalibrated
    made = decide({"false_positive_cost": 1.0, "false_negative_cost": 4.0}, calibrated=False,
                  oof=oof, holdout=hold)
    assert made["method"] == "out_of_fold"
    # p**2 shrinks probabilities: the best cut sits near 0.2**2, far below the ratio 0.2.
    assert made["threshold"] == pytest.approx(0.04, abs=0.03)
    at = made["holdout"]
    assert at["rows"] == 500
    assert at["expected_cost_per_row"] < at["expected_cost_per_row_at_0_5"]
    assert decide(None, calibrated=False, oof=None, holdout=None)["threshold"] == 0.5
