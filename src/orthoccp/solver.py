"""Second-stage solves (METHOD §6).

* :func:`solve_plugin` maximises the concave pseudo log-likelihood (logit with offsets) by
  Newton's method with backtracking.
* :func:`solve_orthogonal` starts there and solves :math:`\\sum_i \\psi_i(\\theta) = 0` by damped
  Newton steps that use the Jacobian :math:`G` of :math:`\\sum m` alone
  (:math:`E[\\partial\\phi/\\partial\\theta] = 0` at the truth), backtracking on
  :math:`\\lVert G_0^{-1}\\bar\\psi\\rVert` and stopping on the step size. When the damped
  Newton solve fails it does not stop: a Powell hybrid root-finder on the same scaled moment
  is tried, and where :math:`\\sum\\psi` has no root near the plug-in solution the one-step
  estimator :math:`\\hat\\theta_1 = \\hat\\theta_{plug} - \\hat G^{-1}\\bar\\psi(\\hat\\theta_{plug})`
  is returned (Newey & McFadden 1994, Handbook of Econometrics vol. 4, §3.4). Which route was
  taken, and why, is recorded in :class:`SolveInfo`.

A singular or ill-conditioned :math:`G` (no estimate exists) raises
:class:`~orthoccp.EstimationError` with the condition number and the last step.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import optimize

from ._arrays import group_sums
from ._errors import EstimationError
from ._numeric import central_jacobian
from .covariance import clustered_outer
from .moments import MomentSystem

__all__ = ["ROUTES", "SolveInfo", "solve_plugin", "solve_orthogonal"]

_MAX_COND = 1e12


ROUTES = ("newton", "root", "one_step")
"""How :func:`solve_orthogonal` found its answer: damped Newton, the Powell hybrid root-finder,
or the one-step estimator from the plug-in solution."""

NEAR_SE = 1.0
"""A root of the fallback root-finder is accepted when every parameter lies within this many
standard errors of the one-step estimate (both have the debiased estimator's first-order
distribution, so a root farther away is not the one the theory describes)."""


@dataclass(frozen=True)
class SolveInfo:
    """How a solve ended.

    Attributes
    ----------
    route : {"newton", "root", "one_step"}
        Which solution is returned (see :func:`solve_orthogonal`).
    note : str
        Why a fallback route was taken (empty for ``"newton"``).
    one_step : numpy.ndarray or None
        The one-step estimate from the plug-in solution (set by :func:`solve_orthogonal`
        whatever the route): its distance to the solution measures how far the moment is from
        linear between the two (:mod:`orthoccp.interval_checks`).
    """

    iterations: int
    converged: bool
    last_step: float
    condition: float
    moment_norm: float
    route: str = "newton"
    note: str = ""
    one_step: np.ndarray | None = field(default=None, repr=False)


class _SolveFailed(Exception):
    """Damped Newton stopped without a root (caught by :func:`solve_orthogonal`)."""

    def __init__(self, message: str, iterations: int) -> None:
        super().__init__(message)
        self.iterations = iterations


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
    """Jacobian of :math:`\\sum_i \\psi_i` by central differences
    (:func:`orthoccp._numeric.central_jacobian`; p is small)."""
    return central_jacobian(lambda th: system.moment(th, debias=True).sum(axis=0), theta)


def solve_orthogonal(
    system: MomentSystem,
    start: np.ndarray,
    *,
    tol: float = 1e-9,
    max_iter: int = 100,
    fallback: bool = True,
) -> tuple[np.ndarray, SolveInfo]:
    r"""Solve :math:`\sum_i \psi_i(\theta) = 0` from the plug-in solution ``start``.

    Parameters
    ----------
    system : MomentSystem
        The moment system (anything with ``moment``, ``jacobian``, ``units``).
    start : numpy.ndarray
        The plug-in solution :math:`\hat\theta_{plug}`.
    tol : float, default=1e-9
        Newton stops when the step is below ``tol * (1 + max|theta|)``.
    max_iter : int, default=100
        Newton iterations.
    fallback : bool, default=True
        When the damped Newton solve fails, try the root-finder and then the one-step
        estimator instead of raising.

    Returns
    -------
    theta : numpy.ndarray
    info : SolveInfo
        ``info.route`` says which of the three routes gave ``theta`` and ``info.note`` why.

    Notes
    -----
    1. **Damped Newton.** The direction uses the Jacobian of :math:`\sum\psi` (central
       differences); where that is ill-conditioned it uses :math:`G`, the Jacobian of
       :math:`\sum m`, which has the same limit because :math:`E[\partial\phi/\partial\theta]
       = 0` at the truth. Steps are halved until :math:`\lVert G_0^{-1}\bar\psi\rVert`
       decreases.
    2. **Root-finder** (when 1 fails): Powell's hybrid method (``scipy.optimize.root``,
       ``method="hybr"``) on :math:`G_0^{-1}\sum\psi`, from the plug-in solution. Its root is
       accepted when it lies within ``NEAR_SE`` standard errors of the one-step estimate.
    3. **One-step** (when 2 finds no root near the plug-in solution):

       .. math::

           \hat\theta_1 = \hat\theta_{plug} - G(\hat\theta_{plug})^{-1}
           \sum_i \psi_i(\hat\theta_{plug}).

       Because :math:`\psi` is orthogonal, :math:`\hat\theta_1` has the debiased
       estimator's first-order distribution when the plug-in solution is within
       :math:`o_p(n^{-1/4})` of :math:`\theta_0` and :math:`G` is consistent, the rate
       conditions the debiased estimator already needs.

    A singular or ill-conditioned :math:`G` at the plug-in solution raises
    :class:`~orthoccp.EstimationError`: then no estimate exists.

    References
    ----------
    Newey & McFadden (1994), "Large sample estimation and hypothesis testing", Handbook of
    Econometrics vol. 4, §3.4 (one-step estimators); Powell (1970), "A hybrid method for
    nonlinear equations" (MINPACK ``hybrd``).
    """
    theta0 = np.array(start, dtype=np.float64)
    G0 = system.jacobian(theta0)
    G0inv = _checked_inverse(G0, "orthogonal solve")
    one = theta0 - G0inv @ system.moment(theta0, debias=True).sum(axis=0)
    try:
        theta, info = _damped_newton(system, theta0, G0inv, tol=tol, max_iter=max_iter)
        return theta, replace(info, one_step=one)
    except _SolveFailed as exc:
        if not fallback:
            raise EstimationError(str(exc)) from None
        newton_failure, used = str(exc), exc.iterations
    cond = float(np.linalg.cond(G0))
    root, root_note = _hybrid_root(system, theta0, G0inv, tol=tol)
    if root is not None:
        se = _sandwich_se(system, one)
        gap = float(np.max(np.abs(root - one) / se)) if np.all(se > 0) else float("inf")
        if gap <= NEAR_SE:
            merit = float(np.linalg.norm(G0inv @ system.moment(root, debias=True).sum(axis=0)))
            return root, SolveInfo(
                used, True, float("nan"), cond, merit, route="root",
                note=f"damped Newton failed ({newton_failure}); the Powell hybrid root-finder "
                     f"solved the moment equations ({gap:.2f} s.e. from the one-step estimate)",
                one_step=one,
            )
        root_note = (f"its root lies {gap:.2f} s.e. from the one-step estimate (more than "
                     f"{NEAR_SE:g}), so it is not the root near the plug-in solution")
    merit = float(np.linalg.norm(G0inv @ system.moment(one, debias=True).sum(axis=0)))
    return one, SolveInfo(
        used, False, float(np.abs(one - theta0).max()), cond, merit, route="one_step",
        note=f"damped Newton failed ({newton_failure}); root-finder: {root_note}; the one-step "
             f"estimator from the plug-in solution is used",
        one_step=one,
    )


def _damped_newton(
    system: MomentSystem, theta: np.ndarray, G0inv: np.ndarray, *, tol: float, max_iter: int
) -> tuple[np.ndarray, SolveInfo]:
    """Step 1 of :func:`solve_orthogonal`; raises :class:`_SolveFailed` when it stops short."""
    psi = system.moment(theta, debias=True).sum(axis=0)
    merit = float(np.linalg.norm(G0inv @ psi))
    step_size = float("inf")
    for it in range(1, max_iter + 1):
        G = system.jacobian(theta)
        try:
            _checked_inverse(G, "orthogonal solve", step_size)
        except EstimationError as exc:
            raise _SolveFailed(str(exc), it) from None
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
            raise _SolveFailed(
                f"no damped step reduces the moment norm at iteration {it}: moment norm "
                f"{merit:.3g}, last full step {full:.3g}, condition number of G "
                f"{np.linalg.cond(G):.3g}, of the moment Jacobian {np.linalg.cond(Jpsi):.3g}",
                it,
            )
        step_size = float(np.abs(lam * found).max())
        theta, psi, merit = cand, psi_new, merit_new
    raise _SolveFailed(
        f"no convergence in {max_iter} iterations: last step {step_size:.3g}, moment norm "
        f"{merit:.3g}",
        max_iter,
    )


def _hybrid_root(
    system: MomentSystem, theta0: np.ndarray, G0inv: np.ndarray, *, tol: float
) -> tuple[np.ndarray | None, str]:
    r"""Powell's hybrid method on :math:`G_0^{-1}\sum\psi`; ``(None, why)`` when it fails."""

    def scaled(theta: np.ndarray) -> np.ndarray:
        value = G0inv @ system.moment(theta, debias=True).sum(axis=0)
        return value if np.all(np.isfinite(value)) else np.full_like(value, 1e10)

    with np.errstate(all="ignore"):
        sol = optimize.root(scaled, theta0, method="hybr", options={"xtol": 1e-12, "maxfev": 400})
    x = np.asarray(sol.x, dtype=np.float64)
    resid = float(np.abs(scaled(x)).max()) if np.all(np.isfinite(x)) else float("inf")
    if resid > max(1e3 * tol, 1e-7) * (1.0 + float(np.abs(x).max())):
        return None, f"no root found (Powell hybrid: {sol.message.strip().rstrip('.')})"
    return x, ""


def _sandwich_se(system: MomentSystem, theta: np.ndarray) -> np.ndarray:
    """Unit-clustered sandwich standard errors at ``theta`` (for the nearness rule only)."""
    Ginv = np.linalg.inv(system.jacobian(theta))
    units = np.unique(system.units, return_inverse=True)[1]
    s = group_sums(units, system.moment(theta, debias=True), int(units.max()) + 1)
    return np.sqrt(np.diag(clustered_outer(s @ Ginv.T, small_sample=False)[0]))
