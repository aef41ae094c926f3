"""Overfitting diagnostics of the winner and which hyperparameters mattered in the search."""

from __future__ import annotations

from typing import Any

import lightgbm as lgb
import numpy as np
import optuna

from tuner._lgb import make_dataset
from tuner.config import SearchConfig
from tuner.dataset import PreparedData
from tuner.evaluation import sampling
from tuner.metrics import get_metric
from tuner.study import load_study
from tuner.validation import ValidationPlan

__all__ = ["hyperparameter_importance", "leaf_sizes", "learning_curve"]

#: LightGBM metrics where larger is better; every other early-stopping metric is a loss.
_HIGHER_IS_BETTER = frozenset({"auc"})
#: Common practice: a leaf should hold enough rows for noise to average out. LightGBM's own
#: default ``min_data_in_leaf`` is 20 (Parameters.rst); we flag leaves under half of that.
SMALL_LEAF_ROWS = 10
SMALL_LEAF_SHARE = 0.25
#: Common practice (a rule of thumb, not a test): at the chosen round, training error below
#: a fifth of the validation error means the trees fit their own rows far better than new
#: ones. "Error" is the loss, or 1 - AUC. Boosted trees on small tables routinely reach a
#: third to a half (measured on both demo tables), so a milder ratio would fire always.
DIVERGENCE_RATIO = 0.2
DIVERGENCE_MIN_GAP = 0.02
#: The learning curve refits one fold: on a large table, on a seeded sample of at most this
#: many of its fitting rows (and SAMPLE_ROWS validation rows). Past a few hundred thousand
#: rows a curve's shape barely moves, and the full fold would cost one more search trial.
CURVE_FIT_ROWS = 200_000
#: fANOVA's forest grows with the trials it is given; more than this many complete trials
#: are sampled (seeded): the variance split it estimates is settled long before.
IMPORTANCE_TRIALS = 1_000


def _round(values: list[float]) -> list[float]:
    # Six significant digits is plenty for a curve and halves the JSON.
    return [float(f"{v:.6g}") for v in values]


def learning_curve(data: PreparedData, plan: ValidationPlan, params: dict[str, Any],
                   config: SearchConfig, *, fold: int = 0) -> dict[str, Any]:
    """Train and validation metric per boosting round for one CV fold of the winner.

    The fold is refit exactly as the search fitted it (same rows, parameters, early
    stopping), recording both curves with ``lgb.record_evaluation``; the curve runs
    ``early_stopping_rounds`` past the chosen round, so the turn is visible.

    On a large table the fold is refit on a seeded sample of at most
    :data:`CURVE_FIT_ROWS` fitting and ``SAMPLE_ROWS`` validation rows (``rows`` says how
    many of how many).

    Returns:
        ``{"metric", "higher_is_better", "fold", "train", "valid", "best_round", "rows",
        "warnings"}``; ``train[i]`` is the score after round ``i + 1``.
    """
    lgb_metric = get_metric(config.metric, data.task).lgb_metric_for(data.task)
    full = {**params, "metric": lgb_metric}
    all_fit, all_valid = plan.folds[fold]
    fit = sampling.bounded(all_fit, CURVE_FIT_ROWS, seed=config.seed)
    valid = sampling.bounded(all_valid, seed=config.seed)
    fit_rows, valid_rows = plan.train_idx[fit], plan.train_idx[valid]
    w = data.weight
    train_set = make_dataset(data.X, data.y[fit_rows], None if w is None else w[fit_rows],
                             full, rows=fit_rows)
    valid_set = make_dataset(data.X, data.y[valid_rows],
                             None if w is None else w[valid_rows], full, reference=train_set,
                             rows=valid_rows)
    record: dict[str, Any] = {}
    booster = lgb.train(
        full, train_set, num_boost_round=config.max_rounds,
        valid_sets=[train_set, valid_set], valid_names=["train", "valid"],
        callbacks=[lgb.record_evaluation(record),
                   lgb.early_stopping(config.early_stopping_rounds, first_metric_only=True,
                                      verbose=False)],
    )
    best = int(booster.best_iteration or booster.current_iteration())
    train, val = record["train"][lgb_metric], record["valid"][lgb_metric]
    higher = lgb_metric in _HIGHER_IS_BETTER
    curve = {"metric": lgb_metric, "higher_is_better": higher, "fold": fold,
             "train": _round(train), "valid": _round(val), "best_round": best,
             "rows": {"fit": int(len(fit)), "fit_of": int(len(all_fit)),
                      "valid": int(len(valid)), "valid_of": int(len(all_valid))}}
    curve["warnings"] = _divergence(lgb_metric, higher, train[best - 1], val[best - 1], best)
    return curve


