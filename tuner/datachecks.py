"""Warnings about data that may fool the search: leaks, copies, duplicates, imbalance, size.

``table_warnings`` needs only the table (upload time; it lives in ``tuner.tablechecks``,
which loads no scikit-learn); ``job_warnings`` knows the target and the hold-out (job
start). Both return plain sentences and never raise on odd data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tuner.dataset import PreparedData
from tuner.metrics import METRICS
from tuner.tablechecks import ROWS_PER_COLUMN, size_message, table_warnings
from tuner.validation import ValidationPlan

__all__ = ["job_warnings", "table_warnings", "single_feature_power"]

#: A single feature explaining this share of the target alone is very likely a leak (a
#: value recorded after, or computed from, the outcome); honest predictors rarely come close.
LEAK_SHARE = 0.98
#: Common practice: a class under 5% of the rows (or with under 20 rows) is "heavily
#: imbalanced"; accuracy then flatters and folds may hold only a handful of its rows.
MINORITY_SHARE = 0.05
MINORITY_ROWS = 20
_BINS = 20
_MAX_ROWS = 200_000  # the checks look at a seeded sample of bigger tables


def _codes(x: pd.Series) -> np.ndarray:
    """Integer bins: categories by level, numbers by quantile; missing is its own bin."""
    if isinstance(x.dtype, pd.CategoricalDtype):
        return x.cat.codes.to_numpy().astype("int64") + 1
    v = x.to_numpy(dtype="float64", na_value=np.nan)
    codes = np.zeros(len(v), dtype="int64")
    ok = ~np.isnan(v)
    if ok.any():
        ranks = pd.Series(v[ok]).rank(method="dense").to_numpy()
        codes[ok] = 1 + np.minimum(_BINS - 1, ((ranks - 1) * _BINS / ranks.max()).astype(int))
    return codes


def _crossfit_explained(codes: np.ndarray, y: np.ndarray, regression: bool,
                        rng: np.random.Generator) -> float:
    """Share of the target explained by per-bin predictions learnt on the other half.

    Cross-fitting keeps ID-like columns honest: a level seen in only one half predicts
    nothing in the other, so memorising rows earns no credit.
    """
    half = rng.random(len(y)) < 0.5
    if half.all() or not half.any():
        return 0.0  # a table of a few rows: nothing to learn from on one side
    size = int(codes.max()) + 1
    pred = np.empty(len(y))
    for learn in (half, ~half):
        use = ~learn
        seen = np.bincount(codes[learn], minlength=size)
        if regression:
            sums = np.bincount(codes[learn], weights=y[learn], minlength=size)
            table = np.where(seen > 0, sums / np.maximum(seen, 1), float(np.mean(y[learn])))
        else:
            k = int(y.max()) + 1
            votes = np.bincount(codes[learn] * k + y[learn], minlength=size * k)
            table = np.where(seen > 0, votes.reshape(size, k).argmax(axis=1),
                             np.bincount(y[learn], minlength=k).argmax())
        pred[use] = table[codes[use]]  # bins unseen in the learning half get the fallback
    if regression:
        total = float(np.sum((y - y.mean()) ** 2))
        return 0.0 if total == 0 else 1.0 - float(np.sum((y - pred) ** 2)) / total
    base = 1.0 - np.bincount(y).max() / len(y)
    return 0.0 if base == 0 else 1.0 - float(np.mean(pred != y)) / base


def _rank_power(x: np.ndarray, y: np.ndarray, task: str) -> float:
    """|Spearman| for regression, |2 AUC - 1| for binary; 0 for other tasks."""
    ok = ~np.isnan(x)
    if ok.sum() < 3 or task == "multiclass":
        return 0.0
    rx = pd.Series(x[ok]).rank().to_numpy()
    if task == "regression":
        ry = pd.Series(y[ok]).rank().to_numpy()
        if rx.std() == 0 or ry.std() == 0:
            return 0.0
        return abs(float(np.corrcoef(rx, ry)[0, 1]))
    pos = y[ok] == 1
    n1, n0 = int(pos.sum()), int((~pos).sum())
    if n1 == 0 or n0 == 0:
        return 0.0
    auc = (rx[pos].sum() - n1 * (n1 + 1) / 2) / (n1 * n0)  # Mann-Whitney U / (n1 n0)
    return abs(2 * float(auc) - 1)


def single_feature_power(data: PreparedData, *, seed: int = 0) -> dict[str, float]:
    """For each feature, the share of the target it explains alone (0 to 1).

    The larger of a cross-fitted per-bin prediction (R² for regression, share of the
    majority-guess errors removed for classes) and, for numbers, a rank measure
    (|Spearman|; binary: |2 AUC - 1|).
    """
    rng = np.random.default_rng(seed)
    n = len(data.y)
    rows = np.sort(rng.choice(n, _MAX_ROWS, replace=False)) if n > _MAX_ROWS else np.arange(n)
    y = data.y[rows]
    regression = data.task == "regression"
    out = {}
    for name in data.X.columns:
        x = data.X[name].iloc[rows]
        power = _crossfit_explained(_codes(x), y, regression, rng)
        if not isinstance(x.dtype, pd.CategoricalDtype):
            power = max(power, _rank_power(x.to_numpy(dtype="float64", na_value=np.nan), y,
                                           data.task))
        out[str(name)] = max(0.0, float(power))
    return out


def _is_copy(x: pd.Series, y: np.ndarray, task: str) -> bool:
    if x.isna().any():
        return False
    if task == "regression":
        if isinstance(x.dtype, pd.CategoricalDtype):
            return False
        v = x.to_numpy(dtype="float64")
        if v.std() == 0:
            return False
        return abs(float(np.corrcoef(v, y)[0, 1])) > 1 - 1e-9  # the target in other units
    if x.nunique() != np.unique(y).size:
        return False  # cheap test first: a relabelling has exactly one value per class
    pairs = pd.DataFrame({"x": x.astype(object).to_numpy(), "y": y}).drop_duplicates()
    return pairs["x"].is_unique and pairs["y"].is_unique  # a one-to-one relabelling


def _duplicates_across(data: PreparedData, plan: ValidationPlan) -> str | None:
    if not len(plan.holdout_idx):
        return None
    keyed = data.X.assign(__target__=data.y)
    hashes = pd.util.hash_pandas_object(keyed, index=False).to_numpy()
    seen = set(hashes[plan.train_idx].tolist())
    hits = int(sum(h in seen for h in hashes[plan.holdout_idx].tolist()))
    if not hits:
        return None
    return (f"{hits} of {len(plan.holdout_idx)} hold-out row(s) also appear among the search "
            "rows, identical in every feature and the target: the hold-out scores them as "
            "new rows although the model was trained on them")


def _imbalance(data: PreparedData) -> str | None:
    if data.classes is None:
        return None
    counts = np.bincount(data.y, minlength=len(data.classes))
    small = counts.min()
    if small / counts.sum() >= MINORITY_SHARE and small >= MINORITY_ROWS:
        return None
    listing = ", ".join(f"{c!r}: {int(k)}" for c, k in zip(data.classes, counts, strict=True))
    metrics = "roc_auc, average_precision or log_loss" if "average_precision" in METRICS \
        else "roc_auc or log_loss"
    if data.task == "binary":
        ratio = counts[0] / max(counts[1], 1)
        act = (f"to weigh the rare class up, try fixed {{\"is_unbalance\": true}} or search "
               f"scale_pos_weight (search_space {{\"scale_pos_weight\": {{\"low\": 1, "
               f"\"high\": {max(ratio, 1.0):.3g}}}}}, about negatives / positives at the top)")
    else:
        act = ("to weigh rare classes up, give rows a weight_column (for example "
               "total rows / (classes x rows of the row's class))")
    return (f"the target '{data.target}' is heavily imbalanced ({listing}); accuracy flatters "
            f"such data, prefer {metrics}, and expect wide intervals; {act}. Weighting "
            "changes predicted probabilities: read them as scores, not frequencies")


def _dates_without_time_folds(data: PreparedData, plan: ValidationPlan) -> str | None:
    dated = [f.name for f in data.schema.features if f.kind == "datetime"]
    if not dated or plan.strategy == "time":
        return None
    names = ", ".join(repr(n) for n in dated)
    return (f"column(s) {names} hold dates but the folds are {plan.strategy}, not in time "
            "order: a model may learn from rows later than those it is scored on and look "
            "better than it will on future rows; use cv.strategy 'time' with cv.time_column "
            "to score each fold on later rows only")


def job_warnings(data: PreparedData, plan: ValidationPlan, *, seed: int = 0) -> list[str]:
    """Warnings at job start, once the target, features and hold-out are known."""
    out: list[str] = []
    power = single_feature_power(data, seed=seed)
    for name in data.X.columns:
        if _is_copy(data.X[name], data.y, data.task):
            how = "an exact linear transform" if data.task == "regression" else "a relabelling"
            out.append(f"column '{name}' is a copy of the target '{data.target}' ({how}); "
                       "exclude it")
        elif power[str(name)] >= LEAK_SHARE:
            out.append(f"column '{name}' alone explains {power[str(name)]:.1%} of the target "
                       f"'{data.target}': likely leakage (a value known only after the "
                       "outcome); check it, or exclude it")
    for message in (_duplicates_across(data, plan), _imbalance(data),
                    _dates_without_time_folds(data, plan)):
        if message:
            out.append(message)
    n_search, n_features = len(plan.train_idx), len(data.schema.names)
    if n_search < ROWS_PER_COLUMN * n_features:
        out.append(size_message(n_search, n_features, "search rows"))
    return out
