"""How far along a job is, and how long it will probably take to finish."""

from __future__ import annotations


def eta_seconds(
    *,
    status: str,
    elapsed: float,
    finished_trials: int,
    trials_budget: int | None,
    seconds_budget: float | None,
) -> float | None:
    """Seconds left, extrapolated from the trials so far; None while there is no basis.

    The pace is the job's own (elapsed wall time per finished trial, all workers together),
    so several workers on one job shorten the estimate. A seconds budget caps it. The
    final refit after the search is not included: it is one fit, not a trial.
    """
    if status in ("succeeded", "failed", "cancelled"):
        return 0.0
    if status != "running":
        return None
    estimates: list[float] = []
    if seconds_budget is not None:
        estimates.append(max(seconds_budget - elapsed, 0.0))
    if trials_budget is not None and finished_trials > 0:
        remaining = max(trials_budget - finished_trials, 0)
        estimates.append(elapsed / finished_trials * remaining)
    return round(min(estimates), 1) if estimates else None
