"""Choosing the winner among finished trials: best mean, or the one-standard-error rule."""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

import numpy as np

from tuner.errors import ConfigError
from vocabulary import SELECTION_RULES

#: ``best``: the best mean CV score. ``one_se``: the simplest model whose mean CV score is
#: within one standard error of the best (Breiman, Friedman, Olshen & Stone,
#: *Classification and Regression Trees*, 1984, section 3.4.3).


def standard_error(fold_scores: list[float]) -> float:
    """Standard error of a mean over folds: sample std (ddof=1) / sqrt(k); 0 for one fold."""
    k = len(fold_scores)
    if k < 2:
        return 0.0
    return float(np.std(fold_scores, ddof=1) / math.sqrt(k))


#: Blocks a single validation split is cut into to estimate its score's standard error.
SE_BLOCKS = 10


def split_standard_error(metric: Any, y: np.ndarray, pred: np.ndarray,
                         weight: np.ndarray | None, *, blocks: int = SE_BLOCKS) -> float | None:
    """Standard error of a score on one validation split, by batch means.

    The rows are cut into ``blocks`` interleaved blocks (row ``i`` to block ``i % blocks``;
    the fold's rows are already in random order relative to the target), the metric is
    scored on each, and the standard error is ``std(ddof=1) / sqrt(blocks)``: exact in
    expectation for metrics that are means over rows, a fair approximation for the
    others (AUC). Blocks where the metric is undefined (one class only) are skipped;
    ``None`` when fewer than two blocks are left.
    """
    scores = []
    for b in range(blocks):
        idx = slice(b, None, blocks)
        try:
            scores.append(float(metric(y[idx], pred[idx], None if weight is None
                                       else weight[idx])))
        except ValueError:
            continue
    if len(scores) < 2:
        return None
    return float(np.std(scores, ddof=1) / math.sqrt(len(scores)))


def record_standard_error(record: Any) -> float:
    """A trial's ``score_se`` when it has one, else the standard error over its folds."""
    se = getattr(record, "score_se", None)
    return float(se) if se is not None else standard_error(list(record.fold_scores))


def complexity(record: Any) -> int:
    """Size of the model a trial would refit: leaves per tree times boosting rounds.

    ``num_leaves`` missing from the params (fixed outside the space) counts as
    LightGBM's default 31.
    """
    leaves = int(record.params.get("num_leaves", 31))
    return leaves * int(record.boosting_rounds or 0)


def select(records: Iterable[Any], direction: str, rule: str = "best"
           ) -> tuple[Any | None, dict[str, Any]]:
    """Pick the winner among complete trials (records with ``score`` and ``fold_scores``).

    Args:
        records: Trial records; only those with ``state == "complete"`` compete.
        direction: ``"maximize"`` or ``"minimize"``.
        rule: One of :data:`SELECTION_RULES`.

    Returns:
        ``(winner, report)``; ``report`` names the rule, the best trial, the chosen one
        and, for ``one_se``, the standard error, the threshold and both complexities.
        ``(None, {...})`` when no trial completed.

    Raises:
        ConfigError: Unknown rule (field ``selection``).
    """
    if rule not in SELECTION_RULES:
        message = f"unknown selection '{rule}'; use one of {', '.join(SELECTION_RULES)}"
        raise ConfigError(message, [{"field": "selection", "message": message}])
    sign = -1.0 if direction == "maximize" else 1.0
    complete = [r for r in records if r.state == "complete" and r.score is not None]
    if not complete:
        return None, {"rule": rule, "best_trial": None, "chosen_trial": None}
    # Ties on score go to the earlier trial, so equal searches choose equal winners.
    best = min(complete, key=lambda r: (sign * r.score, r.number))
    report: dict[str, Any] = {"rule": rule, "best_trial": best.number,
                              "best_score": best.score}
    if rule == "best":
        return best, {**report, "chosen_trial": best.number, "chosen_score": best.score}
    se = record_standard_error(best)
    # Within one SE of the best, on the worse side of it: score >= best - se (maximize).
    threshold = best.score - se if direction == "maximize" else best.score + se
    within = [r for r in complete if sign * r.score <= sign * threshold]
    chosen = min(within, key=lambda r: (complexity(r), sign * r.score, r.number))
    return chosen, {
        **report, "chosen_trial": chosen.number, "chosen_score": chosen.score,
        "standard_error": se, "threshold": threshold, "candidates": len(within),
        "best_complexity": complexity(best), "chosen_complexity": complexity(chosen),
    }
