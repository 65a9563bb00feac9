"""One design of the family: its structure, exact solution, calibration and panels.

:class:`FamilyDesign` holds what a seed of :func:`orthoccp.simulate.family_design` drew and
builds, for any set of units, the exact model the solver takes. The solved state of a unit is
(main level ``s``, exogenous level ``m``) with index ``s * M + m`` (``M`` exogenous levels in
all, the product of the chains' sizes); the per-unit covariates enter the transitions through
one index and the flow utilities through the interaction and scrap-value columns, so every unit
has its own small Markov chain over ``S * M <= 60`` states and
:func:`~orthoccp.simulate._solve.solve` handles all units at once.

Calibration. The anchor's constant (the renewal cost of a renewal design; the continuing
choices' common fixed cost, with the opposite sign, of a terminal one) is set by root finding
(:func:`scipy.optimize.brentq`) so that the *expected* anchor share of the recorded panel, or the
mean anchor probability just after a renewal, hits a target. Expectations are exact: the state
distribution is propagated through the solved chains of a fixed calibration sample of
:data:`CALIBRATION_UNITS` units.
"""

from __future__ import annotations

import itertools
import numbers
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from .._errors import InputError
from ._scenarios import _sigmoid, draw_covariates
from ._simulation import Simulation, _record
from ._solve import Model, Solution, Transition, solve

__all__ = ["CALIBRATION_TOL", "CALIBRATION_UNITS", "MAX_SOLVED_STATES", "FamilyDesign", "Term"]

#: Units of the fixed calibration sample behind the anchor calibration.
CALIBRATION_UNITS: int = 300
#: Largest solved state space per unit (main levels times exogenous levels).
MAX_SOLVED_STATES: int = 60
#: Tolerance of the calibration on the expected (exact) share, absolute.
CALIBRATION_TOL: float = 1e-4

_INC_DRAWS = 3  # renewal wear increment ~ Binomial(3, p)
_BURN_IN = 20  # unrecorded periods of a renewal design before period 0
_CAL_BRACKET = (-25.0, 15.0)


# --------------------------------------------------------------------------- structure
@dataclass(frozen=True)
class Term:
    """One non-linear term of the transition index: ``coef * form(x[a], x[b])``.

    Attributes
    ----------
    form : str
        ``"product"`` (``x_a x_b``), ``"sin"`` (``sin 2 x_a``), ``"tanh"`` (``tanh 1.5 x_a``),
        ``"threshold"`` (``1{x_a > cut}``) or ``"square"`` (``x_a^2 - 1``).
    a, b : int
        Covariate indices (``b`` only for ``"product"``).
    coef : float
        Coefficient.
    cut : float
        Threshold of ``"threshold"``.
    """

    form: str
    a: int
    b: int
    coef: float
    cut: float = 0.0

    def __call__(self, X: np.ndarray) -> np.ndarray:
        xa = X[:, self.a]
        if self.form == "product":
            value = xa * X[:, self.b]
        elif self.form == "sin":
            value = np.sin(2.0 * xa)
        elif self.form == "tanh":
            value = np.tanh(1.5 * xa)
        elif self.form == "threshold":
            value = (xa > self.cut).astype(float)
        else:
            value = xa**2 - 1.0
        return self.coef * value

    def text(self) -> str:
        """Readable form, e.g. ``"0.8 sin(2 x3)"``."""
        forms = {
            "product": f"x{self.a} x{self.b}",
            "sin": f"sin(2 x{self.a})",
            "tanh": f"tanh(1.5 x{self.a})",
            "threshold": f"1[x{self.a} > {self.cut:.2f}]",
            "square": f"(x{self.a}^2 - 1)",
        }
        return f"{self.coef:+.2f} {forms[self.form]}"


_FORMS = ("product", "sin", "tanh", "threshold", "square")
_RENEWAL_CHOICES = {2: ("keep", "replace"), 3: ("keep", "repair", "replace"),
                    4: ("keep", "service", "repair", "replace")}
_TERMINAL_CHOICES = {2: ("stay", "exit"), 3: ("stay", "invest", "exit"),
                     4: ("stay", "invest", "shrink", "exit")}
