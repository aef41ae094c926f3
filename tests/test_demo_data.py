"""Tests for the seeded demo-table generators in examples.demo_data."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from pandas.testing import assert_frame_equal
from sklearn.compose import make_column_transformer
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.model_selection import KFold, StratifiedKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, StandardScaler

from examples import demo_data
from examples.demo_data import greenhouse, kilns, write_demo_tables

REPO_ROOT = Path(__file__).resolve().parents[1]

KILN_DTYPES: dict[str, str] = {
    "firing_id": "str",
    "kiln": "str",
    "clay_body": "str",
    "peak_temp_c": "float64",
    "ramp_rate_c_per_h": "float64",
    "hold_minutes": "int64",
    "cooling_rate_c_per_h": "float64",
    "humidity_pct": "float64",
    "glaze_thickness_mm": "float64",
    "load_fraction": "float64",
    "shelf_position": "str",
    "fired_on": "str",
    "defect": "int64",
}

GREENHOUSE_DTYPES: dict[str, str] = {
    "bay": "str",
    "crop": "str",
    "day_temp_c": "float64",
    "night_temp_c": "float64",
    "co2_ppm": "float64",
    "light_mol_per_m2_day": "float64",
    "irrigation_l_per_m2": "float64",
    "ec_ms_per_cm": "float64",
    "week_of_year": "int64",
    "planted_on": "str",
    "yield_kg_per_m2": "float64",
}


@pytest.fixture(scope="module")
def kiln_frame() -> pd.DataFrame:
    """Default kilns table, built once per module."""
    return kilns()


@pytest.fixture(scope="module")
def greenhouse_frame() -> pd.DataFrame:
    """Default greenhouse table, built once per module."""
    return greenhouse()


def _categorised(frame: pd.DataFrame) -> pd.DataFrame:
    """Copy of ``frame`` with str columns cast to category, as LightGBM expects."""
    out = frame.copy()
    for column in out.columns:
        if pd.api.types.is_string_dtype(out[column]):
            out[column] = out[column].astype("category")
    return out


@pytest.mark.parametrize(
    ("make", "seed"), [(kilns, 7), (kilns, 123), (greenhouse, 11), (greenhouse, 5)]
)
def test_same_seed_gives_identical_frames(make, seed: int) -> None:
    assert_frame_equal(make(seed=seed), make(seed=seed))


@pytest.mark.parametrize("make", [kilns, greenhouse])
def test_different_seed_differs(make) -> None:
    first, second = make(seed=1), make(seed=2)
    assert first.shape == second.shape
    with pytest.raises(AssertionError):
        assert_frame_equal(first, second)


@pytest.mark.parametrize("make", [kilns, greenhouse])
def test_n_rows_is_respected(make) -> None:
    assert len(make(n_rows=37)) == 37
    with pytest.raises(ValueError):
        make(n_rows=0)


def test_kiln_columns_and_dtypes(kiln_frame: pd.DataFrame) -> None:
    assert list(kiln_frame.columns) == list(KILN_DTYPES)
    assert {c: str(t) for c, t in kiln_frame.dtypes.items()} == KILN_DTYPES
    assert len(kiln_frame) == 2000


def test_greenhouse_columns_and_dtypes(greenhouse_frame: pd.DataFrame) -> None:
    assert list(greenhouse_frame.columns) == list(GREENHOUSE_DTYPES)
    assert {c: str(t) for c, t in greenhouse_frame.dtypes.items()} == GREENHOUSE_DTYPES
    assert len(greenhouse_frame) == 1500


def test_kiln_values_are_plausible(kiln_frame: pd.DataFrame) -> None:
    ids = kiln_frame["firing_id"]
    assert ids.is_unique
    assert ids.map(lambda s: re.fullmatch(r"F-\d{6}", s) is not None).all()
    assert set(kiln_frame["kiln"]) == {"north", "south", "east", "annex"}
    assert set(kiln_frame["clay_body"]) == set(demo_data.CLAY_IDEAL_C)
    assert set(kiln_frame["shelf_position"]) == {"top", "middle", "bottom"}
    assert set(kiln_frame["defect"]) == {0, 1}
    assert kiln_frame["load_fraction"].between(0.3, 1.0).all()
    # Most firings sit in the 1180-1300 C band the scenario describes.
    assert kiln_frame["peak_temp_c"].between(1180, 1300).mean() > 0.8
    dates = pd.to_datetime(kiln_frame["fired_on"], format="%Y-%m-%d")
    assert (dates.max() - dates.min()).days >= 360


def test_greenhouse_values_are_plausible(greenhouse_frame: pd.DataFrame) -> None:
    assert set(greenhouse_frame["crop"]) == {
        "tomato",
        "cucumber",
        "pepper",
        "lettuce",
        "strawberry",
    }
    assert (greenhouse_frame["yield_kg_per_m2"] > 0).all()
    # The noise is multiplicative log-normal, so the target is right-skewed.
    assert greenhouse_frame["yield_kg_per_m2"].skew() > 0.5
    assert greenhouse_frame["week_of_year"].between(1, 52).all()
    assert (greenhouse_frame["night_temp_c"] < greenhouse_frame["day_temp_c"]).all()
    pd.to_datetime(greenhouse_frame["planted_on"], format="%Y-%m-%d")


@pytest.mark.parametrize("seed", [7, 1, 2, 3])
def test_kiln_prevalence(seed: int) -> None:
    assert 0.15 <= kilns(seed=seed)["defect"].mean() <= 0.40


def test_kiln_missing_fractions(kiln_frame: pd.DataFrame) -> None:
    expected = {"humidity_pct": 0.03, "glaze_thickness_mm": 0.03, "cooling_rate_c_per_h": 0.01}
    missing = kiln_frame.isna().mean()
    for column in kiln_frame.columns:
        assert missing[column] == pytest.approx(expected.get(column, 0.0), abs=1e-9), column


def test_greenhouse_missing_fractions(greenhouse_frame: pd.DataFrame) -> None:
    expected = {"co2_ppm": 0.02, "ec_ms_per_cm": 0.01}
    missing = greenhouse_frame.isna().mean()
    for column in greenhouse_frame.columns:
        assert missing[column] == pytest.approx(expected.get(column, 0.0), abs=1e-9), column


# The two tests below check the generator, not the tuner: the signal must be learnable and
# non-linear, so a GBM clearly beats a linear baseline. Scores come from
# sklearn.model_selection.cross_val_score (source: scikit-learn API).


def test_kiln_signal_is_real_and_non_linear(kiln_frame: pd.DataFrame) -> None:
    y = kiln_frame["defect"]
    features = kiln_frame.drop(columns=["defect", "firing_id", "fired_on"])
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)

    gbm = lgb.LGBMClassifier(n_estimators=200, learning_rate=0.05, verbose=-1, num_threads=1)
    gbm_auc = cross_val_score(
        gbm, _categorised(features), y, cv=folds, scoring="roc_auc"
    ).mean()

    linear = make_pipeline(
        SimpleImputer(strategy="mean"), StandardScaler(), LogisticRegression(max_iter=1000)
    )
    numeric = features.select_dtypes("number")
    linear_auc = cross_val_score(linear, numeric, y, cv=folds, scoring="roc_auc").mean()

    assert gbm_auc >= 0.75, (gbm_auc, linear_auc)
    assert gbm_auc - linear_auc >= 0.03, (gbm_auc, linear_auc)


def test_greenhouse_signal_is_real_and_non_linear(greenhouse_frame: pd.DataFrame) -> None:
    y = greenhouse_frame["yield_kg_per_m2"]
    features = greenhouse_frame.drop(columns=["yield_kg_per_m2", "planted_on"])
    folds = KFold(n_splits=5, shuffle=True, random_state=0)

    gbm = lgb.LGBMRegressor(n_estimators=200, learning_rate=0.05, verbose=-1, num_threads=1)
    gbm_r2 = cross_val_score(gbm, _categorised(features), y, cv=folds, scoring="r2").mean()

    # Give the linear baseline the categoricals too (one-hot), so the gap is down to
    # non-linearity rather than to the linear model seeing fewer columns.
    numeric = [c for c in features.columns if pd.api.types.is_numeric_dtype(features[c])]
    encode = make_column_transformer(
        (OneHotEncoder(handle_unknown="ignore"), ["bay", "crop"]),
        (make_pipeline(SimpleImputer(strategy="mean"), StandardScaler()), numeric),
    )
    linear = make_pipeline(encode, LinearRegression())
    linear_r2 = cross_val_score(linear, features, y, cv=folds, scoring="r2").mean()

    assert gbm_r2 >= 0.6, (gbm_r2, linear_r2)
    assert gbm_r2 - linear_r2 >= 0.1, (gbm_r2, linear_r2)


def test_write_demo_tables_round_trips(tmp_path: Path) -> None:
    paths = write_demo_tables(tmp_path / "out")
    assert set(paths) == {"kilns", "greenhouse"}
    assert paths["kilns"].name == "kilns.csv"
    assert paths["greenhouse"].name == "greenhouse.csv"
    for name, make in (("kilns", kilns), ("greenhouse", greenhouse)):
        expected = make()
        loaded = pd.read_csv(paths[name])
        assert list(loaded.columns) == list(expected.columns)  # index=False: no extra column
        assert len(loaded) == len(expected)
        assert np.array_equal(loaded.isna().to_numpy(), expected.isna().to_numpy())


def test_main_prints_written_paths(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert demo_data.main([str(tmp_path)]) == 0
    printed = capsys.readouterr().out.split()
    assert printed == [str(tmp_path / "kilns.csv"), str(tmp_path / "greenhouse.csv")]
    assert all(Path(p).is_file() for p in printed)


def test_module_entry_point(tmp_path: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "examples.demo_data", str(tmp_path)],
        cwd=REPO_ROOT,
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    assert (tmp_path / "kilns.csv").is_file()
    assert (tmp_path / "greenhouse.csv").is_file()
    assert str(tmp_path / "kilns.csv") in result.stdout
