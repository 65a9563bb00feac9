"""Monte Carlo settings: the estimator names, the record columns and the checked run options."""

from __future__ import annotations

import numbers
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

from .._errors import EstimationError, InputError
from .._options import check_option

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
    "solution",
    "linearity_gap",
    "correction_shift",
    "effective_units",
    "unseen_variance",
    "flagged",
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
    "fallbacks",
    "fallback_coverage",
    "flagged",
    "unflagged_coverage",
)
"""Columns of :attr:`MonteCarloResults.summary`."""

MAX_REPS = 100_000
"""Most replications one run takes: at a second each (the fastest design) that is more than a
day; a longer study runs in parts (``first_rep``) joined by :meth:`MonteCarloResults.concat`."""

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
        Built-in scenario (:func:`orthoccp.simulate.scenario_names`) or family design id
        (``"F07"``, :func:`orthoccp.simulate.family_design`).
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


def check_reps(reps: object, *, name: str = "reps") -> int:
    """``reps`` as an int in 1..:data:`MAX_REPS`, checked before anything is built.

    ``name`` is the option in the message (``"--reps"`` on the command line).
    """
    n = _integer(name, reps, minimum=1)
    if n > MAX_REPS:
        raise InputError(
            f"{name} {n:,} exceeds the ceiling of {MAX_REPS:,} replications per run (at a "
            f"second each, more than a day); use fewer, or run the study in parts "
            f"(run_montecarlo(first_rep=...)) and join them with MonteCarloResults.concat."
        )
    return n


def _check_settings(settings: MonteCarloSettings) -> None:
    """Reject a configuration that would make every replication fail, before any runs."""
    from ..simulate import is_family_id, scenario_names, simulate

    names = scenario_names()
    if not is_family_id(settings.scenario) and (
        not isinstance(settings.scenario, str) or settings.scenario not in names
    ):
        valid = ", ".join(repr(n) for n in names)
        raise InputError(
            f"unknown scenario {settings.scenario!r}; valid scenarios are {valid}, or a family "
            f"design id such as 'F07'."
        )
    folds = check_option("folds", settings.folds)
    if folds < 3:
        raise InputError(
            f"folds must be >= 3 (the default nested cross-fitting fits the CCP on the folds "
            f"outside each pair), got {folds}."
        )
    _integer("units", settings.units, minimum=folds)
    _integer("periods", settings.periods, minimum=2)
    check_option("seed", settings.seed)
    check_option("learner", settings.learner, note="the Monte Carlo takes registry names only")
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
