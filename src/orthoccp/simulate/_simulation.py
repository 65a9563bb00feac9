"""Panel simulation from the exactly solved scenario models."""

from __future__ import annotations

import numbers
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .._errors import InputError
from .._options import check_option
from ._scenarios import SCENARIOS, Scenario, draw_covariates
from ._solve import Solution, solve

if TYPE_CHECKING:
    from ..data import Panel
    from ..model import Model as EstimationModel
    from ..nuisance import Nuisances

__all__ = ["Simulation", "scenario_names", "simulate"]


@dataclass(frozen=True, eq=False, repr=False)
class Simulation:
    """A simulated panel together with its exact model quantities.

    Attributes
    ----------
    data : pandas.DataFrame
        One row per unit-period, sorted by unit then period, with the unit,
        period, choice, state and utility columns.
    unit, period, choice : str
        Column names of the unit identifier, the period (consecutive integers
        from 0 within a unit) and the choice label.
    states : tuple of str
        Columns a first-stage learner should see: the main state and all
        covariates.
    persistent : tuple of str
        Time-invariant covariates that a renewal does not reset.
    choices : tuple of str
        Choice labels; the column order of ``ccp``, ``values`` and
        ``continuation``.
    anchor : str
        Anchor choice label.
    kind : str
        ``"renewal"`` or ``"terminal"``.
    discount : float
        Discount factor.
    utility : dict
        Per choice label, parameter name -> column name (``"1"`` is a
        constant); a choice without parameters maps to ``{}``.
    truth : dict
        True parameter values.
    ccp : numpy.ndarray
        Exact conditional choice probabilities at each row's state, shape
        ``(n_rows, J)``.
    values : numpy.ndarray
        Exact choice-specific values ``v_j`` at each row's state, shape
        ``(n_rows, J)``.
    continuation : numpy.ndarray
        Exact ``E[ln P_R(x_{t+1}) | x_t, a_t = j]`` at each row's state, shape
        ``(n_rows, J)``; NaN in the anchor's column of a terminal model.
    scenario : str
        Scenario name.
    seed : int
        Seed of the random number generator.
    solution : Solution
        Internal: the exact solution over all units and main-state levels,
        including the per-choice transition laws (``solution.model``).
    unit_index : numpy.ndarray
        Internal: row -> unit position in ``solution``.
    state_index : numpy.ndarray
        Internal: row -> main-state level.
    covariates : numpy.ndarray
        Internal: covariates of every unit, shape ``(units, n_covariates)``.
    description : str
        One-line description of the scenario or family design.
    grid_columns : Mapping
        Internal: utility data columns at every unit and solved state, each shaped like
        ``solution.V``; needed by :meth:`exact_nuisances` for the anchor's non-constant
        columns (empty for the built-in scenarios, whose anchors have none).
    """

    data: pd.DataFrame
    unit: str
    period: str
    choice: str
    states: tuple[str, ...]
    persistent: tuple[str, ...]
    choices: tuple[str, ...]
    anchor: str
    kind: str
    discount: float
    utility: dict[str, dict[str, str]]
    truth: dict[str, float]
    ccp: np.ndarray
    values: np.ndarray
    continuation: np.ndarray
    scenario: str
    seed: int
    solution: Solution = field(repr=False)
    unit_index: np.ndarray = field(repr=False)
    state_index: np.ndarray = field(repr=False)
    covariates: np.ndarray = field(repr=False)
    description: str = ""
    grid_columns: Mapping[str, np.ndarray] = field(default_factory=dict, repr=False)

    def __repr__(self) -> str:
        n_units = int(self.data[self.unit].nunique())
        return (
            f"Simulation(scenario={self.scenario!r}, seed={self.seed}, rows={len(self.data)}, "
            f"units={n_units}, choices={self.choices!r}, anchor={self.anchor!r}, "
            f"kind={self.kind!r}, discount={self.discount!r})"
        )

    def panel(self) -> Panel:
        """The data as a :class:`orthoccp.Panel` with the simulation's columns.

        Returns
        -------
        orthoccp.Panel
        """
        from ..data import Panel

        return Panel(self.data, unit=self.unit, period=self.period, choice=self.choice,
                     states=list(self.states))

    def model(self) -> EstimationModel:
        """The :class:`orthoccp.Model` to estimate: utility, anchor, kind, discount and the
        persistent states.

        Returns
        -------
        orthoccp.Model
        """
        from ..model import Model

        return Model(anchor=self.anchor, kind=self.kind,  # type: ignore[arg-type]
                     discount=self.discount, utility=dict(self.utility),  # type: ignore[arg-type]
                     persistent=tuple(self.persistent or ()))

    def exact_nuisances(self, panel: Panel | None = None,
                        model: EstimationModel | None = None) -> Nuisances:
        """The exact CCPs and continuation terms as nuisances for ``estimate(nuisances=)``.

        Parameters
        ----------
        panel : orthoccp.Panel, optional
            The panel built from :attr:`data` (:meth:`panel` when omitted); its rows must be
            the simulation's rows in the same order.
        model : orthoccp.Model, optional
            :meth:`model` when omitted.

        Returns
        -------
        orthoccp.nuisance.Nuisances
            In the panel's choice order (:func:`orthoccp.nuisances_from_truth`).
        """
        from ..nuisance import nuisances_from_truth

        panel = self.panel() if panel is None else panel
        model = self.model() if model is None else model
        bound = model.bind(panel)
        order = [list(self.choices).index(c) for c in panel.choices]
        # The continuation target q = (z_R data columns, ln P_R), each E[. | x, j] exactly.
        anchor_spec = self.utility[self.anchor]
        targets = []
        for k in bound.zR_params:
            column = anchor_spec[bound.parameters[int(k)]]
            if column not in self.grid_columns:
                raise InputError(
                    f"the anchor's utility column {column!r} has no exact values on the "
                    f"solved grid of scenario {self.scenario!r}; exact nuisances need them."
                )
            grid = np.asarray(self.grid_columns[column], dtype=float)
            expected = np.full(self.ccp.shape, np.nan)
            for j, tr in enumerate(self.solution.model.transitions):
                if tr is not None:
                    expected[:, j] = tr.expect(grid)[self.unit_index, self.state_index]
            targets.append(expected[:, order])
        mu = np.stack([*targets, self.continuation[:, order]], axis=2)
        return nuisances_from_truth(bound, self.ccp[:, order], mu)

    def spec(self) -> dict[str, Any]:
        """The model specification as plain Python types.

        Returns
        -------
        dict
            ``{"data": {"unit", "period", "choice", "states"},
            "model": {"kind", "anchor", "discount"},
            "utility": {choice: {param: column}}}``.
        """
        return {
            "data": {
                "unit": self.unit,
                "period": self.period,
                "choice": self.choice,
                "states": list(self.states),
            },
            "model": {"kind": self.kind, "anchor": self.anchor, "discount": float(self.discount)},
            "utility": {label: dict(params) for label, params in self.utility.items()},
        }


