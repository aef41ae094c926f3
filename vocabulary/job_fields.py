"""Every field of a tuning job request, declared once.

Each :class:`JobField` gives a field's name (dotted for the parts of ``budget``, ``cv``,
``decision`` and ``promote``), its type, default, bounds, a one-line description, an
example and the ``grovekeeper tune`` option that sets it. The API's request model
(``service/api/schemas.py`` ``JobCreate``) takes its defaults, bounds and descriptions
from here, the worker re-validates a stored request into that same model, the tuner's
``SearchConfig`` defaults come from here, and tests check README's field table and the
``tune --help`` text against this list.

Standard library only: the client imports it on machines without the server's libraries.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from vocabulary import (
    CV_STRATEGIES,
    DECLARED_KINDS,
    FINAL_REFITS,
    METRIC_NAMES,
    PROMOTE_RULES,
    PRUNERS,
    REGRESSION_OBJECTIVES,
    SELECTION_RULES,
    TASKS,
)

#: Bounds on the size of a request's strings and lists, so no field can hold more than a
#: table's worth of names (the body-size guard bounds the whole request too).
MAX_NAME = 1000  # a column name
MAX_COLUMNS = 10_000  # a list of columns
MAX_ENTRIES = 200  # search-space overrides
MAX_ID = 64  # a dataset or job id
#: A budget in trials when the request names neither trials nor seconds.
DEFAULT_TRIALS = 40
#: Folds the search rows are cut into when ``cv.folds`` is left out (as many of them are
#: scored as the rows need: ``tuner.validation.validation_splits``).
AUTO_FOLDS = 5


class _Required:
    """The default of a field the request must give."""

    def __repr__(self) -> str:
        return "REQUIRED"


REQUIRED: Any = _Required()


@dataclass(frozen=True)
class JobField:
    """One field of a job request."""

    name: str
    #: ``string``, ``integer``, ``number``, ``boolean``, ``columns`` (a list of column
    #: names), ``map`` (an object) or ``groups`` (a list of lists of columns).
    type: str
    #: What the field is when the request leaves it out (``None``: not set, or chosen as
    #: ``default_text`` says); :data:`REQUIRED` for the two the request must give.
    default: Any
    description: str
    example: Any
    #: The ``grovekeeper tune`` options that set the field (the first is the main one);
    #: empty for ``dataset_id``, the command's positional argument.
    options: tuple[str, ...] = ()
    choices: tuple[Any, ...] | None = None
    minimum: float | None = None
    #: ``minimum`` itself is refused (the value must be above it).
    above_minimum: bool = False
    maximum: float | None = None
    max_length: int | None = None
    #: How README and ``--help`` state a default of ``None`` (e.g. "inferred from the
    #: target"); the default's own text otherwise.
    default_text: str | None = None

    @property
    def required(self) -> bool:
        return self.default is REQUIRED

    @property
    def shown_default(self) -> str:
        """The default as README and ``tune --help`` write it."""
        if self.required:
            group, _, _ = self.name.rpartition(".")
            return f"required in {group}" if group else "required"
        if self.default_text is not None:
            return self.default_text
        return show(self.default)


def show(value: Any) -> str:
    """A value as a request writes it in JSON (``true``, ``0.2``, ``"median"`` bare)."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


