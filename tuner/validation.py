"""Hold-out and cross-validation plans.

All indices are integer positions. ``train_idx`` and ``holdout_idx`` index rows of
``PreparedData`` (``data.X.iloc[...]``). Fold indices index the *train part*: fold
``(fit, valid)`` means ``data.X.iloc[train_idx[fit]]`` and ``data.X.iloc[train_idx[valid]]``.
The hold-out never takes part in the search; it is scored once, by the final model.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from sklearn.model_selection import GroupKFold, KFold, StratifiedKFold

from tuner.dataset import PreparedData
from tuner.errors import ConfigError, DatasetError
from vocabulary import CV_STRATEGIES as STRATEGIES
from vocabulary.job_fields import AUTO_FOLDS

Fold = tuple[np.ndarray, np.ndarray]

#: Folds of the partition the search rows are cut into (each fit on 80%, validated on 20%).
PARTITION_FOLDS = AUTO_FOLDS
#: Bound on a validation score's standard error, in units of the per-row standard deviation
#: of the metric's loss: a mean over ``m`` validation rows has standard error
#: ``sd / sqrt(m)``, so the bound holds once ``(1 / SE_BOUND) ** 2 = 40,000`` rows are
#: scored. Below that every fold of the partition is used (the best the rows allow).
SE_BOUND = 0.005
#: Validation rows that keep the standard error under :data:`SE_BOUND`.
SE_ROWS = int(round((1 / SE_BOUND) ** 2))


def validation_splits(n_search_rows: int, partition: int = PARTITION_FOLDS) -> int:
    """How many folds of a ``partition``-fold split the search scores trials on.

    Each fold validates on ``n_search_rows / partition`` rows; enough folds are used to
    score :data:`SE_ROWS` rows in all, never more than the partition has and never fewer
    than one (a single validation split on large tables). With 5 folds: all 5 below
    50,000 search rows, 4 up to 66,666, 3 up to 100,000, 2 up to 200,000, 1 from there.
    Every fold still fits on ``(partition - 1) / partition`` of the rows, so the scores
    mean the same whatever the count; only their standard error changes.
    """
    if n_search_rows <= 0:
        return partition
    per_fold = n_search_rows / partition
    return max(1, min(partition, math.ceil(SE_ROWS / per_fold - 1e-9)))


@dataclass(frozen=True)
class ValidationPlan:
    """Where each row goes: hold-out, and the CV folds over the remaining train part.

    Attributes:
        train_idx: Sorted positions of the rows used by the search and the final fit.
        holdout_idx: Sorted positions of the hold-out rows (may be empty).
        folds: ``(fit, valid)`` pairs of sorted positions **into** ``train_idx``.
        strategy: One of :data:`STRATEGIES`.
        partition: Folds the train part was cut into; ``folds`` may hold only the first
            of them (see :func:`validation_splits`). 0: as many as ``folds`` holds.
    """

    train_idx: np.ndarray
    holdout_idx: np.ndarray
    folds: tuple[Fold, ...]
    strategy: str
    partition: int = 0

    @property
    def n_folds(self) -> int:
        """Number of CV folds the search scores trials on."""
        return len(self.folds)

    @property
    def partition_folds(self) -> int:
        """Folds of the partition (each fold fits on ``(k - 1) / k`` of the train part)."""
        return self.partition or len(self.folds)

    @property
    def min_fit_rows(self) -> int:
        """Training rows of the smallest fold (sizes ``min_data_in_leaf``'s range)."""
        return min(len(fit) for fit, _ in self.folds)


def _error(field: str, message: str) -> DatasetError:
    return DatasetError(message, [{"field": field, "message": message}])


def _sorted(a: np.ndarray) -> np.ndarray:
    return np.sort(np.asarray(a, dtype="int64"))


def _split_holdout_random(n: int, fraction: float, rng: np.random.Generator,
                          y: np.ndarray | None) -> np.ndarray:
    if y is None:
        return rng.permutation(n)[: int(round(n * fraction))]
    picked = []  # per class, so the hold-out keeps the class balance
    for k in np.unique(y):
        members = rng.permutation(np.flatnonzero(y == k))
        picked.append(members[: int(round(len(members) * fraction))])
    return np.concatenate(picked)


def _holdout_groups(groups: np.ndarray, fraction: float, rng: np.random.Generator) -> np.ndarray:
    """Whole groups, in random order, until they cover ``fraction`` of the rows."""
    if fraction == 0:
        return np.array([], dtype="int64")
    names, sizes = np.unique(groups, return_counts=True)
    order = rng.permutation(len(names))
    before = np.cumsum(sizes[order]) - sizes[order]  # rows covered before taking each group
    chosen = names[order[before < fraction * len(groups)]]
    return np.flatnonzero(np.isin(groups, chosen))


def _tie_start(t_sorted: np.ndarray, cut: int) -> int:
    """Move a cut back so that equal times never sit on both sides of it."""
    if cut <= 0 or cut >= len(t_sorted):
        return cut
    return int(np.searchsorted(t_sorted, t_sorted[cut], side="left"))


def _time_folds(times: np.ndarray, n_folds: int) -> list[Fold]:
    """Forward chaining: fold k validates on block k+1 and fits on all earlier blocks."""
    order = np.argsort(times, kind="stable")
    t = times[order]
    n = len(t)
    size = n // (n_folds + 1)
    cuts = [_tie_start(t, n - (n_folds - k) * size) for k in range(n_folds)] + [n]
    folds = []
    for k in range(n_folds):
        fit, valid = order[: cuts[k]], order[cuts[k]: cuts[k + 1]]
        if len(fit) == 0 or len(valid) == 0:
            raise _error("cv.folds", f"cannot make {n_folds} time-ordered folds: too few "
                                     "distinct times in the training rows")
        folds.append((_sorted(fit), _sorted(valid)))
    return folds


def plan_validation(
    data: PreparedData,
    *,
    strategy: str | None = None,
    n_folds: int | None = None,
    holdout_fraction: float = 0.2,
    seed: int = 0,
) -> ValidationPlan:
    """Split rows into a hold-out and CV folds.

    Strategies: ``kfold`` (shuffled, seeded; default for regression); ``stratified``
    (class-balanced hold-out and folds; default for classification); ``group`` (whole
    groups go to the hold-out, then ``GroupKFold`` - no group is ever on both sides);
    ``time`` (the hold-out is the latest rows, folds chain forward in time so validation
    rows are always later than fitting rows).

    Args:
        data: Prepared data; ``groups`` / ``times`` are needed by ``group`` / ``time``.
        strategy: One of :data:`STRATEGIES`, or ``None`` for the task's default.
        n_folds: Number of CV folds, at least 2, all of them scored. ``None``: a
            :data:`PARTITION_FOLDS`-fold partition of which only as many folds are scored
            as keep the score's standard error under :data:`SE_BOUND`
            (:func:`validation_splits`; on time folds, the latest ones).
        holdout_fraction: Share of rows held out, in ``[0, 0.9]``; 0 gives no hold-out.
        seed: Seeds every shuffle, so equal inputs give equal plans.

    Returns:
        The plan.

    Raises:
        ConfigError: Unknown strategy or bad numbers (fields ``cv.strategy``, ``cv.folds``,
            ``cv.holdout_fraction``).
        DatasetError: Too few rows, class members or groups for the folds (``cv.folds``),
            or a missing group/time column (``cv.group_column``/``cv.time_column``).
    """
    classify = data.task in ("binary", "multiclass")
    strategy = strategy or ("stratified" if classify else "kfold")
    if strategy not in STRATEGIES:
        message = f"unknown strategy '{strategy}'; use one of {', '.join(STRATEGIES)}"
        raise ConfigError(message, [{"field": "cv.strategy", "message": message}])
    if strategy == "stratified" and not classify:
        message = "stratified folds need a classification task; use kfold"
        raise ConfigError(message, [{"field": "cv.strategy", "message": message}])
    auto = n_folds is None
    if auto:
        n_folds = PARTITION_FOLDS
    if not isinstance(n_folds, int) or n_folds < 2:
        raise ConfigError("n_folds must be an integer >= 2",
                          [{"field": "cv.folds", "message": "must be an integer >= 2"}])
    if not 0 <= holdout_fraction <= 0.9:
        raise ConfigError("holdout_fraction must be within [0, 0.9]",
                          [{"field": "cv.holdout_fraction", "message": "must be in [0, 0.9]"}])
    n = data.n_rows
    rng = np.random.default_rng(seed)

    if strategy == "group":
        if data.groups is None:
            raise _error("cv.group_column", "the group strategy needs a group column")
        holdout = _holdout_groups(data.groups, holdout_fraction, rng)
    elif strategy == "time":
        if data.times is None:
            raise _error("cv.time_column", "the time strategy needs a time column")
        order = np.argsort(data.times, kind="stable")
        cut = _tie_start(data.times[order], n - int(round(n * holdout_fraction)))
        holdout = order[cut:]
    else:
        holdout = _split_holdout_random(n, holdout_fraction, rng,
                                        data.y if strategy == "stratified" else None)
    holdout = _sorted(holdout)
    train = _sorted(np.setdiff1d(np.arange(n), holdout))
    if len(train) < n_folds * 2:
        raise _error("cv.folds", f"{len(train)} training rows are too few for {n_folds} folds")

    seed32 = int(seed) % (2**32)
    if strategy == "kfold":
        splits = KFold(n_folds, shuffle=True, random_state=seed32).split(train)
    elif strategy == "stratified":
        classes = data.classes or []
        y = data.y[train]
        labels, counts = np.unique(y, return_counts=True)
        if len(labels) < len(classes) or counts.min() < n_folds:
            rare = classes[int(labels[np.argmin(counts)])] if len(labels) else None
            raise _error("cv.folds", f"class {rare!r} has only {counts.min()} training "
                         f"row(s), fewer than the {n_folds} stratified folds; lower cv.folds")
        splits = StratifiedKFold(n_folds, shuffle=True, random_state=seed32).split(train, y)
    elif strategy == "group":
        assert data.groups is not None  # checked when the plan's columns were read
        groups = data.groups[train]
        if len(np.unique(groups)) < n_folds:
            raise _error("cv.folds", f"{len(np.unique(groups))} groups outside the hold-out "
                                     f"are too few for {n_folds} folds")
        splits = GroupKFold(n_folds, shuffle=True, random_state=seed32).split(train, groups=groups)
    else:
        assert data.times is not None  # checked when the plan's columns were read
        splits = _time_folds(data.times[train], n_folds)
    folds = [(_sorted(fit), _sorted(valid)) for fit, valid in splits]
    if auto:
        used = validation_splits(len(train), n_folds)
        # Time folds: the latest blocks, which fit on the most history.
        folds = folds[n_folds - used:] if strategy == "time" else folds[:used]
    return ValidationPlan(train_idx=train, holdout_idx=holdout, folds=tuple(folds),
                          strategy=strategy, partition=n_folds)
