"""Bootstrap intervals, optimism, calibration and the winner's diagnostics."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from sklearn import metrics as skm
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss

import tuner
from tuner.evaluation.diagnostics import SMALL_LEAF_ROWS, _divergence, leaf_sizes
from tuner.evaluation.holdout import bootstrap_intervals, calibration, evaluate_model, optimism
from tuner.metrics import score_all


def _binary(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    y = (rng.random(n) < 1 / (1 + np.exp(-2 * x))).astype("int64")
    return y, 1 / (1 + np.exp(-2 * x + rng.normal(0, 0.5, n)))


def _width(iv: dict) -> float:
    return iv["high"] - iv["low"]


@pytest.mark.parametrize("task", ["binary", "regression"])
def test_intervals_contain_the_estimate_and_shrink_with_more_rows(task: str) -> None:
    rng = np.random.default_rng(1)
    sizes = {}
    for n in (100, 2000):
        if task == "binary":
            y, pred = _binary(n, seed=n)
        else:
            y = rng.normal(10, 2, n)
            pred = y + rng.normal(0, 1, n)
        sizes[n] = bootstrap_intervals(task, y, pred, n_resamples=400, seed=3)
        point = tuner.score_all(task, y, pred)
        assert set(sizes[n]) == set(point)
        for name, iv in sizes[n].items():
            assert iv["low"] <= point[name] <= iv["high"], (n, name, iv)
            assert iv["estimate"] == point[name]
    for name in sizes[100]:
        # 20x the rows: widths shrink roughly by sqrt(20) ~ 4.5; demand at least half.
        assert _width(sizes[2000][name]) < 0.5 * _width(sizes[100][name]), name


def test_bootstrap_is_seeded_and_matches_the_binomial_standard_error() -> None:
    y, pred = _binary(800, seed=5)
    a = bootstrap_intervals("binary", y, pred, n_resamples=500, seed=7)
    b = bootstrap_intervals("binary", y, pred, n_resamples=500, seed=7)
    c = bootstrap_intervals("binary", y, pred, n_resamples=500, seed=8)
    assert a == b and a != c
    # Accuracy is a share of n rows: its standard error is sqrt(p (1 - p) / n) (binomial;
    # Efron & Tibshirani 1993 use this as the bootstrap's check case).
    p = a["accuracy"]["estimate"]
    assert a["accuracy"]["std_error"] == pytest.approx(np.sqrt(p * (1 - p) / 800), rel=0.15)


def test_undefined_resamples_are_skipped() -> None:
    y = np.array([0] * 19 + [1])  # many resamples draw no positive: AUC undefined there
    pred = np.linspace(0.1, 0.9, 20)
    iv = bootstrap_intervals("binary", y, pred, n_resamples=200, seed=0)
    assert 0 < iv["roc_auc"]["resamples"] < 200
    assert iv["accuracy"]["resamples"] == 200


def test_calibration_matches_sklearn() -> None:
    y, prob = _binary(500, seed=2)
    w = np.random.default_rng(0).uniform(0.5, 2, 500)
    cal = calibration(y, prob, w, n_bins=10)
    # References: sklearn.calibration.calibration_curve and sklearn.metrics.brier_score_loss.
    observed, predicted = calibration_curve(y, prob, n_bins=10, strategy="uniform")
    np.testing.assert_allclose(cal["observed"], observed, atol=1e-12)
    np.testing.assert_allclose(cal["mean_predicted"], predicted, atol=1e-12)
    assert cal["brier"] == pytest.approx(brier_score_loss(y, prob, sample_weight=w), abs=1e-12)
    assert sum(cal["counts"]) == 500


def test_optimism_flags_only_gaps_beyond_the_spread() -> None:
    held = {"roc_auc": {"estimate": 0.80, "std_error": 0.02}}
    calm = optimism("roc_auc", "binary", {"mean": 0.83, "std": 0.02}, held)
    assert calm["worse_by"] == pytest.approx(0.03) and not calm["suspicious"]
    assert calm["allowed"] == pytest.approx(2 * np.sqrt(0.02**2 + 0.02**2))
    assert optimism("roc_auc", "binary", {"mean": 0.90, "std": 0.02}, held)["suspicious"]
    better = optimism("roc_auc", "binary", {"mean": 0.70, "std": 0.01}, held)
    assert better["worse_by"] < 0 and not better["suspicious"]
    # Lower is better: a larger hold-out loss is "worse".
    loss = optimism("rmse", "regression", {"mean": 1.0, "std": 0.01},
                    {"rmse": {"estimate": 1.2, "std_error": 0.01}})
    assert loss["worse_by"] == pytest.approx(0.2) and loss["suspicious"]


def test_divergence_rule() -> None:
    assert _divergence("auc", True, 0.999, 0.80, 40)  # train error 0.001 vs valid 0.2
    assert not _divergence("auc", True, 0.90, 0.85, 40)
    assert _divergence("rmse", False, 0.1, 1.0, 12)
    assert not _divergence("rmse", False, 0.5, 1.0, 12)
    assert not _divergence("l2", False, 0.001, 0.01, 3)  # tiny absolute gap


def test_leaf_sizes_match_lightgbm_tree_table() -> None:
    rng = np.random.default_rng(0)
    X = pd.DataFrame({"a": rng.normal(size=400), "b": rng.normal(size=400)})
    y = X["a"] + rng.normal(0, 0.5, 400)
    for min_leaf, warns in ((1, True), (40, False)):
        params = {"objective": "regression", "num_leaves": 31, "min_data_in_leaf": min_leaf,
                  "verbosity": -1, "seed": 0}
        booster = lgb.train(params, lgb.Dataset(X, y), num_boost_round=20)
        found = leaf_sizes(booster)
        # Reference: LightGBM's own trees_to_dataframe (leaves have no split feature).
        table = booster.trees_to_dataframe()
        leaves = table[table["split_feature"].isna()]["count"].to_numpy()
        assert found["leaves"] == len(leaves)
        assert found["min"] == leaves.min()
        assert found["small_share"] == pytest.approx(np.mean(leaves < SMALL_LEAF_ROWS))
        assert bool(found["warnings"]) is warns


@pytest.fixture(scope="module")
def searched(tmp_path_factory) -> dict:
    from tests.tuner.conftest import _frame

    url = f"sqlite:///{tmp_path_factory.mktemp('ev') / 's.db'}"
    data = tuner.prepare(_frame("binary", n_rows=300, seed=4), target="cracked")
    plan = tuner.plan_validation(data, n_folds=4, seed=1)
    config = tuner.SearchConfig(task="binary", metric="roc_auc", n_trials=5, seed=1,
                                max_rounds=200, early_stopping_rounds=20)
    result = tuner.run_search(data, plan, config, storage_url=url, study_name="s")
    fitted = tuner.fit_final(data, plan, config, result.best)
    return {"data": data, "plan": plan, "config": config, "best": result.best,
            "fitted": fitted, "url": url}


def test_evaluate_model_on_a_real_search(searched: dict) -> None:
    s = searched
    ev = evaluate_model(s["fitted"], s["data"], s["plan"], s["config"], storage_url=s["url"],
                        study_name="s", seed=1, n_resamples=300)
    assert ev == evaluate_model(s["fitted"], s["data"], s["plan"], s["config"],
                                storage_url=s["url"], study_name="s", seed=1,
                                n_resamples=300)  # seeded throughout
    holdout = s["fitted"].holdout
    for name, iv in ev["holdout_intervals"].items():
        assert iv["estimate"] == pytest.approx(holdout[name])
    curve = ev["learning_curve"]
    # Refitting fold 0 as the search did reproduces that fold's early-stopped round.
    assert curve["best_round"] == s["best"].best_iterations[0]
    assert len(curve["valid"]) == min(200, curve["best_round"] + 20)
    assert curve["metric"] == "auc" and curve["higher_is_better"]
    imp = ev["hyperparameter_importance"]
    assert imp["trials"] == 5 and imp["importances"]
    assert sum(imp["importances"].values()) == pytest.approx(1.0, abs=1e-6)
    assert set(imp["importances"]) <= set(tuner.DEFAULT_SPACE)
    assert ev["calibration"]["counts"] and sum(ev["calibration"]["counts"]) == holdout["rows"]
    assert isinstance(ev["warnings"], list)


def test_importance_needs_two_complete_trials(tmp_path) -> None:
    from tuner.evaluation.diagnostics import hyperparameter_importance

    url = f"sqlite:///{tmp_path / 'one.db'}"
    study = tuner.open_study(url, "one", direction="maximize", seed=0, create=True)
    study.optimize(lambda t: t.suggest_float("x", 0, 1), n_trials=1)
    out = hyperparameter_importance(url, "one")
    assert out["importances"] == {} and "two" in out["note"]


@pytest.mark.parametrize("weighted", [False, True])
def test_counted_resample_scores_match_sklearn_on_the_resampled_rows(weighted) -> None:
    from tuner.evaluation.holdout import _CountedBinary

    rng = np.random.default_rng(5)
    n = 3_000
    p = np.round(rng.random(n), 3)  # rounded: tied scores too
    y = (rng.random(n) < p).astype("int64")
    w = rng.uniform(0.5, 2.0, n) if weighted else None
    counted = _CountedBinary(y, p, w)
    drawn = rng.integers(0, n, n)  # positions in the resampler's sorted order
    got = counted.scores(np.bincount(drawn, minlength=n))
    rows = counted.order[drawn]
    ww = None if w is None else w[rows]
    # Reference: scikit-learn's metrics on the resampled rows themselves.
    assert got["roc_auc"] == pytest.approx(
        skm.roc_auc_score(y[rows], p[rows], sample_weight=ww), rel=1e-9)
    assert got["log_loss"] == pytest.approx(
        skm.log_loss(y[rows], p[rows], sample_weight=ww), rel=1e-9)
    assert got["average_precision"] == pytest.approx(
        skm.average_precision_score(y[rows], p[rows], sample_weight=ww), rel=1e-9)
    assert got["accuracy"] == pytest.approx(
        skm.accuracy_score(y[rows], p[rows] > 0.5, sample_weight=ww), rel=1e-9)
    assert got["f1_macro"] == pytest.approx(
        skm.f1_score(y[rows], p[rows] > 0.5, average="macro", sample_weight=ww), rel=1e-9)
    # Every binary metric of the service has its counted form.
    assert set(got) == set(score_all("binary", y, p))
