"""Full-solution reference estimator and the bus-engine benchmark design.

A benchmark toolkit, not part of orthoccp's main estimator: :func:`nfxp_estimate` is the nested
fixed point maximum-likelihood estimator of Rust (1987) for models whose state is discrete,
against which :func:`orthoccp.estimate` is measured (``benchmarks/discrete_reference.py``).

* :func:`solve_bellman` -- the logit Bellman equation on a finite state space (successive
  approximations, then Newton--Kantorovich steps, to sup-norm 1e-12).
* :func:`nfxp_estimate` -- two-step NFXP: transitions first (cell frequencies, a shared
  increment pmf, or given matrices), then the choice likelihood by Newton's method with the
  analytic gradient and Hessian (implicit function theorem).
* :data:`SU_JUDD_BUS`, :func:`solve_bus`, :func:`simulate_bus` -- the bus-engine replacement
  design of Su & Judd (2012, Econometrica 80), based on Rust (1987), solved exactly.
"""

from ._bellman import BellmanSolution, bellman_operator, solve_bellman, value_derivative
from ._bus import BUS_CHOICES, SU_JUDD_BUS, BusDesign, bus_transitions, simulate_bus, solve_bus
from ._nfxp import LoglikEvaluation, NFXPProblem, NFXPResults, nfxp_estimate
from ._transitions import TransitionEstimate, estimate_transitions

__all__ = [
    "BUS_CHOICES",
    "BellmanSolution",
    "BusDesign",
    "LoglikEvaluation",
    "NFXPProblem",
    "NFXPResults",
    "SU_JUDD_BUS",
    "TransitionEstimate",
    "bellman_operator",
    "bus_transitions",
    "estimate_transitions",
    "nfxp_estimate",
    "simulate_bus",
    "solve_bellman",
    "solve_bus",
    "value_derivative",
]
