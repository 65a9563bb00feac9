"""One Monte Carlo replication: its seeds, the simulated panel and every estimator on it."""

from __future__ import annotations

import time
import warnings
from typing import Any

import numpy as np

from .._errors import OrthoCCPWarning
from ..data import Panel
from ..estimate import estimate
from ..learners import resolve_learners
from ..model import Model
from ..results import cross_fit_details
from ._settings import _CATCH, _CORRECTED, _EXACT, _SEED_BOUND, MonteCarloSettings


def replication_seeds(seed: int, rep: int) -> tuple[int, int]:
    """The simulation seed and the estimation seed of replication ``rep``.

    Parameters
    ----------
    seed : int
        The run's seed.
    rep : int
        Replication index (0, 1, ...).

    Returns
    -------
    tuple of int
        ``(sim_seed, est_seed)``, drawn from
        ``default_rng(SeedSequence(seed, spawn_key=(rep,)))``: they depend on ``seed`` and
        ``rep`` only.

    Examples
    --------
    >>> replication_seeds(0, 3) == replication_seeds(0, 3)
    True
    >>> replication_seeds(0, 3) != replication_seeds(0, 4)
    True
    """
    rng = np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(rep),)))
    sim_seed, est_seed = (int(v) for v in rng.integers(0, _SEED_BOUND, size=2))
    return sim_seed, est_seed


# --------------------------------------------------------------------------- one replication
def _single_threaded(est: Any) -> Any:
    """A clone of ``est`` whose multi-threaded parts (``n_jobs`` > 1 or -1) use one thread."""
    from sklearn.base import clone

    est = clone(est)
    params = est.get_params(deep=True)
    updates = {
        k: 1
        for k, v in params.items()
        if (k == "n_jobs" or k.endswith("__n_jobs"))
        and isinstance(v, (int, np.integer))
        and not isinstance(v, bool)
        and (int(v) > 1 or int(v) < 0)
    }
    if updates:
        est.set_params(**updates)
    return est


def _fit_one(
    name: str,
    panel: Panel,
    model: Model,
    settings: MonteCarloSettings,
    *,
    est_seed: int,
    learners: tuple[Any, Any],
    oracle: Any,
) -> tuple[dict[str, tuple[float, float, float, float]] | None, str, str, int, float, str,
           dict[str, dict[str, Any]]]:
    """Run one estimator; returns (per parameter (est, se, lo, hi) or None, moments, error,
    number of orthoccp warnings, seconds, solution route(s), per parameter interval checks)."""
    clf, reg = learners
    corrected = name in _CORRECTED
    options: dict[str, Any] = {"folds": settings.folds, "seed": est_seed, "learner": clf,
                               "regressor": reg, "debias": corrected}
    if corrected:
        options["moments"] = settings.moments
    if name == "debiased" and settings.model_ccp_steps:
        options["model_ccp_steps"] = settings.model_ccp_steps
    if name in _EXACT:
        options["nuisances"] = oracle
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = estimate(panel, model, **options)
        except _CATCH as exc:
            seconds = time.perf_counter() - t0
            n_warn = sum(issubclass(w.category, OrthoCCPWarning) for w in caught)
            moments = settings.moments if corrected and settings.moments else ""
            text = " ".join(f"{type(exc).__name__}: {exc}".split())
            return None, moments, text, n_warn, seconds, "failed", {}
    seconds = time.perf_counter() - t0
    n_warn = sum(issubclass(w.category, OrthoCCPWarning) for w in caught)
    ci = res.conf_int(settings.level)
    values = {
        str(p): (
            float(res.params[p]),
            float(res.std_errors[p]),
            float(ci.loc[p, "lower"]),
            float(ci.loc[p, "upper"]),
        )
        for p in res.params.index
    }
    d = cross_fit_details(res, needed_by="run_montecarlo")
    checks = {} if d.interval_check is None else d.interval_check.to_dict()
    return values, str(d.moments), "", n_warn, seconds, ",".join(d.solve_routes), checks


def _signal(checks: dict[str, dict[str, Any]], param: Any, name: str) -> float:
    value = checks.get(str(param), {}).get(name)
    return float("nan") if value is None else float(value)


def run_replication(settings: MonteCarloSettings, rep: int) -> list[dict[str, Any]]:
    """Simulate replication ``rep`` and run every estimator of ``settings`` on it.

    Parameters
    ----------
    settings : MonteCarloSettings
        The run's configuration (checked by :func:`run_montecarlo`).
    rep : int
        Replication index; the seeds come from :func:`replication_seeds`.

    Returns
    -------
    list of dict
        One record per estimator and parameter with the keys of :data:`REPLICATION_COLUMNS`.
        A failed estimate gives NaN numbers, ``failed=True`` and the error message.
    """
    from ..simulate import simulate

    sim_seed, est_seed = replication_seeds(settings.seed, rep)
    sim = simulate(
        settings.scenario,
        units=settings.units,
        periods=settings.periods,
        seed=sim_seed,
        n_covariates=settings.n_covariates,
    )
    panel = sim.panel()
    model = sim.model()
    pair = resolve_learners(settings.learner)
    learners = (_single_threaded(pair.classifier), _single_threaded(pair.regressor))
    oracle = None
    if _EXACT.intersection(settings.estimators):
        oracle = sim.exact_nuisances(panel, model)
    records: list[dict[str, Any]] = []
    nan = float("nan")
    for name in settings.estimators:
        values, moments, error, n_warn, seconds, solution, checks = _fit_one(
            name, panel, model, settings, est_seed=est_seed, learners=learners, oracle=oracle
        )
        for param, truth in sim.truth.items():
            est, se, lo, hi = values[param] if values is not None else (nan, nan, nan, nan)
            records.append(
                {
                    "rep": int(rep),
                    "sim_seed": sim_seed,
                    "est_seed": est_seed,
                    "estimator": name,
                    "parameter": str(param),
                    "truth": float(truth),
                    "estimate": est,
                    "std_error": se,
                    "ci_lower": lo,
                    "ci_upper": hi,
                    "ci_length": hi - lo,
                    "covers": None if values is None else bool(lo <= truth <= hi),
                    "seconds": seconds,
                    "moments": moments,
                    "failed": values is None,
                    "error": error,
                    "warnings": n_warn,
                    "solution": solution,
                    "linearity_gap": _signal(checks, param, "linearity_gap"),
                    "correction_shift": _signal(checks, param, "correction_shift"),
                    "effective_units": _signal(checks, param, "effective_units"),
                    "unseen_variance": _signal(checks, param, "unseen_variance"),
                    "flagged": bool(checks.get(str(param), {}).get("flagged", False)),
                }
            )
    return records


# --------------------------------------------------------------------------- summary