_FIELDS = (
    JobField("dataset_id", "string", REQUIRED, "the dataset to tune on (an upload's id)",
             "ds_0123abcd4567ef89", max_length=MAX_ID),
    JobField("target", "string", REQUIRED, "the column to predict", "defect",
             ("--target",), max_length=MAX_NAME),
    JobField("task", "string", None, "the learning problem", "binary", ("--task",),
             choices=TASKS, default_text="inferred from the target"),
    JobField("metric", "string", None, "the score trials are ranked by", "roc_auc",
             ("--metric",), choices=METRIC_NAMES, max_length=64,
             default_text="roc_auc, log_loss or rmse by task"),
    JobField("features", "columns", None, "the only columns used as features",
             ["peak_temp_c", "clay_body"], ("--feature",), max_length=MAX_COLUMNS,
             default_text="every usable column"),
    JobField("exclude", "columns", None, "columns never used as features", ["firing_id"],
             ("--exclude",), max_length=MAX_COLUMNS, default_text="none"),
    JobField("budget.trials", "integer", None, "configurations to try",
             60, ("--trials",), minimum=1, maximum=100_000,
             default_text=f"{DEFAULT_TRIALS} unless budget.seconds is given"),
    JobField("budget.seconds", "number", None, "wall-clock limit from the job's first start",
             600, ("--seconds",), minimum=0, above_minimum=True, maximum=7 * 24 * 3600,
             default_text="no limit"),
    JobField("cv.folds", "integer", None, "cross-validation folds, all of them scored", 5,
             ("--folds",), minimum=2, maximum=20,
             default_text=f"{AUTO_FOLDS}, scoring as many as the rows need"),
    JobField("cv.strategy", "string", None, "how rows are cut into folds", "group",
             ("--cv-strategy",), choices=CV_STRATEGIES,
             default_text="stratified (classes) or kfold"),
    JobField("cv.group_column", "string", None,
             "rows of one group stay on one side of every split (group strategy)", "kiln",
             ("--group-column",), max_length=MAX_NAME, default_text="none"),
    JobField("cv.time_column", "string", None,
             "dates or numbers that order rows (time strategy)", "fired_on",
             ("--time-column",), max_length=MAX_NAME, default_text="none"),
    JobField("holdout_fraction", "number", 0.2,
             "share of rows set aside and scored once by the final model", 0.25,
             ("--holdout-fraction", "--holdout"), minimum=0.0, maximum=0.5),
    JobField("weight_column", "string", None, "non-negative row weights", "exposure",
             ("--weight-column",), max_length=MAX_NAME, default_text="none"),
    JobField("search_space", "map", None,
             "ranges, choices or fixed values over the default search space",
             {"num_leaves": {"low": 8, "high": 64}}, ("--search-space",),
             max_length=MAX_ENTRIES, default_text="the default space"),
    JobField("seed", "integer", 0, "seeds the hold-out, the folds and the sampler", 7,
             ("--seed",), minimum=0, maximum=2**31 - 1),
    JobField("priority", "integer", 0, "higher runs first", 10, ("--priority",),
             minimum=-1000, maximum=1000),
    JobField("max_workers", "integer", 1,
             "worker processes that may run trials of this job at once", 2,
             ("--max-workers",), minimum=1, maximum=256),
    JobField("objective", "string", None, "the regression loss (LightGBM objective)",
             "poisson", ("--objective",), choices=REGRESSION_OBJECTIVES, max_length=64,
             default_text="the task's own"),
    JobField("pruner", "string", "median", "how hopeless trials are stopped early",
             "halving", ("--pruner",), choices=PRUNERS),
    JobField("max_parallel_trials", "integer", None, "trials one worker runs at once", 2,
             ("--max-parallel-trials",), minimum=1, maximum=64,
             default_text="the machine's choice"),
    JobField("num_threads", "integer", None,
             "LightGBM threads the running trials of one worker share", 2,
             ("--num-threads",), minimum=1, maximum=64, default_text="the machine's choice"),
    JobField("reproducible", "boolean", False,
             "byte-identical trials and model file for the same data, seed and settings",
             True, ("--reproducible",)),
    JobField("selection", "string", "best", "how the winner is chosen among finished trials",
             "one_se", ("--selection",), choices=SELECTION_RULES),
    JobField("final_refit", "string", "train", "rows the served model is refit on", "all",
             ("--final-refit",), choices=FINAL_REFITS),
    JobField("calibrate", "boolean", True,
             "classification: calibrate the served probabilities when it helps", False,
             ("--calibrate",)),
    JobField("portfolio", "boolean", True,
             "run fixed strong configurations right after trial 0", False,
             ("--portfolio",)),
    JobField("warm_start_job_id", "string", None,
             "an earlier job of the same task whose best trials run first", "job_0123abcd",
             ("--warm-start",), max_length=MAX_ID, default_text="none"),
    JobField("column_kinds", "map", None,
             "the kind a column is used as, over the upload's and the inferred one",
             {"store_id": "categorical"}, ("--kind",), choices=DECLARED_KINDS,
             default_text="none"),
    JobField("fixed", "map", None, "LightGBM parameters held for every trial and the final fit",
             {"max_bin": 63}, ("--fixed",), default_text="none"),
    JobField("monotone", "map", None,
             "predictions never fall (1) or never rise (-1) as the column grows",
             {"peak_temp_c": 1}, ("--monotone",), choices=(1, -1), default_text="none"),
    JobField("interaction_constraints", "groups", None,
             "groups of columns; every tree splits within one group",
             [["peak_temp_c", "hold_minutes"]], ("--interaction",), default_text="none"),
    JobField("segments", "columns", None, "columns the hold-out metrics are reported by",
             ["clay_body"], ("--segment",), max_length=20, default_text="none"),
    JobField("max_rounds", "integer", 1000, "boosting rounds at most per fit", 2000,
             ("--max-rounds",), minimum=1, maximum=100_000),
    JobField("early_stopping_rounds", "integer", 50,
             "rounds without improvement before a fold stops", 100,
             ("--early-stopping-rounds",), minimum=1, maximum=10_000),
    JobField("decision.false_positive_cost", "number", REQUIRED,
             "binary: the cost of one false positive, in any unit", 1.0,
             ("--false-positive-cost",), minimum=0, maximum=1e12),
    JobField("decision.false_negative_cost", "number", REQUIRED,
             "binary: the cost of one false negative, in the same unit", 5.0,
             ("--false-negative-cost",), minimum=0, maximum=1e12),
    JobField("promote.channel", "string", REQUIRED,
             "move this channel to the job's model when it succeeds", "production",
             ("--promote",), max_length=100),
    JobField("promote.rule", "string", "if_better",
             "when to move the channel: past the current model only, or always", "always",
             ("--promote-rule",), choices=PROMOTE_RULES),
)

#: Every job field by name, in the order README and ``tune --help`` list them.
JOB_FIELDS: dict[str, JobField] = {f.name: f for f in _FIELDS}
#: Objects a request nests fields in; ``decision`` and ``promote`` are left out entirely
#: unless asked for, so their required parts are required only within them.
GROUPS = ("budget", "cv", "decision", "promote")
#: Top-level fields (a group counts once, under its own name).
TOP_LEVEL = tuple(dict.fromkeys(n.split(".")[0] for n in JOB_FIELDS))


def field(name: str) -> JobField:
    """The field called ``name`` (dotted inside a group)."""
    return JOB_FIELDS[name]


def defaults() -> dict[str, Any]:
    """Flat ``{name: default}`` of the fields a request may leave out (outside groups
    that are themselves left out)."""
    return {n: f.default for n, f in JOB_FIELDS.items() if not f.required}


__all__ = ["AUTO_FOLDS", "DEFAULT_TRIALS", "GROUPS", "JOB_FIELDS", "MAX_COLUMNS",
           "MAX_ENTRIES", "MAX_ID", "MAX_NAME", "REQUIRED", "TOP_LEVEL", "JobField",
           "defaults", "field", "show"]
