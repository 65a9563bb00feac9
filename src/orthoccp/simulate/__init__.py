"""Simulated panels from dynamic discrete choice models with known truth.

:func:`simulate` draws a panel from one of the built-in scenarios
(:func:`scenario_names`) and returns a :class:`Simulation` holding the data,
the model specification, the true parameters and the exact conditional choice
probabilities, choice-specific values and continuation terms at every row.

The exact quantities come from solving each unit's Bellman equation over its
discrete main state (covariates are fixed per unit), vectorised across units;
see :mod:`orthoccp.simulate._solve`.
"""

from ._simulation import Simulation, scenario_names, simulate
from ._solve import EULER_GAMMA

__all__ = ["EULER_GAMMA", "Simulation", "scenario_names", "simulate"]
