"""Hold-out diagnostics for decision-makers, against scikit-learn and direct numpy."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes

from tuner import SearchConfig, fit_final, plan_validation, prepare, run_search
from tuner.evaluation.holdout import evaluate_model
from tuner.evaluation.outcomes import confusion, gains, segment_labels, segment_metrics


def test_gains_match_a_direct_numpy_computation() -> None:
    rng = np.random.default_rng(1)
    y = (rng.random(237) < 0.3).astype(int)
    score = np.round(rng.random(237) + 0.5 * y, 2)  # rounded: ties happen
    out = gains(y, score, points=10)
    # Direct computation: sort by score descending (stable), count positives in the top k.
    ranked = y[np.argsort(-score, kind="stable")]
    for share, captured, lift in zip(out["share"], out["captured"], out["lift"], strict=True):
        k = math.ceil(share * len(y) - 1e-9)
        assert captured == pytest.approx(ranked[:k].sum() / y.sum())
        assert lift == pytest.approx(captured / (k / len(y)))
    assert out["captured"][-1] == 1.0 and out["positives"] == int(y.sum())


@pytest.mark.parametrize("threshold", [0.5, 0.2, 0.8])
def test_binary_confusion_matches_sklearn(threshold) -> None:
    rng = np.random.default_rng(2)
    y = rng.integers(0, 2, 300)
    prob = np.clip(rng.random(300) * 0.6 + 0.4 * y, 0, 1)
    prob[:5] = threshold  # exactly on the threshold: not positive, as the service labels
    out = confusion(y, prob, ["ok", "cracked"], threshold=threshold)
    # Reference: scikit-learn's confusion_matrix (rows actual, columns predicted).
    expected = skm.confusion_matrix(y, (prob > threshold).astype(int), labels=[0, 1])
    assert out["matrix"] == expected.tolist()
    tn, fp, fn, tp = expected.ravel()
    assert (out["true_negative"], out["false_positive"], out["false_negative"],
            out["true_positive"]) == (tn, fp, fn, tp)


def test_multiclass_confusion_matches_sklearn() -> None:
    rng = np.random.default_rng(3)
    y = rng.integers(0, 3, 200)
    prob = rng.dirichlet([1, 1, 1], 200)
    out = confusion(y, prob, ["a", "b", "c"])
    assert out["matrix"] == skm.confusion_matrix(y, prob.argmax(axis=1),
                                                 labels=[0, 1, 2]).tolist()


def test_segment_metrics_match_sklearn_on_each_segments_rows() -> None:
    rng = np.random.default_rng(4)
    n = 400
    region = rng.choice(["north", "south", "east"], n)
    y = rng.integers(0, 2, n)
    noise = np.where(region == "east", 0.9, 0.25)  # east is scored much worse
    prob = np.clip(y * 0.5 + 0.25 + rng.normal(0, noise, n), 0.001, 0.999)
    out = segment_metrics("binary", "roc_auc", y, prob, None, {"region": region}, seed=0)
    assert out["whole"]["score"] == pytest.approx(skm.roc_auc_score(y, prob))
    rows = {s["value"]: s for s in out["columns"][0]["segments"]}
    for value, entry in rows.items():
        members = region == value
        assert entry["rows"] == int(members.sum())
        # Reference: scikit-learn's roc_auc_score on that segment's rows alone.
        assert entry["score"] == pytest.approx(skm.roc_auc_score(y[members], prob[members]))
        assert entry["low"] <= entry["score"] <= entry["high"]
    assert rows["east"]["worse"] and not rows["north"]["worse"] and not rows["south"]["worse"]


def test_regression_segments_and_many_valued_numbers() -> None:
    rng = np.random.default_rng(5)
    n = 300
    age = rng.integers(18, 90, n)
    y = rng.normal(0, 1, n)
    pred = y + rng.normal(0, 0.5, n)
    out = segment_metrics("regression", "rmse", y, pred, None, {"age": age}, seed=0)
    segments = out["columns"][0]["segments"]
    assert len(segments) == 5  # quantile bins, not 72 ages
    labels = segment_labels(age)
    for entry in segments:
        members = labels == entry["value"]
        assert entry["score"] == pytest.approx(math.sqrt(skm.mean_squared_error(
            y[members], pred[members])))


@pytest.fixture(scope="module")
def cancer_eval(tmp_path_factory):
    # Breast Cancer Wisconsin (Diagnostic), Wolberg et al., UCI; bundled with scikit-learn.
    frame = load_breast_cancer(as_frame=True).frame.rename(columns={"target": "benign"})
    frame["size_band"] = pd.cut(frame["mean radius"], [0, 12, 15, 40],
                                labels=["small", "medium", "large"]).astype(str)
    data = prepare(frame, target="benign", exclude=["size_band"], segments=["size_band"])
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.3, seed=1)
    config = SearchConfig(task="binary", metric="log_loss", n_trials=2, max_rounds=40,
                          early_stopping_rounds=5)
    url = f"sqlite:///{tmp_path_factory.mktemp('ev') / 's.db'}"
    result = run_search(data, plan, config, storage_url=url, study_name="ev")
    fitted = fit_final(data, plan, config, result.best)
    return data, plan, fitted, evaluate_model(fitted, data, plan, config, n_resamples=50)


def test_evaluation_reports_decision_diagnostics_on_the_holdout(cancer_eval) -> None:
    data, plan, fitted, ev = cancer_eval
    decision = ev["outcomes"]
    rows = plan.holdout_idx
    # Reference: LightGBM's own predict on the hold-out rows, then scikit-learn.
    prob = fitted.booster.predict(data.X.iloc[rows])
    y = data.y[rows]
    assert decision["confusion"]["matrix"] == skm.confusion_matrix(
        y, (prob > 0.5).astype(int), labels=[0, 1]).tolist()
    assert decision["gains"]["rows"] == len(rows)
    assert "size_band" not in data.schema.columns  # a segment need not be a feature
    band = np.asarray(data.segments["size_band"])[rows]
    for entry in decision["segments"]["columns"][0]["segments"]:
        members = band == entry["value"]
        assert entry["score"] == pytest.approx(skm.log_loss(y[members], prob[members],
                                                            labels=[0, 1]))


def test_regression_evaluation_has_predicted_vs_actual(tmp_path) -> None:
    # Diabetes progression (Efron et al. 2004), bundled with scikit-learn.
    frame = load_diabetes(as_frame=True).frame
    data = prepare(frame, target="target", task="regression")
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.25, seed=0)
    config = SearchConfig(task="regression", metric="rmse", n_trials=2, max_rounds=40,
                          early_stopping_rounds=5)
    result = run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                        study_name="d")
    fitted = fit_final(data, plan, config, result.best)
    ev = evaluate_model(fitted, data, plan, config, n_resamples=20)
    points = ev["outcomes"]["regression"]
    pred = fitted.booster.predict(data.X.iloc[plan.holdout_idx])
    np.testing.assert_allclose(points["predicted"], pred)
    np.testing.assert_allclose(points["actual"], data.y[plan.holdout_idx])
    assert "segments" not in ev["outcomes"]
