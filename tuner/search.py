"""Running a search: the CV objective driven by Optuna over one study, to a budget."""

from __future__ import annotations

from collections.abc import Callable

import lightgbm as lgb
import optuna
from optuna.trial import FrozenTrial, TrialState

from tuner._lgb import base_params
from tuner.config import SearchConfig, check_config
from tuner.dataset import PreparedData
from tuner.errors import TunerError
from tuner.fidelity import fidelity_rungs
from tuner.journal import Fence
from tuner.metrics import get_metric
from tuner.objective import CVObjective, checkpoints, fold_steps, pruner_step
from tuner.portfolio import portfolio_params
from tuner.space import fit_into_space, initial_params
from tuner.study import fail_running, open_study
from tuner.trial_loop import optimize_budgeted, threads_per_trial
from tuner.trials import SearchResult, TrialRecord, record_from_frozen, summarise_study
from tuner.validation import ValidationPlan

_BUDGET_STATES = (TrialState.COMPLETE, TrialState.PRUNED)
# Trials that hold a share of the budget: finished ones and those running now. A failed
# trial gives its share back (it is replaced by a new draw).
_TAKEN_STATES = (TrialState.RUNNING, *_BUDGET_STATES)
# Failures that stop a search, at least: an error in every trial is not worth repeating.
_MIN_FAILURE_CAP = 5


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
    on_budget_taken: Callable[[], None] | None = None,
    fence: Fence | None = None,
) -> SearchResult:
    """Run (or resume, or join) a search until its budget, timeout or a stop request.

    The study is created on first use, with trial 0 set to LightGBM's defaults, then any
    warm-start trials, then the portfolio (:mod:`tuner.portfolio`, unless
    ``config.portfolio`` is off). When it already holds trials (a resumed job), complete
    and pruned trials count against ``n_trials``. This process runs up to
    ``config.max_parallel_trials`` trials at once; other processes may run trials of the
    same study at once (``join=True``), and the budget then holds for all of them
    together: a process stops once ``n_trials`` trials of the study are finished, so at
    most the trials other processes have in flight overshoot it.

    From ``config.fidelity_from_rows`` search rows each sampled configuration first
    climbs rungs of seeded row subsamples (:mod:`tuner.fidelity`); one that is not
    promoted ends ``pruned`` at its rung's fidelity, so the budget still counts
    configurations. Enqueued configurations run on all the rows from the start.

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
        on_budget_taken: Called once, when this process starts a trial that takes the
            last share of ``n_trials`` (running, complete and pruned trials of the study
            reach it): a process joining after that would find nothing to run.
        fence: Checked in every write to the study's journal (see :mod:`tuner.journal`);
            a refusal ends the search with :class:`tuner.journal.JournalFenced`.

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
        # Inside the first warm-up fold, not before its second checkpoint.
        n_warmup_steps=pruner_step(max(0, config.pruner_warmup_folds - 1),
                                   (*checkpoints(config.max_rounds), 0, 0)[1],
                                   config.max_rounds),
        fold_steps=fold_steps(config.max_rounds),
        initial_params=initial_params(config.space, n_train_rows=rows),
        pruner=config.pruner,
        warm_start=tuple(fit_into_space(p, config.space, n_train_rows=rows)
                         for p in config.warm_start),
        portfolio=tuple(portfolio_params(config.space, n_train_rows=rows)
                        if config.portfolio else ()),
        heartbeat_seconds=heartbeat_seconds, grace_seconds=grace_seconds, seed_salt=seed_salt,
        fence=fence,
    )
    if heartbeat_seconds is None and not join:
        fail_running(study)
    rungs = fidelity_rungs(len(plan.train_idx), config.fidelity_from_rows)
    # Enqueued configurations (trial 0, warm start, portfolio) start on all the rows.
    enqueued = frozenset(t.number for t in study.get_trials(deepcopy=False)
                         if "fixed_params" in t.system_attrs)
    cv_objective = CVObjective(
        data, plan, metric,
        params_base=base_params(data.task, num_class=len(data.classes or ()),
                                metric=metric.name, seed=config.seed,
                                num_threads=threads_per_trial(config.num_threads,
                                                              config.max_parallel_trials),
                                objective=config.objective, fixed=config.fixed_params),
        space=config.space, max_rounds=config.max_rounds,
        early_stopping_rounds=config.early_stopping_rounds, should_stop=should_stop,
        rungs=rungs, full_fidelity=enqueued, subsample_seed=config.seed,
    )
    started = taken = False

    def objective(trial: optuna.Trial) -> float:
        nonlocal started, taken
        if not started and on_started is not None:
            on_started()
        started = True
        if not taken and on_budget_taken is not None and config.n_trials is not None:
            # This trial is RUNNING already, so it counts itself. Parallel threads may
            # both see the last share taken: the callback must bear a second call.
            if len(study.get_trials(deepcopy=False, states=_TAKEN_STATES)) >= config.n_trials:
                taken = True
                on_budget_taken()
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
    return summarise_study(study, metric.direction, config.selection)
