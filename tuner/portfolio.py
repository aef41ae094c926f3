"""A short fixed list of strong starting configurations, run right after trial 0.

Every search starts with LightGBM's defaults (trial 0) and any warm-start configurations;
then these, clipped into the job's search space (fixed parameters stay fixed), at full
fidelity, before the sampler takes over. They were learned offline by
``python -m benchmarks.portfolio`` (greedy forward selection of configurations that
complement the defaults across tables: Pfisterer et al. 2018, "Learning multiple defaults
for machine learning algorithms"; the idea of starting a search from configurations that
did well elsewhere: Feurer, Springenberg & Hutter 2015, "Initializing Bayesian
hyperparameter optimization via meta-learning"). The script names its tables and their
sources; none of them is a table ``benchmarks.quality`` reports on.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from tuner.space import SearchSpace, fit_into_space

__all__ = ["PORTFOLIO", "portfolio_params"]

#: In the order chosen (each adds the most to the ones before it). From
#: ``python -m benchmarks.portfolio --candidates 24 --folds 3`` (10 tables, seed 0): the
#: mean over tables of the best CV loss so far, as a share of the defaults' loss, went
#: 1.0 (defaults) -> 0.932 -> 0.907 -> 0.904 -> 0.903 as these were added.
PORTFOLIO: tuple[Mapping[str, Any], ...] = (
    {"learning_rate": 0.04778, "num_leaves": 4, "max_depth": 8, "min_data_in_leaf": 66,
     "min_sum_hessian_in_leaf": 0.001385, "feature_fraction": 0.6582,
     "bagging_fraction": 0.706, "bagging_freq": 4, "lambda_l1": 0.01357,
     "lambda_l2": 5.97e-06, "min_gain_to_split": 1.074e-07, "extra_trees": True},
    {"learning_rate": 0.02439, "num_leaves": 25, "max_depth": 8, "min_data_in_leaf": 10,
     "min_sum_hessian_in_leaf": 0.6137, "feature_fraction": 0.8672,
     "bagging_fraction": 0.8664, "bagging_freq": 2, "lambda_l1": 2.314e-05,
     "lambda_l2": 0.007516, "min_gain_to_split": 1.523e-06, "extra_trees": False},
    {"learning_rate": 0.1552, "num_leaves": 72, "max_depth": 4, "min_data_in_leaf": 20,
     "min_sum_hessian_in_leaf": 0.2899, "feature_fraction": 0.4743,
     "bagging_fraction": 0.9088, "bagging_freq": 6, "lambda_l1": 0.001324,
     "lambda_l2": 0.000118, "min_gain_to_split": 3.575e-08, "extra_trees": False},
    {"learning_rate": 0.0475, "num_leaves": 44, "max_depth": 3, "min_data_in_leaf": 83,
     "min_sum_hessian_in_leaf": 0.004342, "feature_fraction": 0.7773,
     "bagging_fraction": 0.6391, "bagging_freq": 0, "lambda_l1": 6.551e-05,
     "lambda_l2": 3.862e-06, "min_gain_to_split": 0.06199, "extra_trees": True},
)


def portfolio_params(space: SearchSpace, *, n_train_rows: int) -> list[dict[str, Any]]:
    """The portfolio moved into the (effective) space, in order (see ``fit_into_space``)."""
    return [fit_into_space(config, space, n_train_rows=n_train_rows) for config in PORTFOLIO]
