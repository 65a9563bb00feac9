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
"""

from __future__ import annotations

import json
import math
import numbers
import os
import sys
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import pandas as pd
from scipy import stats

from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._version import __version__
from .data import Panel
from .estimate import estimate
from .learners import learner_names, resolve_learners
from .model import Model
from .nuisance import nuisances_from_truth

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

ESTIMATORS: tuple[str, ...] = ("naive", "debiased", "oracle", "oracle_debiased")
"""Every estimator name, in the order they are run and reported."""

DEFAULT_ESTIMATORS: tuple[str, ...] = ("naive", "debiased", "oracle")
"""The estimators a run compares unless told otherwise."""

ESTIMATOR_LABELS: dict[str, str] = {
    "naive": "plug-in (naive)",
    "debiased": "debiased",
    "oracle": "oracle (true nuisances)",
    "oracle_debiased": "oracle, corrected moment",
}

REPLICATION_COLUMNS: tuple[str, ...] = (
    "rep",
    "sim_seed",
    "est_seed",
    "estimator",
    "parameter",
    "truth",
    "estimate",
    "std_error",
    "ci_lower",
    "ci_upper",
    "ci_length",
    "covers",
    "seconds",
    "moments",
    "failed",
    "error",
    "warnings",
)
"""Columns of :attr:`MonteCarloResults.replications`."""

SUMMARY_COLUMNS: tuple[str, ...] = (
    "estimator",
    "parameter",
    "truth",
    "reps",
    "n_ok",
    "failures",
    "mean_estimate",
    "bias",
    "bias_mcse",
    "sd",
    "mean_se",
    "sd_over_se",
    "rmse",
    "coverage",
    "coverage_mcse",
    "mean_ci_length",
    "median_seconds",
    "warned",
    "moments",
    "level",
)
"""Columns of :attr:`MonteCarloResults.summary`."""

_MOMENTS = ("standard", "renewal_robust")
# Which estimators solve the corrected moment, and which use the simulator's exact nuisances.
_CORRECTED = frozenset({"debiased", "oracle_debiased"})
_EXACT = frozenset({"oracle", "oracle_debiased"})
_SEED_BOUND = 2**31 - 1
_CATCH = (EstimationError, InputError)


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class MonteCarloSettings:
    """What a Monte Carlo run simulates and estimates (everything but ``reps`` and ``jobs``).

    Attributes
    ----------
    scenario : str
        Built-in scenario (:func:`orthoccp.simulate.scenario_names`).
    units, periods : int
        Panel size of every replication.
    learner : str
        First-stage learner, a registry name (:func:`orthoccp.learner_names`), run
        single-threaded.
    folds : int
        Cross-fitting folds.
    seed : int
        The one seed of the run (see :func:`replication_seeds`).
    moments : str or None
        Moments of the debiased estimator: ``"standard"``, ``"renewal_robust"``, or ``None``
        for :func:`orthoccp.estimate`'s default (renewal-robust for the renewal scenarios,
        whose covariates are declared persistent; standard otherwise). The plug-in and the
        oracle always use the standard moment; ``"oracle_debiased"`` uses the debiased
        estimator's.
    estimators : tuple of str
        A subset of :data:`ESTIMATORS`; :data:`DEFAULT_ESTIMATORS` by default.
    level : float
        Confidence level of the intervals whose coverage is measured.
    n_covariates : int or None
        Covariates per unit; the scenario's default when ``None``.
    model_ccp_steps : int
        Model-implied CCP steps of the debiased estimator (``estimate(model_ccp_steps=)``);
        the other estimators do not take them.
    """

    scenario: str
    units: int
    periods: int
    learner: str = "lightgbm"
    folds: int = 5
    seed: int = 0
    moments: str | None = None
    estimators: tuple[str, ...] = DEFAULT_ESTIMATORS
    level: float = 0.95
    n_covariates: int | None = None
    model_ccp_steps: int = 0

    def to_dict(self) -> dict[str, Any]:
        """The settings as plain JSON values (``moments`` ``None`` is written as ``"auto"``).

        Returns
        -------
        dict
        """
        doc = asdict(self)
        doc["estimators"] = list(self.estimators)
        doc["moments"] = "auto" if self.moments is None else self.moments
        if not self.model_ccp_steps:
            del doc["model_ccp_steps"]  # documents written before the option read the same
        return doc

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> MonteCarloSettings:
        """Inverse of :meth:`to_dict`.

        Parameters
        ----------
        doc : mapping
            As written by :meth:`to_dict`.

        Returns
        -------
        MonteCarloSettings
        """
        moments = doc.get("moments")
        return cls(
            scenario=str(doc["scenario"]),
            units=int(doc["units"]),
            periods=int(doc["periods"]),
            learner=str(doc.get("learner", "lightgbm")),
            folds=int(doc.get("folds", 5)),
            seed=int(doc.get("seed", 0)),
            moments=None if moments in (None, "auto") else str(moments),
            estimators=tuple(doc.get("estimators", DEFAULT_ESTIMATORS)),
            level=float(doc.get("level", 0.95)),
            n_covariates=None if doc.get("n_covariates") is None else int(doc["n_covariates"]),
            model_ccp_steps=int(doc.get("model_ccp_steps", 0)),
        )


def _integer(name: str, value: object, *, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}.")
    return int(value)


def _check_settings(settings: MonteCarloSettings) -> None:
    """Reject a configuration that would make every replication fail, before any runs."""
    from .simulate import scenario_names, simulate

    names = scenario_names()
    if not isinstance(settings.scenario, str) or settings.scenario not in names:
        valid = ", ".join(repr(n) for n in names)
        raise InputError(f"unknown scenario {settings.scenario!r}; valid scenarios are {valid}.")
    folds = _integer("folds", settings.folds, minimum=2)
    if folds < 3:
        raise InputError(
            f"folds must be >= 3 (the default nested cross-fitting fits the CCP on the folds "
            f"outside each pair), got {folds}."
        )
    _integer("units", settings.units, minimum=folds)
    _integer("periods", settings.periods, minimum=2)
    _integer("seed", settings.seed, minimum=0)
    if not isinstance(settings.learner, str) or settings.learner not in learner_names():
        raise InputError(
            f"learner {settings.learner!r} is unknown; the Monte Carlo takes a registry name: "
            f"{', '.join(learner_names())}."
        )
    if settings.moments is not None and settings.moments not in _MOMENTS:
        raise InputError(
            f"moments must be 'standard', 'renewal_robust' or None (estimate's default), got "
            f"{settings.moments!r}."
        )
    est = settings.estimators
    unknown = [e for e in est if e not in ESTIMATORS]
    if not est or unknown or len(set(est)) != len(est):
        raise InputError(
            f"estimators must be distinct names among {', '.join(ESTIMATORS)}, got {list(est)!r}."
        )
    level = settings.level
    if isinstance(level, bool) or not isinstance(level, numbers.Real) or not 0 < level < 1:
        raise InputError(f"level must be a probability in (0, 1), got {level!r}.")
    # A one-unit draw is cheap and checks n_covariates and the scenario's kind.
    probe = simulate(settings.scenario, units=1, periods=1, seed=0,
                     n_covariates=settings.n_covariates)
    corrected = bool(_CORRECTED.intersection(est))
    steps = _integer("model_ccp_steps", settings.model_ccp_steps, minimum=0)
    if steps and "debiased" not in est:
        raise InputError("model_ccp_steps applies to the 'debiased' estimator; add it to estimators.")
    if steps and probe.kind == "renewal" and settings.moments != "standard":
        raise InputError(
            f"model_ccp_steps needs the standard moment; the renewal scenario "
            f"{settings.scenario!r} defaults to renewal-robust moments, so pass "
            f"moments='standard'."
        )
    if settings.moments == "renewal_robust" and corrected and probe.kind != "renewal":
        raise InputError(
            f"moments='renewal_robust' needs a renewal scenario; {settings.scenario!r} is "
            f"{probe.kind}. Use moments='standard' or None."
        )


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
) -> tuple[dict[str, tuple[float, float, float, float]] | None, str, str, int, float]:
    """Run one estimator; returns (per parameter (est, se, lo, hi) or None, moments, error,
    number of orthoccp warnings, seconds)."""
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
            return None, moments, text, n_warn, seconds
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
    return values, str(res.moments), "", n_warn, seconds


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
    from .simulate import simulate

    sim_seed, est_seed = replication_seeds(settings.seed, rep)
    sim = simulate(
        settings.scenario,
        units=settings.units,
        periods=settings.periods,
        seed=sim_seed,
        n_covariates=settings.n_covariates,
    )
    panel = Panel(
        sim.data, unit=sim.unit, period=sim.period, choice=sim.choice, states=list(sim.states)
    )
    model = Model(
        anchor=sim.anchor,
        kind=sim.kind,  # type: ignore[arg-type]
        discount=sim.discount,
        utility=dict(sim.utility),  # type: ignore[arg-type]
        persistent=tuple(sim.persistent or ()),
    )
    pair = resolve_learners(settings.learner)
    learners = (_single_threaded(pair.classifier), _single_threaded(pair.regressor))
    oracle = None
    if _EXACT.intersection(settings.estimators):
        order = [list(sim.choices).index(c) for c in panel.choices]
        oracle = nuisances_from_truth(
            model.bind(panel), sim.ccp[:, order], sim.continuation[:, order]
        )
    records: list[dict[str, Any]] = []
    nan = float("nan")
    for name in settings.estimators:
        values, moments, error, n_warn, seconds = _fit_one(
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
                }
            )
    return records


# --------------------------------------------------------------------------- summary
def _replications_frame(records: Iterable[Mapping[str, Any]]) -> pd.DataFrame:
    frame = pd.DataFrame(list(records), columns=list(REPLICATION_COLUMNS))
    for col in ("estimate", "std_error", "ci_lower", "ci_upper", "ci_length", "truth", "seconds"):
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    for col in ("rep", "sim_seed", "est_seed", "warnings"):
        frame[col] = frame[col].astype(np.int64)
    frame["covers"] = frame["covers"].astype("boolean")
    frame["failed"] = frame["failed"].astype(bool)
    for col in ("estimator", "parameter", "moments", "error"):
        frame[col] = frame[col].fillna("").astype(str)
    rank = {e: i for i, e in enumerate(ESTIMATORS)}
    # Parameters keep the order in which they were recorded (the scenario's).
    frame = frame.sort_values(
        ["rep", "estimator"],
        key=lambda s: s.map(rank) if s.name == "estimator" else s,
        kind="stable",
    )
    return frame.reset_index(drop=True)


def _summarise(
    replications: pd.DataFrame,
    *,
    estimators: Sequence[str],
    parameters: Sequence[str],
    level: float,
) -> pd.DataFrame:
    rows = []
    nan = float("nan")
    for name in estimators:
        sub = replications[replications["estimator"] == name]
        for param in parameters:
            cell = sub[sub["parameter"] == param]
            ok = cell[~cell["failed"]]
            n = len(cell)
            k = len(ok)
            truth = float(cell["truth"].iloc[0]) if n else nan
            est = ok["estimate"].to_numpy(dtype=float)
            se = ok["std_error"].to_numpy(dtype=float)
            covers = ok["covers"].to_numpy(dtype=float)
            sd = float(np.std(est, ddof=1)) if k >= 2 else nan
            mean_se = float(se.mean()) if k else nan
            cov = float(covers.mean()) if k else nan
            used = sorted({m for m in ok["moments"] if m})
            rows.append(
                {
                    "estimator": name,
                    "parameter": param,
                    "truth": truth,
                    "reps": n,
                    "n_ok": k,
                    "failures": n - k,
                    "mean_estimate": float(est.mean()) if k else nan,
                    "bias": float(est.mean() - truth) if k else nan,
                    "bias_mcse": sd / math.sqrt(k) if k >= 2 else nan,
                    "sd": sd,
                    "mean_se": mean_se,
                    "sd_over_se": sd / mean_se if k >= 2 and mean_se > 0 else nan,
                    "rmse": float(np.sqrt(np.mean((est - truth) ** 2))) if k else nan,
                    "coverage": cov,
                    "coverage_mcse": math.sqrt(cov * (1 - cov) / k) if k else nan,
                    "mean_ci_length": float(ok["ci_length"].mean()) if k else nan,
                    "median_seconds": float(cell["seconds"].median()) if n else nan,
                    "warned": int((cell["warnings"] > 0).sum()),
                    "moments": "+".join(used),
                    "level": float(level),
                }
            )
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))


# --------------------------------------------------------------------------- JSON helpers
def _plain(value: Any) -> Any:
    """JSON values: numpy scalars unwrapped, NaN and infinities as ``None``."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if value is pd.NA or value is None:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    out = frame.astype(object).where(frame.notna(), None).to_dict(orient="records")
    return [_plain(r) for r in out]


