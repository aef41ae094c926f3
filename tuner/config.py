"""Search settings (:class:`SearchConfig`), their checks, and the pruners on offer."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from tuner.errors import ConfigError
from tuner.fidelity import FIDELITY_FROM_ROWS
from tuner.space import DEFAULT_SPACE, SearchSpace, space_problems
from vocabulary import FINAL_REFITS, PRUNERS, SELECTION_RULES
from vocabulary.job_fields import DEFAULT_TRIALS
from vocabulary.job_fields import field as job_field


def _default(name: str) -> Any:
    # A job request's default (vocabulary/job_fields.py), so a job that leaves a field out
    # and a library caller that leaves the setting out get the same search.
    return job_field(name).default

if TYPE_CHECKING:  # plain Python at import: the API checks settings without these
    import optuna

    from tuner.dataset import PreparedData

__all__ = ["FINAL_REFITS", "PRUNERS", "SearchConfig", "check_config", "make_pruner",
           "space_problems"]


@dataclass(frozen=True)
class SearchConfig:
    """What to search and how long; ``n_trials`` counts complete and pruned trials."""

    task: str
    metric: str
    n_trials: int | None = DEFAULT_TRIALS
    timeout: float | None = None
    seed: int = _default("seed")
    space: SearchSpace = DEFAULT_SPACE
    max_rounds: int = _default("max_rounds")
    early_stopping_rounds: int = _default("early_stopping_rounds")
    num_threads: int = 1
    pruner_warmup_folds: int = 1
    n_startup_trials: int = 8
    #: Regression loss (``tuner.losses.REGRESSION_OBJECTIVES``); ``None``: task default.
    objective: str | None = None
    #: ``median`` (per fold), ``halving`` (successive halving per fold) or ``none``.
    pruner: str = _default("pruner")
    #: Trials run at once in this process; ``num_threads`` is divided among them.
    max_parallel_trials: int = 1
    #: How the winner is chosen (``tuner.selection.SELECTION_RULES``).
    selection: str = _default("selection")
    #: ``train``: serve the model fit on the search rows and scored on the hold-out;
    #: ``all``: after scoring, refit on every row (hold-out included) and serve that.
    final_refit: str = _default("final_refit")
    #: Parameter sets enqueued right after trial 0 (e.g. an earlier job's winners).
    warm_start: tuple[dict[str, Any], ...] = ()
    #: LightGBM parameters every trial and the final fit share: the job's fixed ones and
    #: its constraints (see :mod:`tuner.controls`); the search space holds the tuned ones.
    fixed_params: dict[str, Any] = field(default_factory=dict)
    #: Classification: fit a calibration map on the winner's out-of-fold scores and, when
    #: it lowers their cross-fitted log loss, write it into the model (tuner.calibration).
    calibrate: bool = _default("calibrate")
    #: Enqueue the portfolio of strong configurations (tuner.portfolio) after trial 0
    #: and the warm-start configurations.
    portfolio: bool = _default("portfolio")
    #: Search rows from which sampled configurations climb rungs of row subsamples
    #: (successive halving, :mod:`tuner.fidelity`); ``None``: always all the rows.
    fidelity_from_rows: int | None = FIDELITY_FROM_ROWS


#: ``median``: prune a trial whose score so far (inside a fold at the boosting
#: checkpoints, or the running mean over its first folds) is worse than the median of
#: earlier trials at the same step. ``halving``: successive halving with folds as the
#: resource (keep the best half at 2 and 4 folds). ``none``: no pruning.


def make_pruner(name: str, *, n_warmup_steps: int = 0,
                fold_steps: int = 1) -> optuna.pruners.BasePruner:
    """The pruner called ``name`` (see :data:`PRUNERS`).

    Steps count boosting rounds over folds: fold ``k`` ends at step
    ``(k + 1) * fold_steps`` (``tuner.objective.pruner_step``).

    Raises:
        ConfigError: Unknown name (field ``pruner``).
    """
    import optuna

    if name == "median":
        return optuna.pruners.MedianPruner(n_startup_trials=5, n_warmup_steps=n_warmup_steps)
    if name == "halving":
        return optuna.pruners.SuccessiveHalvingPruner(min_resource=2 * fold_steps,
                                                      reduction_factor=2)
    if name == "none":
        return optuna.pruners.NopPruner()
    message = f"unknown pruner '{name}'; use one of {', '.join(PRUNERS)}"
    raise ConfigError(message, [{"field": "pruner", "message": message}])




def check_config(data: PreparedData, config: SearchConfig) -> None:
    """Reject settings that do not fit the data; every problem names its field.

    Raises:
        ConfigError: Task, budget, metric, objective, pruner, selection or refit problems.
    """
    from tuner.losses import check_objective

    check_objective(config.task, config.metric, config.objective, data.y)
    errors = []
    if config.task != data.task:
        errors.append({"field": "task", "message": f"config task '{config.task}' differs from "
                       f"the data's task '{data.task}'"})
    if config.n_trials is not None and config.n_trials < 1:
        errors.append({"field": "n_trials", "message": "must be at least 1"})
    if config.timeout is not None and config.timeout <= 0:
        errors.append({"field": "timeout", "message": "must be positive"})
    if config.metric == "poisson_deviance" and (data.y < 0).any():
        errors.append({"field": "metric", "message": "poisson_deviance needs a non-negative "
                       "target"})
    if config.max_parallel_trials < 1:
        errors.append({"field": "max_parallel_trials", "message": "must be at least 1"})
    if config.num_threads < 1:
        errors.append({"field": "num_threads", "message": "must be at least 1"})
    if config.max_rounds < 1:
        errors.append({"field": "max_rounds", "message": "must be at least 1"})
    if config.early_stopping_rounds < 1:
        errors.append({"field": "early_stopping_rounds", "message": "must be at least 1"})
    if config.fidelity_from_rows is not None and config.fidelity_from_rows < 1:
        errors.append({"field": "fidelity_from_rows", "message": "must be at least 1"})
    if config.pruner not in PRUNERS:
        errors.append({"field": "pruner", "message": f"use one of {', '.join(PRUNERS)}"})
    if config.selection not in SELECTION_RULES:
        errors.append({"field": "selection",
                       "message": f"use one of {', '.join(SELECTION_RULES)}"})
    if config.final_refit not in FINAL_REFITS:
        errors.append({"field": "final_refit",
                       "message": f"use one of {', '.join(FINAL_REFITS)}"})
    errors += space_problems(config.task, config.objective, config.space)
    if errors:
        raise ConfigError(f"invalid search settings: {errors[0]['message']}", errors)
