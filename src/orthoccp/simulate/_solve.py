"""Exact solution of the simulated dynamic discrete choice models.

Every simulated unit has its own time-invariant covariates, so its main state
(an integer level ``0..S-1``) follows its own small Markov chain under each
choice.  The Bellman equation is solved for all units at once on arrays of
shape ``(units, states)``.

Notation (shared with the rest of :mod:`orthoccp.simulate`):

* ``flow[n, s, j]`` -- deterministic flow utility of choice ``j`` for unit
  ``n`` in state ``s``;
* ``v[n, s, j]`` -- choice-specific value ``flow + discount * E[V(x') | x, j]``
  (the anchor of a terminal model has no continuation term);
* ``V[n, s]`` -- ex-ante value ``logsumexp_j v[n, s, j] + EULER_GAMMA``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..dp import EULER_GAMMA, logsumexp, solve_values

__all__ = [
    "EULER_GAMMA",
    "Model",
    "Solution",
    "Transition",
    "bellman",
    "logsumexp",
    "solve",
]

@dataclass(frozen=True, eq=False)
class Transition:
    """Sparse transition law of the main state under one choice.

    From state ``s``, unit ``n`` moves to state ``dest[s, k]`` with
    probability ``prob[n, s, k]``; the ``K`` successor slots of a state may
    repeat a destination (for instance when a level is capped).

    Parameters
    ----------
    dest : numpy.ndarray
        Integer array of shape ``(S, K)`` with entries in ``0..S-1``.
    prob : numpy.ndarray
        Array of shape ``(N, S, K)``; each ``prob[n, s, :]`` sums to one.
    """

    dest: np.ndarray
    prob: np.ndarray

    def __post_init__(self) -> None:
        dest = np.asarray(self.dest)
        prob = np.asarray(self.prob, dtype=float)
        if dest.ndim != 2 or prob.ndim != 3 or prob.shape[1:] != dest.shape:
            raise ValueError(
                f"Transition needs dest of shape (S, K) and prob of shape (N, S, K); "
                f"got {dest.shape} and {prob.shape}"
            )
        if dest.min() < 0 or dest.max() >= dest.shape[0]:
            raise ValueError("Transition dest entries must lie in 0..S-1")
        if not np.allclose(prob.sum(axis=2), 1.0, rtol=0.0, atol=1e-12) or prob.min() < 0:
            raise ValueError("Transition prob rows must be non-negative and sum to one")
        object.__setattr__(self, "dest", dest.astype(np.intp))
        object.__setattr__(self, "prob", prob)

    @property
    def n_units(self) -> int:
        """Number of units ``N``."""
        return int(self.prob.shape[0])

    @property
    def n_states(self) -> int:
        """Number of main-state levels ``S``."""
        return int(self.dest.shape[0])

    def expect(self, f: np.ndarray) -> np.ndarray:
        """Conditional expectation ``E[f(n, x') | x = s]`` for every unit and state.

        Parameters
        ----------
        f : numpy.ndarray
            Array of shape ``(N, S)``: a function of the unit and next state.

        Returns
        -------
        numpy.ndarray
            Array of shape ``(N, S)``.
        """
        return np.einsum("nsk,nsk->ns", self.prob, f[:, self.dest])

    def matrix(self, units: np.ndarray | slice | None = None) -> np.ndarray:
        """Dense transition matrices.

        Parameters
        ----------
        units : numpy.ndarray or slice, optional
            Subset of units (all units when omitted).

        Returns
        -------
        numpy.ndarray
            Array ``T`` of shape ``(n, S, S)`` with ``T[n, s, s'] = Pr(x' = s' | x = s)``.
        """
        prob = self.prob if units is None else self.prob[units]
        n_states = self.n_states
        out = np.zeros((prob.shape[0], n_states, n_states))
        rows = np.arange(n_states)
        for k in range(self.dest.shape[1]):
            # Within one successor slot each (state, destination) pair is unique,
            # so the buffered in-place addition is exact.
            out[:, rows, self.dest[:, k]] += prob[:, :, k]
        return out

    def sample(self, rng: np.random.Generator, units: np.ndarray, states: np.ndarray) -> np.ndarray:
        """Draw next states for the given (unit, state) pairs.

        Parameters
        ----------
        rng : numpy.random.Generator
            Source of randomness.
        units, states : numpy.ndarray
            Integer arrays of equal length.

        Returns
        -------
        numpy.ndarray
            Next-state indices, same length as ``units``.
        """
        cum = np.cumsum(self.prob[units, states], axis=1)
        draw = np.asarray(rng.random(units.shape[0]))
        slot = (cum[:, :-1] < draw[:, None]).sum(axis=1)
        return self.dest[states, slot]


@dataclass(frozen=True, eq=False)
class Model:
    """A stationary infinite-horizon logit dynamic discrete choice model.

    Parameters
    ----------
    flow : numpy.ndarray
        Flow utilities, shape ``(N, S, J)``.
    transitions : tuple of Transition or None
        One entry per choice; ``None`` marks a terminal choice (no continuation).
    discount : float
        Discount factor in ``[0, 1)``.
    anchor : int
        Index of the anchor choice.
    kind : str
        ``"renewal"`` or ``"terminal"``.
    """

    flow: np.ndarray
    transitions: tuple[Transition | None, ...]
    discount: float
    anchor: int
    kind: str

    def __post_init__(self) -> None:
        n_units, n_states, n_choices = self.flow.shape
        if len(self.transitions) != n_choices:
            raise ValueError("Model needs one transition entry per choice")
        for tr in self.transitions:
            if tr is not None and (tr.n_units, tr.n_states) != (n_units, n_states):
                raise ValueError("Model transition shapes do not match the flow utilities")
        if not 0.0 <= self.discount < 1.0:
            raise ValueError(f"discount must lie in [0, 1); got {self.discount!r}")
        if self.kind not in ("renewal", "terminal"):
            raise ValueError(f"kind must be 'renewal' or 'terminal'; got {self.kind!r}")
        anchor_is_terminal = self.transitions[self.anchor] is None
        if anchor_is_terminal != (self.kind == "terminal"):
            raise ValueError("a terminal model's anchor (and only it) has no transition")
        if sum(tr is None for tr in self.transitions) > int(anchor_is_terminal):
            raise ValueError("only the anchor may be terminal")

    @property
    def shape(self) -> tuple[int, int, int]:
        """``(N, S, J)``: units, main-state levels and choices."""
        n_units, n_states, n_choices = self.flow.shape
        return int(n_units), int(n_states), int(n_choices)

    def choice_values(self, V: np.ndarray) -> np.ndarray:
        """Choice-specific values implied by an ex-ante value function.

        Parameters
        ----------
        V : numpy.ndarray
            Ex-ante values, shape ``(N, S)``.

        Returns
        -------
        numpy.ndarray
            ``flow + discount * E[V(x') | x, j]``, shape ``(N, S, J)``.
        """
        v = self.flow.copy()
        if self.discount > 0.0:
            for j, tr in enumerate(self.transitions):
                if tr is not None:
                    v[:, :, j] += self.discount * tr.expect(V)
        return v


@dataclass(frozen=True, eq=False)
class Solution:
    """Exact solution of a :class:`Model`.

    Attributes
    ----------
    model : Model
        The solved model.
    V : numpy.ndarray
        Ex-ante values, shape ``(N, S)``.
    values : numpy.ndarray
        Choice-specific values, shape ``(N, S, J)``.
    log_ccp : numpy.ndarray
        Log conditional choice probabilities, shape ``(N, S, J)``.
    iterations : int
        Number of value-iteration (successive approximation) steps.
    newton_steps : int
        Number of Newton--Kantorovich steps.
    change : float
        Sup-norm residual ``|bellman(V) - V|`` at the returned ``V`` (the change one more
        value-iteration step would make).
    """

    model: Model
    V: np.ndarray
    values: np.ndarray
    log_ccp: np.ndarray
    iterations: int
    newton_steps: int
    change: float

    @property
    def ccp(self) -> np.ndarray:
        """Conditional choice probabilities, shape ``(N, S, J)``."""
        return np.exp(self.log_ccp)

    def continuation(self) -> np.ndarray:
        """``E[ln P_R(x') | x, j]`` for every choice ``j`` (NaN for a terminal anchor).

        Returns
        -------
        numpy.ndarray
            Array of shape ``(N, S, J)``.
        """
        log_anchor = self.log_ccp[:, :, self.model.anchor]
        out = np.full(self.values.shape, np.nan)
        for j, tr in enumerate(self.model.transitions):
            if tr is not None:
                out[:, :, j] = tr.expect(log_anchor)
        return out


def bellman(model: Model, V: np.ndarray) -> np.ndarray:
    """Apply the logit Bellman operator once.

    Parameters
    ----------
    model : Model
        The model.
    V : numpy.ndarray
        Ex-ante values, shape ``(N, S)``.

    Returns
    -------
    numpy.ndarray
        ``logsumexp_j(flow_j + discount * E[V(x') | x, j]) + EULER_GAMMA``.
    """
    return logsumexp(model.choice_values(V)) + EULER_GAMMA


def _newton_matrix(model: Model, ccp: np.ndarray) -> np.ndarray:
    """``I - discount * sum_j diag(P_j) T_j`` per unit, shape ``(N, S, S)``.

    The derivative of ``V - bellman(V)``: the CCP-weighted transition matrices of the
    non-terminal choices.
    """
    n_units, n_states, _ = model.shape
    system = np.broadcast_to(np.eye(n_states), (n_units, n_states, n_states)).copy()
    rows = np.arange(n_states)
    for j, tr in enumerate(model.transitions):
        if tr is None:
            continue
        weight = model.discount * ccp[:, :, j]
        for k in range(tr.dest.shape[1]):
            system[:, rows, tr.dest[:, k]] -= weight * tr.prob[:, :, k]
    return system


def solve(
    model: Model,
    *,
    tol: float = 1e-12,
    max_iter: int = 100_000,
    newton: bool = True,
    newton_max: int = 50,
) -> Solution:
    """Solve the Bellman equation of ``model`` for all units at once.

    The solve is :func:`orthoccp.dp.solve_values`, the one Bellman solver of the package:
    successive approximations from ``V = 0`` until the change is small, then
    Newton--Kantorovich steps (smoothed policy iteration) until the sup-norm residual
    ``|bellman(V) - V|`` over all units and states is below ``tol``. With ``newton=False``
    it is plain value iteration to the same tolerance and the same fixed point.

    Parameters
    ----------
    model : Model
        The model to solve.
    tol : float, default 1e-12
        Sup-norm tolerance on ``bellman(V) - V`` (the change of one value-iteration step).
    max_iter : int, default 100000
        Maximum number of value-iteration steps when ``newton=False``.
    newton : bool, default True
        Whether Newton--Kantorovich steps take over from value iteration.
    newton_max : int, default 50
        Maximum number of Newton--Kantorovich steps.

    Returns
    -------
    Solution
        Values, log CCPs and convergence information.

    Raises
    ------
    orthoccp.EstimationError
        If the residual stays above ``tol`` (and above the rounding floor).
    """
    n_units, n_states, _ = model.shape
    steps = dict(max_newton=newton_max) if newton and model.discount > 0.0 else dict(
        max_newton=0, switch_tol=0.0, max_contraction=max_iter)
    sol = solve_values(model.choice_values, lambda ccp: _newton_matrix(model, ccp),
                       np.zeros((n_units, n_states)), tol=tol, **steps)
    return Solution(
        model=model,
        V=sol.value,
        values=sol.choice_values,
        log_ccp=sol.log_ccp,
        iterations=sol.contraction_steps,
        newton_steps=sol.newton_steps,
        change=sol.residual,
    )
