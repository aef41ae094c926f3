"""Training objectives (LightGBM losses) per task, and which metrics they can serve."""

from __future__ import annotations

from typing import Any

import numpy as np

from tuner.errors import ConfigError
from vocabulary import OBJECTIVE_METRICS, REGRESSION_OBJECTIVES

#: Regression losses a job may choose with ``objective``, by LightGBM's own names.
#: ``regression`` is squared error; ``poisson`` and ``tweedie`` model counts and skewed,
#: non-negative amounts with a log link; ``huber`` resists outliers; ``quantile`` fits
#: the ``alpha`` quantile (LightGBM's default alpha is 0.9, Parameters.rst).
_TASK_OBJECTIVE = {"binary": "binary", "multiclass": "multiclass"}
# Log-link losses: their predictions are always positive, which Poisson deviance needs.
_LOG_LINK = frozenset({"poisson", "tweedie"})
_NON_NEGATIVE = frozenset({"poisson", "tweedie"})


def _fail(message: str, fields: tuple[str, ...] = ("objective",)) -> ConfigError:
    return ConfigError(message, [{"field": f, "message": message} for f in fields])


def resolve_objective(task: str, metric: str, objective: str | None) -> str:
    """The LightGBM objective for ``task``: ``objective`` if given, else the task default.

    For regression the default is squared error, except that the ``poisson_deviance``
    metric defaults to the ``poisson`` objective: the deviance needs positive
    predictions, which only a log-link loss promises.
    """
    if task in _TASK_OBJECTIVE:
        return _TASK_OBJECTIVE[task]
    if objective is not None:
        return objective
    return "poisson" if metric == "poisson_deviance" else "regression"


def default_metric_for(task: str, objective: str | None) -> str | None:
    """A metric that suits ``objective`` better than the task default, or ``None``."""
    if task != "regression" or objective is None:
        return None
    return OBJECTIVE_METRICS.get(objective)


def check_objective(task: str, metric: str, objective: str | None, y: Any) -> None:
    """Reject an objective that does not fit the task, the metric or the target.

    Raises:
        ConfigError: Field ``objective`` (and ``metric`` when the pair is at fault).
    """
    if objective is None:
        return
    if task in _TASK_OBJECTIVE:
        if objective != _TASK_OBJECTIVE[task]:
            raise _fail(f"objective '{objective}' does not fit task '{task}'; leave it out "
                        f"or use '{_TASK_OBJECTIVE[task]}'")
        return
    if objective not in REGRESSION_OBJECTIVES:
        raise _fail(f"unknown objective '{objective}' for regression; choose one of: "
                    f"{', '.join(REGRESSION_OBJECTIVES)}")
    if objective in _NON_NEGATIVE and (np.asarray(y) < 0).any():
        raise _fail(f"objective '{objective}' needs a non-negative target")
    if metric == "poisson_deviance" and objective not in _LOG_LINK:
        raise _fail(f"metric 'poisson_deviance' needs positive predictions, which objective "
                    f"'{objective}' cannot promise; use poisson or tweedie",
                    ("metric", "objective"))
