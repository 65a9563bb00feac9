"""Results of the discrete-state estimators: the core :class:`~orthoccp.Results` plus the
iteration record, the state-space solution and the right description of the method."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..functions import Function
from ..results import Results, covariance_line, estimates_block, json_number, variance_share_lines
from ._transitions import TransitionMatrices

__all__ = ["DISCRETE_ASSUMPTIONS", "DiscreteResults"]

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


@dataclass(frozen=True, eq=False)
class DiscreteResults(Results):
    """:class:`~orthoccp.Results` of :func:`~orthoccp.discrete.estimate_discrete`.

    All the core views (``params``, ``std_errors``, ``conf_int``, ``summary``, ``to_json``)
    work unchanged. Additional attributes:

    Attributes
    ----------
    estimator : str
        ``"npl"`` (iterated to the fixed point) or ``"pml"`` (a fixed number of
        pseudo-likelihood steps from the frequency CCPs).
    values : str
        ``"inversion"`` (full Hotz--Miller inversion) or ``"simulation"`` (forward
        simulation, Hotz, Miller, Sanders & Smith 1994).
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
    ccp : pandas.DataFrame
        (S, J) CCPs implied by the estimate (the fixed point for NPL).
    value : numpy.ndarray
        (S,) ex-ante value at the estimate (inversion only; empty for simulation).
    transitions : TransitionMatrices
        The transition step.
    n_paths, horizon : int
        Forward simulation: paths per state and choice, periods simulated (0 otherwise).
    information : numpy.ndarray
        (p, p) :math:`I = \\sum_s n_s \\sum_j \\Lambda_j g_j g_j'` (minus the pseudo-Hessian).
    influence_parts : dict
        ``"choices"`` and ``"transitions"``: the (n_clusters, p) influence terms
        :math:`I^{-1} s_i` and :math:`I^{-1} c_i`; ``influence`` is their sum.
    """

    estimator: str = "npl"
    values: str = "inversion"
    converged: bool = True
    last_change: float = 0.0
    changes: tuple[float, ...] = ()
    loglik: float = float("nan")
    n_states: int = 0
    ccp: pd.DataFrame | None = field(default=None, repr=False)
    value: np.ndarray | None = field(default=None, repr=False)
    transitions: TransitionMatrices | None = field(default=None, repr=False)
    n_paths: int = 0
    horizon: int = 0
    information: np.ndarray | None = field(default=None, repr=False)
    influence_parts: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def method(self) -> str:
        text = _NAMES.get(self.estimator, self.estimator)
        if self.values == "simulation":
            text += f", forward-simulated values ({self.n_paths} paths, horizon {self.horizon})"
        return text

    def summary(self, level: float = 0.95, *,
                functions: Mapping[str, Function] | None = None) -> str:
        """Plain-text summary: estimates, iterations, transitions, variance sources, assumptions;
        ``functions`` adds delta-method rows (:meth:`derive`)."""
        lines = estimates_block([
            f"orthoccp {self.version}: {self.method}",
            f"model: discrete states ({self.n_states}), discount {self.model['discount']}; "
            f"no renewal or terminal choice needed",
        ], self.to_frame(level), level) + self._function_block(functions, level)
        lines.append(f"units {self.n_units}; rows {self.n_rows} (all enter the likelihood); "
                     f"log-likelihood {self.loglik:.4f}")
        if self.estimator == "npl":
            lines.append(
                f"NPL iterations {self.iterations}; last sup-norm CCP change "
                f"{self.last_change:.3g}; converged {self.converged}"
            )
        else:
            lines.append(f"pseudo-likelihood steps {self.iterations} from {self.learner}")
        tm = self.transitions
        if tm is not None:
            extra = f", smoothing {tm.smoothing:g}" if tm.method == "frequency" and tm.smoothing else ""
            lines.append(f"transitions: {tm.method}{extra} from {tm.n_transitions} observed "
                         f"transitions")
        lines.append(
            covariance_line(self.cov_type, self.small_sample)
            + "; includes the transition estimate's noise"
            + (" and the simulation noise" if self.values == "simulation" else "")
        )
        lines.extend(variance_share_lines(
            self.decomposition, "variance shares (choices: pseudo-score, transitions: first step):"))
        lines.append("Inference is valid only under the model's assumptions:")
        lines.extend(f"  - {a}" for a in DISCRETE_ASSUMPTIONS)
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return self._summary_html()

    def to_dict(self, level: float = 0.95) -> dict[str, Any]:
        """The core JSON fields plus the estimator's own (JSON-safe)."""
        out = super().to_dict(level)
        out["assumptions"] = list(DISCRETE_ASSUMPTIONS)
        out["estimator"] = {
            "name": self.estimator,
            "values": self.values,
            "converged": self.converged,
            "iterations": self.iterations,
            "last_change": json_number(self.last_change),
            "changes": [json_number(c) for c in self.changes],
            "loglik": json_number(self.loglik),
            "n_states": self.n_states,
            "n_paths": self.n_paths,
            "horizon": self.horizon,
            "transitions": None if self.transitions is None else {
                "method": self.transitions.method,
                "smoothing": self.transitions.smoothing,
                "n_transitions": self.transitions.n_transitions,
                "unseen": {str(k): int(v) for k, v in self.transitions.unseen.items()},
            },
        }
        return out
