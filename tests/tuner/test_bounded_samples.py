"""Descriptions of the winner on bounded, seeded samples (tuner/evaluation/sampling.py):
the learning curve's fold rows and the trials fANOVA reads."""

from __future__ import annotations

import numpy as np
import pytest

from tuner import SearchConfig, plan_validation, prepare, run_search
from tuner.evaluation import diagnostics, sampling
from tuner.space import LIGHTGBM_DEFAULTS


def test_bounded_keeps_small_sets_and_samples_large_ones_seeded() -> None:
    small = np.arange(10, 40)
    assert np.array_equal(sampling.bounded(small, 30), small)
    big = np.arange(0, 200_000, 2)
    a, b = sampling.bounded(big, 1_000, seed=4), sampling.bounded(big, 1_000, seed=4)
    assert np.array_equal(a, b) and not np.array_equal(a, sampling.bounded(big, 1_000, seed=5))
    assert len(a) == 1_000 and len(np.unique(a)) == 1_000 and set(a) <= set(big)
    assert np.all(np.diff(a) > 0)  # the original order
    assert sampling.SAMPLE_ROWS == 50_000
    assert len(sampling.bounded(np.arange(60_000))) == 50_000


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    from tests.tuner.conftest import _frame

    data = prepare(_frame("binary", n_rows=600), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    config = SearchConfig(task="binary", metric="log_loss", n_trials=8, seed=0,
                          max_rounds=60)
    url = f"sqlite:///{tmp_path_factory.mktemp('bounded') / 's.db'}"
    run_search(data, plan, config, storage_url=url, study_name="s")
    return data, plan, config, url


def test_learning_curve_refits_a_bounded_sample_of_its_fold(setup, monkeypatch) -> None:
    data, plan, config, _ = setup
    params = {**LIGHTGBM_DEFAULTS, "objective": "binary", "verbosity": -1, "seed": 0,
              "num_threads": 1}
    fit, valid = plan.folds[0]
    whole = diagnostics.learning_curve(data, plan, params, config)
    assert whole["rows"] == {"fit": len(fit), "fit_of": len(fit), "valid": len(valid),
                             "valid_of": len(valid)}
    monkeypatch.setattr(diagnostics, "CURVE_FIT_ROWS", 150)
    monkeypatch.setattr(sampling, "SAMPLE_ROWS", 60)
    small = diagnostics.learning_curve(data, plan, params, config)
    assert small["rows"] == {"fit": 150, "fit_of": len(fit), "valid": 60,
                             "valid_of": len(valid)}
    # Fewer rows, another curve: the sample was really used.
    assert small["train"] != whole["train"] and small["valid"] != whole["valid"]


def test_importance_reads_a_seeded_sample_of_many_trials(setup, monkeypatch) -> None:
    _, _, _, url = setup
    every = diagnostics.hyperparameter_importance(url, "s", seed=0)
    complete = every["trials"]
    assert complete >= 4 and "sampled_from" not in every
    monkeypatch.setattr(diagnostics, "IMPORTANCE_TRIALS", complete - 1)
    sampled = diagnostics.hyperparameter_importance(url, "s", seed=0)
    assert sampled["trials"] == complete - 1 and sampled["sampled_from"] == complete
    assert sampled["importances"] and sum(sampled["importances"].values()) == \
        pytest.approx(1.0, abs=1e-6)
    assert sampled == diagnostics.hyperparameter_importance(url, "s", seed=0)
