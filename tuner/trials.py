"""Trial records: what one trial of a search did, in a JSON-friendly shape, and the
summary of a whole study (counts, best trial, the trial the selection rule chose)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import optuna
from optuna.trial import FrozenTrial, TrialState

from tuner.selection import select

_STATES = {
    TrialState.COMPLETE: "complete", TrialState.PRUNED: "pruned", TrialState.FAIL: "failed",
    TrialState.RUNNING: "running", TrialState.WAITING: "waiting",
}


@dataclass(frozen=True)
class TrialRecord:
    """A JSON-friendly summary of one trial (``state``: complete/pruned/failed/running)."""

    number: int
    state: str
    params: dict[str, Any]
    score: float | None
    score_std: float | None
    fold_scores: list[float] = field(default_factory=list)
    best_iterations: list[int] = field(default_factory=list)
    boosting_rounds: int | None = None
    duration_seconds: float | None = None
    train_seconds: float | None = None
    #: Standard error of ``score``: over folds, or by batch means on a single split.
    score_se: float | None = None
    #: Largest share of the search rows the trial reached (1.0 = all); see tuner.fidelity.
    fidelity: float | None = None
    #: Mean validation score at each lower rung it finished, keyed by share (``"0.1111"``).
    rung_scores: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Return the record as a JSON-ready dict."""
        return asdict(self)


@dataclass(frozen=True)
class SearchResult:
    """Outcome of :func:`run_search`; counts cover the whole study, resumed runs included."""

    best: TrialRecord | None
    n_complete: int
    n_pruned: int
    n_failed: int
    direction: str
    #: The trial the selection rule picked (``best`` unless ``selection="one_se"``).
    chosen: TrialRecord | None = None
    #: How it was picked: see :func:`tuner.selection.select`.
    selection: dict[str, Any] = field(default_factory=dict)


def trial_attrs(ft: FrozenTrial) -> dict[str, Any]:
    """What the CV objective recorded on a trial (one ``record`` attribute per trial)."""
    return {**ft.user_attrs, **ft.user_attrs.get("record", {})}


def record_from_frozen(ft: FrozenTrial) -> TrialRecord:
    """Summarise an Optuna trial (``state`` is ``"waiting"`` for enqueued, unstarted ones)."""
    attrs = trial_attrs(ft)
    complete = ft.state == TrialState.COMPLETE
    return TrialRecord(
        number=ft.number,
        state=_STATES[ft.state],
        params=dict(attrs.get("params", ft.params)),
        score=float(ft.value) if complete and ft.value is not None else None,
        score_std=attrs.get("score_std") if complete else None,
        fold_scores=list(attrs.get("fold_scores", [])),
        best_iterations=list(attrs.get("best_iterations", [])),
        boosting_rounds=attrs.get("boosting_rounds") if complete else None,
        duration_seconds=ft.duration.total_seconds() if ft.duration is not None else None,
        train_seconds=attrs.get("train_seconds"),
        score_se=attrs.get("score_se") if complete else None,
        fidelity=attrs.get("fidelity", 1.0 if "params" in attrs or complete else None),
        rung_scores=dict(attrs.get("rung_scores") or attrs.get("rungs") or {}),
    )


def summarise_study(study: optuna.Study, direction: str, selection: str = "best") -> SearchResult:
    trials = study.get_trials(deepcopy=False)
    complete = [t for t in trials if t.state == TrialState.COMPLETE and t.value is not None]
    best = None
    if complete:
        sign = -1.0 if direction == "maximize" else 1.0
        best = record_from_frozen(min(complete, key=lambda t: (sign * float(t.value or 0.0),
                                                             t.number)))
    chosen, report = select([record_from_frozen(t) for t in complete], direction, selection)
    return SearchResult(
        best=best,
        n_complete=len(complete),
        n_pruned=sum(t.state == TrialState.PRUNED for t in trials),
        n_failed=sum(t.state == TrialState.FAIL for t in trials),
        direction=direction,
        chosen=chosen,
        selection=report,
    )
