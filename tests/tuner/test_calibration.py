"""Calibration maps: fitted on out-of-fold scores, written into the LightGBM model file."""

from __future__ import annotations

import dataclasses

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from scipy.special import expit, softmax
from sklearn.metrics import log_loss

from tuner import (
    LIGHTGBM_DEFAULTS,
    Predictor,
    SearchConfig,
    TrialRecord,
    fit_final,
    model_metadata,
    plan_validation,
    prepare,
    save_model,
)
from tuner import calibration as cal
from tuner.model import out_of_fold_raw

# An over-confident configuration: big trees on few rows, many fast rounds.
SHARP = {**LIGHTGBM_DEFAULTS, "learning_rate": 0.3, "num_leaves": 63, "min_data_in_leaf": 3}


def _record(rounds: int, folds: int, **params) -> TrialRecord:
    return TrialRecord(number=7, state="complete", params={**SHARP, **params}, score=0.5,
                       score_std=0.0, fold_scores=[0.5] * folds,
                       best_iterations=[rounds] * folds, boosting_rounds=rounds)


def _known_binary(n: int = 900, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    """A table whose true probability of class 1 is known for every row."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 5))
    truth = expit(1.2 * x[:, 0] - 0.8 * x[:, 1] + 0.5 * x[:, 2] * x[:, 3])
    frame = pd.DataFrame(x, columns=[f"x{i}" for i in range(5)])
    frame["label"] = (rng.random(n) < truth).astype(int)
    return frame, truth


def _known_multiclass(n: int = 900, seed: int = 1) -> tuple[pd.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 4))
    logits = np.column_stack([x[:, 0], -x[:, 0] + 0.5 * x[:, 1], 0.7 * x[:, 2]])
    truth = softmax(logits, axis=1)
    frame = pd.DataFrame(x, columns=[f"x{i}" for i in range(4)])
    frame["label"] = [rng.choice(3, p=p) for p in truth]
    return frame, truth


def _ece(prob: np.ndarray, y: np.ndarray, bins: int = 15) -> float:
    """Top-label expected calibration error, written out with numpy histograms
    (Guo et al. 2017, eq. 3: sum over bins of |B|/n * |acc(B) - conf(B)|)."""
    probs = np.column_stack([1 - prob, prob]) if prob.ndim == 1 else prob
    conf, hit = probs.max(axis=1), (probs.argmax(axis=1) == y).astype(float)
    edges = np.linspace(0, 1, bins + 1)
    count, _ = np.histogram(conf, edges)
    acc, _ = np.histogram(conf, edges, weights=hit)
    mean_conf, _ = np.histogram(conf, edges, weights=conf)
    return float(np.abs(acc - mean_conf).sum() / len(y))


def _cross_fitted(task: str, raw: np.ndarray, y: np.ndarray, fold_of: np.ndarray,
                  kind: str) -> np.ndarray:
    """Calibrated out-of-fold probabilities: each fold's map fitted on the other folds."""
    out = np.empty_like(raw)
    for j in np.unique(fold_of):
        cmap = cal.fit_map(kind, raw[fold_of != j], y[fold_of != j])
        out[fold_of == j] = cal.apply_map(raw[fold_of == j], cmap)
    return cal.probabilities(out)


@pytest.mark.parametrize("task", ["binary", "multiclass"])
def test_calibrated_out_of_fold_probabilities_beat_raw_ones(task) -> None:
    frame, truth = _known_binary() if task == "binary" else _known_multiclass()
    data = prepare(frame, target="label", task=task)
    plan = plan_validation(data, n_folds=5, holdout_fraction=0.0, seed=0)
    config = SearchConfig(task=task, metric="log_loss")
    params = {"objective": task, "verbosity": -1, "seed": 0, "deterministic": True,
              "num_threads": 1, **SHARP, **({"num_class": 3} if task == "multiclass" else {})}
    raw, rows, fold_of = out_of_fold_raw(data, plan, config, params, _record(60, 5))
    y = data.y[rows]
    kind = "platt" if task == "binary" else "vector"
    before, after = cal.probabilities(raw), _cross_fitted(task, raw, y, fold_of, kind)
    # Reference: sklearn.metrics.log_loss; the calibration error is computed above.
    assert log_loss(y, after, labels=list(range(raw.shape[1] if raw.ndim == 2 else 2))) < \
        log_loss(y, before, labels=list(range(raw.shape[1] if raw.ndim == 2 else 2)))
    assert _ece(after, y) < _ece(before, y)
    # Closer to the probabilities the table was drawn from (known here).
    true = truth[rows] if task == "multiclass" else truth[rows]
    assert np.abs(after - true).mean() < np.abs(before - true).mean()
    # The chooser agrees: a map is kept, and it softens these over-confident scores.
    cmap, report = cal.calibrate_scores(task, raw, y, fold_of)
    assert cmap is not None and max(cmap.scale) < 1.0
    assert report["oof_log_loss"]["after"] < report["oof_log_loss"]["before"]
    assert report["oof_ece"]["after"] < report["oof_ece"]["before"]
    assert report["oof_log_loss"]["before"] == pytest.approx(log_loss(y, before), rel=1e-9)


def test_no_map_when_scores_are_already_calibrated() -> None:
    # Scores that are the true log-odds: no map can lower the cross-fitted log loss much,
    # and whatever is kept stays close to doing nothing.
    rng = np.random.default_rng(3)
    raw = rng.normal(0, 1.5, 4000)
    y = (rng.random(4000) < expit(raw)).astype(int)
    cmap, report = cal.calibrate_scores("binary", raw, y, np.arange(4000) % 5)
    if cmap is not None:
        assert abs(cmap.scale[0] - 1) < 0.1 and abs(cmap.bias[0]) < 0.1
    assert report["oof_log_loss"]["after"] <= report["oof_log_loss"]["before"]


@pytest.mark.parametrize("task,sigmoid", [("binary", 1.0), ("binary", 2.5),
                                          ("multiclass", 1.0)])
def test_map_written_into_the_text_equals_the_map(task, sigmoid) -> None:
    frame, _ = _known_binary(400) if task == "binary" else _known_multiclass(400)
    X, y = frame.drop(columns="label"), frame["label"].to_numpy()
    params = {"objective": task, "verbosity": -1, "num_leaves": 15, "bagging_fraction": 0.7,
              "bagging_freq": 1, "feature_fraction": 0.8}
    params |= {"num_class": 3} if task == "multiclass" else {"sigmoid": sigmoid}
    booster = lgb.train(params, lgb.Dataset(X, y), num_boost_round=40)
    k = 3 if task == "multiclass" else 1
    cmap = cal.CalibrationMap("vector", tuple(np.linspace(0.4, 1.7, k)),
                              tuple(np.linspace(-0.6, 0.9, k)))
    text = cal.write_into_model(booster.model_to_string(), cmap)
    rewritten = lgb.Booster(model_str=text)
    # Reference: LightGBM's own predict on the uncalibrated model, mapped by hand.
    raw = booster.predict(X, raw_score=True)
    z = raw * np.asarray(cmap.scale) + np.asarray(cmap.bias)
    expected = softmax(z, axis=1) if task == "multiclass" else expit(sigmoid * z)
    np.testing.assert_allclose(rewritten.predict(X), expected, rtol=0, atol=1e-9)
    np.testing.assert_allclose(rewritten.predict(X, raw_score=True), z, rtol=0, atol=1e-9)
    # TreeSHAP on the rewritten trees still adds up to the new raw score.
    contrib = rewritten.predict(X, pred_contrib=True)
    if task == "binary":
        np.testing.assert_allclose(contrib.sum(axis=1), z, atol=1e-9)
    # The header's tree sizes match the rewritten blocks, as LightGBM writes them.
    again = cal.write_into_model(rewritten.model_to_string(),
                                 cal.CalibrationMap("t", (1.0,) * k, (0.0,) * k))
    assert lgb.Booster(model_str=again).num_trees() == booster.num_trees()


def test_unsupported_models_are_named() -> None:
    frame, _ = _known_binary(300)
    X, y = frame.drop(columns="label"), frame["label"]
    forest = lgb.train({"objective": "binary", "boosting": "rf", "bagging_freq": 1,
                        "bagging_fraction": 0.6, "verbosity": -1}, lgb.Dataset(X, y), 5)
    assert "averages" in cal.supported(forest.model_to_string())
    linear = lgb.train({"objective": "binary", "linear_tree": True, "verbosity": -1},
                       lgb.Dataset(X, y), 5)
    assert "linear" in cal.supported(linear.model_to_string())


@pytest.mark.parametrize("task,refit", [("binary", "train"), ("multiclass", "all")])
def test_saved_file_predicts_what_is_served(task, refit, tmp_path) -> None:
    frame, _ = _known_binary(600) if task == "binary" else _known_multiclass(600)
    data = prepare(frame, target="label", task=task)
    plan = plan_validation(data, n_folds=4, holdout_fraction=0.25, seed=0)
    config = SearchConfig(task=task, metric="log_loss", final_refit=refit)
    best = _record(60, 4)
    fitted = fit_final(data, plan, config, best)
    plain = fit_final(data, plan, dataclasses.replace(config, calibrate=False), best)
    report = fitted.calibration
    assert report["applied"] is True and plain.calibration["applied"] is False
    assert report["method"] in cal.candidates(task)
    assert report["holdout"]["log_loss"]["after"] < report["holdout"]["log_loss"]["before"]
    path = tmp_path / "model.txt"
    save_model(fitted, path)
    from_file = lgb.Booster(model_file=str(path))  # LightGBM alone, nothing of ours
    X = data.X
    rows = [{k: float(v) for k, v in r.items()} for r in X.to_dict(orient="records")]
    served = Predictor.from_metadata(from_file, model_metadata(fitted)).predict_rows(rows)
    served_p = np.asarray(served["probabilities"])
    own = from_file.predict(X)
    own = np.column_stack([1 - own, own]) if own.ndim == 1 else own
    np.testing.assert_allclose(served_p, own, rtol=0, atol=1e-9)
    # ... and those are the map applied to the uncalibrated model's raw scores.
    cmap = cal.CalibrationMap(**{k: tuple(v) if isinstance(v, list) else v
                                 for k, v in report["map"].items() if k != "units"})
    raw = plain.booster.predict(X, raw_score=True)
    mapped = cal.probabilities(cal.apply_map(raw, cmap))
    mapped = np.column_stack([1 - mapped, mapped]) if mapped.ndim == 1 else mapped
    np.testing.assert_allclose(own, mapped, rtol=0, atol=1e-9)
    # The hold-out scores are the served model's (when it is the scored one).
    if refit == "train":
        hold = plan.holdout_idx
        assert fitted.holdout["log_loss"] == pytest.approx(
            log_loss(data.y[hold], own[hold], labels=[0, 1]), rel=1e-9)
        assert fitted.holdout["log_loss"] == pytest.approx(
            report["holdout"]["log_loss"]["after"], rel=1e-6)


def test_regression_is_left_alone(tmp_path) -> None:
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"a": rng.normal(size=200), "b": rng.normal(size=200)})
    frame["y"] = frame["a"] * 2 + rng.normal(size=200)
    data = prepare(frame, target="y")
    plan = plan_validation(data, n_folds=3, seed=0)
    fitted = fit_final(data, plan, SearchConfig(task="regression", metric="rmse"),
                       _record(20, 3))
    assert fitted.calibration["applied"] is False
    assert "regression" in fitted.calibration["reason"]
