r"""A renewal design with permanent unobserved types, solved exactly, and its simulated panels.

Each unit has a mileage-like state :math:`x \in \{0, \dots, S-1\}` and chooses each period to
keep (flow utility :math:`\theta_w x`) or to replace (:math:`\theta_R + \alpha_k`, where
:math:`\alpha_k` is the replacement-cost shift of the unit's permanent type k, :math:`\alpha_1
= 0`). Keeping moves the state up by an increment drawn from a pmf (capped at the top state);
replacing restarts it from 0 before the increment. Types are drawn once per unit with the
design's shares, independently of the first state, which is uniform over the lower half of the
states for every type. Each type's CCPs are the exact solution of its Bellman equation
(:func:`orthoccp.dp.solve_values`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .._errors import InputError
from ..dp import solve_values

__all__ = ["TypesDesign", "simulate_types"]


@dataclass(frozen=True)
class TypesDesign:
    r"""A renewal design with K permanent types that differ in the replacement cost.

    Attributes
    ----------
    n_states : int, default=10
        States :math:`0, \dots, S-1`.
    wear : float, default=-0.3
        :math:`\theta_w`, the flow utility of keeping per unit of state.
    replace : float, default=-3.0
        :math:`\theta_R`, the flow utility of replacing for type 1.
    shifts : tuple of float, default=(0.0, 1.5)
        :math:`\alpha_k`, each type's replacement-cost shift (the first is 0).
    shares : tuple of float, default=(0.6, 0.4)
        :math:`\pi_k`, the population share of each type.
    increments : tuple of float, default=(0.3, 0.5, 0.2)
        Pmf of the state's increment 0, 1, 2, ... after either choice.
    discount : float, default=0.95
        :math:`\beta`.
    wear_shifts : tuple of float, optional
        Each type's shift of the wear coefficient (the first is 0); None: no type difference
        in wear.
    """

    n_states: int = 10
    wear: float = -0.3
    replace: float = -3.0
    shifts: tuple[float, ...] = (0.0, 1.5)
    shares: tuple[float, ...] = (0.6, 0.4)
    increments: tuple[float, ...] = (0.3, 0.5, 0.2)
    discount: float = 0.95
    wear_shifts: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        if self.wear_shifts is not None and (len(self.wear_shifts) != len(self.shares)
                                             or self.wear_shifts[0] != 0.0):
            raise InputError("wear_shifts needs one entry per type, the first 0.")
        if len(self.shifts) != len(self.shares) or len(self.shares) < 1:
            raise InputError("shifts and shares must have one entry per type.")
        if self.shifts[0] != 0.0:
            raise InputError(f"the first type's shift is the reference and must be 0, got "
                             f"{self.shifts[0]!r}.")
        if abs(sum(self.shares) - 1.0) > 1e-12 or min(self.shares) <= 0:
            raise InputError(f"shares must be positive and sum to one, got {self.shares!r}.")
        if abs(sum(self.increments) - 1.0) > 1e-12 or min(self.increments) < 0:
            raise InputError(f"increments must be a pmf, got {self.increments!r}.")

    @property
    def n_types(self) -> int:
        return len(self.shares)

    @property
    def truth(self) -> dict[str, float]:
        """The parameters as :func:`~orthoccp.types.estimate_types` names them, with
        ``utility={"keep": {"wear": "x"}, "replace": {"replace": "1"}}``,
        ``type_shifts=["replace"]`` and, with ``wear_shifts``, ``type_slopes=["wear"]``."""
        out = {"wear": self.wear, "replace": self.replace}
        out.update({f"replace:type{k + 1}": a for k, a in enumerate(self.shifts) if k > 0})
        if self.wear_shifts is not None:
            out.update({f"wear:type{k + 1}": a for k, a in enumerate(self.wear_shifts) if k > 0})
        out.update({f"share:type{k + 1}": s for k, s in enumerate(self.shares) if k > 0})
        return out

    def transitions(self) -> np.ndarray:
        """(2, S, S) transition matrices of keep and replace."""
        S, pmf = self.n_states, np.asarray(self.increments)
        F = np.zeros((2, S, S))
        for s in range(S):
            for inc, prob in enumerate(pmf):
                F[0, s, min(s + inc, S - 1)] += prob
                F[1, s, min(inc, S - 1)] += prob
        return F

    def utilities(self) -> np.ndarray:
        """(K, S, 2) flow utilities of each type."""
        x = np.arange(self.n_states, dtype=np.float64)
        u = np.empty((self.n_types, self.n_states, 2))
        wear = self.wear + np.asarray(self.wear_shifts or (0.0,) * self.n_types)
        u[:, :, 0] = wear[:, None] * x[None, :]
        u[:, :, 1] = self.replace + np.asarray(self.shifts)[:, None]
        return u

    def ccp(self) -> np.ndarray:
        """(K, S, 2) each type's exact CCPs (Bellman residual below 1e-12)."""
        F, u, beta = self.transitions(), self.utilities(), self.discount

        def choice_values(V: np.ndarray) -> np.ndarray:
            return u + beta * np.einsum("jst,nt->nsj", F, V)

        def newton_matrix(P: np.ndarray) -> np.ndarray:
            return np.eye(self.n_states)[None] - beta * np.einsum("nsj,jst->nst", P, F)

        return solve_values(choice_values, newton_matrix,
                            np.zeros((self.n_types, self.n_states))).ccp


def simulate_types(design: TypesDesign, *, units: int, periods: int, seed: int) -> pd.DataFrame:
    """Simulate a panel of ``units`` x ``periods`` from the design's exact CCPs.

    Returns
    -------
    pandas.DataFrame
        Columns ``unit``, ``period``, ``x`` (state), ``choice`` (``"keep"``/``"replace"``)
        and ``type`` (1..K, for checks only: an estimator must not read it).
    """
    if units < 1 or periods < 2:
        raise InputError(f"need units >= 1 and periods >= 2, got {units} and {periods}.")
    rng = np.random.default_rng(seed)
    P, F = design.ccp(), design.transitions()
    S = design.n_states
    kind = rng.choice(design.n_types, size=units, p=np.asarray(design.shares))
    x = rng.integers(0, max(S // 2, 1), size=units)
    rows = []
    for t in range(periods):
        a = (rng.random(units) < P[kind, x, 1]).astype(int)
        rows.append(pd.DataFrame({"unit": np.arange(units), "period": t, "x": x,
                                  "choice": np.where(a == 1, "replace", "keep"),
                                  "type": kind + 1}))
        cum = F[a, x].cumsum(axis=1)
        x = np.minimum((rng.random(units)[:, None] > cum).sum(axis=1), S - 1)
    return pd.concat(rows, ignore_index=True)