def scenario_names() -> tuple[str, ...]:
    """Names of the available scenarios.

    Returns
    -------
    tuple of str
        ``("ebike", "ebike3", "producers")``.
    """
    return tuple(SCENARIOS)


def _count(name: str, value: object, *, minimum: int) -> int:
    """Validate an integer option."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputError(f"{name} must be an integer >= {minimum}; got {value!r}")
    if value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _discount(value: object) -> float:
    """Validate the discount factor."""
    return float(check_option("discount", value))


def _draw_choices(rng: np.random.Generator, ccp: np.ndarray) -> np.ndarray:
    """Draw one choice index per row of ``ccp`` (shape ``(n, J)``)."""
    cum = np.cumsum(ccp, axis=1)
    draw = np.asarray(rng.random(ccp.shape[0]))
    return (cum[:, :-1] < draw[:, None]).sum(axis=1)


def _step(
    rng: np.random.Generator,
    solution: Solution,
    units: np.ndarray,
    states: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Simulate one period for the given units.

    Returns the choices, the next states and a mask of units still in the
    problem (false after a terminal choice).
    """
    ccp = np.exp(solution.log_ccp[units, states])
    chosen = _draw_choices(rng, ccp)
    nxt = states.copy()
    alive = np.ones(units.shape[0], dtype=bool)
    for j, tr in enumerate(solution.model.transitions):
        rows = np.flatnonzero(chosen == j)
        if tr is None:
            alive[rows] = False
        elif rows.size:
            nxt[rows] = tr.sample(rng, units[rows], states[rows])
    return chosen, nxt, alive


