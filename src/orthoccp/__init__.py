"""orthoccp: cross-fitted, Neyman-orthogonal CCP estimation of dynamic discrete choice models.

The public surface is listed in ``__all__``; everything else is private.
"""

from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._version import __version__
from .compare import Comparison, compare, difference_test
from .covariance import covariance_names
from .data import Panel
from .diagnostics import Diagnostics
from .estimate import estimate
from .learners import learner_names
from .model import EULER_GAMMA, Model
from .nuisance import Nuisances, nuisances_from_truth
from .results import ASSUMPTIONS, NotApplicable, Results, RowAccounting

__all__ = [
    "ASSUMPTIONS",
    "Comparison",
    "Diagnostics",
    "EULER_GAMMA",
    "EstimationError",
    "InputError",
    "Model",
    "NotApplicable",
    "Nuisances",
    "OrthoCCPWarning",
    "Panel",
    "Results",
    "RowAccounting",
    "__version__",
    "compare",
    "covariance_names",
    "difference_test",
    "estimate",
    "learner_names",
    "nuisances_from_truth",
]
