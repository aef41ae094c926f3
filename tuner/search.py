"""Running, resuming and reading an Optuna search stored behind a storage URL."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import lightgbm as lgb
import numpy as np
import optuna
from optuna.trial import FrozenTrial, TrialState

from tuner._journal import TrialJournal, create_tables, import_rdb_study, rdb_has_study
from tuner._lgb import base_params
from tuner._optimize import optimize_budgeted, threads_per_trial
from tuner.config import SearchConfig, check_config, make_pruner
from tuner.data import PreparedData
from tuner.errors import TunerError
from tuner.metrics import get_metric
from tuner.objective import CVObjective
from tuner.selection import select
from tuner.space import LIGHTGBM_DEFAULTS, fit_into_space, initial_params
from tuner.validation import ValidationPlan

# The only global the tuner sets: Optuna logs every trial at INFO, which floods workers.
optuna.logging.set_verbosity(optuna.logging.WARNING)

_STATES = {
    TrialState.COMPLETE: "complete", TrialState.PRUNED: "pruned", TrialState.FAIL: "failed",
    TrialState.RUNNING: "running", TrialState.WAITING: "waiting",
}
_BUDGET_STATES = (TrialState.COMPLETE, TrialState.PRUNED)
# Failures that stop a search, at least: an error in every trial is not worth repeating.
_MIN_FAILURE_CAP = 5


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
    )


def _storage(storage_url: str, study_name: str, heartbeat_seconds: int | None = None,
             grace_seconds: int | None = None) -> TrialJournal:
    # Optuna's trial heartbeat (works with optimize()): a trial whose process stopped
    # beating for grace_seconds is failed by the next trial any process starts.
    # No stale-trial callback: a retry would enqueue a WAITING copy, and a configuration
    # that got its worker killed (out of memory) would kill the next one. Only finished
    # trials count against the budget, so a failed one is simply replaced by a new draw.
    return TrialJournal(storage_url, study_name, heartbeat_seconds=heartbeat_seconds,
                        grace_seconds=grace_seconds)


def init_storage(storage_url: str) -> None:
    """Create the trial journal's tables once, before several processes open studies.

    Concurrent first-time schema creation races ("table already exists"), so the service
    should call this at start-up, from one process.
    """
    create_tables(storage_url)


def load_study(storage_url: str, study_name: str) -> optuna.Study:
    """Open an existing study for reading (``KeyError`` if there is none)."""
    return optuna.load_study(study_name=study_name, storage=_storage(storage_url, study_name))


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
    initial_params: dict[str, Any] | None = None,
    pruner: str = "median",
    warm_start: tuple[dict[str, Any], ...] = (),
    heartbeat_seconds: int | None = None,
    grace_seconds: int | None = None,
    seed_salt: int = 0,
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
        n_warmup_steps: Folds reported before pruning is allowed, minus one.
        initial_params: Trial 0's parameters; defaults to :data:`LIGHTGBM_DEFAULTS`.
        pruner: One of :data:`tuner.config.PRUNERS` (see :func:`make_pruner`).
        warm_start: Parameter sets enqueued after trial 0 in a new study (duplicates of
            trial 0 or of each other are skipped).
        heartbeat_seconds: Optuna trial heartbeat interval (``None``: no heartbeat).
        grace_seconds: Seconds without a heartbeat after which a running trial is failed.
        seed_salt: Mixed into the sampler seed, so that several processes sampling one
            study at once do not draw the same configurations (0 for a single process).

    Returns:
        The study.

    Raises:
        KeyError: ``create`` is false and the study does not exist.
    """
    storage = _storage(storage_url, study_name, heartbeat_seconds, grace_seconds)
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
    chosen_pruner = make_pruner(pruner, n_warmup_steps=n_warmup_steps)
    if not create:
        return optuna.load_study(study_name=study_name, storage=storage, sampler=sampler,
                                 pruner=chosen_pruner)
    study = optuna.create_study(storage=storage, study_name=study_name, direction=direction,
                                sampler=sampler, pruner=chosen_pruner, load_if_exists=True)
    if not study.get_trials(deepcopy=False):
        first = dict(LIGHTGBM_DEFAULTS if initial_params is None else initial_params)
        queued = [first]
        for params in warm_start:
            if params not in queued:
                queued.append(dict(params))
        for params in queued:
            study.enqueue_trial(params)
    return study


