"""The fast CSV answer must be the text ``DataFrame.to_csv(index=False)`` writes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from service.api.tabular import frame_csv

rng = np.random.default_rng(0)
FRAMES = {
    "binary": pd.DataFrame({
        "prediction": np.array([0, 1], dtype=object)[rng.integers(0, 2, 500)],
        "probability_0": rng.random(500) ** 30, "probability_1": rng.random(500)}),
    "labels-and-missing": pd.DataFrame({
        "prediction": np.array(["raku", "stoneware", None], dtype=object)[
            rng.integers(0, 3, 200)],
        "p": np.where(rng.random(200) < 0.1, np.nan, rng.random(200))}),
    "regression": pd.DataFrame({"prediction": np.concatenate(
        [rng.normal(size=100) * 1e6, [0.0, -0.0, 1e16, 1e-5, np.inf]])}),
    "lone-missing": pd.DataFrame({"prediction": pd.Series(["x", None], dtype="str")}),
    "needs-quotes": pd.DataFrame({"prediction": np.array(['a,b', 'say "hi"'], dtype=object)}),
    "bool-and-int": pd.DataFrame({"prediction": np.array([True, False], dtype=object),
                                  "n": [1, 2]}),
}


@pytest.mark.parametrize("name", FRAMES)
def test_same_text_as_pandas(name: str) -> None:
    frame = FRAMES[name]
    assert frame_csv(frame) == frame.to_csv(index=False)  # reference: pandas.to_csv
