"""Second-stage solves (METHOD §6).

* :func:`solve_plugin` maximises the concave pseudo log-likelihood (logit with offsets) by
  Newton's method with backtracking.
* :func:`solve_orthogonal` starts there and solves :math:`\\sum_i \\psi_i(\\theta) = 0` by damped
  Newton steps that use the Jacobian :math:`G` of :math:`\\sum m` alone
  (:math:`E[\\partial\\phi/\\partial\\theta] = 0` at the truth), backtracking on
  :math:`\\lVert G_0^{-1}\\bar\\psi\\rVert` and stopping on the step size.

Failures raise :class:`~orthoccp.EstimationError` with the condition number and the last step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._errors import EstimationError
from .moments import MomentSystem

__all__ = ["SolveInfo", "solve_plugin", "solve_orthogonal"]

_MAX_COND = 1e12


@dataclass(frozen=True)
class SolveInfo:
    """How a solve ended."""

    iterations: int
    converged: bool
    last_step: float
    condition: float
    moment_norm: float


def _checked_inverse(G: np.ndarray, what: str, step: float = float("nan")) -> np.ndarray:
    if not np.all(np.isfinite(G)):
        raise EstimationError(f"{what}: the Jacobian has non-finite entries (last step {step:.3g}).")
    cond = float(np.linalg.cond(G))
    if not np.isfinite(cond) or cond > _MAX_COND:
        raise EstimationError(
            f"{what}: the Jacobian is singular or ill-conditioned (condition number {cond:.3g}, "
            f"last step {step:.3g}); a parameter is (nearly) not identified from these data."
        )
    return np.linalg.inv(G)


def _check_separation(system: MomentSystem, theta: np.ndarray, it: int) -> None:
    """A 'converged' logit whose every choice is predicted with certainty has no finite MLE."""
    lam = system.probabilities(theta)
    chosen = lam[np.arange(system.n_rows), system.chosen]
    if float(chosen.min()) > 1.0 - 1e-8:
        raise EstimationError(
            f"plug-in solve: the utility regressors predict every choice perfectly "
            f"(separation; smallest fitted probability of the chosen alternative "
            f"{float(chosen.min()):.12f}, max |theta| {float(np.abs(theta).max()):.3g} after "
            f"{it} iterations); the estimates are not finite. Drop or coarsen the regressor "
            f"that separates the choices."
        )


def solve_plugin(
    system: MomentSystem, *, start: np.ndarray | None = None, tol: float = 1e-10, max_iter: int = 100
) -> tuple[np.ndarray, SolveInfo]:
    """Maximise the pseudo log-likelihood with plug-in nuisances.

    Newton's method on the concave objective :math:`\\sum_i \\ln\\Lambda_{a_i}(\\theta)` with
    backtracking line search; converged when the Newton decrement is below ``tol``.
    """
    theta = np.zeros(system.n_params) if start is None else np.array(start, dtype=np.float64)
    ll = system.loglik(theta)
    step_size = float("inf")
    for it in range(1, max_iter + 1):
        grad = system.score(theta).sum(axis=0)
        H = system.jacobian(theta)
        Hinv = _checked_inverse(-H, "plug-in solve", step_size)
        step = Hinv @ grad
        decrement = float(grad @ step)
        if decrement < tol:
            _check_separation(system, theta, it)
            return theta, SolveInfo(it, True, step_size, float(np.linalg.cond(H)), float(np.abs(grad).max()))
        lam = 1.0
        while True:
            cand = theta + lam * step
            ll_new = system.loglik(cand)
            if np.isfinite(ll_new) and ll_new >= ll + 1e-4 * lam * decrement:
                break
            lam *= 0.5
            if lam < 1e-10:
                raise EstimationError(
                    f"plug-in solve: line search failed at iteration {it} (last step "
                    f"{float(np.abs(step).max()):.3g}, condition number {np.linalg.cond(H):.3g})."
                )
        step_size = float(np.abs(lam * step).max())
        theta, ll = cand, ll_new
        if step_size > 1e6:
            break
    raise EstimationError(
        f"plug-in solve did not converge in {max_iter} iterations (last step {step_size:.3g}); "
        f"the choices may be perfectly predicted by the utility regressors (separation)."
    )


def psi_jacobian(system: MomentSystem, theta: np.ndarray) -> np.ndarray:
    """Jacobian of :math:`\\sum_i \\psi_i` by central differences (p is small)."""
    p = theta.size
    J = np.empty((p, p))
    for k in range(p):
        h = 1e-6 * (1.0 + abs(theta[k]))
        e = np.zeros(p)
        e[k] = h
        J[:, k] = (
            system.moment(theta + e, debias=True).sum(axis=0)
            - system.moment(theta - e, debias=True).sum(axis=0)
        ) / (2 * h)
    return J


def solve_orthogonal(
    system: MomentSystem,
    start: np.ndarray,
    *,
    tol: float = 1e-9,
    max_iter: int = 100,
) -> tuple[np.ndarray, SolveInfo]:
    """Solve :math:`\\sum_i \\psi_i(\\theta) = 0` by damped Newton steps from ``start``.

    The direction uses the Jacobian of :math:`\\sum\\psi` (central differences); where that
    is ill-conditioned it falls back to :math:`G`, the Jacobian of :math:`\\sum m`, which has
    the same limit because :math:`E[\\partial\\phi/\\partial\\theta] = 0` at the truth. Steps are
    halved until :math:`\\lVert G_0^{-1}\\bar\\psi\\rVert` decreases; the solve stops when the step,
    on the parameter scale, is below ``tol * (1 + max|theta|)``.
    """
    theta = np.array(start, dtype=np.float64)
    G0inv = _checked_inverse(system.jacobian(theta), "orthogonal solve")
    psi = system.moment(theta, debias=True).sum(axis=0)
    merit = float(np.linalg.norm(G0inv @ psi))
    step_size = float("inf")
    for it in range(1, max_iter + 1):
        G = system.jacobian(theta)
        _checked_inverse(G, "orthogonal solve", step_size)
        Jpsi = psi_jacobian(system, theta)
        directions = []
        if np.all(np.isfinite(Jpsi)) and np.linalg.cond(Jpsi) < _MAX_COND:
            directions.append(-np.linalg.solve(Jpsi, psi))
        directions.append(-np.linalg.solve(G, psi))
        full = float(np.abs(directions[0]).max())
        scale = tol * (1.0 + float(np.abs(theta).max()))
        if full < scale:
            return theta, SolveInfo(it, True, full, float(np.linalg.cond(G)), merit)
        found = None
        for step in directions:
            lam = 1.0
            while lam >= 1e-8:
                cand = theta + lam * step
                psi_new = system.moment(cand, debias=True).sum(axis=0)
                merit_new = float(np.linalg.norm(G0inv @ psi_new))
                if np.isfinite(merit_new) and (merit_new < merit * (1 - 1e-4 * lam) or merit_new == 0):
                    found = step
                    break
                lam *= 0.5
            if found is not None:
                break
        if found is None:
            if min(float(np.abs(d).max()) for d in directions) < 1e3 * scale:
                # Round-off floor: the remaining step is far below any standard error.
                return theta, SolveInfo(it, True, full, float(np.linalg.cond(G)), merit)
            raise EstimationError(
                f"orthogonal solve: no damped step reduces the moment norm at iteration {it} "
                f"(moment norm {merit:.3g}, last full step {full:.3g}, condition number of G "
                f"{np.linalg.cond(G):.3g}, of the moment Jacobian {np.linalg.cond(Jpsi):.3g})."
            )
        step = found
        step_size = float(np.abs(lam * step).max())
        theta, psi, merit = cand, psi_new, merit_new
    raise EstimationError(
        f"orthogonal solve did not converge in {max_iter} iterations (last step {step_size:.3g}, "
        f"moment norm {merit:.3g}, condition number {np.linalg.cond(system.jacobian(theta)):.3g})."
    )
