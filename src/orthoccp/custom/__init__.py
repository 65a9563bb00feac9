"""Plug in your own moments: cross-fitted ML nuisances with automatic debiasing (METHOD §8).

Declare each nuisance as a conditional expectation (:class:`Nuisance`), write the moment as
a NumPy function ``m(theta, rows, nu)``, and :func:`estimate_moments` cross-fits the
nuisances by unit, finds the correction terms by Riesz regression, solves the GMM problem
and returns :class:`~orthoccp.Results`. :func:`check_orthogonality` checks numerically that
the corrected moment is insensitive to the nuisances.
"""

from ._check import OrthogonalityCheck, check_orthogonality
from ._dictionary import dictionary_names
from ._estimate import MomentDetails, MomentFit, MomentResults, estimate_moments
from ._gmm import HansenJ
from ._spec import Nuisance, Rows

__all__ = [
    "HansenJ",
    "MomentDetails",
    "MomentFit",
    "MomentResults",
    "Nuisance",
    "OrthogonalityCheck",
    "Rows",
    "check_orthogonality",
    "dictionary_names",
    "estimate_moments",
]
