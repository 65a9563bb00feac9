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

``unseen_variance`` reads the CCP correction
:math:`\phi_P = \beta(A_a - \bar A)(1\{a_{t+1} = R\} - P_R(x_{t+1}))/P_R(x_{t+1})`. Given the
next state its square has expectation :math:`\beta^2(A_a-\bar A)^2(1-P_R)/P_R`, which is large
where the first stage puts the anchor choice at a small probability; the realised squares
reach that expectation only through the rare rows where the anchor is then chosen. When the
sample has too few of them, the clustered variance misses most of the correction's spread and
the estimate itself is off by the missing rare terms. In units of the parameter
(:math:`o_t = \beta G^{-1}(A_a - \bar A)_t`),

.. math::

    U_k = \frac{\sum_t o_{tk}^2 (1 - \hat P_{R,t+1})/\hat P_{R,t+1}
                 - \sum_g \bigl(\sum_{t \in g} o_{tk}\,\mathrm{score}_t\bigr)^2}
               {\mathrm{se}_k^2},

the variance the correction should have, less the variance it shows, over the reported
variance (median over splits). Cross-unit and within-unit cross terms have expectation zero
(the scores are martingale differences), so :math:`U_k` is about zero when the sample has
seen the anchor choices its probabilities predict; it is large when the interval omits
variance the data have not revealed (measured on the design family: the interaction slopes
whose intervals under-cover).

Two more describe the unit scores behind the clustered variance: ``top_unit_share``, the
largest unit's share of the variance (:math:`\max_g s_{gk}^2 / \sum_h s_{hk}^2`), and
``effective_units``, :math:`(\sum_g s_{gk}^2)^2 / \sum_g s_{gk}^4`, the number of equally
influential units that would give the same spread of influence. They are reported, not used
for the flag: heavy-tailed unit scores alone did not predict under-coverage in the project's
Monte Carlo (the e-bike headline cell covers 0.965-0.970 with its top 20 units carrying most
of the variance).

A parameter is *flagged* when ``linearity_gap > GAP_LIMIT``, ``split_spread >
SPREAD_LIMIT``, ``unseen_variance > UNSEEN_LIMIT`` or ``identification < WEAK_LIMIT``, or when it correlates with a weakly
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

from ._arrays import group_sums
from .moments import MomentSystem

__all__ = ["IntervalCheck", "interval_check", "identification_strength", "unseen_variance",
           "GAP_LIMIT", "SPREAD_LIMIT", "UNSEEN_LIMIT", "WEAK_LIMIT", "JOINT_LIMIT", "SIGNALS"]

GAP_LIMIT = 2.0
"""Flag when the solution lies more than this many s.e. from the one-step estimate."""

SPREAD_LIMIT = 0.5
"""Flag when the per-split estimates spread by more than this many s.e. (``splits`` > 1)."""

UNSEEN_LIMIT = 1.0
"""Flag when the correction's unseen variance exceeds the reported variance (the interval
would be at least 1.41 times as wide with it)."""

WEAK_LIMIT = 0.1
r"""Flag as weakly identified when less than this share of the information survives (a
regressor diluted to about a third of its flow-utility size). Estimation noise in the
continuation regressions adds spurious variation to :math:`X`, so the measured share of a
scrap value diluted by :math:`1 - \beta = 0.05` was 0.9-4.9 % on an outside terminal design
rather than :math:`0.05^2`."""

JOINT_LIMIT = 0.3
"""A parameter whose estimate correlates with a weakly identified one by at least this much
(in absolute value) is flagged too: it moves with it."""

SIGNALS = ("linearity_gap", "correction_shift", "split_spread", "unseen_variance",
           "identification", "top_unit_share", "effective_units")
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
    unseen: np.ndarray | None = None,
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
    unseen : numpy.ndarray, optional
        (S, p) per split, :func:`unseen_variance` (in squared units of the parameter); the
        signal is its median over the reported variance. NaN when not given.

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
        unseen_share = (np.full(se.shape, np.nan) if unseen is None
                        else np.median(np.asarray(unseen, dtype=np.float64), axis=0) / se**2)
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
        if np.isfinite(unseen_share[k]) and unseen_share[k] > UNSEEN_LIMIT:
            reasons.append(
                f"rests on anchor choices the first stage expects but the sample has not "
                f"shown: had they occurred, its CCP correction would add {unseen_share[k]:.1f} "
                f"times the reported variance (more than {UNSEEN_LIMIT:g}), so the interval "
                f"is too narrow (with that variance it would be "
                f"{np.sqrt(1.0 + unseen_share[k]):.1f} times as wide)"
            )
        if np.isfinite(spread[k]) and spread[k] > SPREAD_LIMIT:
            reasons.append(
                f"the fold splits' estimates spread by {spread[k]:.2f} s.e. (more than "
                f"{SPREAD_LIMIT:g})"
            )
        rows.append({
            "parameter": str(name), "linearity_gap": float(gap[k]),
            "correction_shift": float(shift[k]), "split_spread": float(spread[k]),
            "unseen_variance": float(unseen_share[k]),
            "identification": float(ident[k]),
            "top_unit_share": float(top[k]), "effective_units": float(n_eff[k]),
            "flagged": bool(reasons), "reason": "; ".join(reasons),
        })
    return IntervalCheck(pd.DataFrame(rows).set_index("parameter"))


def unseen_variance(system: MomentSystem, theta: np.ndarray) -> np.ndarray:
    r"""(p,) the CCP correction's expected minus realised variance, in squared parameter units.

    :math:`\sum_t o_{tk}^2 (1-\hat P_{R,t+1})/\hat P_{R,t+1} - \sum_g (\sum_{t\in g}
    o_{tk}\,\mathrm{score}_t)^2` with :math:`o_t = \beta G^{-1}(A_a - \bar A)_t` and
    :math:`\mathrm{score}_t = (1\{a_{t+1} = R\} - \hat P_{R,t+1})/\hat P_{R,t+1}` (the module
    docstring gives the reading). Zero for a static model or a system without next-row
    probabilities.
    """
    p = system.n_params
    if system.discount == 0.0 or system.next_anchor_p is None:
        return np.zeros(p)
    own = system.correction_weight(theta)
    o = system.discount * np.linalg.solve(system.jacobian(theta), own.T).T
    P = system.next_anchor_p
    use = system.corrected
    expected = ((o[use] ** 2) * ((1.0 - P[use]) / P[use])[:, None]).sum(axis=0)
    codes, units = np.unique(system.units, return_inverse=True)
    realised = (group_sums(units, o * system.ccp_score[:, None], codes.size) ** 2).sum(axis=0)
    return np.asarray(expected - realised, dtype=np.float64)


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
