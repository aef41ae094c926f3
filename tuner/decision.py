"""Binary decisions with costs: the probability cut that minimises the expected cost of
the two mistakes, and that cost on the hold-out against the plain 0.5 cut.

With calibrated probabilities the cost-minimising cut is c_FP / (c_FP + c_FN) (Elkan
2001, "The foundations of cost-sensitive learning"). Boosted trees' probabilities are
often not calibrated, so otherwise the cut is chosen on out-of-fold predictions of the
search rows (each row predicted by a fold model that never saw it), never on the
hold-out, which stays for the honest estimate.
"""

from __future__ import annotations

from typing import Any

import lightgbm as lgb
import numpy as np

from tuner._lgb import feature_matrix, make_dataset, predict
from tuner.dataset import PreparedData
from tuner.validation import ValidationPlan
from vocabulary import DEFAULT_DECISION

__all__ = ["DEFAULT_DECISION", "cost_ratio_threshold", "decide", "expected_cost",
           "out_of_fold", "threshold_from_costs"]



def cost_ratio_threshold(false_positive_cost: float, false_negative_cost: float) -> float:
    """c_FP / (c_FP + c_FN): the Bayes-optimal cut for calibrated probabilities."""
    return false_positive_cost / (false_positive_cost + false_negative_cost)


def expected_cost(y: np.ndarray, prob: np.ndarray, threshold: float, *,
                  false_positive_cost: float, false_negative_cost: float,
                  weight: np.ndarray | None = None) -> float:
    """Mean cost per row when class 1 is predicted for ``prob > threshold``."""
    positive = np.asarray(prob) > threshold
    truth = np.asarray(y) == 1
    cost = (false_positive_cost * (positive & ~truth)
            + false_negative_cost * (~positive & truth))
    return float(np.average(cost, weights=weight))


def threshold_from_costs(y: np.ndarray, prob: np.ndarray, *, false_positive_cost: float,
                         false_negative_cost: float,
                         weight: np.ndarray | None = None) -> float:
    """The cut with the least mean cost on these rows.

    Candidates are the midpoints between successive distinct probabilities (plus both
    ends), which covers every distinct labelling; among equally cheap cuts the one nearest
    the cost ratio is taken, so little data never pushes the cut to an extreme.
    """
    p = np.asarray(prob, dtype="float64")
    truth = np.asarray(y) == 1
    w = np.ones(len(p)) if weight is None else np.asarray(weight, dtype="float64")
    values = np.unique(p)
    candidates = np.r_[0.0, (values[:-1] + values[1:]) / 2, 1.0]
    order = np.argsort(p)
    sorted_p, sorted_pos, sorted_w = p[order], truth[order], w[order]
    # Rows at or below a cut are predicted 0: cumulative sums give every cut's cost at once.
    below = np.searchsorted(sorted_p, candidates, side="right")
    fn = np.r_[0.0, np.cumsum(sorted_w * sorted_pos)][below]
    neg_below = np.r_[0.0, np.cumsum(sorted_w * ~sorted_pos)][below]
    fp = w[~truth].sum() - neg_below
    cost = (false_positive_cost * fp + false_negative_cost * fn) / w.sum()
    best = np.flatnonzero(np.isclose(cost, cost.min(), rtol=0, atol=1e-12))
    ratio = cost_ratio_threshold(false_positive_cost, false_negative_cost)
    return float(candidates[best[np.argmin(np.abs(candidates[best] - ratio))]])


def out_of_fold(data: PreparedData, plan: ValidationPlan, params: dict[str, Any],
                best_iterations: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Positions (into the table) and probabilities of every search row that some fold
    validated, each predicted by that fold's model refit with the trial's early-stopped
    round count."""
    w = data.weight
    rows, probs = [], []
    for (fit, valid), rounds in zip(plan.folds, best_iterations, strict=False):
        fit_rows, valid_rows = plan.train_idx[fit], plan.train_idx[valid]
        train = make_dataset(data.X, data.y[fit_rows], None if w is None else w[fit_rows],
                             params, rows=fit_rows)
        booster = lgb.train(params, train, num_boost_round=max(1, int(rounds)))
        del train
        rows.append(valid_rows)
        probs.append(predict(booster, data.task,
                             feature_matrix(data.X, valid_rows, order="C")))
    return np.concatenate(rows), np.concatenate(probs)


def decide(costs: dict[str, float] | None, *, calibrated: bool,
           oof: tuple[np.ndarray, np.ndarray] | None,
           holdout: tuple[np.ndarray, np.ndarray, np.ndarray | None] | None) -> dict[str, Any]:
    """The model's ``decision``: its threshold, how it was chosen, and (with costs and a
    hold-out) the expected cost per row there at that threshold and at 0.5.

    Args:
        costs: ``{"false_positive_cost", "false_negative_cost"}`` or None.
        calibrated: The served probabilities are calibrated.
        oof: ``(y, prob)`` out of fold on the search rows (needed when not calibrated).
        holdout: ``(y, prob, weight)`` of the served model on the hold-out, or None.
    """
    if not costs:
        return dict(DEFAULT_DECISION)
    c_fp, c_fn = float(costs["false_positive_cost"]), float(costs["false_negative_cost"])
    out: dict[str, Any] = {"false_positive_cost": c_fp, "false_negative_cost": c_fn}
    if calibrated or oof is None:
        out["threshold"] = cost_ratio_threshold(c_fp, c_fn)
        out["method"] = "cost_ratio"
        out["note"] = ("calibrated probabilities: c_FP / (c_FP + c_FN) (Elkan 2001)"
                       if calibrated else "no out-of-fold rows: c_FP / (c_FP + c_FN)")
    else:
        y, prob = oof
        out["threshold"] = threshold_from_costs(y, prob, false_positive_cost=c_fp,
                                                false_negative_cost=c_fn)
        out["method"] = "out_of_fold"
        out["note"] = ("probabilities not calibrated: the cut with the least cost on "
                       f"{len(y)} out-of-fold search rows (never the hold-out)")
    if holdout is not None and len(holdout[0]):
        y, prob, weight = holdout
        def cost(threshold: float) -> float:
            return expected_cost(y, prob, threshold, false_positive_cost=c_fp,
                                 false_negative_cost=c_fn, weight=weight)
        out["holdout"] = {
            "rows": int(len(y)),
            "expected_cost_per_row": cost(out["threshold"]),
            "expected_cost_per_row_at_0_5": cost(0.5),
        }
    return out
