"""Permanent unobserved types (finite mixtures) for dynamic logit models with discrete states.

* :func:`estimate_types` -- the mixture maximum likelihood by EM with CCPs updated from the
  model (Arcidiacono & Miller 2011), polished by Newton steps, with standard errors from the
  unit-level scores (transition noise included), the type shares and each unit's posterior
  type probabilities; returns :class:`TypesResults`, an :class:`orthoccp.Results`;
* :func:`bootstrap_types` -- a unit bootstrap of an estimate, the check on its sandwich
  standard errors (labels kept from swapping by the estimator's ordering rule);
* :class:`TypesDesign` and :func:`simulate_types` -- a renewal design whose types differ in the
  replacement cost, solved exactly, and its simulated panels.
"""

from ._bootstrap import TypesBootstrap, bootstrap_types
from ._design import TypesDesign, simulate_types
from ._estimate import TYPES_ASSUMPTIONS, TypesDetails, TypesResults, estimate_types

__all__ = ["TYPES_ASSUMPTIONS", "TypesBootstrap", "TypesDesign", "TypesDetails", "TypesResults",
           "bootstrap_types", "estimate_types", "simulate_types"]