# --------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class MonteCarloResults:
    """The replications of a Monte Carlo run and their summary.

    Attributes
    ----------
    settings : MonteCarloSettings
        What was simulated and estimated.
    truth : dict
        True parameter values of the scenario.
    replications : pandas.DataFrame
        One row per replication, estimator and parameter, columns
        :data:`REPLICATION_COLUMNS`. ``covers`` is a nullable boolean (missing for a failed
        estimate); ``seconds`` is the wall time of the estimator's call.
    jobs : int
        Worker processes used (the numbers do not depend on it).
    wall_seconds : float
        Wall time of the run (summed over the parts of a concatenated run).
    version : str
        orthoccp version that produced the numbers.
    """

    settings: MonteCarloSettings
    truth: dict[str, float]
    replications: pd.DataFrame = field(repr=False)
    jobs: int = 1
    wall_seconds: float = float("nan")
    version: str = __version__

    def __repr__(self) -> str:
        s = self.settings
        return (
            f"MonteCarloResults(scenario={s.scenario!r}, reps={self.reps}, units={s.units}, "
            f"periods={s.periods}, learner={s.learner!r}, estimators={s.estimators!r}, "
            f"failures={self.failures})"
        )

    @property
    def reps(self) -> int:
        """Number of replications."""
        return int(self.replications["rep"].nunique())

    @property
    def failures(self) -> dict[str, int]:
        """Failed replications per estimator."""
        rep = self.replications
        failed = rep[rep["failed"]].groupby("estimator")["rep"].nunique()
        return {e: int(failed.get(e, 0)) for e in self.settings.estimators}

    @cached_property
    def summary(self) -> pd.DataFrame:
        """One row per estimator and parameter, columns :data:`SUMMARY_COLUMNS`.

        Notes
        -----
        Over the ``n_ok`` replications in which the estimator succeeded, with estimates
        :math:`\\hat\\theta_r`, standard errors :math:`s_r` and truth :math:`\\theta`:
        ``bias`` :math:`= \\bar{\\hat\\theta} - \\theta` with Monte Carlo standard error
        ``bias_mcse`` :math:`= \\mathrm{sd}/\\sqrt{n}`; ``sd`` (``ddof=1``); ``mean_se``
        :math:`=\\bar s`; ``sd_over_se`` = sd / mean_se (about 1 when the standard errors
        are right); ``rmse``; ``coverage`` = share of intervals containing :math:`\\theta`
        with ``coverage_mcse`` :math:`= \\sqrt{c(1-c)/n}`; ``mean_ci_length``.
        ``median_seconds`` is over all attempts, failed ones included; ``failures`` counts
        replications whose estimate failed and ``warned`` those with an orthoccp warning.
        """
        return _summarise(
            self.replications,
            estimators=self.settings.estimators,
            parameters=list(self.truth),
            level=self.settings.level,
        )

    # ----------------------------------------------------------------- views
    def to_dict(self, *, replications: bool = True) -> dict[str, Any]:
        """The results as plain JSON values (NaN written as ``None``).

        Parameters
        ----------
        replications : bool, default=True
            Include the per-replication records (needed by :meth:`from_dict`).

        Returns
        -------
        dict
            ``settings``, ``truth``, ``reps``, ``failures``, ``jobs``, ``wall_seconds``,
            ``version``, ``summary`` (records) and ``replications`` (records).
        """
        doc: dict[str, Any] = {
            "settings": self.settings.to_dict(),
            "truth": dict(self.truth),
            "reps": self.reps,
            "failures": self.failures,
            "jobs": int(self.jobs),
            "wall_seconds": self.wall_seconds,
            "version": self.version,
            "summary": _records(self.summary),
        }
        if replications:
            doc["replications"] = _records(self.replications)
        return _plain(doc)

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> MonteCarloResults:
        """Rebuild results from :meth:`to_dict` (with its replications).

        Parameters
        ----------
        doc : mapping
            As written by :meth:`to_dict` or :meth:`to_json`.

        Returns
        -------
        MonteCarloResults
        """
        if "replications" not in doc:
            raise InputError("the document has no 'replications'; write it with replications=True.")
        wall = doc.get("wall_seconds")
        return cls(
            settings=MonteCarloSettings.from_dict(doc["settings"]),
            truth={str(k): float(v) for k, v in doc["truth"].items()},
            replications=_replications_frame(doc["replications"]),
            jobs=int(doc.get("jobs", 1)),
            wall_seconds=float("nan") if wall is None else float(wall),
            version=str(doc.get("version", "")),
        )

    def to_json(self, path: str | os.PathLike[str], *, replications: bool = True) -> Path:
        """Write :meth:`to_dict` as JSON.

        Parameters
        ----------
        path : path-like
            Output file; its folder is created.
        replications : bool, default=True
            Include the per-replication records.

        Returns
        -------
        pathlib.Path
        """
        p = Path(path)
        p.parent.mkdir(parents=True, exist_ok=True)
        text = json.dumps(self.to_dict(replications=replications), indent=1, allow_nan=False)
        p.write_text(text + "\n", encoding="utf-8")
        return p

    @classmethod
    def read_json(cls, path: str | os.PathLike[str]) -> MonteCarloResults:
        """Read results written by :meth:`to_json`.

        Parameters
        ----------
        path : path-like

        Returns
        -------
        MonteCarloResults
        """
        return cls.from_dict(json.loads(Path(path).read_text(encoding="utf-8")))

    def to_csv(self, path: str | os.PathLike[str], *, which: str = "summary") -> Path:
        """Write the summary (one row per estimator and parameter) or the replications as CSV.

        Parameters
        ----------
        path : path-like
            Output file; its folder is created.
        which : {"summary", "replications"}, default="summary"

        Returns
        -------
        pathlib.Path
        """
        if which not in ("summary", "replications"):
            raise InputError(f"which must be 'summary' or 'replications', got {which!r}.")
        frame = self.summary if which == "summary" else self.replications
        p = Path(path)
        p.parent.mkdir(parents=True, exist_ok=True)
        frame.to_csv(p, index=False)
        return p

    def table(self) -> str:
        """A plain-text table of the summary for the terminal.

        Returns
        -------
        str
        """
        s = self.settings
        head = (
            f"{'estimator':<10}{'parameter':<12}{'truth':>8}{'bias':>9}{'sd':>8}{'mean se':>9}"
            f"{'sd/se':>7}{'rmse':>8}{'cover':>7}{'(mcse)':>8}{'ci len':>8}{'sec':>7}{'fail':>6}"
        )
        level = f"{100 * s.level:g}%"
        lines = [
            f"Monte Carlo: {s.scenario!r}, {self.reps} replications of {s.units} units x "
            f"{s.periods} periods; learner {s.learner}, {s.folds} folds, seed {s.seed}; "
            f"coverage of the {level} interval",
            head,
            "-" * len(head),
        ]
        for r in self.summary.itertuples(index=False):
            lines.append(
                f"{r.estimator:<10}{r.parameter:<12}{r.truth:>8.3f}{r.bias:>9.4f}{r.sd:>8.4f}"
                f"{r.mean_se:>9.4f}{r.sd_over_se:>7.2f}{r.rmse:>8.4f}{r.coverage:>7.3f}"
                f"{'(' + format(r.coverage_mcse, '.3f') + ')':>8}{r.mean_ci_length:>8.3f}"
                f"{r.median_seconds:>7.2f}{r.failures:>6d}"
            )
        lines.append("-" * len(head))
        moments = {r.estimator: r.moments for r in self.summary.itertuples(index=False)}
        lines.append("moments used: " + ", ".join(f"{e} {m or '-'}" for e, m in moments.items()))
        return "\n".join(lines)

    def plot(self, path: str | os.PathLike[str], *, dpi: int = 200) -> Path:
        """Coverage with Monte Carlo error bars, and mean interval length, as a PNG.

        Left panel: coverage per parameter and estimator with a 95 % Monte Carlo interval
        (Wilson score interval for a share of ``n_ok`` replications, which stays informative
        when the coverage is 0 or 1, unlike ±1.96 ``coverage_mcse``) and the nominal level
        dashed. Right panel: mean interval length (log scale when the lengths differ by more
        than a factor of 20).

        Parameters
        ----------
        path : path-like
            Output file (PNG); its folder is created.
        dpi : int, default=200

        Returns
        -------
        pathlib.Path

        Raises
        ------
        ImportError
            When matplotlib (the optional ``plot`` dependency) is not installed.
        """
        Figure = _matplotlib_figure()
        s = self.settings
        summary = self.summary
        params = list(self.truth)
        est = [e for e in s.estimators]
        width = 0.8 / max(len(est), 1)
        colors = {
            "naive": "#d95f02",
            "debiased": "#1b9e77",
            "oracle": "#7570b3",
            "oracle_debiased": "#e7298a",
        }
        z = float(stats.norm.ppf(0.975))
        fig = Figure(figsize=(9.0, 4.2), layout="constrained")
        ax_cov, ax_len = fig.subplots(1, 2)
        x = np.arange(len(params), dtype=float)
        lows, lengths = [], []
        for i, name in enumerate(est):
            sub = summary[summary["estimator"] == name].set_index("parameter").loc[params]
            pos = x - 0.4 + width * (i + 0.5)
            cov = sub["coverage"].to_numpy(dtype=float)
            lo, hi = _wilson(cov, sub["n_ok"].to_numpy(dtype=float), z)
            label = ESTIMATOR_LABELS.get(name, name)
            color = colors.get(name)
            # Rounding can put a bound a hair inside the share when it is 0 or 1.
            yerr = np.clip(np.vstack([cov - lo, hi - cov]), 0.0, None)
            ax_cov.errorbar(pos, cov, yerr=yerr, fmt="o", color=color, capsize=3, label=label)
            lows.extend(lo[np.isfinite(lo)].tolist())
            length = sub["mean_ci_length"].to_numpy(dtype=float)
            ax_len.bar(pos, length, width=width * 0.9, color=color, label=label)
            lengths.extend(length[np.isfinite(length) & (length > 0)].tolist())
        ax_cov.axhline(
            s.level, color="black", linestyle="--", linewidth=1, label=f"nominal {100 * s.level:g}%"
        )
        low = min([s.level, *lows]) if lows else s.level
        ax_cov.set_ylim(max(0.0, low - 0.05), 1.01)
        ax_cov.set_ylabel(f"coverage of the {100 * s.level:g}% interval")
        ax_cov.set_title("coverage (bars: 95% Monte Carlo interval)", fontsize=10)
        ax_len.set_ylabel("mean interval length")
        ax_len.set_title("mean interval length", fontsize=10)
        if lengths and max(lengths) / min(lengths) > 20:
            ax_len.set_yscale("log")
        for ax in (ax_cov, ax_len):
            ax.set_xticks(x, params)
            ax.set_xlim(-0.6, len(params) - 0.4)
        handles, labels = ax_cov.get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=len(labels), fontsize=8)
        fails = ", ".join(f"{k} {v}" for k, v in self.failures.items() if v)
        fig.suptitle(
            f"{s.scenario}: {self.reps} replications, {s.units} units x {s.periods} periods, "
            f"learner {s.learner}, {s.folds} folds" + (f"; failures: {fails}" if fails else ""),
            fontsize=10,
        )
        p = Path(path)
        p.parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(p, dpi=dpi, format="png")
        return p

    # ----------------------------------------------------------------- combining
    @classmethod
    def concat(cls, parts: Sequence[MonteCarloResults]) -> MonteCarloResults:
        """Join runs of the same settings over different replications (e.g. a resumed run).

        Parameters
        ----------
        parts : sequence of MonteCarloResults
            Same :class:`MonteCarloSettings`, disjoint replication indices.

        Returns
        -------
        MonteCarloResults
        """
        if not parts:
            raise InputError("concat needs at least one MonteCarloResults.")
        first = parts[0]
        for other in parts[1:]:
            if other.settings != first.settings:
                raise InputError(
                    f"cannot join runs with different settings: {first.settings} and "
                    f"{other.settings}."
                )
        frames = [p.replications for p in parts]
        seen: set[int] = set()
        for f in frames:
            reps = set(f["rep"].tolist())
            if reps & seen:
                raise InputError(f"replications {sorted(reps & seen)[:5]} appear in two parts.")
            seen |= reps
        joined = _replications_frame(pd.concat(frames, ignore_index=True).to_dict("records"))
        return cls(
            settings=first.settings,
            truth=dict(first.truth),
            replications=joined,
            jobs=max(p.jobs for p in parts),
            wall_seconds=float(sum(p.wall_seconds for p in parts)),
            version=first.version,
        )


