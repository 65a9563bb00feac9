"""The Monte Carlo entry point: replications in parallel, with a progress bar."""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import Any

from .._progress import progress_bar
from .._options import check_option
from ._replicate import run_replication
from ._results import MonteCarloResults, _replications_frame
from ._settings import (
    DEFAULT_ESTIMATORS,
    MonteCarloSettings,
    _check_settings,
    _integer,
    check_reps,
)


def _workers(jobs: int) -> int:
    check_option("jobs", jobs)
    return (os.cpu_count() or 1) if jobs == -1 else int(jobs)


def _map_replications(
    settings: MonteCarloSettings, reps: Sequence[int], jobs: int, counter: Any
) -> Iterator[list[dict[str, Any]]]:
    if jobs == 1 or len(reps) == 1:
        for r in reps:
            out = run_replication(settings, r)
            counter.update()
            yield out
        return
    from joblib import Parallel, delayed

    tasks = (delayed(run_replication)(settings, r) for r in reps)
    try:
        parallel = Parallel(n_jobs=min(jobs, len(reps)), return_as="generator_unordered")
        results: Iterable[list[dict[str, Any]]] = parallel(tasks)
    except (TypeError, ValueError):  # joblib < 1.4: no streaming of results
        results = Parallel(n_jobs=min(jobs, len(reps)))(
            delayed(run_replication)(settings, r) for r in reps
        )
    for out in results:
        counter.update()
        yield out


# --------------------------------------------------------------------------- entry point
def run_montecarlo(
    scenario: str,
    *,
    reps: int,
    units: int,
    periods: int,
    learner: str = "lightgbm",
    folds: int = 5,
    seed: int = 0,
    jobs: int = 1,
    moments: str | None = None,
    estimators: Sequence[str] = DEFAULT_ESTIMATORS,
    level: float = 0.95,
    n_covariates: int | None = None,
    model_ccp_steps: int = 0,
    first_rep: int = 0,
    progress: bool | None = None,
    on_replication: Callable[[list[dict[str, Any]]], None] | None = None,
) -> MonteCarloResults:
    """Replicate a simulator scenario and compare the plug-in, debiased and oracle estimators.

    Parameters
    ----------
    scenario : str
        Built-in scenario: ``"ebike"``, ``"ebike3"`` (renewal) or ``"producers"`` (terminal);
        or a family design id such as ``"F07"`` (:func:`orthoccp.simulate.family_design`),
        whose discount and covariates the design fixes (leave ``n_covariates`` out).
    reps : int
        Number of replications.
    units, periods : int
        Panel size of every replication.
    learner : str, default="lightgbm"
        First-stage learner, a registry name (:func:`orthoccp.learner_names`). It runs with
        one thread; the parallelism is over replications.
    folds : int, default=5
        Cross-fitting folds (at least 3: the default nested scheme needs them).
    seed : int, default=0
        The run's one seed; replication ``r`` uses :func:`replication_seeds` ``(seed, r)``.
        The plug-in and the debiased estimator share the estimation seed, hence the folds and
        the learners' seeds.
    jobs : int, default=1
        Worker processes (joblib); -1 for all cores. The numbers do not depend on it.
    moments : {"standard", "renewal_robust"}, optional
        Moments of the debiased estimator; by default :func:`orthoccp.estimate`'s choice
        (renewal-robust for the renewal scenarios, whose covariates are persistent; standard
        for ``"producers"``). The one used is recorded in the ``moments`` columns.
    estimators : sequence of str, default=("naive", "debiased", "oracle")
        Which estimators to run: the plug-in, the debiased estimator, the plug-in with the
        simulator's exact nuisances, and (``"oracle_debiased"``, not run by default) the
        debiased estimator's corrected moment at the exact nuisances.
    level : float, default=0.95
        Confidence level whose coverage is measured.
    n_covariates : int, optional
        Covariates per unit; the scenario's default (30 or 25) when omitted.
    model_ccp_steps : int, default=0
        Model-implied CCP steps of the debiased estimator (:func:`orthoccp.estimate`); they
        need the standard moment (``moments="standard"`` for the renewal scenarios).
    first_rep : int, default=0
        Index of the first replication: replications ``first_rep, ..., first_rep + reps - 1``
        run, so a run can be continued in parts and joined with
        :meth:`MonteCarloResults.concat`.
    progress : bool, optional
        A progress bar on stderr. By default the session's setting
        (:func:`orthoccp.set_progress`), else shown exactly when stderr is a terminal or the
        call runs in a notebook.
    on_replication : callable, optional
        Called in the main process with each finished replication's records (in completion
        order), e.g. to save progress.

    Returns
    -------
    MonteCarloResults

    Raises
    ------
    orthoccp.InputError
        For an unknown scenario, learner or estimator, or an option out of range; raised
        before any replication runs.

    Notes
    -----
    The oracle is the plug-in solve (``debias=False``) with the exact CCPs and continuation
    terms from :func:`orthoccp.nuisances_from_truth`; it shows what the moment achieves
    without first-stage error. ``"oracle_debiased"`` solves the corrected moment
    ψ = m + φ_μ + φ_P at the same exact nuisances. Its spread is the debiased estimator's
    asymptotic spread (the influence function at the truth); the gap to the oracle's is the
    price of not knowing the CCPs, which no learner removes, and the gap between the debiased
    estimator and it is the finite-sample cost of the learner (Chernozhukov, Escanciano,
    Ichimura, Newey & Robins 2022, Econometrica 90, on the variance of locally robust
    moments). A replication's failed estimate is kept as a failure
    (see :attr:`MonteCarloResults.replications`).

    Examples
    --------
    >>> mc = run_montecarlo("ebike", reps=2, units=150, periods=6, learner="logit",
    ...                     folds=3, n_covariates=5, estimators=("oracle",))
    >>> mc.summary[["estimator", "parameter", "reps", "failures"]]
      estimator  parameter  reps  failures
    0    oracle  wear_cost     2         0
    1    oracle  swap_cost     2         0
    """
    settings = MonteCarloSettings(
        scenario=scenario,
        units=units,
        periods=periods,
        learner=learner,
        folds=folds,
        seed=seed,
        moments=moments,
        estimators=tuple(estimators),
        level=level,
        n_covariates=n_covariates,
        model_ccp_steps=model_ccp_steps,
    )
    reps = check_reps(reps)
    first_rep = _integer("first_rep", first_rep, minimum=0)
    workers = _workers(jobs)
    _check_settings(settings)
    t0 = time.perf_counter()
    indices = range(first_rep, first_rep + reps)
    counter = progress_bar(len(indices), desc="Monte Carlo", unit="rep", progress=progress)
    records: list[dict[str, Any]] = []
    try:
        for out in _map_replications(settings, indices, workers, counter):
            records.extend(out)
            if on_replication is not None:
                on_replication(out)
    finally:
        counter.close()
    from ..simulate import simulate

    truth = dict(simulate(scenario, units=1, periods=1, seed=0, n_covariates=n_covariates).truth)
    return MonteCarloResults(
        settings=settings,
        truth={str(k): float(v) for k, v in truth.items()},
        replications=_replications_frame(records),
        jobs=workers,
        wall_seconds=time.perf_counter() - t0,
    )
