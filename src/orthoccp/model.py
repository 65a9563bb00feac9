"""Model description: choices, anchor, discount factor and linear flow utilities.

A :class:`Model` is data-free; :meth:`Model.bind` validates it against a :class:`~orthoccp.Panel`
and returns a :class:`BoundModel` holding the flow-utility design ``Z`` (rows x choices x
parameters) and the bookkeeping the moments need.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from ._errors import InputError
from ._options import check_option
from ._labels import check_declared, declare_in_python, match_keys, match_label, show_label
from .data import Panel

__all__ = ["Model", "BoundModel", "EULER_GAMMA", "CONSTANT", "check_constant_name"]

EULER_GAMMA = 0.5772156649015329
"""Euler–Mascheroni constant: the mean of a standard type-I extreme-value draw."""

CONSTANT = "1"
"""Column name that stands for a constant regressor in a utility specification."""

Kind = Literal["renewal", "terminal"]

# Utility columns beyond 1e±100 are refused: their squares overflow or underflow float64.
_EXTREME_SCALE = 1e100


@dataclass(frozen=True)
class Model:
    """A dynamic discrete choice model with one finite-dependence anchor choice.

    Parameters
    ----------
    anchor : hashable
        Label of the anchor choice R (renewal or terminal).
    kind : {"renewal", "terminal"}
        ``"renewal"``: after R the next state's distribution does not depend on the earlier
        choice. ``"terminal"``: R ends the problem with flow payoff :math:`z_R(x)'\\theta` and
        no continuation value.
    discount : float
        Known discount factor :math:`\\beta`, ``0 <= discount < 1``.
    utility : mapping
        Per choice label, a mapping parameter name -> data column; ``"1"`` is a constant
        (so a data column named ``"1"`` must be renamed).
        A parameter may appear under several choices. Every observed choice must be listed:
        a choice with zero flow utility as an empty mapping (``"keep": {}``). An observed
        label the utility does not list is an error (:meth:`bind`), and so are two
        spellings of one label that differ only by case or surrounding whitespace
        (``"keep"`` and ``"keep "``), unless both are listed. Labels match exactly, or as
        the same number (``1``, ``1.0`` and ``"1"`` name one choice; two such keys are an
        error).
    persistent : sequence of str, default=()
        States a renewal does not reset (used by renewal-robust moments).

    Notes
    -----
    Flow utility :math:`u_j(x;\\theta) = z_j(x)'\\theta + \\varepsilon_j` with
    :math:`\\varepsilon_j` i.i.d. type-I extreme value; Markov states with conditional
    independence; stationarity; known :math:`\\beta`. With finite dependence
    (Arcidiacono & Miller 2011) the value differences are

    .. math::

        w_j = [z_j - z_R]'\\theta + \\beta\\,(E[h(x')\\mid x, j] - E[h(x')\\mid x, R]),
        \\quad h = z_R'\\theta - \\ln P_R

    for renewal models and
    :math:`w_j = [z_j - z_R]'\\theta + \\beta E[z_R(x')'\\theta - \\ln P_R(x') + \\gamma_E\\mid x, j]`
    for terminal ones.

    Examples
    --------
    >>> m = Model(anchor="swap", kind="renewal", discount=0.95,
    ...           utility={"keep": {"wear_cost": "wear"}, "swap": {"swap_cost": "1"}})
    >>> m.parameters
    ('wear_cost', 'swap_cost')
    >>> Model(anchor="swap", kind="renewal", discount=0.95,
    ...       utility={"keep": {}, "swap": {"swap_cost": "1"}}).parameters
    ('swap_cost',)
    """

    anchor: Hashable
    kind: Kind
    discount: float
    utility: Mapping[Hashable, Mapping[str, str]]
    persistent: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        if self.kind not in ("renewal", "terminal"):
            raise InputError(
                f"kind must be 'renewal' or 'terminal', got {self.kind!r}."
            )
        object.__setattr__(self, "discount", check_option("discount", self.discount))
        if not isinstance(self.utility, Mapping) or not self.utility:
            raise InputError("utility must map at least one choice to {parameter: column}.")
        for choice, spec in self.utility.items():
            if not isinstance(spec, Mapping):
                raise InputError(
                    f"utility[{choice!r}] must map parameter names to columns, got {spec!r}."
                )
            for name, col in spec.items():
                if not isinstance(name, str) or not name:
                    raise InputError(f"utility[{choice!r}] has a bad parameter name {name!r}.")
                if not isinstance(col, str) or not col:
                    raise InputError(
                        f"utility[{choice!r}][{name!r}] must be a column name (or '1'), got {col!r}."
                    )
        if not self.parameters:
            raise InputError("utility declares no parameters.")
        object.__setattr__(self, "persistent", _persistent_names(self.persistent))

    @property
    def parameters(self) -> tuple[str, ...]:
        """Parameter names in order of first appearance."""
        names: list[str] = []
        for spec in self.utility.values():
            for name in spec:
                if name not in names:
                    names.append(name)
        return tuple(names)

    def bind(self, panel: Panel) -> BoundModel:
        """Validate the model against ``panel`` and build the flow-utility design."""
        return BoundModel.build(self, panel)

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python description (JSON/TOML friendly)."""
        return {
            "anchor": self.anchor,
            "kind": self.kind,
            "discount": self.discount,
            "utility": {str(c): dict(s) for c, s in self.utility.items()},
            "persistent": list(self.persistent),
        }


def check_constant_name(columns: Any, where: str) -> None:
    """A data column named ``"1"`` cannot be told from the constant ``"1"``: refuse it.

    Called where a utility uses the constant, with the data's columns.
    """
    if CONSTANT in columns:
        raise InputError(
            f"{where}: the data have a column named {CONSTANT!r}, which the utility cannot tell "
            f"from the constant {CONSTANT!r}; rename that column (e.g. df.rename(columns="
            f"{{'1': 'x1'}})) and use the new name where you mean the column."
        )


def _persistent_names(value: Any) -> tuple[str, ...]:
    """``persistent=`` as a tuple of state names (a single name is accepted too)."""
    if isinstance(value, str):
        return (value,)
    if value is None or isinstance(value, Mapping) or not isinstance(value, (Sequence, set, frozenset)):
        raise InputError(
            f"persistent must be a list of state names (e.g. persistent=['x0']; [] for none), "
            f"got {type(value).__name__} {value!r}."
        )
    bad = [v for v in value if not isinstance(v, str) or not v]
    if bad:
        raise InputError(
            f"persistent must list state names as strings, got {bad[0]!r} "
            f"({type(bad[0]).__name__}) in {list(value)!r}."
        )
    return tuple(value)


@dataclass(frozen=True, eq=False)
class BoundModel:
    """A :class:`Model` validated against a panel.

    Attributes
    ----------
    Z : numpy.ndarray
        Flow-utility design, shape (n_rows, n_choices, n_params): ``Z[i, j, k]`` is the
        column of parameter k under choice j at row i (0 when k is not in u_j).
    anchor_index : int
        Position of the anchor in ``panel.choices``.
    zR_params : numpy.ndarray
        Indices of parameters that enter u_R through a data column (not the constant); their
        next-period values are continuation targets.
    zR_constants : numpy.ndarray
        Indices of parameters that enter u_R as the constant.
    """

    model: Model
    panel: Panel
    Z: np.ndarray
    anchor_index: int
    zR_params: np.ndarray
    zR_constants: np.ndarray

    @classmethod
    def build(cls, model: Model, panel: Panel) -> BoundModel:
        J = len(panel.choices)
        if J < 2:
            raise InputError(
                f"only one choice ({show_label(panel.choices[0])}) is observed in column "
                f"{panel.choice!r}; a discrete choice model needs at least two."
            )
        counts = np.bincount(panel.choice_codes, minlength=J)
        anchor = match_label(model.anchor, panel.choices, role="anchor", column=panel.choice,
                             counts=counts)
        positions = match_keys(model.utility, panel.choices, role="utility choice",
                               column=panel.choice, counts=counts)
        check_declared(positions.values(), panel.choices, counts, column=panel.choice,
                       fix=declare_in_python)
        params = model.parameters
        p = len(params)
        Z = np.zeros((panel.n_rows, J, p))
        columns: dict[str, np.ndarray] = {}
        for choice, spec in model.utility.items():
            j = positions[choice]
            for name, col in spec.items():
                k = params.index(name)
                if col == CONSTANT:
                    check_constant_name(panel.frame.columns, f"utility[{show_label(choice)}]"
                                        f"[{name!r}]")
                    Z[:, j, k] = 1.0
                else:
                    if col not in columns:
                        columns[col] = panel.column(col)
                    Z[:, j, k] = columns[col]
        for col in model.persistent:
            if col not in panel.states:
                raise InputError(
                    f"persistent state {col!r} is not one of the states "
                    f"({', '.join(panel.states)}); persistent columns must be states."
                )
        zR_params: list[int] = []
        zR_constants: list[int] = []
        R_spec = {
            name: col
            for choice, spec in model.utility.items()
            if positions[choice] == anchor
            for name, col in spec.items()
        }
        for name, col in R_spec.items():
            (zR_constants if col == CONSTANT else zR_params).append(params.index(name))
        bound = cls(
            model=model,
            panel=panel,
            Z=Z,
            anchor_index=anchor,
            zR_params=np.asarray(zR_params, dtype=np.int64),
            zR_constants=np.asarray(zR_constants, dtype=np.int64),
        )
        bound._check_identified()
        return bound

    @property
    def parameters(self) -> tuple[str, ...]:
        return self.model.parameters

    @property
    def n_targets(self) -> int:
        """Dimension of the continuation target q = (z_R data columns, ln P_R)."""
        return int(self.zR_params.size) + 1

    @property
    def has_next_stage(self) -> bool:
        """False when discount is 0 (static logit: no continuation terms)."""
        return self.model.discount > 0.0

    def continuation_choices(self) -> np.ndarray:
        """Choices j whose continuation expectation mu_j is needed."""
        J = len(self.panel.choices)
        if self.model.kind == "renewal":
            return np.arange(J)
        return np.array([j for j in range(J) if j != self.anchor_index])

    def next_targets_data(self) -> np.ndarray:
        """z_R data columns at every row (n_rows, n_zR); the ln P_R part is added later."""
        return self.Z[:, self.anchor_index, :][:, self.zR_params]

    def _check_scale(self, Z: np.ndarray) -> None:
        """Utility columns of extreme scale (beyond 1e±100) break the rank check and the solve
        (their squares overflow or underflow): name them before anything else."""
        largest = np.abs(Z).max(axis=(0, 1)) if Z.size else np.zeros(Z.shape[2])
        extreme = (largest > _EXTREME_SCALE) | ((largest > 0) & (largest < 1 / _EXTREME_SCALE))
        for k in np.flatnonzero(extreme):
            name = self.parameters[k]
            cols = sorted({col for spec in self.model.utility.values() for p, col in spec.items()
                           if p == name and col != CONSTANT})
            raise InputError(
                f"utility column(s) {', '.join(map(repr, cols))} of parameter {name!r} have an "
                f"extreme scale (largest absolute value {largest[k]:.3g}); the estimation needs "
                f"values of moderate size. Rescale the column (e.g. to values of order 1; the "
                f"parameter scales inversely)."
            )

    def _check_identified(self, rows: np.ndarray | None = None) -> None:
        """Each parameter needs variation in z_j - z_R not spanned by the others.

        ``rows`` restricts the check to the moment rows (``None``: every row); a parameter can
        vary in the panel and still be constant on the rows that enter the moments.
        """
        R = self.anchor_index
        Z = self.Z if rows is None else self.Z[rows]
        where = "in all rows" if rows is None else f"in the {Z.shape[0]} moment rows"
        self._check_scale(Z)
        diffs = [Z[:, j, :] - Z[:, R, :] for j in range(Z.shape[1]) if j != R]
        D = np.vstack(diffs)
        # Terminal models with a constant in u_R: beta * 1 enters X and can identify it.
        if self.model.kind == "terminal" and self.zR_constants.size and self.model.discount > 0:
            D = D.copy()
            D[:, self.zR_constants] += self.model.discount
        scale = np.sqrt((D**2).mean(axis=0))
        names = self.parameters
        zero = np.flatnonzero(scale == 0)
        if zero.size:
            bad = ", ".join(repr(names[k]) for k in zero)
            raise InputError(
                f"parameter(s) {bad} not identified: the regressor is the same for every "
                f"choice (z_j - z_R = 0 {where}); a constant column under every choice, "
                f"or the same column under all choices, cancels. Drop the parameter or let it "
                f"enter some choices only."
            )
        Dn = D / scale
        # Rank check through pivoted QR on the (choice-differenced) design.
        from scipy.linalg import qr

        _, Rm, piv = qr(Dn, mode="economic", pivoting=True)
        diag = np.abs(np.diag(Rm))
        tol = diag.max() * max(Dn.shape) * 1e-10
        rank = int((diag > tol).sum())
        if rank < Dn.shape[1]:
            dependent = [names[k] for k in piv[rank:]]
            raise InputError(
                f"parameter(s) {', '.join(map(repr, dependent))} not identified: their "
                f"utility columns are constant or collinear with the other parameters' "
                f"{where} (rank {rank} of {Dn.shape[1]}). Drop one of the collinear parameters."
            )
