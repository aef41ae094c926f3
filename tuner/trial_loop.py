"""The trial loop: an exact budget of finished trials, one or several at a time.

Kept apart from :mod:`tuner.search` (which opens and resumes studies) so the loop can
change without touching the study set-up.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any

import optuna
from optuna.trial import FrozenTrial, TrialState

_BUDGET_STATES = (TrialState.COMPLETE, TrialState.PRUNED)


def threads_per_trial(num_threads: int, max_parallel_trials: int) -> int:
    """LightGBM threads each of ``max_parallel_trials`` concurrent trials gets.

    The thread budget is divided, never multiplied: k trials on k cores with one thread
    each, rather than k trials each asking for every core. Idle OpenMP threads busy-wait
    and starve their neighbours.
    """
    return max(1, num_threads // max(1, max_parallel_trials))


#: Search rows from which one trial at a time on every core beats one trial per core:
#: LightGBM's threads split each round's histogram work, which pays once a round has
#: enough rows to share (benchmarks/parallel.py measures both on a small and a large
#: table); below it parallel trials keep every core busy without thread overhead.
THREADS_FROM_ROWS = 50_000


def machine_split(search_rows: int, cores: int) -> tuple[int, int]:
    """``(max_parallel_trials, num_threads)`` that use all ``cores`` for one search.

    Small tables: one trial per core, one LightGBM thread each. From
    :data:`THREADS_FROM_ROWS` search rows: one trial at a time on every core.
    """
    cores = max(1, cores)
    if search_rows >= THREADS_FROM_ROWS:
        return 1, cores
    return cores, cores


def optimize_budgeted(
    study: optuna.Study,
    objective: Callable[[optuna.Trial], float],
    *,
    n_trials: int | None,
    timeout: float | None,
    n_jobs: int,
    callbacks: Sequence[Callable[[optuna.Study, FrozenTrial], None]],
    catch: tuple[type[Exception], ...],
    stopped: Callable[[], bool],
) -> None:
    """Run trials until ``n_trials`` are complete or pruned, the timeout, or a stop.

    Failed trials do not use up the budget: each round asks Optuna for exactly the
    trials still missing, and a round that lost some to failures is followed by another.
    Asking for an exact count (rather than stopping from a callback) matters with
    ``n_jobs > 1``: a callback's ``study.stop()`` lets every other running trial finish,
    which would overshoot the budget by up to ``n_jobs - 1`` trials.

    Args:
        study: The opened study (enqueued trials run first).
        objective: The trial function.
        n_trials: Complete plus pruned trials wanted in the whole study; ``None``: no cap.
        timeout: Seconds for this call; ``None``: no limit.
        n_jobs: Trials run at once, in threads of this process (LightGBM releases the
            GIL while it trains, so threads use several cores).
        callbacks: Passed to ``study.optimize``.
        catch: Exceptions recorded as failed trials instead of ending the search.
        stopped: ``True`` once a callback has stopped the study; ends the loop.
    """
    deadline = None if timeout is None else time.monotonic() + timeout
    while not stopped():
        remaining: int | None = None
        if n_trials is not None:
            done = len(study.get_trials(deepcopy=False, states=_BUDGET_STATES))
            remaining = n_trials - done
            if remaining <= 0:
                return
        left = None if deadline is None else deadline - time.monotonic()
        if left is not None and left <= 0:
            return
        # Enqueued trials (defaults, warm start) may run in parallel too: the trial
        # journal hands each to exactly one thread or process (tuner/_journal.py).
        kwargs: dict[str, Any] = {"n_trials": remaining, "timeout": left, "n_jobs": n_jobs}
        study.optimize(objective, callbacks=list(callbacks), catch=catch, **kwargs)
        if remaining is None:
            return  # no trial cap: only the timeout or a stop ends optimize()