def _wilson(share: np.ndarray, n: np.ndarray, z: float) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial share (NaN where ``n`` is 0)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        denom = 1 + z**2 / n
        centre = (share + z**2 / (2 * n)) / denom
        half = z * np.sqrt(share * (1 - share) / n + z**2 / (4 * n**2)) / denom
    return np.clip(centre - half, 0, 1), np.clip(centre + half, 0, 1)


def _matplotlib_figure() -> Any:
    try:
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise ImportError(
            "the Monte Carlo plot needs matplotlib, an optional dependency: install it with "
            "pip install 'orthoccp[plot]' (or pip install matplotlib)."
        ) from exc
    return Figure


# --------------------------------------------------------------------------- progress
class _Counter:
    """``k/n replications`` on one stderr line, rewritten in place; only on a terminal."""

    def __init__(self, total: int, *, enabled: bool | None, stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty()) if callable(isatty) else False
        self.enabled = enabled
        self.total = total
        self.done = 0
        self.start = time.perf_counter()

    def step(self) -> None:
        self.done += 1
        if self.enabled:
            elapsed = time.perf_counter() - self.start
            eta = elapsed / self.done * (self.total - self.done)
            self.stream.write(
                f"\rorthoccp montecarlo: {self.done}/{self.total} replications "
                f"({elapsed:.0f} s, about {eta:.0f} s left)   "
            )
            self.stream.flush()

    def close(self) -> None:
        if self.enabled and self.done:
            self.stream.write("\n")
            self.stream.flush()