def _record(
    rng: np.random.Generator,
    solution: Solution,
    state: np.ndarray,
    *,
    periods: int,
    burn_in: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Simulate every unit from ``state`` (one solved-state index per unit): ``burn_in``
    unrecorded periods, then up to ``periods`` recorded ones (a terminal choice ends a unit).

    Returns the rows' unit, period, solved state and choice index, sorted by unit and period.
    """
    unit_ids = np.arange(state.shape[0])
    for _ in range(burn_in):
        _, state, _ = _step(rng, solution, unit_ids, state)
    rec_unit, rec_period, rec_state, rec_choice = [], [], [], []
    active = unit_ids
    for t in range(periods):
        chosen, nxt, alive = _step(rng, solution, active, state)
        rec_unit.append(active)
        rec_period.append(np.full(active.shape[0], t))
        rec_state.append(state)
        rec_choice.append(chosen)
        active, state = active[alive], nxt[alive]
        if active.size == 0:
            break
    row_unit = np.concatenate(rec_unit)
    row_period = np.concatenate(rec_period)
    order = np.lexsort((row_period, row_unit))
    return (
        row_unit[order],
        row_period[order],
        np.concatenate(rec_state)[order],
        np.concatenate(rec_choice)[order],
    )


def simulate(
    scenario: str,
    *,
    units: int | None = None,
    periods: int | None = None,
    seed: int = 0,
    discount: float | None = None,
    n_covariates: int | None = None,
) -> Simulation:
    """Simulate a panel from one of the built-in scenarios.

    Each unit draws its time-invariant covariates, its Bellman equation is
    solved exactly (see :func:`orthoccp.simulate._solve.solve`), and choices
    are drawn from the exact conditional choice probabilities, which is
    equivalent to drawing the type-I extreme value shocks.

    Scenarios (see :func:`scenario_names`):

    ``"ebike"``
        Bikes (column ``bike``) choose each ``week`` an ``action``, ``keep``
        or ``swap`` (anchor, renewal).  State ``wear`` in 0..24 and
        ``wear_scaled = wear / 10``; the weekly wear increment is
        Binomial(3, p_i) with ``p_i`` a non-linear function of ``x0..x4``.
        ``keep``: wear -> min(wear + inc, 24); ``swap``: wear -> inc.
        Each bike starts at wear 0 and runs a 30-week unrecorded burn-in
        under the optimal policy, so recorded wear is close to stationary.
    ``"ebike3"``
        As ``"ebike"`` with a third action ``recondition``:
        wear -> min(wear // 2 + inc, 24).
    ``"producers"``
        Producers choose each ``quarter`` a ``decision``, ``stay`` or
        ``exit`` (anchor, terminal, payoff 0).  State ``demand`` in 0..14 and
        ``demand_scaled = demand / 5``; demand moves one level up or down with
        probabilities depending non-linearly on ``x0..x4`` and mean-reverting
        in the level.  Initial demand is uniform on 5..14; an exiting
        producer has no further rows.

    A family design id such as ``"F07"`` (:func:`orthoccp.simulate.family_design`) draws a
    panel from that design instead, at the design's size unless ``units`` or ``periods`` are
    given; the design fixes its discount and covariates.

    Parameters
    ----------
    scenario : str
        Scenario name, or a family design id ``"F<seed>"``.
    units : int, optional
        Number of units: 1000 for a scenario, the design's for a family design.
    periods : int, optional
        Number of recorded periods (a terminal unit may have fewer rows): 12 for a scenario,
        the design's for a family design.
    seed : int, default 0
        Seed for :func:`numpy.random.default_rng`; the only source of randomness.
    discount : float, optional
        Discount factor in ``[0, 1)``; the scenario default (0.95) when omitted.
    n_covariates : int, optional
        Number of covariates ``x0, x1, ...`` (at least 5); 30 for the e-bike
        scenarios and 25 for ``"producers"`` when omitted.

    Returns
    -------
    Simulation
        The panel with its exact CCPs, values and continuation terms.

    Raises
    ------
    orthoccp.InputError
        (a :class:`ValueError`) for an unknown scenario or an option of the
        wrong type or out of range; the message names the option and value.
    """
    from ._family import family_design, is_family_id

    if is_family_id(scenario):
        for name, value in (("discount", discount), ("n_covariates", n_covariates)):
            if value is not None:
                raise InputError(
                    f"{name}={value!r} does not apply to the family design {scenario!r}, which "
                    f"fixes it; leave it out, or build a calibrated variant with "
                    f"orthoccp.simulate.family_design({scenario!r}, {name}=...)."
                )
        return family_design(scenario).simulate(units=units, periods=periods, seed=seed)
    if not isinstance(scenario, str) or scenario not in SCENARIOS:
        valid = ", ".join(repr(name) for name in SCENARIOS)
        raise InputError(
            f"unknown scenario {scenario!r}; valid scenarios are {valid}, or a family design "
            f"id such as 'F07'"
        )
    spec: Scenario = SCENARIOS[scenario]
    units = _count("units", 1000 if units is None else units, minimum=1)
    periods = _count("periods", 12 if periods is None else periods, minimum=1)
    seed = _count("seed", seed, minimum=0)
    beta = spec.default_discount if discount is None else _discount(discount)
    p = spec.default_covariates if n_covariates is None else n_covariates
    p = _count("n_covariates", p, minimum=spec.min_covariates)

    rng = np.random.default_rng(seed)
    X = draw_covariates(rng, units, p)
    solution = solve(spec.model(X, beta))

    state = spec.initial(rng, X)
    row_unit, row_period, row_state, row_choice = _record(
        rng, solution, state, periods=periods, burn_in=spec.burn_in
    )

    columns: dict[str, Any] = {
        spec.unit: row_unit.astype(np.int64),
        spec.period: row_period.astype(np.int64),
        spec.choice: np.asarray(spec.choices, dtype=object)[row_choice],
    }
    columns.update(spec.state_columns(row_state))
    covariate_names = tuple(f"x{i}" for i in range(p))
    for i, name in enumerate(covariate_names):
        columns[name] = X[row_unit, i]
    data = pd.DataFrame(columns)

    return Simulation(
        data=data,
        unit=spec.unit,
        period=spec.period,
        choice=spec.choice,
        states=(spec.state, *covariate_names),
        persistent=covariate_names,
        choices=spec.choices,
        anchor=spec.anchor,
        kind=spec.kind,
        discount=beta,
        utility={label: dict(params) for label, params in spec.utility.items()},
        truth=dict(spec.truth),
        ccp=solution.ccp[row_unit, row_state],
        values=solution.values[row_unit, row_state],
        continuation=solution.continuation()[row_unit, row_state],
        scenario=scenario,
        seed=seed,
        solution=solution,
        unit_index=row_unit,
        state_index=row_state,
        covariates=X,
        description=spec.description,
    )
