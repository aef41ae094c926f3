"""Final fit, hold-out scores, saved artifacts and predictions in original labels."""

from __future__ import annotations

import json

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer

from tuner import (
    LIGHTGBM_DEFAULTS,
    ArtifactError,
    Predictor,
    SearchConfig,
    TrialRecord,
    TunerError,
    fit_final,
    load_booster,
    model_metadata,
    plan_validation,
    predict,
    prepare,
    run_search,
    save_model,
)


def _record(rounds: int = 20, **params) -> TrialRecord:
    return TrialRecord(number=0, state="complete", params={**LIGHTGBM_DEFAULTS, **params},
                       score=0.5, score_std=0.0, fold_scores=[0.5], best_iterations=[rounds],
                       boosting_rounds=rounds)


@pytest.fixture(scope="module")
def cancer_fit(tmp_path_factory):
    # Breast Cancer Wisconsin (Diagnostic), Wolberg et al., UCI; bundled with scikit-learn.
    bunch = load_breast_cancer(as_frame=True)
    frame = bunch.frame.rename(columns={"target": "benign"})
    data = prepare(frame, target="benign")
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.25, seed=1)
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=3, max_rounds=50,
                          early_stopping_rounds=10)
    url = f"sqlite:///{tmp_path_factory.mktemp('cancer') / 's.db'}"
    result = run_search(data, plan, config, storage_url=url, study_name="cancer")
    return data, plan, config, result, fit_final(data, plan, config, result.best)


def test_holdout_scores_match_sklearn(cancer_fit) -> None:
    data, plan, _, result, fitted = cancer_fit
    rows = plan.holdout_idx
    proba = fitted.booster.predict(data.X.iloc[rows])
    y = data.y[rows]
    assert fitted.holdout["rows"] == len(rows) == 142
    # Reference values: sklearn.metrics on the booster's own hold-out predictions.
    assert fitted.holdout["roc_auc"] == pytest.approx(skm.roc_auc_score(y, proba), rel=1e-12)
    assert fitted.holdout["log_loss"] == pytest.approx(skm.log_loss(y, y_proba=proba), rel=1e-12)
    assert fitted.holdout["accuracy"] == pytest.approx(
        skm.accuracy_score(y, proba > 0.5), rel=1e-12)
    assert fitted.holdout["f1_macro"] == pytest.approx(
        skm.f1_score(y, proba > 0.5, average="macro"), rel=1e-12)
    assert fitted.holdout["roc_auc"] > 0.95
    assert fitted.booster.current_iteration() == result.best.boosting_rounds
    assert fitted.cv == {"metric": "roc_auc", "mean": result.best.score,
                         "std": result.best.score_std, "se": result.best.score_se,
                         "fold_scores": result.best.fold_scores}


def test_importance_and_metadata_are_json_ready(cancer_fit) -> None:
    _, _, _, _, fitted = cancer_fit
    gains = [r["gain"] for r in fitted.feature_importance]
    assert gains == sorted(gains, reverse=True) and len(gains) == 30
    assert {type(r["gain"]) for r in fitted.feature_importance} == {float}
    assert {type(r["split"]) for r in fitted.feature_importance} == {int}
    meta = json.loads(json.dumps(model_metadata(fitted)))
    assert meta["classes"] == [0, 1] and meta["schema"] == fitted.schema.to_dict()


def test_artifact_round_trip_and_checksum(cancer_fit, tmp_path) -> None:
    data, plan, _, _, fitted = cancer_fit
    path = tmp_path / "models" / "m.txt"
    digest = save_model(fitted, path)
    assert [p.name for p in path.parent.iterdir()] == ["m.txt"]  # no temp file left behind
    booster = load_booster(path, expected_sha256=digest)
    rows = data.X.iloc[plan.holdout_idx]
    np.testing.assert_array_equal(booster.predict(rows), fitted.booster.predict(rows))
    with pytest.raises(ArtifactError, match="SHA-256"):
        load_booster(path, expected_sha256="0" * 64)
    with pytest.raises(ArtifactError):
        load_booster(tmp_path / "missing.txt")
    (tmp_path / "junk.txt").write_text("not a model")
    with pytest.raises(ArtifactError):
        load_booster(tmp_path / "junk.txt")