def _workers(jobs: int) -> int:
    if isinstance(jobs, bool) or not isinstance(jobs, numbers.Integral) or not (
        jobs >= 1 or jobs == -1
    ):
        raise InputError(f"jobs must be a positive integer or -1 (all cores), got {jobs!r}.")
    return (os.cpu_count() or 1) if jobs == -1 else int(jobs)


def _map_replications(
    settings: MonteCarloSettings, reps: Sequence[int], jobs: int, counter: _Counter
) -> Iterator[list[dict[str, Any]]]:
    if jobs == 1 or len(reps) == 1:
        for r in reps:
            out = run_replication(settings, r)
            counter.step()
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
        counter.step()
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
        Built-in scenario: ``"ebike"``, ``"ebike3"`` (renewal) or ``"producers"`` (terminal).
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
        A counter line on stderr; by default exactly when stderr is a terminal.
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
    reps = _integer("reps", reps, minimum=1)
    first_rep = _integer("first_rep", first_rep, minimum=0)
    workers = _workers(jobs)
    _check_settings(settings)
    t0 = time.perf_counter()
    indices = list(range(first_rep, first_rep + reps))
    counter = _Counter(len(indices), enabled=progress)
    records: list[dict[str, Any]] = []
    try:
        for out in _map_replications(settings, indices, workers, counter):
            records.extend(out)
            if on_replication is not None:
                on_replication(out)
    finally:
        counter.close()
    from .simulate import simulate

    truth = dict(simulate(scenario, units=1, periods=1, seed=0, n_covariates=n_covariates).truth)
    return MonteCarloResults(
        settings=settings,
        truth={str(k): float(v) for k, v in truth.items()},
        replications=_replications_frame(records),
        jobs=workers,
        wall_seconds=time.perf_counter() - t0,
    )
