"""orthoccp: cross-fitted, Neyman-orthogonal CCP estimation of dynamic discrete choice models.

The public surface is listed in ``__all__``; everything else is private.
"""

from . import discrete, games, types
from ._errors import EstimationError, InputError, OrthoCCPWarning
from ._version import __version__
from .compare import Comparison, compare, difference_test
from .counterfactual import Counterfactual, DemandCurve, counterfactual, demand_curve
from .covariance import covariance_names
from .custom import (
    HansenJ,
    MomentDetails,
    MomentResults,
    Nuisance,
    OrthogonalityCheck,
    check_orthogonality,
    estimate_moments,
)
from .data import Panel
from .diagnostics import Diagnostics
from .discrete import DiscreteDetails, DiscreteResults, bin_states, check_anchor_probability, estimate_discrete
from .estimate import estimate
from .first_stage import FirstStage, first_stage
from .interval_checks import IntervalCheck
from .learners import learner_names
from .model import EULER_GAMMA, Model
from .montecarlo import MonteCarloResults, run_montecarlo
from .nuisance import Nuisances, nuisances_from_truth
from .pieces import MomentPieces
from ._progress import set_progress
from .report import write_report
from .results import ASSUMPTIONS, CrossFitDetails, Details, NotApplicable, Results, RowAccounting
from .sensitivity import DiscountSensitivity, discount_sensitivity
from .spec import read_panel
from .stability import FoldStability, fold_stability

__all__ = [
    "ASSUMPTIONS",
    "Comparison",
    "Counterfactual",
    "CrossFitDetails",
    "DemandCurve",
    "Details",
    "Diagnostics",
    "DiscountSensitivity",
    "DiscreteDetails",
    "DiscreteResults",
    "EULER_GAMMA",
    "EstimationError",
    "FirstStage",
    "FoldStability",
    "HansenJ",
    "InputError",
    "IntervalCheck",
    "Model",
    "MomentDetails",
    "MomentPieces",
    "MomentResults",
    "MonteCarloResults",
    "NotApplicable",
    "Nuisance",
    "Nuisances",
    "OrthogonalityCheck",
    "OrthoCCPWarning",
    "Panel",
    "Results",
    "RowAccounting",
    "__version__",
    "bin_states",
    "check_anchor_probability",
    "check_orthogonality",
    "compare",
    "counterfactual",
    "demand_curve",
    "covariance_names",
    "difference_test",
    "discount_sensitivity",
    "discrete",
    "estimate",
    "estimate_discrete",
    "estimate_moments",
    "first_stage",
    "fold_stability",
    "learner_names",
    "nuisances_from_truth",
    "read_panel",
    "run_montecarlo",
    "set_progress",
    "write_report",
]