# Terminal designs: shift of the demand drift under each continuing choice.
_DRIFT_SHIFT = {"stay": 0.0, "invest": 1.2, "shrink": -1.2}


@dataclass(frozen=True, eq=False)
class FamilyDesign:
    """One design of the family: its structure, true parameters and default panel size.

    Build it with :func:`family_design`; draw panels with :meth:`simulate`.

    Attributes
    ----------
    id : str
        Short id, ``"F07"`` for seed 7 (``"F07*"`` when targets changed the draw).
    seed : int
        Design seed: it fixes the structure and the true parameters.
    kind : str
        ``"renewal"`` or ``"terminal"``.
    choices : tuple of str
        Choice labels; the anchor is the last.
    units, periods : int
        Default panel size (500--4,000 units, 6--20 periods).
    n_levels : int
        Main-state levels ``0..n_levels-1``.
    n_covariates : int
        Time-invariant covariates ``x0, x1, ...`` (5--50).
    discount : float
        Discount factor (0.90--0.98).
    terms : tuple of Term
        Non-linear terms of the transition index in the covariates.
    exo_levels : tuple of int
        Levels of each exogenous Markov covariate ``e0, e1`` (empty: none).
    exo_stay : tuple of float
        Probability that each exogenous covariate keeps its level; otherwise it moves to a
        neighbouring level.
    exo_effect : float
        Effect of ``e0`` on the transition index (0 without exogenous covariates).
    interact : int
        Index of the persistent covariate interacted with the main state in the utility.
    resale_source : str
        Column whose ``exp(0.4 * value)`` is the scrap value's regressor (terminal designs).
    truth : Mapping
        True parameter values (the anchor constant after calibration).
    utility : Mapping
        Per choice, parameter name -> column name (``"1"`` a constant).
    calibration : Mapping
        The calibration target and what it reached: ``target``, ``value``, ``achieved``.
    """

    id: str
    seed: int
    kind: str
    choices: tuple[str, ...]
    units: int
    periods: int
    n_levels: int
    n_covariates: int
    discount: float
    terms: tuple[Term, ...]
    exo_levels: tuple[int, ...]
    exo_stay: tuple[float, ...]
    exo_effect: float
    interact: int
    resale_source: str
    truth: Any
    utility: Any
    calibration: Any = field(default_factory=lambda: MappingProxyType({}))

    # ------------------------------------------------------------------ names
    @property
    def anchor(self) -> str:
        """Anchor choice label (the last choice)."""
        return self.choices[-1]

    @property
    def unit(self) -> str:
        """Unit column name."""
        return "machine" if self.kind == "renewal" else "firm"

    @property
    def period(self) -> str:
        """Period column name."""
        return "period" if self.kind == "renewal" else "year"

    @property
    def choice(self) -> str:
        """Choice column name."""
        return "action" if self.kind == "renewal" else "decision"

    @property
    def state(self) -> str:
        """Main-state column name (integer levels)."""
        return "wear" if self.kind == "renewal" else "demand"

    @property
    def scaled(self) -> str:
        """Scaled main-state column used in the utilities."""
        return f"{self.state}_scaled"

    @property
    def scale(self) -> float:
        """``scaled = level / scale``."""
        return self.n_levels / (2.5 if self.kind == "renewal" else 3.0)

    @property
    def covariate_names(self) -> tuple[str, ...]:
        """Time-invariant covariates ``x0, x1, ...``."""
        return tuple(f"x{i}" for i in range(self.n_covariates))

    @property
    def exo_names(self) -> tuple[str, ...]:
        """Exogenous time-varying covariates ``e0, e1`` (may be empty)."""
        return tuple(f"e{i}" for i in range(len(self.exo_levels)))

    @property
    def states(self) -> tuple[str, ...]:
        """Columns a first-stage learner sees: main state, covariates, exogenous covariates."""
        return (self.state, *self.covariate_names, *self.exo_names)

    @property
    def persistent(self) -> tuple[str, ...]:
        """States a renewal does not reset: the covariates and the exogenous covariates."""
        return (*self.covariate_names, *self.exo_names)

    @property
    def anchor_constant(self) -> str:
        """The calibrated parameter: renewal cost, or the continuing choices' fixed cost."""
        return "replace_cost" if self.kind == "renewal" else "fixed_cost"

    @property
    def description(self) -> str:
        """One line: kind, choices, size, covariates, exogenous chains, discount, anchor share."""
        exo = (
            "no exogenous covariate" if not self.exo_levels
            else f"exogenous Markov {'+'.join(map(str, self.exo_levels))} levels"
        )
        share = self.calibration.get("achieved")
        target = self.calibration.get("target", "anchor_share")
        rare = "" if share is None else (
            f", {'P(anchor) after renewal' if target == 'anchor_after_renewal' else 'anchor share'} "
            f"{share:.3f}"
        )
        extra = f", scrap value exp(0.4 {self.resale_source})" if self.kind == "terminal" else ""
        return (
            f"{self.kind}, {len(self.choices)} choices ({'/'.join(self.choices)}), "
            f"N={self.units} T={self.periods}, {self.n_levels} levels, {self.n_covariates} "
            f"covariates ({len(self._relevant())} in transitions), {exo}, "
            f"state x x{self.interact} in utility{extra}, beta={self.discount:.3f}{rare}"
        )

    def _relevant(self) -> tuple[int, ...]:
        idx = {t.a for t in self.terms} | {t.b for t in self.terms if t.form == "product"}
        return tuple(sorted(idx))

    # ------------------------------------------------------------------ exogenous chain
    def _exo_grid(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Values ``(M, n_exo)``, transition ``(M, M)`` and stationary law ``(M,)`` of the
        joint exogenous chain; joint level ``m = m0 * levels1 + m1``."""
        Q: np.ndarray = np.ones((1, 1))
        for levels, stay in zip(self.exo_levels, self.exo_stay, strict=True):
            q = np.zeros((levels, levels))
            for a in range(levels):
                nbrs = [b for b in (a - 1, a + 1) if 0 <= b < levels]
                q[a, a] = stay
                q[a, nbrs] = (1.0 - stay) / len(nbrs)
            Q = np.kron(Q, q)
        grids = [np.linspace(-1.0, 1.0, levels) for levels in self.exo_levels]
        values = np.array(list(itertools.product(*grids)), dtype=float).reshape(
            Q.shape[0], len(self.exo_levels)
        )
        # Stationary law: the left eigenvector of Q for eigenvalue 1 (a birth-death chain's
        # law is positive and unique).
        w, vecs = np.linalg.eig(Q.T)
        stat = np.abs(np.real(vecs[:, np.argmin(np.abs(w - 1.0))]))
        return values, Q, stat / stat.sum()

    # ------------------------------------------------------------------ regressors
    def _resale(self, X: np.ndarray, exo: np.ndarray) -> np.ndarray:
        if self.resale_source.startswith("e"):
            return np.exp(0.4 * exo[..., int(self.resale_source[1:])])
        return np.exp(0.4 * X[..., int(self.resale_source[1:])])

    def columns(self, X: np.ndarray, level: np.ndarray, exo: np.ndarray) -> dict[str, np.ndarray]:
        """Data columns derived from covariates, main levels and exogenous values.

        Parameters
        ----------
        X : numpy.ndarray
            Covariates ``(..., n_covariates)``.
        level : numpy.ndarray
            Main levels ``(...)``.
        exo : numpy.ndarray
            Exogenous values ``(..., n_exo)``.

        Returns
        -------
        dict
            The main state, its scaled version, the interaction, the resale value (terminal).
        """
        level = np.asarray(level)
        scaled = level / self.scale
        out = {
            self.state: level.astype(np.int64),
            self.scaled: scaled,
            f"{self.state}_x{self.interact}": scaled * X[..., self.interact],
        }
        if self.kind == "terminal":
            out["resale"] = self._resale(X, exo)
        return out

    def grid_columns(self, X: np.ndarray) -> dict[str, np.ndarray]:
        """The utility columns at every unit and solved state, each ``(N, S*M)``.

        Parameters
        ----------
        X : numpy.ndarray
            Covariates ``(N, n_covariates)``.

        Returns
        -------
        dict
            :meth:`columns` and the exogenous covariates on the solved grid.
        """
        values, _, _ = self._exo_grid()
        S, M = self.n_levels, values.shape[0]
        n = X.shape[0]
        level = np.broadcast_to(np.repeat(np.arange(S), M)[None, :], (n, S * M))
        exo = np.broadcast_to(np.tile(values, (S, 1))[None, :, :], (n, S * M, values.shape[1]))
        cols = self.columns(X[:, None, :], level, exo)
        cols.update({name: exo[..., i] for i, name in enumerate(self.exo_names)})
        return {k: np.broadcast_to(v, (n, S * M)) for k, v in cols.items()}

    def _flow(self, X: np.ndarray, truth: Any, cols: dict[str, np.ndarray] | None = None
              ) -> np.ndarray:
        """Flow utilities ``(N, S*M, J)`` at ``truth`` on the solved grid."""
        cols = self.grid_columns(X) if cols is None else cols
        n, SM = cols[self.state].shape
        flow = np.zeros((n, SM, len(self.choices)))
        for j, label in enumerate(self.choices):
            for param, column in self.utility[label].items():
                flow[:, :, j] += truth[param] * (1.0 if column == "1" else cols[column])
        return flow

    # ------------------------------------------------------------------ transitions
    def _index(self, X: np.ndarray) -> np.ndarray:
        """Transition index ``(N, M)``: the covariate terms plus the effect of ``e0``."""
        values, _, _ = self._exo_grid()
        base = sum((t(X) for t in self.terms), np.zeros(X.shape[0]))
        e0 = values[:, 0] if values.shape[1] else np.zeros(values.shape[0])
        return base[:, None] + self.exo_effect * e0[None, :]

    def _transitions(self, X: np.ndarray) -> tuple[Transition | None, ...]:
        _, Q, _ = self._exo_grid()
        S, M, n = self.n_levels, Q.shape[0], X.shape[0]
        index = self._index(X)  # (n, M)
        levels = np.arange(S)
        out: list[Transition | None] = []
        if self.kind == "renewal":
            p = 0.05 + 0.5 * _sigmoid(index - 0.3)  # (n, M)
            k = np.arange(_INC_DRAWS + 1)
            comb = np.array([1.0, 3.0, 3.0, 1.0])
            pmf = comb * p[..., None] ** k * (1.0 - p[..., None]) ** (_INC_DRAWS - k)  # (n,M,K)
            starts = {"keep": levels, "service": np.maximum(levels - 2, 0),
                      "repair": levels // 2, "replace": np.zeros(S, dtype=int)}
            main_prob = np.broadcast_to(pmf[:, None, :, :], (n, S, M, _INC_DRAWS + 1))
            for label in self.choices:
                main_dest = np.minimum(starts[label][:, None] + k[None, :], S - 1)
                out.append(_combine(main_dest, main_prob, Q))
            return tuple(out)
        centred = 0.25 * (levels - (S - 1) / 2.0)  # (S,)
        dest = np.stack([np.maximum(levels - 1, 0), levels, np.minimum(levels + 1, S - 1)], 1)
        for label in self.choices[:-1]:
            drift = index[:, None, :] - 0.2 + _DRIFT_SHIFT[label] - centred[None, :, None]
            up, down = 0.5 * _sigmoid(drift), 0.5 * _sigmoid(-drift)  # (n, S, M)
            main_prob = np.stack([down, 1.0 - up - down, up], axis=3)
            out.append(_combine(dest, main_prob, Q))
        out.append(None)
        return tuple(out)

    def exact_model(self, X: np.ndarray, truth: Any | None = None) -> Model:
        """The solver's model for units with covariates ``X``.

        Parameters
        ----------
        X : numpy.ndarray
            Covariates ``(N, n_covariates)``.
        truth : mapping, optional
            Parameter values; the design's truth when omitted.

        Returns
        -------
        orthoccp.simulate._solve.Model
        """
        return Model(
            flow=self._flow(X, self.truth if truth is None else truth),
            transitions=self._transitions(X),
            discount=self.discount,
            anchor=len(self.choices) - 1,
            kind=self.kind,
        )

    # ------------------------------------------------------------------ expectations
    def _initial_law(self, n: int) -> np.ndarray:
        """Distribution of the solved state at the start (before any burn-in), ``(n, S*M)``."""
        _, _, stat = self._exo_grid()
        S, M = self.n_levels, stat.shape[0]
        main = np.zeros(S)
        if self.kind == "renewal":
            main[0] = 1.0
        else:
            main[S // 3:] = 1.0 / (S - S // 3)
        return np.broadcast_to(np.kron(main, stat), (n, S * M)).copy()

    def _burn_in(self) -> int:
        return _BURN_IN if self.kind == "renewal" else 0

    def expected_shares(self, solution: Solution, *, periods: int | None = None) -> dict[str, float]:
        """Exact expected choice shares of a recorded panel, and the mean anchor probability
        just after a renewal (renewal designs).

        Parameters
        ----------
        solution : Solution
            A solved :meth:`exact_model`.
        periods : int, optional
            Recorded periods; the design's by default.

        Returns
        -------
        dict
            Choice label -> expected share of rows, and ``"anchor_after_renewal"`` (NaN for a
            terminal design).
        """
        T = self.periods if periods is None else periods
        model = solution.model
        ccp = solution.ccp
        mats = [None if tr is None else tr.matrix() for tr in model.transitions]
        policy = sum(ccp[:, :, j, None] * m for j, m in enumerate(mats) if m is not None)
        d = self._initial_law(ccp.shape[0])
        for _ in range(self._burn_in()):
            d = np.einsum("ns,nst->nt", d, policy)
        counts = np.zeros(ccp.shape[2])
        after = 0.0
        for _ in range(T):
            counts += np.einsum("ns,nsj->j", d, ccp)
            if self.kind == "renewal":
                R = mats[-1]
                assert R is not None
                nxt = np.einsum("nst,nt->ns", R, ccp[:, :, -1])
                after += float(np.einsum("ns,ns->", d * ccp[:, :, -1], nxt))
            d = np.einsum("ns,nst->nt", d, policy)
        out = {label: float(c / counts.sum()) for label, c in zip(self.choices, counts, strict=True)}
        out["anchor_after_renewal"] = (
            after / float(counts[-1]) if self.kind == "renewal" else float("nan")
        )
        return out

    def _calibration_covariates(self) -> np.ndarray:
        rng = np.random.default_rng(np.random.SeedSequence(self.seed, spawn_key=(1,)))
        return draw_covariates(rng, CALIBRATION_UNITS, self.n_covariates)

    def calibrate(self, *, target: str, value: float) -> FamilyDesign:
        """The design with its anchor constant set so that ``target`` equals ``value``.

        Parameters
        ----------
        target : {"anchor_share", "anchor_after_renewal"}
            Expected share of anchor rows in the recorded panel, or (renewal designs) the mean
            anchor probability at the state just after a renewal, weighted by renewals.
        value : float
            Target in (0, 1).

        Returns
        -------
        FamilyDesign
            A copy with the calibrated truth; ``calibration`` records the target and the exact
            expected value reached (within :data:`CALIBRATION_TOL`).

        Raises
        ------
        orthoccp.InputError
            For an unknown target, a value outside (0, 1), ``anchor_after_renewal`` on a terminal
            design, or a target no anchor constant in [-25, 15] reaches.
        """
        if target not in ("anchor_share", "anchor_after_renewal"):
            raise InputError(
                f"calibration target {target!r} is unknown; use 'anchor_share' or "
                f"'anchor_after_renewal'."
            )
        if target == "anchor_after_renewal" and self.kind != "renewal":
            raise InputError(
                f"{target}={value!r} needs a renewal design; design {self.id} is terminal. "
                f"Use anchor_share."
            )
        if isinstance(value, bool) or not isinstance(value, numbers.Real) or not 0 < value < 1:
            raise InputError(f"{target} must be a share in (0, 1); got {value!r}")
        sign = 1.0 if self.kind == "renewal" else -1.0
        name = self.anchor_constant
        key = self.anchor if target == "anchor_share" else "anchor_after_renewal"
        shares = self._calibration_shares()

        def reached(c: float) -> float:
            truth = dict(self.truth)
            truth[name] = sign * c
            return shares(truth)[key]

        lo, hi = _CAL_BRACKET
        f_lo, f_hi = reached(lo) - value, reached(hi) - value
        if f_lo * f_hi > 0:
            raise InputError(
                f"{target}={value!r} is out of reach for design {self.id}: an anchor constant "
                f"in [{lo:g}, {hi:g}] gives {f_lo + value:.4g} to {f_hi + value:.4g}; choose a "
                f"target in that range."
            )
        c = brentq(lambda c: reached(c) - value, lo, hi, xtol=1e-9, rtol=1e-12)
        truth = dict(self.truth)
        truth[name] = float(sign * c)
        achieved = reached(c)
        if abs(achieved - value) > CALIBRATION_TOL:  # pragma: no cover - brentq guarantees it
            raise RuntimeError(f"calibration reached {achieved} for target {value}")
        return replace(
            self,
            truth=MappingProxyType(truth),
            calibration=MappingProxyType(
                {"target": target, "value": float(value), "achieved": float(achieved)}
            ),
        )

    def _calibration_shares(self) -> Callable[[Mapping[str, float]], dict[str, float]]:
        """``truth -> expected_shares`` on the fixed calibration sample."""
        X = self._calibration_covariates()
        transitions = self._transitions(X)
        cols = self.grid_columns(X)

        def shares(truth: Mapping[str, float]) -> dict[str, float]:
            model = Model(flow=self._flow(X, truth, cols), transitions=transitions,
                          discount=self.discount, anchor=len(self.choices) - 1, kind=self.kind)
            return self.expected_shares(solve(model, tol=1e-10))

        return shares

    def calibrate_shares(self, shares: Mapping[str, float], *, max_iter: int = 200
                         ) -> FamilyDesign:
        """The design with its choice constants set so that the expected choice shares hit
        ``shares``.

        Each choice but the first (``keep`` or ``stay``, whose flow has no constant of its own)
        has one constant that moves its log-odds against the first: its own cost (renewal;
        ``invest_cost``, ``shrink_gain``), or minus the fixed cost for ``exit``. The constants
        are updated together by the log-odds gap, ``c_j += ln(target_j / share_j) -
        ln(target_0 / share_0)``, until every share is within :data:`CALIBRATION_TOL`.

        Parameters
        ----------
        shares : mapping
            Choice label -> target expected share of rows; every choice, summing to one.
        max_iter : int, default=200
            Most updates.

        Returns
        -------
        FamilyDesign
            A copy with the calibrated truth; ``calibration`` records the targets, the shares
            reached (``shares``) and the anchor's (``achieved``).

        Raises
        ------
        orthoccp.InputError
            For missing or unknown choices, shares outside (0, 1) or not summing to one, or
            targets the iteration does not reach.
        """
        if not isinstance(shares, Mapping) or set(shares) != set(self.choices):
            raise InputError(
                f"choice_shares must give a share for each of {list(self.choices)}; got "
                f"{shares!r}."
            )
        target: dict[str, float] = {}
        for label in self.choices:
            v = shares[label]
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not 0 < v < 1:
                raise InputError(f"choice_shares[{label!r}] must be in (0, 1); got {v!r}")
            target[label] = float(v)
        if abs(sum(target.values()) - 1.0) > 1e-9:
            raise InputError(f"choice_shares must sum to one; they sum to {sum(target.values())}")
        levers = {label: (f"{label}_cost", 1.0) for label in self.choices[1:]}
        if self.kind == "terminal":
            levers = {label: (f"{label}_cost" if label == "invest" else f"{label}_gain", 1.0)
                      for label in self.choices[1:-1]}
            levers[self.anchor] = ("fixed_cost", -1.0)
        expected = self._calibration_shares()
        truth = dict(self.truth)
        base = self.choices[0]
        for _ in range(max_iter):
            now = expected(truth)
            gap = max(abs(now[c] - target[c]) for c in self.choices)
            if gap <= CALIBRATION_TOL:
                break
            shift = np.log(target[base] / now[base])
            for label, (param, sign) in levers.items():
                step = np.log(target[label] / now[label]) - shift
                truth[param] += sign * float(np.clip(step, -3.0, 3.0))
        else:
            raise InputError(
                f"choice_shares {target} are out of reach for design {self.id} after "
                f"{max_iter} updates (last shares {now}); choose shares nearer the design's."
            )
        return replace(
            self,
            truth=MappingProxyType(truth),
            calibration=MappingProxyType(
                {"target": "choice_shares", "value": MappingProxyType(target),
                 "achieved": float(now[self.anchor]),
                 "shares": MappingProxyType({c: float(now[c]) for c in self.choices})}
            ),
        )

    # ------------------------------------------------------------------ panels
    def simulate(
        self, *, units: int | None = None, periods: int | None = None, seed: int = 0
    ) -> Simulation:
        """Draw a panel from the design, with its exact nuisances.

        Parameters
        ----------
        units, periods : int, optional
            Panel size; the design's when omitted.
        seed : int, default=0
            Seed of the panel (covariates, exogenous paths, choices); the design (structure
            and truth) stays fixed.

        Returns
        -------
        Simulation
            ``scenario`` is the design id; ``state_index`` indexes the solved state
            ``level * M + exogenous level``.
        """
        from ._simulation import _count

        n = self.units if units is None else _count("units", units, minimum=1)
        T = self.periods if periods is None else _count("periods", periods, minimum=1)
        seed = _count("seed", seed, minimum=0)
        rng = np.random.default_rng(seed)
        X = draw_covariates(rng, n, self.n_covariates)
        grid = self.grid_columns(X)
        solution = solve(Model(flow=self._flow(X, self.truth, grid),
                               transitions=self._transitions(X), discount=self.discount,
                               anchor=len(self.choices) - 1, kind=self.kind))
        values, _, _ = self._exo_grid()
        law = self._initial_law(n)
        cum = np.cumsum(law, axis=1)
        state = (cum[:, :-1] < rng.random(n)[:, None]).sum(axis=1)
        row_unit, row_period, row_state, row_choice = _record(
            rng, solution, state, periods=T, burn_in=self._burn_in()
        )
        M = values.shape[0]
        level, exo = row_state // M, values[row_state % M]
        data_cols: dict[str, Any] = {
            self.unit: row_unit.astype(np.int64),
            self.period: row_period.astype(np.int64),
            self.choice: np.asarray(self.choices, dtype=object)[row_choice],
        }
        data_cols.update(self.columns(X[row_unit], level, exo))
        for i, name in enumerate(self.covariate_names):
            data_cols[name] = X[row_unit, i]
        for i, name in enumerate(self.exo_names):
            data_cols[name] = exo[:, i]
        return Simulation(
            data=pd.DataFrame(data_cols),
            unit=self.unit,
            period=self.period,
            choice=self.choice,
            states=self.states,
            persistent=self.persistent,
            choices=self.choices,
            anchor=self.anchor,
            kind=self.kind,
            discount=self.discount,
            utility={label: dict(p) for label, p in self.utility.items()},
            truth=dict(self.truth),
            ccp=solution.ccp[row_unit, row_state],
            values=solution.values[row_unit, row_state],
            continuation=solution.continuation()[row_unit, row_state],
            scenario=self.id,
            seed=seed,
            solution=solution,
            unit_index=row_unit,
            state_index=row_state,
            covariates=X,
            description=self.description,
            grid_columns=MappingProxyType(grid),
        )


def _combine(main_dest: np.ndarray, main_prob: np.ndarray, Q: np.ndarray) -> Transition:
    """Joint transition of (main level, exogenous level) with independent exogenous moves.

    ``main_dest`` is ``(S, K)``, ``main_prob`` ``(n, S, M, K)`` (the main move may depend on the
    current exogenous level) and ``Q`` the ``(M, M)`` exogenous transition.
    """
    S, K = main_dest.shape
    M = Q.shape[0]
    n = main_prob.shape[0]
    # Solved state s*M + m; successor slot k*M + m' goes to main_dest[s, k]*M + m'.
    dest = (main_dest[:, None, :, None] * M + np.arange(M)[None, None, None, :])  # (S,1,K,M)
    dest = np.broadcast_to(dest, (S, M, K, M)).reshape(S * M, K * M)
    prob = main_prob[..., None] * Q[None, None, :, None, :]  # (n,S,M,K,M)
    return Transition(dest=dest, prob=prob.reshape(n, S * M, K * M))