def test_predictor_returns_original_labels(make_frame) -> None:
    frame = make_frame("binary", n_rows=200)
    data = prepare(frame, target="cracked", weight_column="weight", exclude=["kiln"])
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2)
    config = SearchConfig(task="binary", metric="log_loss")
    fitted = fit_final(data, plan, config, _record(min_data_in_leaf=10))
    rows = plan.holdout_idx
    proba = fitted.booster.predict(data.X.iloc[rows])
    # Reference: sklearn.metrics.log_loss with the hold-out weights.
    assert fitted.holdout["log_loss"] == pytest.approx(
        skm.log_loss(data.y[rows], y_proba=proba, sample_weight=data.weight[rows]), rel=1e-12)
    predictor = Predictor(fitted.booster, fitted.schema, "binary", fitted.classes)
    out = predictor.predict_rows(frame.iloc[:5].to_dict(orient="records"))
    assert out["ignored_columns"] == ["cracked", "kiln", "weight"]
    assert set(out["predictions"]) <= {"no", "yes"}
    p1 = fitted.booster.predict(data.X.iloc[:5])
    np.testing.assert_allclose([p[1] for p in out["probabilities"]], p1, rtol=0, atol=0)
    assert out["predictions"] == [fitted.classes[int(p > 0.5)] for p in p1]


def test_multiclass_and_regression_predictions(make_frame) -> None:
    frame = make_frame("multiclass", n_rows=240)
    data = prepare(frame, target="grade", exclude=["kiln", "weight"])
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.0)
    fitted = fit_final(data, plan, SearchConfig(task="multiclass", metric="log_loss"), _record())
    assert fitted.holdout == {}
    # Reference: LightGBM's own Booster.predict on the stored text model, not our wrapper.
    probs = lgb.Booster(model_str=fitted.booster.model_to_string()).predict(data.X.iloc[:4])
    assert probs.shape == (4, 3)
    np.testing.assert_allclose(predict(fitted.booster, "multiclass", data.X.iloc[:4]), probs)
    out = Predictor(fitted.booster, fitted.schema, "multiclass", fitted.classes).predict_table(
        frame.iloc[:4])
    assert out["predictions"] == [int(k) for k in probs.argmax(axis=1)]
    np.testing.assert_allclose(out["probabilities"], probs)

    frame = make_frame("regression", n_rows=200)
    data = prepare(frame, target="shrinkage", exclude=["kiln", "weight"])
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2)
    fitted = fit_final(data, plan, SearchConfig(task="regression", metric="poisson_deviance"),
                       _record())
    assert fitted.params["objective"] == "poisson"
    rows = plan.holdout_idx
    pred = fitted.booster.predict(data.X.iloc[rows])
    # Reference: sklearn.metrics.mean_poisson_deviance and r2_score.
    assert fitted.holdout["poisson_deviance"] == pytest.approx(
        skm.mean_poisson_deviance(data.y[rows], pred), rel=1e-12)
    assert fitted.holdout["r2"] == pytest.approx(skm.r2_score(data.y[rows], pred), rel=1e-12)
    out = Predictor(fitted.booster, fitted.schema, "regression", None).predict_rows(
        [{"temp_c": 1200, "clay_body": "raku", "glazed": False, "fired_on": "2024-05-01"}])
    assert "probabilities" not in out and isinstance(out["predictions"][0], float)


def test_only_complete_trials_are_refit(make_frame) -> None:
    data = prepare(make_frame("binary", n_rows=60), target="cracked")
    plan = plan_validation(data, n_folds=2)
    pruned = TrialRecord(number=1, state="pruned", params={}, score=None, score_std=None)
    with pytest.raises(TunerError):
        fit_final(data, plan, SearchConfig(task="binary", metric="roc_auc"), pruned)


def test_feature_names_lightgbm_rejects_are_handled() -> None:
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"depth [cm]": rng.normal(size=120), "kiln: zone": rng.choice(
        ["a", "b"], 120), "y": rng.integers(0, 2, 120)})
    data = prepare(frame, target="y")
    plan = plan_validation(data, n_folds=2, holdout_fraction=0.2)
    fitted = fit_final(data, plan, SearchConfig(task="binary", metric="roc_auc"), _record(5))
    assert [r["feature"] for r in fitted.feature_importance] != []
    assert {r["feature"] for r in fitted.feature_importance} == {"depth [cm]", "kiln: zone"}
