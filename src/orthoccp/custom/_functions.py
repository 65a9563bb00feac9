"""Calling the user's moment and target functions, and their row-wise derivatives.

The moment ``m(theta, rows, nu)`` must be *row-wise*: row t's moment may depend on the
nuisance values of row t only (values at the next row or at a counterfactual point are
already aligned to row t). Then the directional derivative of the sample moment along any
function b(Z) of a nuisance is :math:`\\sum_t D_t\\, b(Z_{t})` with the per-row derivative
:math:`D_t = \\partial m_t / \\partial \\gamma_t`, which one central difference per evaluation
label gives for all rows at once. The row-wise property is checked numerically.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from .._errors import EstimationError, InputError
from ._spec import Rows

__all__ = ["MomentFunction", "rowwise_derivative", "fd_steps"]

_REL = 1e-5


class MomentFunction:
    """The user's moment with shape checks; non-moment rows are returned as zeros."""

    def __init__(self, fn: Callable[..., Any], rows: Rows) -> None:
        if not callable(fn):
            raise InputError(
                f"moment must be a function m(theta, rows, nu) -> (n_rows, k) array, got "
                f"{type(fn).__name__}."
            )
        self.fn = fn
        self.rows = rows
        self.use: np.ndarray | None = None

    def raw(self, theta: np.ndarray, nu: Mapping[str, np.ndarray]) -> np.ndarray:
        n = self.rows.n_rows
        try:
            out = self.fn(np.array(theta, dtype=np.float64), self.rows, nu)
        except KeyError as exc:
            raise InputError(
                f"the moment asked for {exc.args[0]!r}, which is not a nuisance value "
                f"(available: {', '.join(nu)})."
            ) from exc
        try:
            arr = np.asarray(out, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"the moment must return a numeric array, got {type(out).__name__}.") from exc
        if arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2 or arr.shape[0] != n:
            raise InputError(
                f"the moment returned shape {arr.shape}; expected (n_rows, k) = ({n}, k), one "
                f"row per data row (NaN on rows where it is not defined)."
            )
        return arr

    def __call__(self, theta: np.ndarray, nu: Mapping[str, np.ndarray]) -> np.ndarray:
        arr = self.raw(theta, nu)
        assert self.use is not None, "moment rows are fixed at the start"
        bad = ~np.isfinite(arr[self.use])
        if bad.any():
            raise EstimationError(
                f"the moment is not finite on {int(bad.any(axis=1).sum())} moment rows at "
                f"theta={np.round(theta, 6).tolist()}; it was finite there at the start."
            )
        arr = np.where(self.use[:, None], arr, 0.0)
        return arr


def fd_steps(values: np.ndarray, binary: bool) -> np.ndarray:
    """Per-row finite-difference steps (probabilities stay inside (0, 1))."""
    v = np.where(np.isfinite(values), values, 0.0)
    if binary:
        return 1e-4 * np.minimum(v, 1.0 - v).clip(1e-12)
    finite = values[np.isfinite(values)]
    scale = float(np.sqrt(np.mean(finite**2))) if finite.size else 1.0
    return _REL * (np.abs(v) + max(scale, 1e-8))


def rowwise_derivative(
    f: Callable[[Mapping[str, np.ndarray]], np.ndarray],
    nu: Mapping[str, np.ndarray],
    label: str,
    steps: np.ndarray,
    *,
    what: str,
    check: bool = True,
) -> np.ndarray:
    """:math:`\\partial f_t / \\partial \\nu[label]_t` per row by central differences, (n, k).

    Rows where the value is undefined (NaN) or where f is not finite get 0. With ``check``,
    a second difference along random signs verifies that f is row-wise.
    """
    base = np.asarray(nu[label])
    defined = np.isfinite(base)
    h = np.where(defined, steps, 0.0)

    def shifted(delta: np.ndarray) -> np.ndarray:
        moved = dict(nu)
        moved[label] = np.where(defined, base + delta, base)
        out = np.asarray(f(moved), dtype=np.float64)
        return out[:, None] if out.ndim == 1 else out

    up, down = shifted(h), shifted(-h)
    with np.errstate(invalid="ignore", divide="ignore"):
        D = (up - down) / (2 * np.where(h > 0, h, 1.0))[:, None]
    D = np.where(np.isfinite(D) & defined[:, None], D, 0.0)
    if check and defined.any():
        # A fixed, irregular sign pattern (a multiplicative hash of the row index).
        t = np.arange(base.shape[0], dtype=np.uint64)
        signs = np.where(((t * np.uint64(2654435761)) >> np.uint64(11)) & np.uint64(1), 1.0, -1.0)
        up2, down2 = shifted(signs * h), shifted(-signs * h)
        with np.errstate(invalid="ignore"):
            lhs = (up2 - down2) / 2.0
        rhs = D * (signs * h)[:, None]
        ok = np.isfinite(lhs) & defined[:, None]
        err = np.abs(np.where(ok, lhs - rhs, 0.0)).max()
        size = np.abs(np.where(ok, rhs, 0.0)).max()
        if err > 1e-4 * size + 1e-300 and err > 1e-12:
            raise InputError(
                f"{what} is not row-wise in {label!r}: changing that value on other rows "
                f"changes a row's result (discrepancy {err:.3g} against a derivative of size "
                f"{size:.3g}). Row t may use nuisance values of row t only; for values at the "
                f"next row declare at={{...: 'next'}}."
            )
    return D
