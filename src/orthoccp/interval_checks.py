r"""Interval checks: signs, computed from one estimate, that its normal interval may not hold.

The debiased interval rests on a first-order expansion of :math:`\sum_i\psi_i(\theta)` around
the truth. Three quantities, each in standard errors of the parameter, say how far that
expansion is being stretched in the data at hand:

* ``linearity_gap``: :math:`|\hat\theta_k - \hat\theta_{1,k}| / \mathrm{se}_k`, the distance
  between the solution of :math:`\sum\psi = 0` and the one-step estimator
  :math:`\hat\theta_1 = \hat\theta_{plug} - G^{-1}\sum\psi(\hat\theta_{plug})`. The two share
  their first-order distribution (Newey & McFadden 1994, §3.4); they differ by the moment's
  curvature between the plug-in solution and the root. A gap of a sizeable fraction of a
  standard error means the interval's linearisation is not accurate over the interval itself.
* ``correction_shift``: :math:`|\hat\theta_k - \hat\theta_{plug,k}| / \mathrm{se}_k`, how far
  the correction moved the estimate; large values mean a poor first stage, whose second-order
  remainder the interval ignores.
* ``split_spread`` (with ``splits`` > 1): the standard deviation of the per-split estimates
  over the standard error: how much the answer depends on the random fold split.

``identification`` measures how much of a parameter's flow-utility variation survives into
the constructed regressors :math:`X_j = z_j - z_R + \beta(\ldots)` that the moments see: the
ratio of the Schur complements (the parameter's information given the others),

.. math::

    \iota_k = \frac{1/[H(X)^{-1}]_{kk}}{1/[H(D)^{-1}]_{kk}}, \qquad
    H(A) = \sum_i\sum_j \Lambda_{ij}(A_{ij} - \bar A_i)(A_{ij} - \bar A_i)',

with :math:`D_j = z_j - z_R` the flow-utility differences. A payoff received only on
renewal or exit through a state the choice does not move (a scrap value that depends on a
persistent covariate) enters :math:`X` through about :math:`(1-\beta)` of its size, so
:math:`\iota_k \approx (1-\beta)^2`; its interval then rests on a small signal and the
parameter is flagged as weakly identified when :math:`\iota_k <` ``WEAK_LIMIT``.

Two more describe the unit scores behind the clustered variance: ``top_unit_share``, the
largest unit's share of the variance (:math:`\max_g s_{gk}^2 / \sum_h s_{hk}^2`), and
``effective_units``, :math:`(\sum_g s_{gk}^2)^2 / \sum_g s_{gk}^4`, the number of equally
influential units that would give the same spread of influence. They are reported, not used
for the flag: heavy-tailed unit scores alone did not predict under-coverage in the project's
Monte Carlo (the e-bike headline cell covers 0.965-0.970 with its top 20 units carrying most
of the variance).

A parameter is *flagged* when ``linearity_gap > GAP_LIMIT``, ``split_spread >
SPREAD_LIMIT`` or ``identification < WEAK_LIMIT``, or when it correlates with a weakly
identified parameter by at least ``JOINT_LIMIT``; every parameter is flagged when a split's
debiased moment had no root near the plug-in solution, so that the one-step estimator was
used (``route == "one_step"``, :func:`orthoccp.solver.solve_orthogonal`). The limits are provisional: ``benchmarks/design_family.py`` records every
signal per replication so that they can be calibrated against coverage on the design family
(docs/validation.md states the measured rates).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["IntervalCheck", "interval_check", "identification_strength", "GAP_LIMIT",
           "SPREAD_LIMIT", "WEAK_LIMIT", "JOINT_LIMIT", "SIGNALS"]

GAP_LIMIT = 2.0
"""Flag when the solution lies more than this many s.e. from the one-step estimate."""

SPREAD_LIMIT = 0.5
"""Flag when the per-split estimates spread by more than this many s.e. (``splits`` > 1)."""

WEAK_LIMIT = 0.1
r"""Flag as weakly identified when less than this share of the information survives (a
regressor diluted to about a third of its flow-utility size). Estimation noise in the
continuation regressions adds spurious variation to :math:`X`, so the measured share of a
scrap value diluted by :math:`1 - \beta = 0.05` was 0.9-4.9 % on an outside terminal design
rather than :math:`0.05^2`."""

JOINT_LIMIT = 0.3
"""A parameter whose estimate correlates with a weakly identified one by at least this much
(in absolute value) is flagged too: it moves with it."""

SIGNALS = ("linearity_gap", "correction_shift", "split_spread", "identification",
           "top_unit_share", "effective_units")
"""Columns of :attr:`IntervalCheck.table` besides ``flagged`` and ``reason``."""


@dataclass(frozen=True, eq=False)
class IntervalCheck:
    """Per-parameter interval checks (see the module docstring for each column).

    Attributes
    ----------
    table : pandas.DataFrame
        Indexed by parameter: the :data:`SIGNALS`, ``flagged`` (bool) and ``reason``.
    """

    table: pd.DataFrame

    @property
    def flagged(self) -> list[str]:
        """Names of the flagged parameters."""
        return [str(k) for k in self.table.index[self.table["flagged"]]]

    def readings(self) -> list[str]:
        """One sentence per flagged parameter, or one sentence saying none is flagged."""
        if not self.flagged:
            worst = float(self.table["linearity_gap"].max())
            return [
                f"Interval check: no warning sign (the solution lies at most {worst:.2f} s.e. "
                f"from the one-step estimate)."
            ]
        return [
            f"Interval check: {name!r} {self.table.loc[name, 'reason']}; treat its interval "
            f"with caution."
            for name in self.flagged
        ]

    def to_dict(self) -> dict[str, dict[str, float | bool | str | None]]:
        """Plain-Python view (NaN becomes ``None``)."""
        out: dict[str, dict[str, float | bool | str | None]] = {}
        for name, row in self.table.iterrows():
            rec: dict[str, float | bool | str | None] = {
                k: (None if not np.isfinite(row[k]) else float(row[k])) for k in SIGNALS
            }
            rec["flagged"] = bool(row["flagged"])
            rec["reason"] = str(row["reason"])
            out[str(name)] = rec
        return out


def interval_check(
    parameters: Sequence[str],
    *,
    estimates: np.ndarray,
    plugins: np.ndarray,
    one_steps: np.ndarray,
    std_errors: np.ndarray,
    influence: np.ndarray,
    identification: np.ndarray | None = None,
    routes: Sequence[str] = (),
    cov: np.ndarray | None = None,
) -> IntervalCheck:
    """Compute the interval checks of one estimate.

    Parameters
    ----------
    parameters : sequence of str
        Parameter names.
    estimates, plugins, one_steps : numpy.ndarray
        (S, p) per split: the debiased solution, the plug-in solution and the one-step
        estimate from it.
    std_errors : numpy.ndarray
        (p,) the reported standard errors.
    influence : numpy.ndarray
        (n_units, p) per-unit influence terms.
    identification : numpy.ndarray, optional
        (p,) :func:`identification_strength`; NaN when not given.
    routes : sequence of str, optional
        Per split, the solve's route (:data:`orthoccp.solver.ROUTES`).
    cov : numpy.ndarray, optional
        (p, p) covariance of the estimates, to flag parameters that move with a weakly
        identified one (correlation of at least :data:`JOINT_LIMIT` in absolute value).

    Returns
    -------
    IntervalCheck
    """
    se = np.asarray(std_errors, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        gap = np.median(np.abs(estimates - one_steps), axis=0) / se
        shift = np.median(np.abs(estimates - plugins), axis=0) / se
        spread = (np.std(estimates, axis=0, ddof=1) / se if estimates.shape[0] > 1
                  else np.full(se.shape, np.nan))
        sq = np.asarray(influence, dtype=np.float64) ** 2
        total = sq.sum(axis=0)
        top = sq.max(axis=0) / total
        n_eff = total**2 / (sq**2).sum(axis=0)
    ident = (np.full(se.shape, np.nan) if identification is None
             else np.asarray(identification, dtype=np.float64))
    n_one_step = sum(r == "one_step" for r in routes)
    weak = np.flatnonzero(ident < WEAK_LIMIT)
    corr = None
    if cov is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            corr = np.asarray(cov) / np.outer(se, se)
    rows = []
    for k, name in enumerate(parameters):
        reasons = []
        if n_one_step:
            reasons.append(
                f"comes from the one-step estimator: the debiased moment had no root near the "
                f"plug-in solution in {n_one_step} of {len(routes)} split(s)"
            )
        if ident[k] < WEAK_LIMIT:
            reasons.append(
                f"is weakly identified: only {ident[k]:.2%} of its flow-utility information "
                f"reaches the moments (less than {WEAK_LIMIT:.0%})"
            )
        elif corr is not None:
            for w in weak:
                if abs(corr[k, w]) >= JOINT_LIMIT:
                    reasons.append(
                        f"moves with the weakly identified {str(parameters[w])!r} (correlation "
                        f"{corr[k, w]:+.2f})"
                    )
        if gap[k] > GAP_LIMIT:
            reasons.append(
                f"the solution lies {gap[k]:.2f} s.e. from the one-step estimate (more than "
                f"{GAP_LIMIT:g}): the moment is far from linear over the interval"
            )
        if np.isfinite(spread[k]) and spread[k] > SPREAD_LIMIT:
            reasons.append(
                f"the fold splits' estimates spread by {spread[k]:.2f} s.e. (more than "
                f"{SPREAD_LIMIT:g})"
            )
        rows.append({
            "parameter": str(name), "linearity_gap": float(gap[k]),
            "correction_shift": float(shift[k]), "split_spread": float(spread[k]),
            "identification": float(ident[k]),
            "top_unit_share": float(top[k]), "effective_units": float(n_eff[k]),
            "flagged": bool(reasons), "reason": "; ".join(reasons),
        })
    return IntervalCheck(pd.DataFrame(rows).set_index("parameter"))


def _information(A: np.ndarray, lam: np.ndarray) -> np.ndarray:
    centred = A - np.einsum("nj,njp->np", lam, A)[:, None, :]
    return np.einsum("nj,njp,njq->pq", lam, centred, centred)


def identification_strength(X: np.ndarray, D: np.ndarray, lam: np.ndarray) -> np.ndarray:
    r"""(p,) the share :math:`\iota_k` of flow-utility information that reaches the moments.

    Parameters
    ----------
    X : numpy.ndarray
        (n, J, p) constructed regressors of the moment rows.
    D : numpy.ndarray
        (n, J, p) flow-utility differences :math:`z_j - z_R` at the same rows.
    lam : numpy.ndarray
        (n, J) model-implied choice probabilities at the estimate.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        hx = 1.0 / np.diag(np.linalg.pinv(_information(X, lam)))
        hd = 1.0 / np.diag(np.linalg.pinv(_information(D, lam)))
        return np.where(hd > 0, hx / hd, np.nan)
