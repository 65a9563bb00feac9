r"""The per-row pieces of a CCP estimate: regressors, offsets, moments and corrections.

With the first stage plugged in, each value difference is linear in :math:`\theta`
(METHOD §3), :math:`w_j = X_j'\theta + o_j` with :math:`w_R = 0`, and each moment row holds

.. math::

    m = \sum_{j} A_j\,(1\{a = j\} - \Lambda_j(\theta)), \qquad
    \psi = m + \phi_\mu + \phi_P,

where :math:`A_j = X_j` for the standard moments and the residualised instruments of
METHOD §4b for the renewal-robust ones, :math:`\phi_\mu = -(A_a - \bar A)\,
(q(x_{t+1}) - \mu_{a}(x_t))'g(\theta)` with :math:`g = \beta(\theta_{z_R}, -1)` and
:math:`\phi_P = \beta (A_a - \bar A)(1\{a_{t+1} = R\} - P_R(x_{t+1}))/P_R(x_{t+1})`
(METHOD §4; Chernozhukov, Escanciano, Ichimura, Newey & Robins 2022). The estimate solves
:math:`\sum_t \psi_t(\hat\theta) = 0` (or :math:`\sum_t m_t = 0` for the plug-in), and its
covariance is :math:`G^{-1}\bigl(\sum_i s_i s_i'\bigr)G^{-1\prime}` times the small-sample
factor, :math:`G = \sum_t \partial m_t/\partial\theta'`, :math:`s_i` the unit's sum of
:math:`\psi`.

:class:`MomentPieces` holds them for one fold split, so a second stage of one's own can start
from exactly the numbers the estimator used.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ._errors import InputError
from .moments import MomentSystem

__all__ = ["MomentPieces"]


@dataclass(frozen=True, eq=False)
class MomentPieces:
    """The moment rows of one fold split and every piece of the moment at any :math:`\\theta`.

    Attributes
    ----------
    system : MomentSystem
        The constructed regressors ``X`` (n, J, p), offsets ``offset`` (n, J), instruments
        (renewal-robust moments) and correction ingredients.
    index : pandas.Index
        The input row label of each moment row (``Panel.source_index``).
    units : numpy.ndarray
        The unit label of each moment row.
    choices : tuple
        Choice labels in the order of the J axis.
    parameters : tuple of str
        Parameter names in the order of the p axis.
    theta : numpy.ndarray
        The split's own solution (the reported estimate is the median over splits).
    debiased : bool
        Whether the estimate solved :math:`\\sum\\psi = 0` (else :math:`\\sum m = 0`).
    """

    system: MomentSystem
    index: pd.Index
    units: np.ndarray
    choices: tuple[object, ...]
    parameters: tuple[str, ...]
    theta: np.ndarray
    debiased: bool

    def _theta(self, theta: np.ndarray | pd.Series | None) -> np.ndarray:
        if theta is None:
            return self.theta
        if isinstance(theta, pd.Series):
            theta = theta.reindex(list(self.parameters)).to_numpy()
        t = np.asarray(theta, dtype=np.float64).reshape(-1)
        if t.size != len(self.parameters) or not np.all(np.isfinite(t)):
            raise InputError(
                f"theta must hold {len(self.parameters)} finite values (parameters "
                f"{', '.join(self.parameters)}), got {np.asarray(theta).tolist()}."
            )
        return t

    def m(self, theta: np.ndarray | pd.Series | None = None) -> np.ndarray:
        """(n, p) identifying moment :math:`m_t(\\theta)` (default: the split's solution)."""
        return self.system.score(self._theta(theta))

    def corrections(self, theta: np.ndarray | pd.Series | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(n, p) each: :math:`(\\phi_\\mu, \\phi_P)` at :math:`\\theta`."""
        return self.system.corrections(self._theta(theta))

    def psi(self, theta: np.ndarray | pd.Series | None = None) -> np.ndarray:
        """(n, p) moment the estimate solved: :math:`\\psi = m + \\phi_\\mu + \\phi_P` when
        debiased, :math:`m` otherwise."""
        return self.system.moment(self._theta(theta), debias=self.debiased)

    def jacobian(self, theta: np.ndarray | pd.Series | None = None) -> np.ndarray:
        """(p, p) :math:`G = \\sum_t \\partial m_t/\\partial\\theta'` (analytic)."""
        return self.system.jacobian(self._theta(theta))

    def to_frame(self, theta: np.ndarray | pd.Series | None = None) -> pd.DataFrame:
        """One row per moment row, indexed by the input's row labels.

        Columns: ``unit``, ``choice`` (the row's choice), ``X.<choice>.<param>`` and
        ``offset.<choice>`` for every non-anchor choice, ``A.<choice>.<param>`` for the
        renewal-robust instruments, ``corrected`` (the next row enters the corrections),
        then ``m.<param>``, ``phi_mu.<param>``, ``phi_P.<param>`` and ``psi.<param>`` at
        ``theta`` (default: the split's solution).
        """
        t = self._theta(theta)
        s = self.system
        names = [str(c) for c in self.choices]
        cols: dict[str, np.ndarray] = {
            "unit": self.units,
            "choice": np.asarray([names[c] for c in s.chosen], dtype=object),
        }
        for j, a in enumerate(names):
            if j == s.anchor:
                continue
            for k, p in enumerate(self.parameters):
                cols[f"X.{a}.{p}"] = s.X[:, j, k]
            cols[f"offset.{a}"] = s.offset[:, j]
        if s.instruments is not None:
            for j, a in enumerate(names):
                if j == s.anchor:
                    continue
                for k, p in enumerate(self.parameters):
                    cols[f"A.{a}.{p}"] = s.instruments[:, j, k]
        cols["corrected"] = s.corrected
        m = s.score(t)
        phi_mu, phi_p = s.corrections(t)
        parts = {"m": m, "phi_mu": phi_mu, "phi_P": phi_p,
                 "psi": m + phi_mu + phi_p if self.debiased else m}
        for part, values in parts.items():
            for k, p in enumerate(self.parameters):
                cols[f"{part}.{p}"] = values[:, k]
        return pd.DataFrame(cols, index=self.index.copy())
