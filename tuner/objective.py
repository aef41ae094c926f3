"""The cross-validated objective Optuna optimises."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np
import optuna

from tuner._lgb import base_params, feature_matrix, make_dataset, predict
from tuner.dataset import PreparedData
from tuner.fidelity import promoted, rung_key, subsample_rank
from tuner.metrics import Metric
from tuner.selection import split_standard_error, standard_error
from tuner.space import SearchSpace, suggest
from tuner.validation import ValidationPlan

__all__ = ["CVObjective", "base_params", "refit_rounds"]

# LightGBM parameters that shape a Dataset (its bins), after LightGBM's own list in
# Dataset.get_params; trials that agree on these can share one constructed Dataset.
DATASET_PARAMS = frozenset({
    "bin_construct_sample_cnt", "subsample_for_bin", "categorical_feature", "cat_feature",
    "categorical_column", "cat_column", "categorical_features", "data_random_seed",
    "data_seed", "enable_bundle", "is_enable_bundle", "bundle", "feature_pre_filter",
    "forcedbins_filename", "is_enable_sparse", "is_sparse", "enable_sparse", "sparse",
    "linear_tree", "linear_trees", "max_bin", "max_bins", "max_bin_by_feature",
    "min_data_in_bin", "pre_partition", "is_pre_partition", "two_round",
    "two_round_loading", "use_two_round_loading", "use_missing", "zero_as_missing",
    "seed", "random_seed", "random_state",
})


# Metrics LightGBM itself evaluates exactly as we do on each early-stopping round: its
# value at the best round is the fold's score, and predicting the fold again would only
# redo that work. Only unweighted binary AUC: it depends on nothing but the order of the
# scores and the 0/1 labels. LightGBM keeps labels and weights as float32, so its RMSE or
# a weighted AUC differ from ours in the eighth digit (measured 5e-9 relative).
_SAME_IN_LIGHTGBM = {("roc_auc", "binary"): "auc"}


@dataclass
class _Fold:
    """One fold, ready to train on: constructed Datasets and the validation matrix."""

    key: tuple[tuple[str, Any], ...]
    train_set: lgb.Dataset
    valid_set: lgb.Dataset
    # The validation rows as tuner._lgb.predict hands them to LightGBM (a float matrix);
    # None when LightGBM's own score of the fold is taken (CVObjective._predicts).
    X_valid: np.ndarray | None
    y_valid: np.ndarray
    w_valid: np.ndarray | None
    # AUC of a fold holding one class is undefined: our metric says so, LightGBM's would not.
    both_classes: bool
    # LightGBM's binning time, counted once as training time by the trial that built it.
    build_seconds: float = 0.0


#: Boosting progress (rounds x learning rate) at which a fold's best validation score so
#: far is reported to the pruner: 2.5, 5, 10, 20, … (doubling, so a long fold costs a
#: handful of storage writes). Trials are compared at equal progress, not equal rounds:
#: a trial with a tenth of the learning rate is compared after ten times the rounds, so
#: slow learners are not pruned for being slow (25 rounds at 0.1 ~ 250 rounds at 0.01).
CHECKPOINT_FIRST = 2.5
#: Pruner steps per unit of progress (steps are integers).
_STEPS_PER_UNIT = 10


def fold_steps(max_rounds: int) -> int:
    """Pruner steps one fold spans: its largest possible progress (learning rate <= 1)."""
    return _STEPS_PER_UNIT * max_rounds


def checkpoints(max_rounds: int) -> tuple[int, ...]:
    """In-fold checkpoints as pruner steps within a fold (progress x 10): 25, 50, 100, …"""
    out, level = [], int(CHECKPOINT_FIRST * _STEPS_PER_UNIT)
    while level < fold_steps(max_rounds):
        out.append(level)
        level *= 2
    return tuple(out)


def pruner_step(fold: int, within: int, max_rounds: int) -> int:
    """The pruner's step for checkpoint ``within`` (progress x 10) of fold ``fold``.

    A fold's final score is reported at ``within = fold_steps(max_rounds)``, its end, so
    every trial reports it at the same step whatever round early stopping ended it at.
    """
    return fold * fold_steps(max_rounds) + within


class _Checkpoints:
    """LightGBM callback: report the fold's best validation score so far at the
    checkpoints and stop the trial when the pruner says so; poll ``should_stop`` every
    round so a cancel ends training within a round, not after the fold. Without a
    ``trial`` (a fold on a subsample, see :mod:`tuner.fidelity`) nothing is reported: the
    pruner compares trials on all the rows only."""

    order = 40  # after LightGBM's early stopping (order 30) has seen the round

    def __init__(self, trial: optuna.Trial | None, fold: int, max_rounds: int, sign: float,
                 learning_rate: float, should_stop: Callable[[], bool] | None) -> None:
        self.trial, self.fold, self.max_rounds, self.sign = trial, fold, max_rounds, sign
        self.should_stop = should_stop
        self.rate = float(learning_rate)
        self.pending = list(checkpoints(max_rounds))
        self.best: float | None = None
        self.rounds = 0

    def __call__(self, env: lgb.callback.CallbackEnv) -> None:
        self.rounds = env.iteration + 1
        if self.should_stop is not None and self.should_stop():
            raise optuna.TrialPruned("the search was asked to stop")
        if self.trial is None or not env.evaluation_result_list:
            return
        _, _, value, higher_better = env.evaluation_result_list[0][:4]
        # In the study's direction: LightGBM's early-stopping metric may run the other
        # way (l2 for r2); every trial reports the same metric at the same step.
        value = float(value) * (self.sign if higher_better else -self.sign)
        self.best = value if self.best is None else (
            max(self.best, value) if self.sign > 0 else min(self.best, value))
        progress = self.rounds * self.rate * _STEPS_PER_UNIT
        reached = None
        while self.pending and self.pending[0] <= progress + 1e-9:
            reached = self.pending.pop(0)
        if reached is not None:
            self.trial.report(self.best, pruner_step(self.fold, reached, self.max_rounds))
            if self.trial.should_prune():
                raise optuna.TrialPruned(f"pruned at round {self.rounds} of fold {self.fold}")


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

    Folds run one after another. Inside each fold the best validation score so far is
    reported at the :func:`checkpoints` (boosting progress), and after each fold the
    running mean, so the pruner can stop unpromising configurations early, inside the first
    fold too (steps count progress over folds: :func:`pruner_step`). Trial user attributes:
    ``params`` (every LightGBM parameter sampled or fixed), ``fold_scores``,
    ``best_iterations``, ``train_seconds``, ``rounds_trained`` (rounds boosted, patience
    included), ``fidelity``, ``rung_scores`` and, for completed trials, ``score_std``
    (``None`` with one split), ``score_se`` (over folds, or by batch means on a single
    split) and ``boosting_rounds`` (see :func:`refit_rounds`).

    With ``rungs`` below 1.0 (:mod:`tuner.fidelity`), a sampled configuration first runs
    the same folds on each rung's subsample of the search rows, lowest first, and goes on
    only when :func:`tuner.fidelity.promoted` says so; ``fidelity`` is the share of the
    rows it reached and ``fold_scores`` / ``best_iterations`` are those at that share.
    Trials in ``full_fidelity`` (the enqueued ones) start on all the rows. """

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
        rungs: tuple[float, ...] = (1.0,),
        full_fidelity: frozenset[int] = frozenset(),
        subsample_seed: int = 0,
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
            should_stop: Polled before each fold and every boosting round; ``True``
                prunes the running trial.
            rungs: Shares of the search rows a sampled configuration climbs, ending
                with 1.0 (:func:`tuner.fidelity.fidelity_rungs`).
            full_fidelity: Numbers of the trials that skip the lower rungs.
            subsample_seed: Seeds the rungs' subsamples (:func:`subsample_rank`).
        """
        self.task = data.task
        self.metric = metric
        self.plan = plan
        self.space = space
        self.max_rounds = max_rounds
        self.early_stopping_rounds = early_stopping_rounds
        self.should_stop = should_stop
        self.params_base = {**params_base, "metric": metric.lgb_metric_for(data.task)}
        same = _SAME_IN_LIGHTGBM.get((metric.name, data.task))
        exact = same == self.params_base["metric"] and data.weight is None
        self._lgb_score = same if exact else None
        # The table is held once (``data.X``); no copy of its train part is kept. Each
        # fold keeps its binned Datasets (raw rows freed as soon as they are binned) and
        # its validation rows as a float matrix: one float copy of the validation rows,
        # never a copy of the table per fold or per trial.
        self._features = data.X
        self._train = plan.train_idx
        self._y = data.y[plan.train_idx]
        self._w = None if data.weight is None else data.weight[plan.train_idx]
        # Constructed folds, per thread (parallel trials never share a LightGBM Dataset).
        self._local = threading.local()
        self.rungs = tuple(rungs) if rungs and rungs[-1] >= 1.0 else (*rungs, 1.0)
        self.full_fidelity = frozenset(full_fidelity)
        self._rank = (subsample_rank(len(self._y), subsample_seed)
                      if len(self.rungs) > 1 else None)
        # Each rung's folds (positions into the train part), cut once and shared.
        self._rung_folds: dict[tuple[str, int], tuple[np.ndarray, np.ndarray]] = {}

    def _positions(self, k: int, share: float) -> tuple[np.ndarray, np.ndarray]:
        """Fold ``k``'s fit and validation rows at ``share`` of the search rows: the fold's
        own rows that fall in the rung's subsample (so folds, groups and time order are
        kept, and every rung is scored on the same folds)."""
        fit, valid = self.plan.folds[k]
        if share >= 1.0 or self._rank is None:
            return fit, valid
        key = (rung_key(share), k)
        cut = self._rung_folds.get(key)
        if cut is None:
            m = int(round(share * len(self._rank)))
            cut = (fit[self._rank[fit] < m], valid[self._rank[valid] < m])
            self._rung_folds[key] = cut
        return cut

    def _fold(self, k: int, params: dict[str, Any], share: float = 1.0) -> _Fold:
        """Fold ``k``'s Datasets at ``share`` of the rows, built by the first trial and
        reused by the next ones.

        Binning the rows is the same work in every trial whose Dataset parameters agree,
        often a tenth of a short trial. One fold set per thread is kept (the latest
        Dataset parameters): binned data is about a byte per value, so k folds cost
        about (k - 1) times the train part at one byte per cell; the lower rungs add
        their shares of that (4/9 with rungs at 1/9 and 1/3).
        """
        key = tuple(sorted((n, v) for n, v in params.items() if n in DATASET_PARAMS))
        folds: dict[tuple[str, int], _Fold] = self._local.__dict__.setdefault("folds", {})
        slot = (rung_key(share), k)
        cached = folds.get(slot)
        if cached is not None and cached.key == key:
            return cached
        # The other parameters' Datasets of this slot go before these are built.
        cached = None
        folds.pop(slot, None)
        fit, valid = self._positions(k, share)
        w_fit = None if self._w is None else self._w[fit]
        w_val = None if self._w is None else self._w[valid]
        y_val = self._y[valid]
        started = time.perf_counter()
        # Built and binned one after the other: the fit rows' float matrix is freed once
        # binned, before the validation rows' is gathered.
        train_set = make_dataset(self._features, self._y[fit], w_fit, params,
                                 rows=self._train[fit]).construct()
        # The validation rows as floats, kept for predicting them (category codes by the
        # table's levels, as every booster of this fold has them).
        X_val = feature_matrix(self._features, self._train[valid], order="C")
        valid_set = make_dataset(self._features, y_val, w_val, params, reference=train_set,
                                 matrix=X_val).construct()
        built = time.perf_counter() - started
        both = len(np.unique(y_val)) > 1
        # Kept only when the fold's score needs our own predictions (_fit_fold).
        kept = X_val if self._predicts(share, both) else None
        cached = _Fold(key, train_set, valid_set, kept, y_val, w_val,
                       both_classes=both, build_seconds=built)
        folds[slot] = cached
        return cached

    def _predicts(self, share: float, both_classes: bool) -> bool:
        """Whether a fold at ``share`` is scored from our own predictions of its
        validation rows; otherwise LightGBM's own value of the metric at the best round.
        A single split on all the rows also needs them, for the score's standard error."""
        single = len(self.plan.folds) == 1 and share >= 1.0
        return self._lgb_score is None or not both_classes or single

    def _fit_fold(self, params: dict[str, Any], k: int, trial: optuna.Trial,
                  progress: dict[str, float], share: float = 1.0
                  ) -> tuple[float, int, float, int, float | None]:
        """Train fold ``k`` at ``share`` of the rows: ``(score, best round, seconds,
        rounds trained, score SE)``.

        The SE is given for a single validation split on all the rows only (batch means
        over its rows). ``progress`` collects the rounds and seconds of a stopped fold.
        """
        fold = self._fold(k, params, share)
        started = time.perf_counter()
        sign = 1.0 if self.metric.direction == "maximize" else -1.0
        watch = _Checkpoints(trial if share >= 1.0 else None, k, self.max_rounds, sign,
                             params.get("learning_rate", 0.1), self.should_stop)
        try:
            booster = lgb.train(
                params, fold.train_set, num_boost_round=self.max_rounds,
                valid_sets=[fold.valid_set], valid_names=["valid"],
                callbacks=[lgb.early_stopping(self.early_stopping_rounds,
                                              first_metric_only=True, verbose=False), watch],
            )
        except optuna.TrialPruned:
            progress["rounds"] = watch.rounds
            progress["seconds"] = time.perf_counter() - started + fold.build_seconds
            fold.build_seconds = 0.0
            raise
        seconds = time.perf_counter() - started + fold.build_seconds
        fold.build_seconds = 0.0
        best = int(booster.best_iteration or booster.current_iteration())
        # Early stopping fires after `patience` rounds without gain, else the cap ends it.
        trained = min(self.max_rounds, best + self.early_stopping_rounds)
        single = len(self.plan.folds) == 1 and share >= 1.0
        if not self._predicts(share, fold.both_classes):
            assert self._lgb_score is not None
            score = float(booster.best_score["valid"][self._lgb_score])
            return score, best, seconds, trained, None
        assert fold.X_valid is not None
        pred = predict(booster, self.task, fold.X_valid, num_iteration=best)
        score = self.metric(fold.y_valid, pred, fold.w_valid)
        se = (split_standard_error(self.metric, fold.y_valid, pred, fold.w_valid)
              if single else None)
        return score, best, seconds, trained, se

    def __call__(self, trial: optuna.Trial) -> float:
        """Run the folds for one trial, rung by rung, and return the mean score.

        Raises:
            optuna.TrialPruned: The pruner, a rung (not promoted) or ``should_stop``
                ended the trial early.
        """
        params = suggest(trial, self.space, n_train_rows=self.plan.min_fit_rows)
        full = {**self.params_base, **params}
        shares = (1.0,) if trial.number in self.full_fidelity else self.rungs
        scores: list[float] = []
        iterations: list[int] = []
        seconds = 0.0
        trained = 0  # rounds actually boosted, early-stopping patience included
        last = len(self.plan.folds) - 1
        split_se: float | None = None
        progress: dict[str, float] = {}
        rung_scores: dict[str, float] = {}
        share = shares[0]
        try:
            for share in shares:
                # fold_scores and best_iterations describe the largest share reached.
                scores, iterations = [], []
                at_full = share >= 1.0
                for k in range(len(self.plan.folds)):
                    if self.should_stop is not None and self.should_stop():
                        raise optuna.TrialPruned("the search was asked to stop")
                    try:
                        score, best, spent, rounds, split_se = self._fit_fold(
                            full, k, trial, progress, share)
                    except optuna.TrialPruned:
                        seconds += progress.get("seconds", 0.0)
                        trained += int(progress.get("rounds", 0))
                        raise
                    scores.append(float(score))
                    iterations.append(best)
                    seconds += spent
                    trained += rounds
                    # After the last fold nothing is left to save, so nothing is reported:
                    # every report is a storage write. Subsample scores are never reported
                    # to the pruner: it compares trials on all the rows only.
                    if at_full and k < last:
                        trial.report(float(np.mean(scores)),
                                     step=pruner_step(k, fold_steps(self.max_rounds),
                                                      self.max_rounds))
                        if trial.should_prune():
                            raise optuna.TrialPruned(f"pruned after fold {k}")
                if not at_full:
                    self._climb(trial, share, float(np.mean(scores)), rung_scores)
        finally:
            # One attribute for everything, whatever the trial's outcome: each attribute
            # is a storage write (see tuner.trials.trial_attrs for the reading side).
            record: dict[str, Any] = {"params": params, "fold_scores": scores,
                                      "best_iterations": iterations,
                                      "train_seconds": seconds, "rounds_trained": trained}
            record["fidelity"] = round(float(share), 4)
            if rung_scores:
                record["rung_scores"] = dict(rung_scores)
            if share >= 1.0 and len(scores) == len(self.plan.folds):
                # One split has no spread over folds: its SE comes from its rows.
                record["score_std"] = float(np.std(scores)) if len(scores) > 1 else None
                record["score_se"] = standard_error(scores) if len(scores) > 1 else split_se
                record["boosting_rounds"] = refit_rounds(iterations,
                                                         self.plan.partition_folds,
                                                         self.plan.strategy)
            trial.set_user_attr("record", record)
        return float(np.mean(scores))

    def _climb(self, trial: optuna.Trial, share: float, score: float,
               rung_scores: dict[str, float]) -> None:
        """Publish the trial's score at rung ``share``, then go on or stop there.

        The score is written before the rivals are read, so of two trials finishing a
        rung at once each sees at least one of the two scores (the storage orders them).

        Raises:
            optuna.TrialPruned: Not among the best at this rung.
        """
        key = rung_key(share)
        rung_scores[key] = score
        trial.set_user_attr("rungs", dict(rung_scores))
        rivals = [t.user_attrs["rungs"][key]
                  for t in trial.study.get_trials(deepcopy=False)
                  if t.number != trial.number and key in t.user_attrs.get("rungs", {})]
        if not promoted(score, rivals, self.metric.direction):
            raise optuna.TrialPruned(f"stopped at {key} of the rows: not among the best "
                                     f"{len(rivals) + 1} there")
