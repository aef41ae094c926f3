"""Calibrated probabilities, written into the LightGBM model itself.

After the search, the winner's out-of-fold raw scores are refit fold by fold, and a
small parametric map on the raw score is fitted to them by maximum likelihood:

- ``temperature`` (Guo et al., "On Calibration of Modern Neural Networks", 2017): every
  raw score multiplied by one factor; it softens or sharpens, never reorders;
- ``platt`` (Platt, "Probabilistic Outputs for Support Vector Machines", 1999), binary:
  ``a * logit + b`` on the log-odds;
- ``vector`` (Guo et al. 2017), multiclass: a factor and a bias per class.

A candidate counts only if it lowers the out-of-fold log loss when *cross-fitted* (the
map for fold j's rows is fitted on the other folds' rows): a map fitted and judged on the
same rows would always look better, since doing nothing is one of its settings. The best
cross-fitted candidate is then fitted on every out-of-fold row.

Every kept map is affine in the raw score, and a LightGBM raw score is the sum of its
trees' leaf values, so the map goes into the model text: each tree's leaf values (and
internal values, ``shrinkage``, linear-leaf coefficients) are multiplied by its class's
factor, as LightGBM's own ``Tree::Shrinkage`` does, and the class's bias is added to the
leaves of that class's first tree, as ``Tree::AddBias`` does. ``lightgbm.Booster(
model_file=...)`` then predicts the calibrated probabilities with nothing else.

Models that average their trees (``boosting: rf``, ``average_output`` in the text) or
have linear leaves are left uncalibrated (:func:`supported` says why): averaging divides
the bias by the tree count, and LightGBM's TreeSHAP refuses linear leaves.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

import lightgbm as lgb
import numpy as np
from scipy.optimize import minimize
from scipy.special import expit, log_softmax, softmax

__all__ = [
    "CalibrationMap", "apply_map", "calibrate_scores", "expected_calibration_error",
    "fit_map", "log_loss_of", "probabilities", "write_into_model",
]

#: Bounds on a factor: beyond these a map is no calibration but a broken model.
SCALE_BOUNDS = (0.02, 50.0)
BIAS_BOUND = 50.0
#: Bins of the expected calibration error; Guo et al. (2017) use 15 equal-width bins.
ECE_BINS = 15


@dataclass(frozen=True)
class CalibrationMap:
    """``raw' = scale[k] * raw + bias[k]`` per output ``k`` (binary: one output).

    Factors and biases are in raw-score units, what the trees add up to (for binary,
    LightGBM's log-odds are ``sigmoid * raw``; ``sigmoid`` is 1 unless set).
    """

    kind: str
    scale: tuple[float, ...]
    bias: tuple[float, ...]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {**asdict(self), "scale": list(self.scale), "bias": list(self.bias)}


def apply_map(raw: np.ndarray, cmap: CalibrationMap) -> np.ndarray:
    """Raw scores after the map: ``(n,)`` for binary, ``(n, K)`` for multiclass."""
    raw = np.asarray(raw, dtype="float64")
    return raw * np.asarray(cmap.scale) + np.asarray(cmap.bias) if raw.ndim == 2 else (
        raw * cmap.scale[0] + cmap.bias[0])


def probabilities(raw: np.ndarray, sigmoid: float = 1.0) -> np.ndarray:
    """LightGBM's link: binary ``expit(sigmoid * raw)``, multiclass softmax per row."""
    raw = np.asarray(raw, dtype="float64")
    return np.asarray(softmax(raw, axis=1) if raw.ndim == 2 else expit(sigmoid * raw))


def _row_losses(raw: np.ndarray, y: np.ndarray, sigmoid: float) -> np.ndarray:
    if raw.ndim == 2:
        return np.asarray(-log_softmax(raw, axis=1)[np.arange(len(y)), y])
    z = sigmoid * raw
    return np.logaddexp(0.0, z) - y * z


def log_loss_of(raw: np.ndarray, y: np.ndarray, weight: np.ndarray | None = None,
                sigmoid: float = 1.0) -> float:
    """Log loss of raw scores (computed on the raw scale, so it never hits log(0))."""
    y = np.asarray(y).astype(int)
    return float(np.average(_row_losses(np.asarray(raw, dtype="float64"), y, sigmoid),
                            weights=weight))


def expected_calibration_error(prob: np.ndarray, y: np.ndarray,
                               weight: np.ndarray | None = None,
                               n_bins: int = ECE_BINS) -> float:
    """Top-label expected calibration error (Guo et al. 2017, equal-width bins).

    Each row falls in the bin of its highest probability (its confidence); the error is
    the row-share-weighted mean over bins of ``|accuracy - mean confidence|``.
    """
    prob = np.asarray(prob, dtype="float64")
    probs = np.column_stack([1 - prob, prob]) if prob.ndim == 1 else prob
    y = np.asarray(y).astype(int)
    w = np.ones(len(y)) if weight is None else np.asarray(weight, dtype="float64")
    confidence = probs.max(axis=1)
    correct = (probs.argmax(axis=1) == y).astype("float64")
    bins = np.minimum((confidence * n_bins).astype(int), n_bins - 1)
    total = np.bincount(bins, weights=w, minlength=n_bins)
    acc = np.bincount(bins, weights=w * correct, minlength=n_bins)
    conf = np.bincount(bins, weights=w * confidence, minlength=n_bins)
    full = total > 0
    return float(np.sum(np.abs(acc[full] - conf[full])) / total.sum())


# --- fitting -----------------------------------------------------------------------------

def _objective(kind: str, raw: np.ndarray, y: np.ndarray, w: np.ndarray,
               sigmoid: float) -> tuple[Callable[[np.ndarray], tuple[float, np.ndarray]], int,
                                        Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]]:
    """Weighted mean log loss of the map and its gradient, over ``(log scales, biases)``.

    Scales are fitted on a log scale (they stay positive: a map never reverses the order
    of the scores). A unit Gaussian prior on log-scale and bias, worth one row, keeps the
    fit finite when the out-of-fold scores separate the classes perfectly.
    """
    total = w.sum()
    n_out = raw.shape[1] if raw.ndim == 2 else 1
    onehot = np.eye(n_out)[y] if raw.ndim == 2 else None

    def unpack(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if kind == "temperature":
            return np.full(n_out, theta[0]), np.zeros(n_out)
        if kind == "platt":
            return theta[:1], theta[1:]
        return theta[:n_out], theta[n_out:]

    def f(theta: np.ndarray) -> tuple[float, np.ndarray]:
        u, b = unpack(theta)
        s = np.exp(u)
        if raw.ndim == 2:
            z = raw * s + b
            logp = log_softmax(z, axis=1)
            loss = -np.sum(w * logp[np.arange(len(y)), y])
            resid = (np.exp(logp) - onehot) * w[:, None]          # d loss / d z
            g_u = np.sum(resid * raw, axis=0) * s
            g_b = np.sum(resid, axis=0)
        else:
            z = sigmoid * (raw * s[0] + b[0])
            loss = np.sum(w * (np.logaddexp(0.0, z) - y * z))
            resid = (expit(z) - y) * w * sigmoid
            g_u = np.array([np.sum(resid * raw) * s[0]])
            g_b = np.array([np.sum(resid)])
        loss = loss + 0.5 * (np.sum(theta**2))
        if kind == "temperature":
            grad = np.array([g_u.sum()]) + theta
        else:
            grad = np.concatenate([g_u, g_b]) + theta
        return float(loss / total), grad / total

    return f, n_out, unpack


def fit_map(kind: str, raw: np.ndarray, y: np.ndarray, weight: np.ndarray | None = None,
            sigmoid: float = 1.0) -> CalibrationMap:
    """Maximum-likelihood map of ``kind`` for raw scores ``raw`` and labels ``y``.

    Args:
        kind: ``temperature``, ``platt`` (binary) or ``vector`` (multiclass).
        raw: Raw scores, ``(n,)`` for binary or ``(n, K)`` for multiclass.
        y: Encoded labels (0/1, or 0..K-1).
        weight: Row weights (``None``: equal).
        sigmoid: LightGBM's ``sigmoid`` parameter of a binary model.
    """
    raw = np.asarray(raw, dtype="float64")
    y = np.asarray(y).astype(int)
    w = np.ones(len(y)) if weight is None else np.asarray(weight, dtype="float64")
    f, n_out, unpack = _objective(kind, raw, y, w, sigmoid)
    lo, hi = math.log(SCALE_BOUNDS[0]), math.log(SCALE_BOUNDS[1])
    if kind == "temperature":
        bounds = [(lo, hi)]
    else:
        k = 1 if kind == "platt" else n_out
        bounds = [(lo, hi)] * k + [(-BIAS_BOUND, BIAS_BOUND)] * k
    result = minimize(f, np.zeros(len(bounds)), jac=True, method="L-BFGS-B", bounds=bounds)
    u, b = unpack(result.x)
    if raw.ndim == 2:
        b = b - b.mean()  # softmax ignores a shared shift; keep the biases centred
    return CalibrationMap(kind, tuple(float(v) for v in np.exp(u)),
                          tuple(float(v) for v in b))


def candidates(task: str) -> tuple[str, ...]:
    """The maps tried for a task, simplest first."""
    return ("temperature", "platt") if task == "binary" else ("temperature", "vector")


def calibrate_scores(task: str, raw: np.ndarray, y: np.ndarray, fold_of: np.ndarray,
                     weight: np.ndarray | None = None,
                     sigmoid: float = 1.0) -> tuple[CalibrationMap | None, dict[str, Any]]:
    """Choose a map on out-of-fold raw scores, by cross-fitted log loss.

    Args:
        task: ``binary`` or ``multiclass``.
        raw: Out-of-fold raw scores of the rows in ``y``.
        y: Encoded labels.
        fold_of: The fold whose model scored each row (the map for those rows is fitted
            on the other folds' rows).
        weight: Row weights.
        sigmoid: LightGBM's ``sigmoid`` of a binary model.

    Returns:
        The chosen map (``None`` when no candidate lowers the cross-fitted out-of-fold
        log loss) and a JSON-ready report: ``oof_log_loss`` and ``oof_ece`` before and
        after, ``candidates`` with each one's cross-fitted log loss.
    """
    raw = np.asarray(raw, dtype="float64")
    y = np.asarray(y).astype(int)
    before = log_loss_of(raw, y, weight, sigmoid)
    folds = np.unique(fold_of)
    tried: dict[str, float] = {}
    for kind in candidates(task):
        crossed = np.empty_like(raw)
        for j in folds:
            rest, mine = fold_of != j, fold_of == j
            cmap = fit_map(kind, raw[rest], y[rest],
                           None if weight is None else weight[rest], sigmoid)
            crossed[mine] = apply_map(raw[mine], cmap)
        tried[kind] = log_loss_of(crossed, y, weight, sigmoid)
    best = min(tried, key=lambda k: (tried[k], k))
    chosen = fit_map(best, raw, y, weight, sigmoid) if tried[best] < before else None
    after_raw = raw if chosen is None else apply_map(raw, chosen)
    report = {
        "oof_rows": int(len(y)),
        "oof_log_loss": {"before": before, "after": log_loss_of(after_raw, y, weight, sigmoid)},
        "oof_ece": {
            "before": expected_calibration_error(probabilities(raw, sigmoid), y, weight),
            "after": expected_calibration_error(probabilities(after_raw, sigmoid), y, weight),
        },
        "candidates": [{"kind": k, "cross_fitted_oof_log_loss": v} for k, v in tried.items()],
    }
    return chosen, report


# --- the model text ----------------------------------------------------------------------

_HEADER_END = "\n\n"
_TREE = re.compile(r"^Tree=(\d+)\n", re.M)
_SCALED = ("leaf_value", "internal_value", "leaf_const", "shrinkage")
_BIASED = ("leaf_value", "internal_value", "leaf_const")


def _header_value(header: str, key: str) -> str | None:
    for line in header.splitlines():
        if line == key:
            return ""
        if line.startswith(key + "="):
            return line[len(key) + 1:]
    return None


def model_sigmoid(model_text: str) -> float:
    """The ``sigmoid`` of a binary model's objective line (LightGBM's default: 1)."""
    objective = _header_value(model_text.split(_HEADER_END, 1)[0], "objective") or ""
    match = re.search(r"\bsigmoid:([^\s]+)", objective)
    return float(match.group(1)) if match else 1.0


def _numbers(text: str) -> list[float]:
    return [float(v) for v in text.split()]


def _fmt(values: list[float]) -> str:
    # repr is the shortest text that reads back as the same double, which LightGBM's
    # parser does too (it writes 17 significant digits for the same reason).
    return " ".join(repr(float(v)) for v in values)


def _edit_tree(block: str, scale: float, bias: float) -> str:
    lines = block.split("\n")
    for i, line in enumerate(lines):
        key, sep, value = line.partition("=")
        if not sep:
            continue
        if key in _SCALED or key in ("leaf_coeff",):
            if key == "leaf_coeff":
                # Linear leaves: coefficient groups per leaf, separated by spaces; a leaf
                # without coefficients is an empty field, so split on single spaces.
                parts = value.split(" ")
                lines[i] = "leaf_coeff=" + " ".join(
                    "" if p == "" else repr(float(p) * scale) for p in parts)
                continue
            numbers = [v * scale for v in _numbers(value)]
            if key in _BIASED:
                numbers = [v + bias for v in numbers]
            lines[i] = f"{key}={_fmt(numbers)}"
    return "\n".join(lines)


def write_into_model(model_text: str, cmap: CalibrationMap) -> str:
    """The LightGBM text model ``model_text`` with ``cmap`` built into its trees.

    Args:
        model_text: What ``Booster.model_to_string()`` wrote (binary or multiclass).
        cmap: A map in raw-score units, one factor and bias per output.

    Returns:
        A model text whose raw score is ``cmap`` applied to the original one, with the
        header's ``tree_sizes`` rewritten to match the edited tree blocks.
    """
    header, body = model_text.split(_HEADER_END, 1)
    per_iteration = int(_header_value(header, "num_tree_per_iteration") or 1)
    if per_iteration != len(cmap.scale):
        raise ValueError(f"map has {len(cmap.scale)} outputs, the model "
                         f"{per_iteration} trees per iteration")
    trees, end = body.split("end of trees", 1)
    starts = [m.start() for m in _TREE.finditer(trees)]
    blocks = [trees[a:b] for a, b in zip(starts, [*starts[1:], len(trees)], strict=True)]
    edited = []
    for t, block in enumerate(blocks):
        k = t % per_iteration
        first = t < per_iteration
        bias = cmap.bias[k] if first else 0.0
        edited.append(_edit_tree(block, cmap.scale[k], bias))
    sizes = " ".join(str(len(b.encode("utf-8"))) for b in edited)
    header = re.sub(r"^tree_sizes=.*$", f"tree_sizes={sizes}", header, flags=re.M)
    return header + _HEADER_END + trees[: starts[0] if starts else 0] + "".join(edited) + (
        "end of trees" + end)


def supported(model_text: str) -> str | None:
    """Why the map cannot go into this model (``None``: it can)."""
    header = model_text.split(_HEADER_END, 1)[0]
    if _header_value(header, "average_output") is not None:
        return "the model averages its trees (random forest mode)"
    if "\nis_linear=1\n" in model_text:
        return "the model has linear leaves"
    return None


def calibrated_booster(booster: lgb.Booster, cmap: CalibrationMap) -> lgb.Booster:
    """A new booster whose trees carry ``cmap``."""
    return lgb.Booster(model_str=write_into_model(booster.model_to_string(), cmap))
