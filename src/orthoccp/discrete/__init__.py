"""Discrete-state CCP estimators: full Hotz--Miller inversion, NPL, forward simulation.

For models whose states take finitely many values (given, or binned with
:func:`bin_states`), with or without a renewal or terminal choice:

* :func:`estimate_transition_matrices` -- transition matrices per choice (cell frequencies,
  optionally smoothed; a shared increment pmf; or given), with their influence functions;
* :func:`hotz_miller_values` -- :math:`V = (I - \\beta F^P)^{-1} \\sum_j P_j (u_j + \\gamma_E
  - \\ln P_j)` by a sparse linear solve;
* :func:`estimate_discrete` -- pseudo-likelihood estimation and its NPL iterations
  (Aguirregabiria & Mira 2002), with the inversion or forward-simulated values (Hotz,
  Miller, Sanders & Smith 1994); returns :class:`DiscreteResults`, an
  :class:`orthoccp.Results`;
* :func:`check_anchor_probability` -- the estimated anchor probability right after a
  renewal, with a warning when the CCP correction of the finite-dependence estimator is
  unreliable.
"""

from ..anchor import AnchorCheck, check_anchor_probability
from ._estimate import DiscreteProblem, build_problem, estimate_discrete
from ._forward import SimulatedValues, simulate_continuation
from ._inversion import hotz_miller_values
from ._results import DISCRETE_ASSUMPTIONS, DiscreteDetails, DiscreteResults
from ._states import StateSpace, bin_states, state_space, utility_design
from ._transitions import TransitionMatrices, estimate_transition_matrices

__all__ = [
    "AnchorCheck",
    "DISCRETE_ASSUMPTIONS",
    "DiscreteDetails",
    "DiscreteProblem",
    "DiscreteResults",
    "SimulatedValues",
    "StateSpace",
    "TransitionMatrices",
    "bin_states",
    "build_problem",
    "check_anchor_probability",
    "estimate_discrete",
    "estimate_transition_matrices",
    "hotz_miller_values",
    "simulate_continuation",
    "state_space",
    "utility_design",
]
