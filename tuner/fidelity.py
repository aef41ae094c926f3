"""Rows as a fidelity: successive halving over seeded subsamples of the search rows.

On a large table most configurations can be told apart on a fraction of the rows. A
sampled configuration is scored first on a seeded subsample of the search rows (the
lowest *rung*), and only the promising ones go on to larger subsamples and finally to all
the rows (successive halving: Jamieson & Talwalkar 2016, "Non-stochastic best arm
identification and hyperparameter optimization"; asynchronous promotion as in Li et al.
2020, "A system for massively parallel hyperparameter tuning", so parallel trials and
several workers need no synchronisation point).

The rule, documented in DEVELOPERS.md:

- From :data:`FIDELITY_FROM_ROWS` search rows, rungs are at 1/9, 1/3 and all of the rows
  (:data:`RUNG_SHARES`); below it every trial scores on all the rows (one rung), exactly as
  before rows became a fidelity.
- A configuration finishing a rung is promoted when its mean validation score there is in
  the best ``1 / REDUCTION`` of every configuration that has finished that rung (itself
  included; at least the best one is always promoted). It is compared only with scores at
  the same rung: same rows, same folds. Otherwise it stops there as ``pruned``, with its
  ``fidelity`` the share it reached.
- Trial 0 (LightGBM's defaults) and every enqueued configuration (warm start, portfolio)
  run at full fidelity directly: they are the reference the search must beat.
- The subsamples are nested (each rung's rows hold the rung below's) and drawn once from
  the search seed, so a reproducible (one-trial-at-a-time) search stays byte-identical:
  each promotion depends only on the trials before it.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the rung names are read by the API, which loads no NumPy
    import numpy as np

__all__ = [
    "FIDELITY_FROM_ROWS", "REDUCTION", "RUNG_SHARES", "fidelity_rungs", "promoted",
    "rung_key", "subsample_rank",
]

#: Search rows from which configurations climb rungs. Below it a trial on all the rows is
#: cheap (seconds), and the lowest rung would hold too few rows (under 5,600) for its
#: ranking to be trusted.
FIDELITY_FROM_ROWS = 50_000
#: Keep the best third at each rung.
REDUCTION = 3
#: Shares of the search rows at each rung, lowest first.
RUNG_SHARES = (1 / 9, 1 / 3, 1.0)


def fidelity_rungs(n_search_rows: int, from_rows: int | None = FIDELITY_FROM_ROWS
                   ) -> tuple[float, ...]:
    """The rungs (shares of the search rows) sampled configurations climb.

    ``(1.0,)`` (no subsampling) below ``from_rows`` search rows or when ``from_rows`` is
    ``None``; :data:`RUNG_SHARES` from there.
    """
    if from_rows is None or n_search_rows < from_rows:
        return (1.0,)
    return RUNG_SHARES


def rung_key(share: float) -> str:
    """The share as the short text trials and progress are keyed by: ``0.1111``, ``1``."""
    return f"{round(float(share), 4):g}"


def subsample_rank(n_rows: int, seed: int) -> np.ndarray:
    """Each search row's place in one seeded random order of the search rows.

    The rows of the rung with share ``f`` are those ranked below ``round(f * n_rows)``, so
    the subsamples are nested and the same for every trial of the search.
    """
    import numpy as np

    # A stream of its own, so the subsample never shares draws with the folds' shuffles.
    order = np.random.default_rng([int(seed) % (2**32), 0x5A4D]).permutation(n_rows)
    rank = np.empty(n_rows, dtype="int64")
    rank[order] = np.arange(n_rows)
    return rank


def promoted(score: float, others: Iterable[float], direction: str,
             reduction: int = REDUCTION) -> bool:
    """Whether ``score`` is in the best ``1 / reduction`` of itself and ``others``.

    ``others`` are the scores of every other configuration that finished the same rung.
    With ``n`` scores in all the best ``max(1, n // reduction)`` are promoted: the first
    configuration at a rung goes on (there is nothing to compare it with yet), and while
    fewer than ``2 * reduction`` have finished the rung only its best so far does. A tie
    is not a defeat. An undefined score (NaN) is never promoted.
    """
    if not math.isfinite(score):
        return False
    rivals = [float(o) for o in others if math.isfinite(o)]
    keep = max(1, (len(rivals) + 1) // reduction)
    if direction == "maximize":
        better = sum(o > score for o in rivals)
    else:
        better = sum(o < score for o in rivals)
    return better < keep
