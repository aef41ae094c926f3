"""Declarative LightGBM search spaces, named after LightGBM's canonical parameters."""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from tuner.errors import SearchSpaceError, summarise

if TYPE_CHECKING:  # the space itself is plain Python: the API checks one without Optuna
    import optuna


@dataclass(frozen=True)
class ParamRange:
    """A numeric range; ``kind`` is ``"float"`` or ``"int"``, ``log`` samples log-uniformly."""

    low: float
    high: float
    log: bool = False
    kind: str = "float"


@dataclass(frozen=True)
class Choice:
    """A categorical choice among ``values``."""

    values: tuple[Any, ...]


@dataclass(frozen=True)
class Fixed:
    """A parameter held at one value (not tuned)."""

    value: Any


Spec = ParamRange | Choice | Fixed


class SearchSpace(Mapping[str, Spec]):
    """An immutable mapping from LightGBM parameter name to its :data:`Spec`."""

    def __init__(self, specs: Mapping[str, Spec]) -> None:
        """Create the space from ``{name: ParamRange | Choice | Fixed}``."""
        self._specs = dict(specs)

    def __getitem__(self, name: str) -> Spec:
        return self._specs[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._specs)

    def __len__(self) -> int:
        return len(self._specs)

    def __hash__(self) -> int:
        return hash(tuple(self._specs.items()))

    def __eq__(self, other: object) -> bool:
        return isinstance(other, SearchSpace) and self._specs == other._specs

    def __repr__(self) -> str:
        return f"SearchSpace({self._specs!r})"

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form: ``{"type", "low", "high", "log"}``, ``{"choices"}``, ``{"value"}``."""
        out: dict[str, Any] = {}
        for name, spec in self._specs.items():
            if isinstance(spec, ParamRange):
                out[name] = {"type": spec.kind, "low": spec.low, "high": spec.high,
                             "log": spec.log}
            elif isinstance(spec, Choice):
                out[name] = {"choices": list(spec.values)}
            else:
                out[name] = {"value": spec.value}
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SearchSpace:
        """Rebuild (and validate) a space saved with :meth:`to_dict`."""
        return merge_overrides(SearchSpace({}), dict(d))


# name -> (kind, lowest allowed, highest allowed, lowest is exclusive).
# Bounds are those LightGBM itself enforces (Parameters.rst constraints).
TUNABLE: dict[str, tuple[str, float, float, bool]] = {
    "learning_rate": ("float", 0.0, math.inf, True),
    "num_leaves": ("int", 2, 131072, False),
    "min_data_in_leaf": ("int", 0, math.inf, False),
    "feature_fraction": ("float", 0.0, 1.0, True),
    "bagging_fraction": ("float", 0.0, 1.0, True),
    "bagging_freq": ("int", 0, math.inf, False),
    "lambda_l1": ("float", 0.0, math.inf, False),
    "lambda_l2": ("float", 0.0, math.inf, False),
    "min_gain_to_split": ("float", 0.0, math.inf, False),
    "max_depth": ("int", -1, math.inf, False),  # <= 0 means no limit; -1 is the spelling
    "min_sum_hessian_in_leaf": ("float", 0.0, math.inf, False),
    "max_bin": ("int", 2, math.inf, False),
    "extra_trees": ("bool", 0, 1, False),
    "path_smooth": ("float", 0.0, math.inf, False),
    "cat_smooth": ("float", 0.0, math.inf, False),
    "max_cat_to_onehot": ("int", 1, math.inf, False),
    # Loss shape: huber's delta and quantile's level (a quantile must lie in (0, 1);
    # run_search checks that against the objective).
    "alpha": ("float", 0.0, math.inf, True),
    # LightGBM wants 1 <= p < 2; 1.99 stands in for the open upper end.
    "tweedie_variance_power": ("float", 1.0, 1.99, False),
    # Binary imbalance: weight of the positive class, or LightGBM's own balancing.
    "scale_pos_weight": ("float", 0.0, math.inf, True),
    "is_unbalance": ("bool", 0, 1, False),
}

DEFAULT_SPACE = SearchSpace({
    # The slowest rate worth sampling is the one whose full round cap still adds up to
    # LightGBM's default step budget (100 rounds x 0.1): 1000 rounds x 0.01. Anything
    # slower stops at the cap before it converges. The top, 0.3, is common practice.
    "learning_rate": ParamRange(0.01, 0.3, log=True),
    # Tree size matters multiplicatively, so sample on a log scale. Down to 4 leaves:
    # "4 <= J <= 8 works well in the context of boosting" (Hastie, Tibshirani & Friedman,
    # The Elements of Statistical Learning, 2nd ed., 2009, sec. 10.11), and a table of a
    # few hundred rows cannot fill hundreds of leaves of min_data_in_leaf rows anyway.
    "num_leaves": ParamRange(4, 256, log=True, kind="int"),
    # Depth caps the same way for unbalanced trees; -1 (no cap, LightGBM's default) or
    # the shallow depths the same section recommends (2-3 levels: 4-8 leaves) and a few
    # deeper ones.
    "max_depth": Choice((-1, 2, 3, 4, 6, 8)),
    # Guards against leaves fit to a handful of rows. The ceiling scales with the rows
    # (a tenth of a fold's training rows, min_data_cap); the floor 5 is the usual
    # minimum node size (ESL sec. 15.3 for regression forests; common practice).
    "min_data_in_leaf": ParamRange(5, 100, kind="int"),
    # The hessian a leaf must hold. For log loss a row contributes p(1-p) <= 1/4, so a
    # leaf of rows that are nearly all one class holds almost none: raising this floor
    # stops the trees from isolating pure leaves, whose extreme values make the
    # over-confident probabilities small tables suffer from. Log range after xgboost's
    # min_child_weight in [2^-7, 2^7] (Probst, Boulesteix & Bischl, "Tunability", JMLR
    # 2019, table 1), from LightGBM's default 1e-3 to 10 (40+ rows at p = 0.5).
    "min_sum_hessian_in_leaf": ParamRange(1e-3, 10.0, log=True),
    # Column and row subsampling; below 0.4 trees become too noisy to be worth it.
    "feature_fraction": ParamRange(0.4, 1.0),
    "bagging_fraction": ParamRange(0.4, 1.0),
    # 0 switches bagging off (LightGBM's default), 1-7 re-samples every k iterations.
    "bagging_freq": ParamRange(0, 7, kind="int"),
    # Regularisation spans orders of magnitude; 1e-8 stands in for "off" on a log scale.
    # L1 to 10 as before; L2 up to 100, near the top of xgboost's lambda range in
    # [2^-10, 2^10] (Probst et al. 2019, table 1): shrinking leaf values toward 0 is the
    # strongest guard few rows have against over-confident leaves.
    "lambda_l1": ParamRange(1e-8, 10.0, log=True),
    "lambda_l2": ParamRange(1e-8, 100.0, log=True),
    # Split-gain threshold. Gain is in the target's units squared, so a linear 0-1 range
    # blocks nearly every split on a small-scale target: on the greenhouse table (RMSE
    # ~0.13) no trial of 30 beat LightGBM's defaults until this became a log range with
    # 1e-8 standing in for "off" (measured; see benchmarks/quality.py).
    "min_gain_to_split": ParamRange(1e-8, 1.0, log=True),
    # Random split thresholds (extremely randomized trees: Geurts, Ernst & Wehenkel,
    # Machine Learning 63, 2006), which LightGBM documents as a guard against
    # over-fitting; a variance reducer that small tables need most.
    "extra_trees": Choice((False, True)),
})

#: LightGBM's own defaults, expressed inside the space (0 becomes 1e-8 on log ranges).
#: Enqueued as trial 0 so every search starts from the untuned baseline.
LIGHTGBM_DEFAULTS: dict[str, Any] = {
    "learning_rate": 0.1, "num_leaves": 31, "max_depth": -1, "min_data_in_leaf": 20,
    "min_sum_hessian_in_leaf": 1e-3, "feature_fraction": 1.0, "bagging_fraction": 1.0,
    "bagging_freq": 0, "lambda_l1": 1e-8, "lambda_l2": 1e-8, "min_gain_to_split": 1e-8,
    "extra_trees": False,
}
_OTHER_DEFAULTS: dict[str, Any] = {
    "max_bin": 255, "path_smooth": 0.0, "cat_smooth": 10.0, "max_cat_to_onehot": 4,
    "alpha": 0.9, "tweedie_variance_power": 1.5, "scale_pos_weight": 1.0, "is_unbalance": False,
}


def _value_error(name: str, value: Any) -> str | None:
    kind, lo, hi, lo_open = TUNABLE[name]
    if kind == "bool":
        return None if isinstance(value, bool) else "expected true or false"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "expected a number"
    if kind == "int" and not float(value).is_integer():
        return "expected an integer"
    if not math.isfinite(value):
        return "expected a finite number"
    if (value <= lo if lo_open else value < lo) or value > hi:
        low = f"> {lo:g}" if lo_open else f">= {lo:g}"
        return f"must be {low}" + (f" and <= {hi:g}" if math.isfinite(hi) else "")
    return None


def _parse(name: str, payload: Any, base: Spec | None) -> Spec:
    """Turn one override payload into a spec, or raise ValueError with the reason."""
    kind = TUNABLE[name][0]
    if not isinstance(payload, dict):
        payload = {"value": payload}
    keys = set(payload)
    if keys == {"value"}:
        problem = _value_error(name, payload["value"])
        if problem:
            raise ValueError(problem)
        value = payload["value"]
        return Fixed(int(value) if kind == "int" else value if kind == "bool" else float(value))
    if keys == {"choices"}:
        values = payload["choices"]
        if not isinstance(values, list) or not values:
            raise ValueError("choices must be a non-empty list")
        for v in values:
            problem = _value_error(name, v)
            if problem:
                raise ValueError(f"choice {v!r}: {problem}")
        cast = int if kind == "int" else bool if kind == "bool" else float
        return Choice(tuple(dict.fromkeys(cast(v) for v in values)))
    if not keys or not keys <= {"low", "high", "log", "type"}:
        raise ValueError("expected a value, {'choices': [...]} or {'low', 'high', 'log'}")
    if kind == "bool":
        raise ValueError("a true/false parameter takes a value or choices, not a range")
    inherited = base if isinstance(base, ParamRange) else None
    low = payload.get("low", inherited.low if inherited else None)
    high = payload.get("high", inherited.high if inherited else None)
    log = payload.get("log", inherited.log if inherited else False)
    if low is None or high is None:
        raise ValueError("a range needs both low and high")
    if not isinstance(log, bool):
        raise ValueError("log must be true or false")
    if payload.get("type", kind) != kind:
        raise ValueError(f"type must be '{kind}'")
    for bound, value in (("low", low), ("high", high)):
        problem = _value_error(name, value)
        if problem:
            raise ValueError(f"{bound}: {problem}")
    if low > high:
        raise ValueError(f"inverted range: low {low} > high {high}")
    if log and low <= 0:
        raise ValueError("a log range needs low > 0")
    cast = int if kind == "int" else float
    return ParamRange(cast(low), cast(high), log=log, kind=kind)


def merge_overrides(base: SearchSpace, overrides: Mapping[str, Any]) -> SearchSpace:
    """Apply user overrides to a space.

    Payload forms per parameter: a bare value or ``{"value": v}`` fixes it;
    ``{"choices": [...]}`` makes it categorical; ``{"low", "high", "log"}`` sets a range
    (a missing bound is taken from ``base``).

    Args:
        base: The space to start from, usually :data:`DEFAULT_SPACE`.
        overrides: ``{parameter name: payload}``; names must be in :data:`TUNABLE`.

    Returns:
        A new space.

    Raises:
        SearchSpaceError: One entry per bad parameter, ``field`` = the parameter name.

    Example:
        >>> space = merge_overrides(DEFAULT_SPACE, {"num_leaves": {"low": 16, "high": 64},
        ...                                         "learning_rate": 0.05})
        >>> space["learning_rate"]
        Fixed(value=0.05)
    """
    specs = dict(base)
    errors = []
    for name, payload in overrides.items():
        if name not in TUNABLE:
            errors.append({"field": str(name), "message": "unknown or non-tunable parameter; "
                           f"tunable: {', '.join(TUNABLE)}"})
            continue
        try:
            specs[name] = _parse(name, payload, specs.get(name))
        except ValueError as exc:
            errors.append({"field": name, "message": str(exc)})
    if errors:
        raise SearchSpaceError(summarise("invalid search space", errors), errors)
    return SearchSpace(specs)


def min_data_cap(n_train_rows: int) -> int:
    """Largest ``min_data_in_leaf`` tried for a fold with ``n_train_rows`` training rows.

    A tenth of the rows, but never below 5: with a cap of 100 on a 300-row table most
    trials could not split at all.
    """
    return max(5, n_train_rows // 10)


def effective_space(space: SearchSpace, *, n_train_rows: int) -> SearchSpace:
    """The space actually sampled: ``min_data_in_leaf``'s range clamped to the data size."""
    spec = space.get("min_data_in_leaf")
    if not isinstance(spec, ParamRange):
        return space
    high = min(int(spec.high), min_data_cap(n_train_rows))
    low = min(int(spec.low), high)
    log = spec.log and low > 0
    return SearchSpace({**space, "min_data_in_leaf": ParamRange(low, high, log=log, kind="int")})


