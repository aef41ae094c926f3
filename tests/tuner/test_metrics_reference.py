"""Our metric implementations against scikit-learn's, with sample weights."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm

from tuner import METRICS, ConfigError, default_metric, get_metric, score_all

RNG = np.random.default_rng(42)
N = 400
WEIGHT = RNG.uniform(0.1, 3.0, N)


def _binary():
    y = RNG.integers(0, 2, N)
    # Rounded so that many scores tie, which exercises the ROC tie handling.
    p = np.clip(np.round(0.3 * y + 0.7 * RNG.random(N), 2), 0.01, 0.99)
    return y, p


def _multiclass(k: int = 4):
    y = RNG.integers(0, k, N)
    logits = RNG.normal(size=(N, k)) + 1.5 * np.eye(k)[y]
    p = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    return y, p


def _regression():
    y = RNG.gamma(2.0, 2.0, N)
    return y, y + RNG.normal(0, 1.0, N) ** 2 * 0.5 + 0.1


@pytest.mark.parametrize("weight", [None, WEIGHT], ids=["unweighted", "weighted"])
def test_binary_metrics_match_sklearn(weight) -> None:
    y, p = _binary()
    labels = (p > 0.5).astype(int)
    # Reference: sklearn.metrics.roc_auc_score / log_loss / accuracy_score / f1_score.
    assert METRICS["roc_auc"](y, p, weight) == pytest.approx(
        skm.roc_auc_score(y, p, sample_weight=weight), rel=1e-12)
    assert METRICS["log_loss"](y, p, weight) == pytest.approx(
        skm.log_loss(y, y_proba=p, sample_weight=weight), rel=1e-12)
    assert METRICS["accuracy"](y, p, weight) == pytest.approx(
        skm.accuracy_score(y, labels, sample_weight=weight), rel=1e-12)
    assert METRICS["f1_macro"](y, p, weight) == pytest.approx(
        skm.f1_score(y, labels, average="macro", sample_weight=weight), rel=1e-12)


@pytest.mark.parametrize("weight", [None, WEIGHT], ids=["unweighted", "weighted"])
def test_multiclass_metrics_match_sklearn(weight) -> None:
    y, p = _multiclass()
    labels = p.argmax(axis=1)
    # Reference: sklearn.metrics, one-vs-rest macro AUC as documented for roc_auc_score.
    assert METRICS["roc_auc"](y, p, weight) == pytest.approx(
        skm.roc_auc_score(y, p, multi_class="ovr", average="macro", sample_weight=weight),
        rel=1e-12)
    assert METRICS["log_loss"](y, p, weight) == pytest.approx(
        skm.log_loss(y, y_proba=p, sample_weight=weight), rel=1e-12)
    assert METRICS["accuracy"](y, p, weight) == pytest.approx(
        skm.accuracy_score(y, labels, sample_weight=weight), rel=1e-12)
    assert METRICS["f1_macro"](y, p, weight) == pytest.approx(
        skm.f1_score(y, labels, average="macro", sample_weight=weight), rel=1e-12)


@pytest.mark.parametrize("weight", [None, WEIGHT], ids=["unweighted", "weighted"])
def test_regression_metrics_match_sklearn(weight) -> None:
    y, pred = _regression()
    # Reference: sklearn.metrics.mean_squared_error (square root), mean_absolute_error,
    # r2_score, mean_poisson_deviance.
    assert METRICS["rmse"](y, pred, weight) == pytest.approx(
        np.sqrt(skm.mean_squared_error(y, pred, sample_weight=weight)), rel=1e-12)
    assert METRICS["mae"](y, pred, weight) == pytest.approx(
        skm.mean_absolute_error(y, pred, sample_weight=weight), rel=1e-12)
    assert METRICS["r2"](y, pred, weight) == pytest.approx(
        skm.r2_score(y, pred, sample_weight=weight), rel=1e-12)
    y_counts = np.where(RNG.random(N) < 0.3, 0.0, y)  # zeros exercise the y*log(y/p) limit
    assert METRICS["poisson_deviance"](y_counts, pred, weight) == pytest.approx(
        skm.mean_poisson_deviance(y_counts, pred, sample_weight=weight), rel=1e-12)


def test_r2_constant_truth_follows_sklearn() -> None:
    y = np.full(5, 2.0)
    # Reference: sklearn.metrics.r2_score with its default force_finite=True.
    assert METRICS["r2"](y, y, None) == skm.r2_score(y, y)
    assert METRICS["r2"](y, y + 1, None) == skm.r2_score(y, y + 1)


def test_score_all_covers_task_and_skips_undefined() -> None:
    y, p = _binary()
    assert set(score_all("binary", y, p, WEIGHT)) == {"roc_auc", "log_loss", "accuracy",
                                                      "f1_macro", "average_precision"}
    y_reg, pred = _regression()
    assert "poisson_deviance" in score_all("regression", y_reg, pred)
    assert "poisson_deviance" not in score_all("regression", y_reg - 10, pred)
    assert "roc_auc" not in score_all("binary", np.ones(N, dtype=int), p)


def test_registry_lookup() -> None:
    assert get_metric("roc_auc", "binary").lgb_metric_for("binary") == "auc"
    assert get_metric("accuracy", "multiclass").lgb_metric_for("multiclass") == "multi_error"
    assert get_metric("mae", "regression").lgb_metric_for("regression") == "l1"
    assert [default_metric(t) for t in ("binary", "multiclass", "regression")] == [
        "roc_auc", "log_loss", "rmse"]
    for name, task in (("rmse", "binary"), ("brier", "binary")):
        with pytest.raises(ConfigError) as info:
            get_metric(name, task)
        assert info.value.errors[0]["field"] == "metric"
        assert name in info.value.errors[0]["message"] and task in info.value.errors[0]["message"]


@pytest.mark.parametrize("weight", [None, WEIGHT], ids=["unweighted", "weighted"])
def test_average_precision_matches_sklearn(weight) -> None:
    y, p = _binary()  # many tied scores
    rare = (RNG.random(N) < 0.04).astype(int)  # a rare class, its scores mostly low
    p_rare = np.clip(0.5 * rare + 0.6 * RNG.random(N), 0, 1)
    y3, p3 = _multiclass(3)
    # Reference: sklearn.metrics.average_precision_score (binary; multiclass one-vs-rest
    # on the binarised labels, macro).
    assert METRICS["average_precision"](y, p, weight) == pytest.approx(
        skm.average_precision_score(y, p, sample_weight=weight), rel=1e-12)
    assert METRICS["average_precision"](rare, p_rare, weight) == pytest.approx(
        skm.average_precision_score(rare, p_rare, sample_weight=weight), rel=1e-12)
    assert METRICS["average_precision"](y3, p3, weight) == pytest.approx(
        skm.average_precision_score(np.eye(3)[y3], p3, average="macro",
                                    sample_weight=weight), rel=1e-12)
