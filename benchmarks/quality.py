"""Search quality: tuned vs untuned baselines, and what pruning saves.

``python -m benchmarks.quality`` (``--quick`` for a CI-sized smoke run) tunes, with fixed
seeds, scikit-learn's bundled breast cancer, wine, digits and diabetes tables and both
demo tables, and prints one table:

- hold-out loss of the tuned model (median pruning, the service default) divided by that
  of LightGBM with default parameters (100 rounds) and of scikit-learn's
  ``HistGradientBoosting*`` with default parameters: log loss for classification, RMSE
  for regression; ratio <= 1 means the tuned model is better;
- ``noise``: whether the tuned model is worse than a baseline by more than two standard
  errors of the paired per-row loss difference on the hold-out (``ok`` if not);
- boosting rounds trained by each pruner as a share of the unpruned search at the same
  trial budget, and whether its best CV score is within one standard error (of the
  unpruned winner's fold scores) of the unpruned best.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import lightgbm as lgb
import numpy as np
import pandas as pd
from sklearn import datasets as skd
from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor

import tuner
from examples.demo_data import greenhouse, kilns
from tuner._lgb import base_params, predict
from tuner.selection import standard_error
from tuner.trials import trial_attrs


@dataclass(frozen=True)
class Case:
    name: str
    frame: pd.DataFrame
    target: str
    exclude: tuple[str, ...] = ()


def _sklearn(loader: Any, name: str) -> Case:
    bunch = loader(as_frame=True)
    frame = bunch.frame.copy()
    frame.columns = [str(c) for c in frame.columns]
    return Case(name, frame, "target")


def cases(quick: bool) -> list[Case]:
    out = [
        _sklearn(skd.load_breast_cancer, "breast_cancer"),
        _sklearn(skd.load_wine, "wine"),
        _sklearn(skd.load_digits, "digits"),
        _sklearn(skd.load_diabetes, "diabetes"),
        Case("kilns", kilns(), "defect", ("firing_id",)),
        Case("greenhouse", greenhouse(), "yield_kg_per_m2"),
    ]
    if quick:
        # wine and the greenhouse: one classification and one regression, both small.
        out = [c for c in out if c.name in ("wine", "greenhouse")]
        out = [replace(c, frame=c.frame.head(400)) for c in out]
    return out


def _row_losses(task: str, y: np.ndarray, pred: np.ndarray) -> np.ndarray:
    """Per-row log loss (classification) or squared error (regression)."""
    eps = float(np.finfo(np.float64).eps)
    if task == "regression":
        return (y - pred) ** 2
    probs = np.column_stack([1 - pred, pred]) if pred.ndim == 1 else pred
    return -np.log(np.clip(probs[np.arange(len(y)), y.astype(int)], eps, 1 - eps))


def _summary(task: str, losses: np.ndarray) -> float:
    return float(math.sqrt(losses.mean()) if task == "regression" else losses.mean())


def _default_lightgbm(data: tuner.PreparedData, plan: tuner.ValidationPlan,
                      metric: str) -> np.ndarray:
    params = base_params(data.task, num_class=len(data.classes or ()), metric=metric,
                         seed=0, num_threads=1)
    train = plan.train_idx
    booster = lgb.train(params, lgb.Dataset(data.X.iloc[train], label=data.y[train],
                                            params=params),
                        num_boost_round=100)  # LightGBM's num_iterations default
    return predict(booster, data.task, data.X.iloc[plan.holdout_idx])


def _hist_gb(data: tuner.PreparedData, plan: tuner.ValidationPlan) -> np.ndarray:
    train, hold = plan.train_idx, plan.holdout_idx
    model: Any
    if data.task == "regression":
        model = HistGradientBoostingRegressor(random_state=0)
    else:
        model = HistGradientBoostingClassifier(random_state=0)
    # categorical_features="from_dtype" (the default) picks up the pandas categories.
    model.fit(data.X.iloc[train], data.y[train])
    if data.task == "regression":
        return model.predict(data.X.iloc[hold])
    proba = model.predict_proba(data.X.iloc[hold])
    return proba[:, 1] if data.task == "binary" else proba


def _search(data: tuner.PreparedData, plan: tuner.ValidationPlan, config: tuner.SearchConfig,
            folder: Path, name: str) -> dict[str, Any]:
    url = f"sqlite:///{folder / name}.db"
    started = time.perf_counter()
    result = tuner.run_search(data, plan, config, storage_url=url, study_name=name)
    seconds = time.perf_counter() - started
    trials = tuner.load_study(url, name).get_trials(deepcopy=False)
    rounds = sum(int(trial_attrs(t).get("rounds_trained", 0)) for t in trials)
    return {"result": result, "rounds": rounds, "seconds": seconds,
            "pruned": result.n_pruned}


def _noise_ok(task: str, tuned: np.ndarray, base: np.ndarray) -> bool:
    """Tuned is not worse by more than 2 SE of the paired per-row loss difference."""
    diff = tuned - base
    se = diff.std(ddof=1) / math.sqrt(len(diff))
    return bool(diff.mean() <= 2 * se)


def run_case(case: Case, *, trials: int, pruners: list[str], folder: Path) -> dict[str, Any]:
    data = tuner.prepare(case.frame, target=case.target, exclude=list(case.exclude))
    plan = tuner.plan_validation(data, n_folds=5, holdout_fraction=0.2, seed=0)
    metric = "log_loss" if data.task != "regression" else "rmse"
    base = tuner.SearchConfig(task=data.task, metric=metric, n_trials=trials, seed=0)
    searches = {p: _search(data, plan, replace(base, pruner=p), folder, f"{case.name}-{p}")
                for p in ["none", *pruners]}
    tuned_cfg = replace(base, pruner=pruners[0])
    fitted = tuner.fit_final(data, plan, tuned_cfg, searches[pruners[0]]["result"].best)
    hold = plan.holdout_idx
    y = data.y[hold]
    tuned = _row_losses(data.task, y, predict(fitted.booster, data.task, data.X.iloc[hold]))
    lgbm = _row_losses(data.task, y, _default_lightgbm(data, plan, metric))
    hgb = _row_losses(data.task, y, _hist_gb(data, plan))
    free = searches["none"]
    free_best = free["result"].best
    se = standard_error(list(free_best.fold_scores))
    row: dict[str, Any] = {
        "dataset": case.name, "task": data.task, "rows": data.n_rows,
        "tuned": _summary(data.task, tuned),
        "vs_lgbm": _summary(data.task, tuned) / _summary(data.task, lgbm),
        "vs_hgb": _summary(data.task, tuned) / _summary(data.task, hgb),
        "noise": "ok" if _noise_ok(data.task, tuned, lgbm) and _noise_ok(data.task, tuned, hgb)
        else "WORSE",
        "winner_trial": searches[pruners[0]]["result"].best.number,
        "rounds_none": free["rounds"], "seconds_none": free["seconds"],
    }
    for p in pruners:
        s = searches[p]
        row[f"rounds_{p}"] = s["rounds"] / free["rounds"]
        row[f"pruned_{p}"] = s["pruned"]
        row[f"within_se_{p}"] = abs(s["result"].best.score - free_best.score) <= se
        row[f"seconds_{p}"] = s["seconds"]
    return row


def _print(rows: list[dict[str, Any]], pruners: list[str]) -> None:
    head = ["dataset", "task", "rows", "tuned", "vs_lgbm", "vs_hgb", "noise", "winner",
            "rounds_none"]
    for p in pruners:
        head += [f"rounds_{p}", f"pruned_{p}", f"within_se_{p}"]
    lines = [head]
    for r in rows:
        line = [r["dataset"], r["task"], str(r["rows"]), f"{r['tuned']:.4f}",
                f"{r['vs_lgbm']:.3f}", f"{r['vs_hgb']:.3f}", r["noise"], str(r["winner_trial"]),
                str(r["rounds_none"])]
        for p in pruners:
            line += [f"{r[f'rounds_{p}']:.2f}", str(r[f"pruned_{p}"]),
                     "yes" if r[f"within_se_{p}"] else "NO"]
        lines.append(line)
    widths = [max(len(line[i]) for line in lines) for i in range(len(head))]
    for line in lines:
        print("  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True)))
    for p in pruners:
        total = sum(r["rounds_none"] * r[f"rounds_{p}"] for r in rows)
        saved = 1 - total / sum(r["rounds_none"] for r in rows)
        secs = sum(r[f"seconds_{p}"] for r in rows) / sum(r["seconds_none"] for r in rows)
        print(f"{p}: {saved:.0%} of boosting rounds saved overall, wall time ratio "
              f"{secs:.2f} vs no pruning")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.quality")
    parser.add_argument("--quick", action="store_true", help="two small tables, 6 trials")
    parser.add_argument("--trials", type=int, default=None, help="trials per search")
    parser.add_argument("--pruners", default="median,halving",
                        help="pruners compared with no pruning; the first is 'tuned'")
    parser.add_argument("--only", default=None, help="comma-separated dataset names")
    args = parser.parse_args(argv)
    trials = args.trials or (6 if args.quick else 30)
    pruners = [p for p in args.pruners.split(",") if p and p != "none"]
    chosen = cases(args.quick)
    if args.only:
        chosen = [c for c in chosen if c.name in args.only.split(",")]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for case in chosen:
            rows.append(run_case(case, trials=trials, pruners=pruners, folder=Path(tmp)))
            print(f"# {case.name} done", file=sys.stderr, flush=True)
    print(f"trials per search: {trials}; seed 0; 5 folds; 20% hold-out")
    _print(rows, pruners)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
