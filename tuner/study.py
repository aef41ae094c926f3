"""Opening, resuming, closing and reading the Optuna studies behind searches.

Studies live in the trial journal (:mod:`tuner.journal`) behind a storage URL.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import optuna
from optuna.trial import TrialState

from tuner.config import make_pruner
from tuner.journal import Fence, TrialJournal, import_rdb_study, rdb_has_study
from tuner.journal_db import create_tables
from tuner.space import LIGHTGBM_DEFAULTS
from tuner.trials import SearchResult, TrialRecord, record_from_frozen, summarise_study

# The only global the tuner sets: Optuna logs every trial at INFO, which floods workers.
optuna.logging.set_verbosity(optuna.logging.WARNING)


def _storage(storage_url: str, study_name: str, heartbeat_seconds: int | None = None,
             grace_seconds: int | None = None, fence: Fence | None = None) -> TrialJournal:
    # Optuna's trial heartbeat (works with optimize()): a trial whose process stopped
    # beating for grace_seconds is failed by the next trial any process starts.
    # No stale-trial callback: a retry would enqueue a WAITING copy, and a configuration
    # that got its worker killed (out of memory) would kill the next one. Only finished
    # trials count against the budget, so a failed one is simply replaced by a new draw.
    return TrialJournal(storage_url, study_name, heartbeat_seconds=heartbeat_seconds,
                        grace_seconds=grace_seconds, fence=fence)


def init_storage(storage_url: str) -> None:
    """Create the trial journal's tables once, before several processes open studies.

    Concurrent first-time schema creation races ("table already exists"), so the service
    should call this at start-up, from one process.
    """
    create_tables(storage_url)


def load_study(storage_url: str, study_name: str, *, fence: Fence | None = None) -> optuna.Study:
    """Open an existing study (``KeyError`` if there is none); its writes go through
    ``fence`` when one is given (:class:`tuner.journal.JournalFenced` when refused)."""
    return optuna.load_study(study_name=study_name,
                             storage=_storage(storage_url, study_name, fence=fence))


def _count_trials(storage: TrialJournal, study_name: str) -> int:
    try:
        study_id = storage.get_study_id_from_name(study_name)
    except KeyError:
        return 0
    return len(storage.get_all_trials(study_id, deepcopy=False))


def open_study(
    storage_url: str,
    study_name: str,
    *,
    direction: str,
    seed: int,
    create: bool,
    n_startup_trials: int = 8,
    n_warmup_steps: int = 0,
    fold_steps: int = 1,
    initial_params: dict[str, Any] | None = None,
    pruner: str = "median",
    warm_start: tuple[dict[str, Any], ...] = (),
    portfolio: tuple[dict[str, Any], ...] = (),
    heartbeat_seconds: int | None = None,
    grace_seconds: int | None = None,
    seed_salt: int = 0,
    fence: Fence | None = None,
) -> optuna.Study:
    """Open a study with the tuner's sampler and pruner.

    Args:
        storage_url: SQLAlchemy URL of the Optuna storage (e.g. ``sqlite:///x.db``).
        study_name: Unique name; one study per search job.
        direction: ``"maximize"`` or ``"minimize"``.
        seed: Sampler seed. A study that already has trials is re-opened with a seed
            derived from ``seed`` and its trial count, so a resumed search does not replay
            the random configurations it already tried.
        create: Create the study if missing and, when it has no trials yet, enqueue
            ``initial_params`` as trial 0; otherwise the study must exist.
        n_startup_trials: Random trials before TPE starts modelling.
        n_warmup_steps: The first pruner step at which pruning is allowed.
        fold_steps: Pruner steps per fold (the rounds cap; see :func:`make_pruner`).
        initial_params: Trial 0's parameters; defaults to :data:`LIGHTGBM_DEFAULTS`.
        pruner: One of :data:`tuner.config.PRUNERS` (see :func:`make_pruner`).
        warm_start: Parameter sets enqueued after trial 0 in a new study (duplicates of
            trial 0 or of each other are skipped).
        portfolio: Parameter sets enqueued after the warm-start ones, the same way
            (:mod:`tuner.portfolio`).
        heartbeat_seconds: Optuna trial heartbeat interval (``None``: no heartbeat).
        grace_seconds: Seconds without a heartbeat after which a running trial is failed.
        seed_salt: Mixed into the sampler seed, so that several processes sampling one
            study at once do not draw the same configurations (0 for a single process).
        fence: Checked in every write to the study's journal; a refusal raises
            :class:`tuner.journal.JournalFenced` and writes nothing (see that module).

    Returns:
        The study.

    Raises:
        KeyError: ``create`` is false and the study does not exist.
    """
    storage = _storage(storage_url, study_name, heartbeat_seconds, grace_seconds, fence)
    existing = _count_trials(storage, study_name)
    if create and existing == 0 and rdb_has_study(storage_url, study_name):
        import_rdb_study(storage_url, study_name, storage)
        existing = _count_trials(storage, study_name)
    entropy = [seed, existing] + ([seed_salt] if seed_salt else [])
    sampler_seed = seed if existing == 0 and not seed_salt else int(
        np.random.SeedSequence(entropy).generate_state(1)[0]
    )
    # Constant liar (the optuna 5 default, spelled out so it survives a default change):
    # trials still running count as bad results, so parallel trials spread out.
    sampler = optuna.samplers.TPESampler(seed=sampler_seed, n_startup_trials=n_startup_trials,
                                         constant_liar=True)
    chosen_pruner = make_pruner(pruner, n_warmup_steps=n_warmup_steps, fold_steps=fold_steps)
    if not create:
        return optuna.load_study(study_name=study_name, storage=storage, sampler=sampler,
                                 pruner=chosen_pruner)
    study = optuna.create_study(storage=storage, study_name=study_name,
                                direction="maximize" if direction == "maximize" else "minimize",
                                sampler=sampler, pruner=chosen_pruner, load_if_exists=True)
    if not study.get_trials(deepcopy=False):
        first = dict(LIGHTGBM_DEFAULTS if initial_params is None else initial_params)
        queued = [first]
        for params in (*warm_start, *portfolio):
            if params not in queued:
                queued.append(dict(params))
        for params in queued:
            study.enqueue_trial(params)
    return study


def fail_running(study: optuna.Study) -> None:
    for ft in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        try:
            study.tell(ft.number, state=TrialState.FAIL)
        except optuna.exceptions.UpdateFinishedTrialError:
            pass  # it finished meanwhile: nothing to fail


def close_search(storage_url: str, study_name: str, *, direction: str,
                 selection: str = "best", fence: Fence | None = None) -> SearchResult:
    """Fail trials still RUNNING and return the study's final counts and chosen trial.

    Call it once no process is running trials of the study any more (the service's lead
    worker does, after its joiners left): whatever is still RUNNING belongs to a process
    that died before its heartbeat went stale. ``fence`` guards those writes, as in
    :func:`open_study`.
    """
    study = load_study(storage_url, study_name, fence=fence)
    fail_running(study)
    return summarise_study(study, direction, selection)


def load_trial_records(storage_url: str, study_name: str) -> list[TrialRecord]:
    """Records of every started trial of a study (``[]`` if the study does not exist).

    Enqueued trials that never started are left out.
    """
    try:
        study = load_study(storage_url, study_name)
    except KeyError:
        return []
    return [record_from_frozen(t) for t in study.get_trials(deepcopy=False)
            if t.state != TrialState.WAITING]
