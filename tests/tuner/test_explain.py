"""TreeSHAP contributions from Predictor.explain_frame, per task."""

from __future__ import annotations

import numpy as np
import pytest

import tuner
from tuner._lgb import lgb_frame

TARGETS = {"binary": "cracked", "multiclass": "grade", "regression": "shrinkage"}


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_contributions_plus_bias_equal_the_raw_score(task: str, make_frame) -> None:
    data = tuner.prepare(make_frame(task, n_rows=200, seed=1), target=TARGETS[task])
    plan = tuner.plan_validation(data, n_folds=3, seed=0, holdout_fraction=0.0)
    config = tuner.SearchConfig(task=task, metric=tuner.default_metric(task))
    best = tuner.TrialRecord(number=0, state="complete", params={"num_leaves": 7},
                             score=0.0, score_std=0.0, boosting_rounds=15)
    fitted = tuner.fit_final(data, plan, config, best)
    predictor = tuner.Predictor(fitted.booster, fitted.schema, task, fitted.classes)
    frame = data.X.iloc[:25]
    out = predictor.explain_frame(frame)
    names = fitted.schema.names
    # Reference: LightGBM's own Booster.predict(raw_score=True); TreeSHAP's local accuracy.
    raw = np.asarray(fitted.booster.predict(lgb_frame(frame), raw_score=True))
    rows = out["contributions"]
    assert len(rows) == 25 and all(list(r["features"]) == names for r in rows)
    if task == "multiclass":
        sums = np.array([np.sum([r["features"][n] for n in names], axis=0) + r["bias"]
                         for r in rows])
        assert sums.shape == (25, 3)
    else:
        sums = np.array([sum(r["features"].values()) + r["bias"] for r in rows])
    np.testing.assert_allclose(sums, raw, atol=1e-9)
    assert out["contribution_scale"]
