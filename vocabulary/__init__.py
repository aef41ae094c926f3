"""The words Grovekeeper's parts share: enumerations and what each job field means.

Dependency-free on purpose (standard library only): the tuner, the service and the client
all import it, and a client machine needs no LightGBM, pandas or Optuna to use it. README,
the CLI help and the API's request model read their choices from here, and tests check
that they agree.
"""

from __future__ import annotations

#: Kinds of learning problem a job can be.
TASKS = ("binary", "multiclass", "regression")
#: Column kinds an upload's profile reports.
COLUMN_KINDS = ("numeric", "categorical", "boolean", "datetime", "text")
#: Column kinds a model can use as features (text is reported, never used).
FEATURE_KINDS = ("numeric", "categorical", "boolean", "datetime")
#: Kinds a user may declare for a column (at upload or per job); ``ignore`` keeps it out.
DECLARED_KINDS = ("numeric", "categorical", "datetime", "text", "ignore")
#: Cross-validation strategies.
CV_STRATEGIES = ("kfold", "stratified", "group", "time")
#: Pruners that stop hopeless trials early.
PRUNERS = ("median", "halving", "none")
#: Rules that pick the winner among finished trials.
SELECTION_RULES = ("best", "one_se")
#: Rows the final model is refit on: the search rows, or every row including the hold-out.
FINAL_REFITS = ("train", "all")
#: Regression losses (LightGBM objectives) a regression job may ask for.
REGRESSION_OBJECTIVES = ("regression", "poisson", "tweedie", "huber", "quantile")
#: What prediction does with a category the model never saw.
UNSEEN_POLICIES = ("error", "missing")
#: States of a job (and of other queued runs).
JOB_STATUSES = ("queued", "running", "succeeded", "failed", "cancelled")
#: States a job ends in.
FINISHED_STATUSES = ("succeeded", "failed", "cancelled")
#: States of one trial.
TRIAL_STATES = ("complete", "pruned", "failed", "running", "waiting")
#: API key scopes, weakest first: each may do what the ones before it may.
SCOPES = ("read", "write", "admin")
#: When a job's ``promote`` moves its channel: only past the current model, or always.
PROMOTE_RULES = ("if_better", "always")
#: Every metric a job may rank trials by: its direction and the tasks it applies to
#: (``tuner/metrics.py`` holds how each is computed; a test keeps the two equal).
METRICS: dict[str, tuple[str, tuple[str, ...]]] = {
    "roc_auc": ("maximize", ("binary", "multiclass")),
    "log_loss": ("minimize", ("binary", "multiclass")),
    "average_precision": ("maximize", ("binary", "multiclass")),
    "accuracy": ("maximize", ("binary", "multiclass")),
    "f1_macro": ("maximize", ("binary", "multiclass")),
    "rmse": ("minimize", ("regression",)),
    "mae": ("minimize", ("regression",)),
    "r2": ("maximize", ("regression",)),
    "poisson_deviance": ("minimize", ("regression",)),
}
METRIC_NAMES = tuple(METRICS)
#: A binary model's decision when its job gave no costs.
DEFAULT_DECISION = {
    "threshold": 0.5, "method": "default",
    "note": "no costs given: class 1 when its probability exceeds 0.5",
}
#: The metric a job ranks by when it names none, per task.
DEFAULT_METRICS = {"binary": "roc_auc", "multiclass": "log_loss", "regression": "rmse"}
#: Regression objectives whose own metric suits them better than the task default.
OBJECTIVE_METRICS = {"poisson": "poisson_deviance", "tweedie": "poisson_deviance",
                     "quantile": "mae"}

__all__ = [
    "COLUMN_KINDS", "CV_STRATEGIES", "DECLARED_KINDS", "DEFAULT_DECISION", "DEFAULT_METRICS",
    "FEATURE_KINDS", "FINAL_REFITS", "FINISHED_STATUSES", "JOB_STATUSES", "METRICS",
    "METRIC_NAMES", "OBJECTIVE_METRICS", "PROMOTE_RULES", "PRUNERS", "REGRESSION_OBJECTIVES",
    "SCOPES", "SELECTION_RULES", "TASKS", "TRIAL_STATES", "UNSEEN_POLICIES",
]