def initial_params(space: SearchSpace, *, n_train_rows: int) -> dict[str, Any]:
    """LightGBM's defaults moved into the (effective) space: the parameters of trial 0."""
    return fit_into_space({}, space, n_train_rows=n_train_rows)


def fit_into_space(values: Mapping[str, Any], space: SearchSpace, *,
                   n_train_rows: int) -> dict[str, Any]:
    """``values`` (e.g. an earlier job's winner) moved into the effective space.

    Numbers are clamped into their ranges, a value outside a choice list becomes the
    first choice, fixed parameters are left to the space, names outside the space are
    dropped, and missing ones take LightGBM's defaults. The result can be enqueued as a
    trial without Optuna warning about out-of-range values.
    """
    defaults = {**_OTHER_DEFAULTS, **LIGHTGBM_DEFAULTS}
    out: dict[str, Any] = {}
    for name, spec in effective_space(space, n_train_rows=n_train_rows).items():
        value = values.get(name, defaults[name])
        if isinstance(spec, ParamRange):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                value = defaults[name]
            value = min(max(value, spec.low), spec.high)
            out[name] = int(round(value)) if spec.kind == "int" else float(value)
        elif isinstance(spec, Choice):
            out[name] = value if value in spec.values else spec.values[0]
    return out


def suggest(trial: optuna.Trial, space: SearchSpace, *, n_train_rows: int) -> dict[str, Any]:
    """Sample one configuration; fixed parameters are included as they are.

    Args:
        trial: The running trial.
        space: The space to sample.
        n_train_rows: Training rows of the smallest CV fold; ``min_data_in_leaf``'s upper
            bound is clamped to ``max(5, n_train_rows // 10)`` so small tables stay
            trainable (see :func:`effective_space`).

    Returns:
        ``{parameter: value}`` for every parameter in the space.
    """
    params: dict[str, Any] = {}
    for name, spec in effective_space(space, n_train_rows=n_train_rows).items():
        if isinstance(spec, ParamRange) and spec.kind == "int":
            params[name] = trial.suggest_int(
                name, low=int(spec.low), high=int(spec.high), log=spec.log
            )
        elif isinstance(spec, ParamRange):
            params[name] = trial.suggest_float(name, low=spec.low, high=spec.high, log=spec.log)
        elif isinstance(spec, Choice):
            params[name] = trial.suggest_categorical(name, choices=list(spec.values))
        else:
            params[name] = spec.value
    return params


def space_problems(task: str, objective: str | None, space: SearchSpace
                   ) -> list[dict[str, str]]:
    """What the search space asks that the task or objective cannot take (no data needed:
    the API checks these at submission, ``check_config`` again in the worker)."""
    errors = []
    if "scale_pos_weight" in space and "is_unbalance" in space:
        errors.append({"field": "search_space.scale_pos_weight",
                       "message": "use is_unbalance or scale_pos_weight, not both (LightGBM "
                                  "refuses the pair)"})
    for name in ("scale_pos_weight", "is_unbalance"):
        if name in space and task != "binary":
            errors.append({"field": f"search_space.{name}",
                           "message": "weighs the positive class of a binary task only"})
    alpha = space.get("alpha")
    if objective == "quantile" and alpha is not None:
        if isinstance(alpha, ParamRange):
            bounds: tuple[Any, ...] = (alpha.low, alpha.high)
        else:
            bounds = alpha.values if isinstance(alpha, Choice) else (alpha.value,)
        if not all(0 < float(a) < 1 for a in bounds):
            errors.append({"field": "search_space.alpha",
                           "message": "a quantile objective needs alpha within (0, 1)"})
    return errors
