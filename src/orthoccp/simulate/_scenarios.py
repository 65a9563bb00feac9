"""The invented scenarios behind :func:`orthoccp.simulate.simulate`.

Each scenario fixes the column names, the choice labels, the anchor, the
utility specification and true parameters, and how covariates shape the
transition of the integer main state.  Covariates are time-invariant per unit;
only a handful of them matter, and they matter non-linearly, so that a
flexible first stage is needed to recover the conditional choice
probabilities.

Covariate layout (all scenarios): ``x0, x1, ...`` where every column with
index ``i % 3 == 2`` is a 0/1 indicator with success probability 0.4 and every
other column is standard normal, all mutually independent.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from ._solve import Model, Transition

__all__ = ["SCENARIOS", "Scenario", "draw_covariates"]


def _sigmoid(z: np.ndarray) -> np.ndarray:
    """Logistic function."""
    return 0.5 * (1.0 + np.tanh(0.5 * z))


def draw_covariates(rng: np.random.Generator, units: int, n_covariates: int) -> np.ndarray:
    """Draw the time-invariant covariates of ``units`` units.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    units : int
        Number of units.
    n_covariates : int
        Number of covariate columns.

    Returns
    -------
    numpy.ndarray
        Array of shape ``(units, n_covariates)``; columns with index
        ``i % 3 == 2`` are 0/1, the others standard normal.
    """
    X = rng.standard_normal((units, n_covariates))
    binary = np.arange(n_covariates) % 3 == 2
    X[:, binary] = (rng.random((units, int(binary.sum()))) < 0.4).astype(float)
    return X


@dataclass(frozen=True, eq=False)
class Scenario:
    """Static description of one scenario.

    Attributes
    ----------
    name : str
        Scenario name.
    unit, period, choice : str
        Column names of the unit identifier, the period and the choice label.
    state : str
        Column name of the integer main state.
    scaled : str
        Column name of the scaled main state used in the utilities.
    scale : float
        ``scaled = state / scale``.
    n_levels : int
        Number of main-state levels ``0..n_levels-1``.
    choices : tuple of str
        Choice labels in the fixed column order of the CCP arrays.
    anchor : str
        Anchor choice label.
    kind : str
        ``"renewal"`` or ``"terminal"``.
    default_discount : float
        Discount factor used when none is given.
    default_covariates : int
        Number of covariates used when none is given.
    min_covariates : int
        Covariates ``x0..x{min_covariates-1}`` include every relevant one.
    truth : Mapping
        True utility parameters.
    utility : Mapping
        Per choice label, parameter name -> column name (``"1"`` is a constant).
    transitions : callable
        ``transitions(X)`` returns one :class:`Transition` (or ``None`` for a
        terminal choice) per choice, given covariates of shape ``(N, p)``.
    initial : callable
        ``initial(rng, X)`` returns the starting main-state levels.
    burn_in : int
        Unrecorded periods simulated under the optimal policy before period 0.
    description : str
        One-line story of the scenario.
    """

    name: str
    unit: str
    period: str
    choice: str
    state: str
    scaled: str
    scale: float
    n_levels: int
    choices: tuple[str, ...]
    anchor: str
    kind: str
    default_discount: float
    default_covariates: int
    min_covariates: int
    truth: Mapping[str, float]
    utility: Mapping[str, Mapping[str, str]]
    transitions: Callable[[np.ndarray], tuple[Transition | None, ...]]
    initial: Callable[[np.random.Generator, np.ndarray], np.ndarray]
    burn_in: int
    description: str

    def state_columns(self, levels: np.ndarray) -> dict[str, np.ndarray]:
        """Data columns derived from main-state levels.

        Parameters
        ----------
        levels : numpy.ndarray
            Integer main-state levels.

        Returns
        -------
        dict
            ``{state: levels, scaled: levels / scale}``.
        """
        levels = np.asarray(levels, dtype=np.int64)
        return {self.state: levels, self.scaled: levels / self.scale}

    def flow(self, units: int) -> np.ndarray:
        """Flow utilities ``z_j(x)'theta`` at the true parameters.

        Parameters
        ----------
        units : int
            Number of units (the utilities do not depend on covariates).

        Returns
        -------
        numpy.ndarray
            Array of shape ``(units, n_levels, J)``.
        """
        columns = self.state_columns(np.arange(self.n_levels))
        flow = np.zeros((self.n_levels, len(self.choices)))
        for j, label in enumerate(self.choices):
            for param, column in self.utility[label].items():
                regressor = np.ones(self.n_levels) if column == "1" else columns[column]
                flow[:, j] += self.truth[param] * regressor
        return np.broadcast_to(flow, (units, *flow.shape)).copy()

    def model(self, X: np.ndarray, discount: float) -> Model:
        """The exact model for units with covariates ``X``.

        Parameters
        ----------
        X : numpy.ndarray
            Covariates, shape ``(N, p)``.
        discount : float
            Discount factor.

        Returns
        -------
        Model
            Flow utilities and transitions of every unit.
        """
        return Model(
            flow=self.flow(X.shape[0]),
            transitions=self.transitions(X),
            discount=discount,
            anchor=self.choices.index(self.anchor),
            kind=self.kind,
        )


# ---------------------------------------------------------------------------
# E-bike fleet: battery wear, renewal by swapping the battery.
# ---------------------------------------------------------------------------

_WEAR_LEVELS = 25  # wear 0..24
_WEAR_DRAWS = 3  # weekly increment ~ Binomial(3, p_i)


def wear_rate(X: np.ndarray) -> np.ndarray:
    """Per-bike probability ``p_i`` of each of the three weekly wear draws.

    Depends on ``x0`` (hill exposure), ``x1`` (rider load), ``x2`` (coastal
    station, 0/1), ``x3`` (route roughness) and ``x4`` (winter storage),
    through an interaction, a sine, a threshold and an indicator.

    Parameters
    ----------
    X : numpy.ndarray
        Covariates, shape ``(N, p)`` with ``p >= 5``.

    Returns
    -------
    numpy.ndarray
        Probabilities in ``(0.06, 0.61)``, shape ``(N,)``.
    """
    index = (
        0.9 * X[:, 0] * X[:, 1]
        + 1.2 * np.sin(2.0 * X[:, 3])
        + 1.1 * X[:, 2] * (X[:, 4] > 0.0)
        - 0.8 * (np.abs(X[:, 4]) > 1.2)
        - 0.2
    )
    return 0.06 + 0.55 * _sigmoid(index)


def _wear_increment_pmf(X: np.ndarray) -> np.ndarray:
    """Binomial(3, p_i) probabilities of increments 0..3, shape ``(N, 4)``."""
    p = wear_rate(X)[:, None]
    k = np.arange(_WEAR_DRAWS + 1)
    comb = np.array([1.0, 3.0, 3.0, 1.0])
    return comb * p**k * (1.0 - p) ** (_WEAR_DRAWS - k)


def _ebike_transitions(X: np.ndarray, *, recondition: bool) -> tuple[Transition | None, ...]:
    """keep (wear + inc, capped), [recondition (wear // 2 + inc)], swap (inc)."""
    pmf = _wear_increment_pmf(X)
    levels = np.arange(_WEAR_LEVELS)[:, None]
    inc = np.arange(_WEAR_DRAWS + 1)[None, :]
    prob = np.broadcast_to(pmf[:, None, :], (X.shape[0], _WEAR_LEVELS, _WEAR_DRAWS + 1))
    top = _WEAR_LEVELS - 1
    keep = Transition(dest=np.minimum(levels + inc, top), prob=prob)
    swap = Transition(dest=np.broadcast_to(inc, (_WEAR_LEVELS, _WEAR_DRAWS + 1)), prob=prob)
    if not recondition:
        return keep, swap
    half = Transition(dest=np.minimum(levels // 2 + inc, top), prob=prob)
    return keep, half, swap


def _ebike_initial(rng: np.random.Generator, X: np.ndarray) -> np.ndarray:
    """Every bike starts with a fresh battery (wear 0) before the burn-in."""
    return np.zeros(X.shape[0], dtype=np.intp)


# ---------------------------------------------------------------------------
# Small food producers: demand level, terminal exit.
# ---------------------------------------------------------------------------

_DEMAND_LEVELS = 15  # demand 0..14
_DEMAND_CENTRE = 7.0


def demand_drift(X: np.ndarray) -> np.ndarray:
    """Per-producer demand drift index.

    Depends on ``x0`` (product quality), ``x1`` (local income), ``x2``
    (organic label, 0/1), ``x3`` (shelf placement) and ``x4`` (seasonality)
    through a tanh, an interaction with the indicator, a cosine and a
    threshold.

    Parameters
    ----------
    X : numpy.ndarray
        Covariates, shape ``(N, p)`` with ``p >= 5``.

    Returns
    -------
    numpy.ndarray
        Drift index, shape ``(N,)``; positive values push demand up.
    """
    return (
        1.0 * np.tanh(1.5 * X[:, 0])
        + 0.8 * X[:, 1] * X[:, 2]
        + 0.7 * np.cos(2.0 * X[:, 3])
        - 0.9 * (X[:, 4] > 0.8)
        - 0.3
    )


def demand_moves(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Probabilities of a one-level demand rise and fall, each shape ``(N, D)``.

    ``up = 0.5 * sigmoid(d_i - 0.25 (s - 7))`` and
    ``down = 0.5 * sigmoid(-d_i + 0.25 (s - 7))`` with ``d_i`` from
    :func:`demand_drift`; demand stays put with the remaining probability.

    Parameters
    ----------
    X : numpy.ndarray
        Covariates, shape ``(N, p)``.

    Returns
    -------
    tuple of numpy.ndarray
        ``(up, down)``.
    """
    drift = demand_drift(X)[:, None]
    centred = 0.25 * (np.arange(_DEMAND_LEVELS)[None, :] - _DEMAND_CENTRE)
    return 0.5 * _sigmoid(drift - centred), 0.5 * _sigmoid(centred - drift)


def _producer_transitions(X: np.ndarray) -> tuple[Transition | None, ...]:
    """stay: demand moves down / stays / moves up one level (clipped); exit: terminal."""
    up, down = demand_moves(X)
    levels = np.arange(_DEMAND_LEVELS)
    dest = np.stack(
        [np.maximum(levels - 1, 0), levels, np.minimum(levels + 1, _DEMAND_LEVELS - 1)], axis=1
    )
    prob = np.stack([down, 1.0 - up - down, up], axis=2)
    return Transition(dest=dest, prob=prob), None


def _producer_initial(rng: np.random.Generator, X: np.ndarray) -> np.ndarray:
    """Producers enter the sample with demand uniform on levels 5..14."""
    return np.asarray(rng.integers(5, _DEMAND_LEVELS, size=X.shape[0]), dtype=np.intp)


def _frozen(mapping: dict[str, dict[str, str]]) -> Mapping[str, Mapping[str, str]]:
    return MappingProxyType({k: MappingProxyType(dict(v)) for k, v in mapping.items()})


_EBIKE_COMMON = dict(
    unit="bike",
    period="week",
    choice="action",
    state="wear",
    scaled="wear_scaled",
    scale=10.0,
    n_levels=_WEAR_LEVELS,
    anchor="swap",
    kind="renewal",
    default_discount=0.95,
    default_covariates=30,
    min_covariates=5,
    initial=_ebike_initial,
    burn_in=30,
)

SCENARIOS: Mapping[str, Scenario] = MappingProxyType(
    {
        "ebike": Scenario(
            name="ebike",
            choices=("keep", "swap"),
            truth=MappingProxyType({"wear_cost": -1.0, "swap_cost": -5.0}),
            utility=_frozen({"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}}),
            transitions=lambda X: _ebike_transitions(X, recondition=False),
            description="weekly keep-or-swap decision for e-bike batteries (renewal)",
            **_EBIKE_COMMON,  # type: ignore[arg-type]
        ),
        "ebike3": Scenario(
            name="ebike3",
            choices=("keep", "recondition", "swap"),
            truth=MappingProxyType(
                {"wear_cost": -1.0, "recondition_cost": -3.5, "swap_cost": -5.0}
            ),
            utility=_frozen(
                {
                    "keep": {"wear_cost": "wear_scaled"},
                    "recondition": {"recondition_cost": "1"},
                    "swap": {"swap_cost": "1"},
                }
            ),
            transitions=lambda X: _ebike_transitions(X, recondition=True),
            description="weekly keep, recondition or swap decision for e-bike batteries",
            **_EBIKE_COMMON,  # type: ignore[arg-type]
        ),
        "producers": Scenario(
            name="producers",
            unit="producer",
            period="quarter",
            choice="decision",
            state="demand",
            scaled="demand_scaled",
            scale=5.0,
            n_levels=_DEMAND_LEVELS,
            choices=("stay", "exit"),
            anchor="exit",
            kind="terminal",
            default_discount=0.95,
            default_covariates=25,
            min_covariates=5,
            truth=MappingProxyType({"fixed_cost": -2.0, "profit": 1.0}),
            utility=_frozen({"stay": {"fixed_cost": "1", "profit": "demand_scaled"}, "exit": {}}),
            transitions=_producer_transitions,
            initial=_producer_initial,
            burn_in=0,
            description="quarterly stay-or-exit decision of small food producers (terminal)",
        ),
    }
)