def run_search(
    data: PreparedData,
    plan: ValidationPlan,
    config: SearchConfig,
    *,
    storage_url: str,
    study_name: str,
    on_trial: Callable[[TrialRecord], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
    heartbeat_seconds: int | None = None,
    grace_seconds: int | None = None,
    join: bool = False,
    seed_salt: int = 0,
    on_started: Callable[[], None] | None = None,
) -> SearchResult:
    """Run (or resume, or join) a search until its budget, timeout or a stop request.

    The study is created on first use, with trial 0 set to LightGBM's defaults (and any
    warm-start trials after it). When it already holds trials (a resumed job), complete
    and pruned trials count against ``n_trials``. This process runs up to
    ``config.max_parallel_trials`` trials at once; other processes may run trials of the
    same study at once (``join=True``), and the budget then holds for all of them
    together: a process stops once ``n_trials`` trials of the study are finished, so at
    most the trials other processes have in flight overshoot it.

    Trials left RUNNING by a crashed process: without a heartbeat they are marked failed
    at the start, which assumes this is the only process on the study. With
    ``heartbeat_seconds`` Optuna's heartbeat fails them once they are ``grace_seconds``
    stale, and live trials of other processes are left alone; :func:`close_search` fails
    the rest once every process is done.

    Args:
        data: Prepared data.
        plan: Validation plan; the search uses its train part only.
        config: Budget, seed, space, selection rule and LightGBM settings.
        storage_url: Optuna storage URL.
        study_name: The study to create or resume.
        on_trial: Called with each finished trial's record (from several threads when
            trials run in parallel); exceptions it raises end the search.
        should_stop: Polled before each fold and after each trial; ``True`` ends the
            search (the running trial is recorded as pruned).
        heartbeat_seconds: Optuna trial heartbeat interval; ``None`` for none.
        grace_seconds: Heartbeat age after which a running trial counts as dead.
        join: Load an existing study (never create it, never enqueue trial 0) and run
            trials beside the process that created it.
        seed_salt: See :func:`open_study`; give each process on one study its own.
        on_started: Called once, when this process starts its first trial (by then an
            enqueued trial 0 has been taken, so other processes may join safely).

    Returns:
        Counts for the whole study, its best complete trial and the trial the selection
        rule chose (``None`` if none completed).

    Raises:
        ConfigError: The config does not fit the data (task, metric, budget).
    """
    check_config(data, config)
    metric = get_metric(config.metric, data.task)
    rows = plan.min_fit_rows
    study = open_study(
        storage_url, study_name, direction=metric.direction, seed=config.seed,
        create=not join, n_startup_trials=config.n_startup_trials,
        n_warmup_steps=max(0, config.pruner_warmup_folds - 1),
        initial_params=initial_params(config.space, n_train_rows=rows),
        pruner=config.pruner,
        warm_start=tuple(fit_into_space(p, config.space, n_train_rows=rows)
                         for p in config.warm_start),
        heartbeat_seconds=heartbeat_seconds, grace_seconds=grace_seconds, seed_salt=seed_salt,
    )
    if heartbeat_seconds is None and not join:
        _fail_running(study)
    cv_objective = CVObjective(
        data, plan, metric,
        params_base=base_params(data.task, num_class=len(data.classes or ()),
                                metric=metric.name, seed=config.seed,
                                num_threads=threads_per_trial(config.num_threads,
                                                              config.max_parallel_trials),
                                objective=config.objective),
        space=config.space, max_rounds=config.max_rounds,
        early_stopping_rounds=config.early_stopping_rounds, should_stop=should_stop,
    )
    started = False

    def objective(trial: optuna.Trial) -> float:
        nonlocal started
        if not started and on_started is not None:
            on_started()
        started = True
        return cv_objective(trial)

    done = len(study.get_trials(deepcopy=False, states=_BUDGET_STATES))
    failure_cap = max(_MIN_FAILURE_CAP, config.n_trials or 0)
    failures = 0
    stopped = False

    def after_trial(study: optuna.Study, ft: FrozenTrial) -> None:
        # With parallel trials this runs in several threads; += on ints under the GIL
        # may lose a count, which only delays the failure cap by a trial.
        nonlocal failures, stopped
        failures += ft.state == TrialState.FAIL
        if on_trial is not None:
            on_trial(record_from_frozen(ft))
        if failures >= failure_cap or (should_stop is not None and should_stop()):
            stopped = True
            study.stop()

    callbacks: list[Callable[[optuna.Study, FrozenTrial], None]] = [after_trial]
    if config.n_trials is not None:
        callbacks.append(optuna.study.MaxTrialsCallback(config.n_trials, states=_BUDGET_STATES))
    budget_left = config.n_trials is None or done < config.n_trials
    if budget_left and not (should_stop is not None and should_stop()):
        # Failed trials do not eat into the budget (see optimize_budgeted); the callback
        # stops this worker when other processes on the same study filled it.
        try:
            optimize_budgeted(study, objective, n_trials=config.n_trials,
                              timeout=config.timeout, n_jobs=config.max_parallel_trials,
                              callbacks=callbacks, catch=(lgb.basic.LightGBMError, TunerError),
                              stopped=lambda: stopped)
        except optuna.exceptions.UpdateFinishedTrialError:
            # Another process resumed this study and failed our running trial (see above).
            # Expected only when this worker was told to stop because it lost the job.
            if should_stop is None or not should_stop():
                raise TunerError(
                    f"study '{study_name}' is being run by another process"
                ) from None
    return _result(study, metric.direction, config.selection)


def _fail_running(study: optuna.Study) -> None:
    for ft in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        try:
            study.tell(ft.number, state=TrialState.FAIL)
        except optuna.exceptions.UpdateFinishedTrialError:
            pass  # it finished meanwhile: nothing to fail


def close_search(storage_url: str, study_name: str, *, direction: str,
                 selection: str = "best") -> SearchResult:
    """Fail trials still RUNNING and return the study's final counts and chosen trial.

    Call it once no process is running trials of the study any more (the service's lead
    worker does, after its joiners left): whatever is still RUNNING belongs to a process
    that died before its heartbeat went stale.
    """
    study = load_study(storage_url, study_name)
    _fail_running(study)
    return _result(study, direction, selection)


def _result(study: optuna.Study, direction: str, selection: str = "best") -> SearchResult:
    trials = study.get_trials(deepcopy=False)
    complete = [t for t in trials if t.state == TrialState.COMPLETE and t.value is not None]
    best = None
    if complete:
        sign = -1.0 if direction == "maximize" else 1.0
        best = record_from_frozen(min(complete, key=lambda t: (sign * t.value, t.number)))
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
