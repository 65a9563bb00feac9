"""Monte Carlo harness: repeated simulation and estimation against the known truth.

:func:`run_montecarlo` draws a built-in scenario (:func:`orthoccp.simulate.simulate`) ``reps``
times and, on every panel, runs the plug-in ("naive") estimator, the debiased (orthogonal)
estimator and the oracle: the plug-in solve with the simulator's exact nuisances. On request
it also runs ``"oracle_debiased"``, the debiased estimator's corrected moment evaluated at the
exact nuisances: the best the corrected moment can do, which separates the cost of having to
estimate the CCPs at all (intrinsic to the moment) from the cost of estimating them with a
particular learner on a finite sample. It returns
a :class:`MonteCarloResults` with one row per replication, estimator and parameter
(:attr:`MonteCarloResults.replications`) and one per estimator and parameter
(:attr:`MonteCarloResults.summary`): bias, standard deviation, mean standard error, their
ratio, RMSE, coverage of the confidence interval with its Monte Carlo standard error, mean
interval length, median runtime and failures.

Randomness. The one ``seed`` and the replication index ``r`` make a generator,
``numpy.random.default_rng(SeedSequence(seed, spawn_key=(r,)))``, which draws the
replication's simulation seed and its estimation seed. A replication's numbers therefore do
not depend on ``jobs``, on the order in which workers finish, or on how many replications run
in one call (``first_rep`` continues a run).

Threads. Replications run in parallel over ``jobs`` worker processes (joblib), and the
registry learners run single-threaded inside them, so a run uses ``jobs`` cores. A failed
estimate (:class:`~orthoccp.EstimationError`, or a data-dependent
:class:`~orthoccp.InputError` such as a training fold without some choice) is recorded as a
failure of that estimator in that replication and counted in the summary, never dropped.

Layout: ``_settings`` (estimator names, record columns, :class:`MonteCarloSettings` and its
checks), ``_replicate`` (one replication: seeds, panel, estimators), ``_results``
(:class:`MonteCarloResults`: summary, JSON, CSV, table, plot) and ``_run``
(:func:`run_montecarlo`: parallel replications and the progress counter).
"""

from __future__ import annotations

from ._replicate import replication_seeds, run_replication
from ._results import MonteCarloResults
from ._run import run_montecarlo
from ._settings import (
    DEFAULT_ESTIMATORS,
    ESTIMATORS,
    REPLICATION_COLUMNS,
    SUMMARY_COLUMNS,
    MonteCarloSettings,
)

__all__ = [
    "DEFAULT_ESTIMATORS",
    "ESTIMATORS",
    "REPLICATION_COLUMNS",
    "SUMMARY_COLUMNS",
    "MonteCarloResults",
    "MonteCarloSettings",
    "replication_seeds",
    "run_montecarlo",
    "run_replication",
]

