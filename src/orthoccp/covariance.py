"""Sandwich covariance estimators, selected by name (METHOD §6).

.. math::

    \\hat V = c\\, G^{-1} \\Big(\\sum_g s_g s_g'\\Big) G^{-1\\prime}, \\qquad
    s_g = \\sum_{t \\in g} \\psi_t, \\quad G = \\sum_t \\partial m_t/\\partial\\theta',

with clusters g = decision makers (``"clustered"``) or rows (``"heteroskedastic"``), and the
optional small-sample factor c = n_g/(n_g - 1) (common practice for cluster-robust inference,
e.g. Cameron & Miller 2015, J. Human Resources 50).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import pandas as pd

from ._arrays import group_sums
from ._errors import InputError

__all__ = ["CovarianceEstimate", "check_cov_name", "covariance_names", "estimate_covariance"]


@dataclass(frozen=True, eq=False)
class CovarianceEstimate:
    """A sandwich covariance with the influence terms it is built from.

    Attributes
    ----------
    cov : numpy.ndarray
        (p, p) covariance of the estimator.
    influence : numpy.ndarray
        (n_clusters, p) influence terms :math:`-G^{-1}s_g`; ``cov = c * influence' influence``.
    clusters : numpy.ndarray
        Cluster code of each influence row.
    factor : float
        Small-sample factor c.
    decomposition : pandas.DataFrame
        Share of each parameter's variance from each moment component and their cross terms.
    """

    cov: np.ndarray
    influence: np.ndarray
    clusters: np.ndarray
    factor: float
    decomposition: pd.DataFrame
    name: str


class _ClusterRule(Protocol):
    def __call__(self, units: np.ndarray) -> np.ndarray: ...


def _by_unit(units: np.ndarray) -> np.ndarray:
    return units


def _by_row(units: np.ndarray) -> np.ndarray:
    return np.arange(units.size)


_REGISTRY: dict[str, _ClusterRule] = {"clustered": _by_unit, "heteroskedastic": _by_row}


def covariance_names() -> tuple[str, ...]:
    """Names accepted by ``cov=``."""
    return tuple(_REGISTRY)


def check_cov_name(name: object) -> None:
    """Raise :class:`~orthoccp.InputError` unless ``name`` is a registered covariance."""
    if not isinstance(name, str) or name not in _REGISTRY:
        raise InputError(
            f"cov {name!r} is unknown; valid names: {', '.join(_REGISTRY)}."
        )


def _sum_by(codes: np.ndarray, values: np.ndarray) -> np.ndarray:
    uniq, inv = np.unique(codes, return_inverse=True)
    return group_sums(inv, values, uniq.size)


def estimate_covariance(
    name: str,
    *,
    jacobian: np.ndarray,
    components: Mapping[str, np.ndarray],
    units: np.ndarray,
    parameters: tuple[str, ...],
    small_sample: bool = True,
) -> CovarianceEstimate:
    """Sandwich covariance and variance decomposition.

    Parameters
    ----------
    name : {"clustered", "heteroskedastic"}
        Cluster by decision maker, or by row (only for cross-sections).
    jacobian : numpy.ndarray
        :math:`G` on the same (summed) normalisation as the scores.
    components : mapping
        Per-row moment pieces (e.g. ``m``, ``phi_mu``, ``phi_P``) that add up to the moment.
    units : numpy.ndarray
        Unit code per row.
    small_sample : bool, default=True
        Multiply by n_g/(n_g - 1).
    """
    check_cov_name(name)
    clusters = _REGISTRY[name](units)
    Ginv = np.linalg.inv(jacobian)
    pieces = {k: _sum_by(clusters, v) @ -Ginv.T for k, v in components.items()}
    influence = np.sum(np.stack(list(pieces.values())), axis=0)
    n_g = influence.shape[0]
    if n_g < 2:
        raise InputError("the covariance needs at least two clusters (units).")
    factor = n_g / (n_g - 1) if small_sample else 1.0
    cov = factor * influence.T @ influence
    total = np.diag(cov) / factor
    shares = {}
    for k, v in pieces.items():
        shares[k] = (v**2).sum(axis=0) / total
    if len(pieces) > 1:
        shares["cross"] = 1.0 - sum(shares.values())
    decomposition = pd.DataFrame(shares, index=pd.Index(parameters, name="parameter"))
    uniq = np.unique(clusters)
    return CovarianceEstimate(
        cov=cov,
        influence=influence,
        clusters=uniq,
        factor=factor,
        decomposition=decomposition,
        name=name,
    )
