"""Results of the discrete-state estimators: the core :class:`~orthoccp.Results` plus the
iteration record, the state-space solution and the right description of the method."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from ..results import Details, Results, covariance_line, json_number, variance_share_lines
from ._transitions import TransitionMatrices

__all__ = ["DISCRETE_ASSUMPTIONS", "DiscreteDetails", "DiscreteResults", "transition_record"]

DISCRETE_ASSUMPTIONS = (
    "type-I extreme-value (logit) utility shocks, i.i.d. across choices and periods",
    "known discount factor",
    "finitely many states (given, or binned: then the estimates are those of the binned model)",
    "conditional independence: the next state depends on the current state and choice only",
    "stationarity: utilities, transitions and choice probabilities do not change over time",
)
"""Assumptions of the discrete-state estimators (no finite dependence is needed)."""

_NAMES = {
    "npl": "nested pseudo-likelihood (NPL) estimator, Aguirregabiria & Mira (2002)",
    "pml": "pseudo-likelihood estimator, Hotz & Miller (1993) inversion",
}


def transition_record(tm: TransitionMatrices) -> dict[str, Any]:
    """The JSON-safe record of the transition step: method, smoothing, counts, unseen cells."""
    return {"method": tm.method, "smoothing": tm.smoothing, "n_transitions": tm.n_transitions,
            "unseen": {str(k): int(v) for k, v in tm.unseen.items()}}


@dataclass(frozen=True, eq=False)
class DiscreteDetails(Details):
    """Details of :func:`~orthoccp.discrete.estimate_discrete` (:attr:`DiscreteResults.details`).

    Attributes
    ----------
    estimator : str
        ``"npl"`` (iterated to the fixed point) or ``"pml"`` (a fixed number of
        pseudo-likelihood steps from the initial CCPs).
    values : str
        ``"inversion"`` (full Hotz--Miller inversion) or ``"simulation"`` (forward
        simulation, Hotz, Miller, Sanders & Smith 1994).
    initial_ccp : str
        Where the starting CCPs came from (cell frequencies, a classifier, a sieve).
    clip : float
        Starting CCPs are clipped to ``[clip, 1 - clip]``; ``clipped`` counts observed states
        per choice.
    iterations : int
        NPL iterations or pseudo-likelihood steps.
    converged : bool
        NPL: the CCPs stopped changing (sup-norm change below ``tol``).
    last_change : float
        Sup-norm change of the CCPs in the last iteration.
    changes : tuple of float
        The change after every iteration.
    loglik : float
        Pseudo-log-likelihood at the estimate (at the NPL fixed point, the log-likelihood).
    n_states : int
        States of the state space.
    n_paths, horizon : int
        Forward simulation: paths per state and choice, periods simulated (0 otherwise).
    transitions : dict
        The transition step's record: ``method``, ``smoothing``, ``n_transitions``,
        ``unseen`` (state-choice cells never observed).
    ccp : pandas.DataFrame or None
        (S, J) CCPs implied by the estimate (the fixed point for NPL).
    value : numpy.ndarray or None
        (S,) ex-ante value at the estimate (inversion only; empty for simulation).
    transition_matrices : TransitionMatrices or None
        The transition step itself.
    information : numpy.ndarray or None
        (p, p) :math:`I = \\sum_s n_s \\sum_j \\Lambda_j g_j g_j'` (minus the pseudo-Hessian).
    influence_parts : dict
        ``"choices"`` and ``"transitions"``: the (n_clusters, p) influence terms
        :math:`I^{-1} s_i` and :math:`I^{-1} c_i`; the result's ``influence`` is their sum.

    The last four are not kept when the result is reloaded from JSON (None, empty).
    """

    kind: ClassVar[str] = "discrete"
    assumptions: ClassVar[tuple[str, ...]] = DISCRETE_ASSUMPTIONS

    estimator: str
    values: str
    initial_ccp: str
    clip: float
    clipped: dict[str, int]
    iterations: int
    converged: bool
    last_change: float
    changes: tuple[float, ...]
    loglik: float
    n_states: int
    n_paths: int
    horizon: int
    transitions: dict[str, Any]
    ccp: pd.DataFrame | None = field(default=None, repr=False)
    value: np.ndarray | None = field(default=None, repr=False)
    transition_matrices: TransitionMatrices | None = field(default=None, repr=False)
    information: np.ndarray | None = field(default=None, repr=False)
    influence_parts: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    def method(self, debiased: bool) -> str:
        text = _NAMES.get(self.estimator, self.estimator)
        if self.values == "simulation":
            text += f", forward-simulated values ({self.n_paths} paths, horizon {self.horizon})"
        return text

    def title(self, res: Results) -> str:
        return (f"model: discrete states ({self.n_states}), discount {res.model['discount']}; "
                f"no renewal or terminal choice needed")

    def lines(self, res: Results, *, plugin: bool) -> list[str]:
        lines = (["reloaded from JSON: the state-space solution (CCPs, values, transition "
                  "matrices) is not kept"] if res.reloaded else [])
        lines.append(f"units {res.n_units}; rows {res.n_rows} (all enter the likelihood); "
                     f"log-likelihood {self.loglik:.4f}")
        if self.estimator == "npl":
            lines.append(f"NPL iterations {self.iterations}; last sup-norm CCP change "
                         f"{self.last_change:.3g}; converged {self.converged}")
        else:
            lines.append(f"pseudo-likelihood steps {self.iterations} from {self.initial_ccp}")
        tm = self.transitions
        extra = (f", smoothing {tm['smoothing']:g}" if tm["method"] == "frequency"
                 and tm["smoothing"] else "")
        lines.append(f"transitions: {tm['method']}{extra} from {tm['n_transitions']} observed "
                     f"transitions")
        lines.append(
            covariance_line(res.cov_type, res.small_sample)
            + "; includes the transition estimate's noise"
            + (" and the simulation noise" if self.values == "simulation" else "")
        )
        lines.extend(variance_share_lines(
            res.decomposition, "variance shares (choices: pseudo-score, transitions: first step):"))
        return lines

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind, "estimator": self.estimator, "values": self.values,
            "initial_ccp": self.initial_ccp, "clip": self.clip,
            "clipped": {str(k): int(v) for k, v in self.clipped.items()},
            "iterations": self.iterations, "converged": self.converged,
            "last_change": json_number(self.last_change),
            "changes": [json_number(c) for c in self.changes],
            "loglik": json_number(self.loglik), "n_states": self.n_states,
            "n_paths": self.n_paths, "horizon": self.horizon,
            "transitions": dict(self.transitions),
        }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any], *, index: pd.Index,
                  std_errors: pd.Series) -> DiscreteDetails:
        def num(v: Any) -> float:
            return float("nan") if v is None else float(v)

        return cls(
            estimator=str(doc["estimator"]), values=str(doc["values"]),
            initial_ccp=str(doc["initial_ccp"]), clip=float(doc["clip"]),
            clipped={str(k): int(v) for k, v in doc.get("clipped", {}).items()},
            iterations=int(doc["iterations"]), converged=bool(doc["converged"]),
            last_change=num(doc["last_change"]), changes=tuple(num(c) for c in doc["changes"]),
            loglik=num(doc["loglik"]), n_states=int(doc["n_states"]),
            n_paths=int(doc["n_paths"]), horizon=int(doc["horizon"]),
            transitions=dict(doc["transitions"]),
        )


@dataclass(frozen=True, eq=False)
class DiscreteResults(Results):
    """:class:`~orthoccp.Results` of :func:`~orthoccp.discrete.estimate_discrete`: the shared
    record with :class:`DiscreteDetails` (iterations, log-likelihood, the state-space solution);
    ``res.converged``, ``res.ccp`` and the other details read through to ``res.details``."""

    details: DiscreteDetails = field(repr=False)