def _divergence(metric: str, higher: bool, train: float, valid: float, best: int) -> list[str]:
    train_err, valid_err = (1 - train, 1 - valid) if higher else (train, valid)
    if valid_err - train_err > DIVERGENCE_MIN_GAP and train_err < DIVERGENCE_RATIO * valid_err:
        return [f"training and validation diverge: at round {best} the training {metric} is "
                f"{train:.4g} but the validation {metric} is {valid:.4g}; the trees fit their "
                "own rows far better than new ones (try larger min_data_in_leaf, fewer "
                "leaves or stronger regularisation)"]
    return []


def leaf_sizes(booster: lgb.Booster) -> dict[str, Any]:
    """Training rows per leaf over every tree of the model, and a warning when small.

    Returns:
        ``{"leaves", "min", "median", "small_share", "small_rows", "warnings"}``;
        ``small_share`` is the share of leaves holding fewer than ``SMALL_LEAF_ROWS`` rows.
    """
    # The model text has one "leaf_count=" line per tree; reading it is ten times faster
    # than walking the JSON dump_model builds (0.23 s for a 300-tree model, measured).
    counts: list[int] = []
    for line in booster.model_to_string().splitlines():
        if line.startswith("leaf_count="):
            counts.extend(int(v) for v in line[len("leaf_count="):].split())
    if not counts:
        return {"leaves": 0, "warnings": []}
    arr = np.asarray(counts)
    small = float(np.mean(arr < SMALL_LEAF_ROWS))
    out: dict[str, Any] = {"leaves": int(arr.size), "min": int(arr.min()),
                           "median": float(np.median(arr)), "small_share": small,
                           "small_rows": SMALL_LEAF_ROWS, "warnings": []}
    if small > SMALL_LEAF_SHARE:
        out["warnings"].append(
            f"{small:.0%} of the model's {arr.size} leaves hold fewer than {SMALL_LEAF_ROWS} "
            f"training rows (smallest: {int(arr.min())}); such leaves fit noise (try a "
            "larger min_data_in_leaf)"
        )
    return out


def hyperparameter_importance(storage_url: str, study_name: str, *,
                              seed: int = 0) -> dict[str, Any]:
    """fANOVA importance of each tuned parameter over the study's complete trials.

    fANOVA fits a random forest from parameters to score and splits the score's variance
    by parameter (Hutter, Hoos & Leyton-Brown, 2014, via Optuna's evaluator). Parameters
    absent from some trials are left out by Optuna. With fewer than two complete trials,
    or too little variety, ``importances`` is empty and ``note`` says why. Only complete
    trials count: all of them were scored on every search row (tuner/fidelity.py); past
    :data:`IMPORTANCE_TRIALS` of them a seeded sample is used (``sampled_from`` says so).

    Returns:
        ``{"method": "fanova", "trials", "importances": {param: share}, "note"?,
        "sampled_from"?}``, importances sorted descending and summing to about 1.
    """
    study = load_study(storage_url, study_name)
    complete = study.get_trials(deepcopy=False, states=(optuna.trial.TrialState.COMPLETE,))
    out: dict[str, Any] = {"method": "fanova", "trials": len(complete), "importances": {}}
    if len(complete) < 2:
        out["note"] = "needs at least two complete trials"
        return out
    if len(complete) > IMPORTANCE_TRIALS:
        kept = sampling.bounded(np.arange(len(complete)), IMPORTANCE_TRIALS, seed=seed)
        sample = optuna.create_study(directions=study.directions)
        sample.add_trials([complete[int(i)] for i in kept])
        out.update(trials=len(kept), sampled_from=len(complete))
        study = sample
    try:
        found = optuna.importance.get_param_importances(
            study, evaluator=optuna.importance.FanovaImportanceEvaluator(seed=seed))
    except (ValueError, RuntimeError) as exc:
        out["note"] = f"not computed: {exc}"
        return out
    out["importances"] = {k: float(v) for k, v in found.items()}
    return out
