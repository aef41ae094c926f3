"""The gain over LightGBM's defaults: a paired bootstrap interval on the hold-out."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_iris
from sklearn.metrics import log_loss, mean_squared_error, roc_auc_score

from tuner import SearchConfig, fit_final, load_trial_records, plan_validation, prepare, run_search
from tuner.evaluation.gain import gain_over_defaults, paired_gain


def _direct(y, a, b, score, sign, seed, n_resamples=1000):
    """The same interval written out with numpy and a scikit-learn metric."""
    rng = np.random.default_rng(seed)
    draws = []
    for _ in range(n_resamples):
        idx = rng.integers(0, len(y), len(y))
        draws.append(sign * (score(y[idx], a[idx]) - score(y[idx], b[idx])))
    return sign * (score(y, a) - score(y, b)), np.percentile(draws, [2.5, 97.5])


def test_log_loss_interval_matches_numpy() -> None:
    rng = np.random.default_rng(5)
    y = rng.integers(0, 2, 300)
    a = np.clip(0.5 + 0.3 * (2 * y - 1) + rng.normal(0, 0.15, 300), 0.02, 0.98)
    b = np.clip(0.5 + 0.2 * (2 * y - 1) + rng.normal(0, 0.15, 300), 0.02, 0.98)
    got = paired_gain("binary", "log_loss", y, a, b, seed=11)
    # Reference: sklearn.metrics.log_loss on the same resampled rows.
    gain, (low, high) = _direct(y, a, b, lambda t, p: log_loss(t, p, labels=[0, 1]), -1, 11)
    assert got["gain"] == pytest.approx(gain, rel=1e-9) and got["gain"] > 0
    assert got["low"] == pytest.approx(low, rel=1e-9)
    assert got["high"] == pytest.approx(high, rel=1e-9)
    assert got["resamples"] == 1000 and got["direction"] == "minimize"


def test_rmse_and_auc_intervals_match_numpy() -> None:
    rng = np.random.default_rng(6)
    y = rng.normal(size=200)
    a, b = y + rng.normal(0, 0.5, 200), y + rng.normal(0, 0.4, 200)
    got = paired_gain("regression", "rmse", y, a, b, seed=3)
    gain, (low, high) = _direct(y, a, b, lambda t, p: mean_squared_error(t, p) ** 0.5, -1, 3)
    assert (got["gain"], got["low"], got["high"]) == pytest.approx((gain, low, high), rel=1e-9)
    assert got["gain"] < 0  # the first model is the worse one here
    labels = (y > 0).astype(int)
    got = paired_gain("binary", "roc_auc", labels, a, b, seed=4)
    gain, (low, high) = _direct(labels, a, b, roc_auc_score, 1, 4)
    assert (got["gain"], got["low"], got["high"]) == pytest.approx((gain, low, high), rel=1e-9)


def test_gain_over_defaults_refits_trial_zero(tmp_path) -> None:
    # Iris (Fisher 1936), bundled with scikit-learn.
    frame = load_iris(as_frame=True).frame
    data = prepare(frame, target="target", task="multiclass")
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.3, seed=0)
    config = SearchConfig(task="multiclass", metric="log_loss", n_trials=4, max_rounds=200,
                          early_stopping_rounds=20)
    url = f"sqlite:///{tmp_path / 's.db'}"
    result = run_search(data, plan, config, storage_url=url, study_name="iris")
    fitted = fit_final(data, plan, config, result.best)
    zero = next(r for r in load_trial_records(url, "iris") if r.number == 0)
    gain = gain_over_defaults(fitted, data, plan, config, zero, winner=result.best.number,
                              seed=2)
    hold = plan.holdout_idx
    y = data.y[hold]
    assert gain["available"] and gain["rows"] == len(hold)
    assert gain["tuned"] == pytest.approx(log_loss(y, fitted.holdout_pred), rel=1e-9)
    # The baseline is trial 0 refit without calibration on the same rows.
    plain = fit_final(data, plan, SearchConfig(task="multiclass", metric="log_loss",
                                               calibrate=False), zero)
    base = plain.booster.predict(data.X.iloc[hold])
    assert gain["baseline"] == pytest.approx(log_loss(y, base), rel=1e-9)
    expected, (low, high) = _direct(y, fitted.holdout_pred, base, log_loss, -1, 2)
    assert (gain["gain"], gain["low"], gain["high"]) == pytest.approx((expected, low, high),
                                                                      rel=1e-9)
    assert gain["helped"] == (expected > 0)
    assert ("did not help" in gain["verdict"]) == (expected <= 0 and not gain["same_trial"])
    no_holdout = plan_validation(data, n_folds=3, holdout_fraction=0.0, seed=0)
    assert not gain_over_defaults(fit_final(data, no_holdout, config, result.best), data,
                                  no_holdout, config, zero)["available"]
