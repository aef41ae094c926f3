"""The cross-validated objective Optuna optimises."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import lightgbm as lgb
import numpy as np
import optuna

from tuner._lgb import base_params, make_dataset, predict
from tuner.data import PreparedData
from tuner.metrics import Metric
from tuner.space import SearchSpace, suggest
from tuner.validation import ValidationPlan

__all__ = ["CVObjective", "base_params", "refit_rounds"]


def refit_rounds(best_iterations: list[int], n_folds: int, strategy: str) -> int:
    """Boosting rounds for the final model, fit on all training rows.

    Each fold model saw ``(n_folds - 1) / n_folds`` of the rows; a common adjustment is to
    scale its early-stopped round count up by the inverse. Time folds fit on growing
    prefixes of different sizes, so there the plain mean is used.
    """
    mean = float(np.mean(best_iterations))
    if strategy != "time":
        mean *= n_folds / (n_folds - 1)
    return max(1, int(round(mean)))


class CVObjective:
    """Mean CV score of one sampled LightGBM configuration.

    Folds run one after another. After each fold the running mean is reported to the trial
    so the pruner can stop unpromising configurations early. Trial user attributes:
    ``params`` (every LightGBM parameter sampled or fixed), ``fold_scores``,
    ``best_iterations``, ``train_seconds``, ``rounds_trained`` (rounds boosted, patience
    included) and, for completed trials, ``score_std`` and ``boosting_rounds`` (see
    :func:`refit_rounds`).
    """

    def __init__(
        self,
        data: PreparedData,
        plan: ValidationPlan,
        metric: Metric,
        *,
        params_base: dict[str, Any],
        space: SearchSpace,
        max_rounds: int = 1000,
        early_stopping_rounds: int = 50,
        should_stop: Callable[[], bool] | None = None,
    ) -> None:
        """Slice the folds once; each trial then only builds Datasets and trains.

        Args:
            data: Prepared data.
            plan: Hold-out and folds; only the train part is used here.
            metric: The metric optimised (direction must match the study).
            params_base: Shared parameters, e.g. from :func:`base_params`.
            space: The search space sampled by each trial.
            max_rounds: Upper bound of boosting rounds per fold.
            early_stopping_rounds: Rounds without improvement of the fold's validation
                metric before a fold stops.
            should_stop: Polled before each fold; ``True`` prunes the running trial.
        """
        self.task = data.task
        self.metric = metric
        self.plan = plan
        self.space = space
        self.max_rounds = max_rounds
        self.early_stopping_rounds = early_stopping_rounds
        self.should_stop = should_stop
        self.params_base = {**params_base, "metric": metric.lgb_metric_for(data.task)}
        # Only the train part is kept; folds are sliced per trial rather than up front,
        # which would hold n_folds copies of the table for the whole search.
        self._X = data.X.iloc[plan.train_idx].reset_index(drop=True)
        self._y = data.y[plan.train_idx]
        self._w = None if data.weight is None else data.weight[plan.train_idx]

    def _fit_fold(self, params: dict[str, Any],
                  fold: tuple[np.ndarray, np.ndarray]) -> tuple[float, int, float, int]:
        fit, valid = fold
        w_fit = None if self._w is None else self._w[fit]
        w_val = None if self._w is None else self._w[valid]
        X_val, y_val = self._X.iloc[valid], self._y[valid]
        train_set = make_dataset(self._X.iloc[fit], self._y[fit], w_fit, params)
        valid_set = make_dataset(X_val, y_val, w_val, params, reference=train_set)
        started = time.perf_counter()
        booster = lgb.train(
            params, train_set, num_boost_round=self.max_rounds,
            valid_sets=[valid_set], valid_names=["valid"],
            callbacks=[lgb.early_stopping(self.early_stopping_rounds, first_metric_only=True,
                                          verbose=False)],
        )
        seconds = time.perf_counter() - started
        best = int(booster.best_iteration or booster.current_iteration())
        pred = predict(booster, self.task, X_val, num_iteration=best)
        # Early stopping fires after `patience` rounds without gain, else the cap ends it.
        trained = min(self.max_rounds, best + self.early_stopping_rounds)
        return self.metric(y_val, pred, w_val), best, seconds, trained

    def __call__(self, trial: optuna.Trial) -> float:
        """Run the folds for one trial and return the mean score.

        Raises:
            optuna.TrialPruned: The pruner or ``should_stop`` ended the trial early.
        """
        params = suggest(trial, self.space, n_train_rows=self.plan.min_fit_rows)
        full = {**self.params_base, **params}
        scores: list[float] = []
        iterations: list[int] = []
        seconds = 0.0
        trained = 0  # rounds actually boosted, early-stopping patience included
        last = len(self.plan.folds) - 1
        try:
            for k, fold in enumerate(self.plan.folds):
                if self.should_stop is not None and self.should_stop():
                    raise optuna.TrialPruned("the search was asked to stop")
                score, best, spent, rounds = self._fit_fold(full, fold)
                scores.append(float(score))
                iterations.append(best)
                seconds += spent
                trained += rounds
                # After the last fold nothing is left to save, so nothing is reported:
                # every report is a storage write.
                if k < last:
                    trial.report(float(np.mean(scores)), step=k)
                    if trial.should_prune():
                        raise optuna.TrialPruned(f"pruned after fold {k}")
        finally:
            # One attribute for everything, whatever the trial's outcome: each attribute
            # is a storage write (see tuner.search.trial_attrs for the reading side).
            record: dict[str, Any] = {"params": params, "fold_scores": scores,
                                      "best_iterations": iterations,
                                      "train_seconds": seconds, "rounds_trained": trained}
            if len(scores) == len(self.plan.folds):
                record["score_std"] = float(np.std(scores))
                record["boosting_rounds"] = refit_rounds(iterations, self.plan.n_folds,
                                                         self.plan.strategy)
            trial.set_user_attr("record", record)
        return float(np.mean(scores))
