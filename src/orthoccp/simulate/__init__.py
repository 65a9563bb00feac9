"""Simulated panels from dynamic discrete choice models with known truth.

:func:`simulate` draws a panel from one of the built-in scenarios
(:func:`scenario_names`) and returns a :class:`Simulation` holding the data,
the model specification, the true parameters and the exact conditional choice
probabilities, choice-specific values and continuation terms at every row.

The exact quantities come from solving each unit's Bellman equation over its
discrete main state (covariates are fixed per unit), vectorised across units;
see :mod:`orthoccp.simulate._solve`.

:func:`family_design` draws random designs from a seeded family (renewal and terminal,
2--4 choices, 5--50 covariates, exogenous Markov covariates, covariate-dependent scrap values,
rare to common anchors), each solved exactly the same way and calibrated to a target anchor
share; :meth:`FamilyDesign.simulate` (or :func:`simulate` with an id such as ``"F07"``) draws
its panels.
"""

from ._design import FamilyDesign
from ._family import family_design, family_id, is_family_id
from ._simulation import Simulation, scenario_names, simulate
from ._solve import EULER_GAMMA

__all__ = [
    "EULER_GAMMA",
    "FamilyDesign",
    "Simulation",
    "family_design",
    "family_id",
    "is_family_id",
    "scenario_names",
    "simulate",
]
