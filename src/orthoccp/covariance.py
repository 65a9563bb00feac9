"""Sandwich covariance estimators, selected by name (METHOD §6).

.. math::

    \\hat V = c\\, G^{-1} \\Big(\\sum_g s_g s_g'\\Big) G^{-1\\prime}, \\qquad
    s_g = \\sum_{t \\in g} \\psi_t, \\quad G = \\sum_t \\partial m_t/\\partial\\theta',

with clusters g = decision makers (``"clustered"``) or rows (``"heteroskedastic"``), and the
optional small-sample factor c = n_g/(n_g - 1) (common practice for cluster-robust inference,
e.g. Cameron & Miller 2015, J. Human Resources 50).

Every estimator's covariance goes through this module: :func:`estimate_covariance` for the
sandwich (also with independent variance components added, such as the simulation noise of
forward-simulated values in :mod:`orthoccp.discrete`), and :func:`clustered_outer` for the
outer product of per-cluster influence terms with the small-sample factor (also used by
:func:`orthoccp.difference_test`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import pandas as pd

from ._arrays import group_sums
from ._errors import InputError

__all__ = [
    "CovarianceEstimate",
    "check_cov_name",
    "cluster_codes",
    "clustered_outer",
    "covariance_names",
    "estimate_covariance",
]


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
        Share of each parameter's variance from each moment component,
        :math:`\\mathrm{Cov}(\\psi^{(k)}, \\psi)/\\mathrm{Var}(\\psi)` (they add up to one), and from
        each added variance component.
    name : str
        The covariance's name in the registry.
    parts : dict
        Component name -> its (n_clusters, p) influence terms; they add up to ``influence``.
    """

    cov: np.ndarray
    influence: np.ndarray
    clusters: np.ndarray
    factor: float
    decomposition: pd.DataFrame
    name: str
    parts: dict[str, np.ndarray] = field(default_factory=dict)

    def cluster_labels(self, unit_labels: np.ndarray) -> np.ndarray:
        """Label of each influence row: the unit's label when the clusters are the units,
        else the cluster code (the row number for ``"heteroskedastic"``)."""
        return unit_labels[self.clusters] if _REGISTRY[self.name].by_unit else self.clusters


class _ClusterRule(Protocol):
    def __call__(self, units: np.ndarray) -> np.ndarray: ...


def _by_unit(units: np.ndarray) -> np.ndarray:
    return units


def _by_row(units: np.ndarray) -> np.ndarray:
    return np.arange(units.size)


@dataclass(frozen=True)
class _Rule:
    clusters: _ClusterRule
    by_unit: bool  # the clusters are the units (influence rows carry unit labels)


_REGISTRY: dict[str, _Rule] = {
    "clustered": _Rule(_by_unit, by_unit=True),
    "heteroskedastic": _Rule(_by_row, by_unit=False),
}


def covariance_names() -> tuple[str, ...]:
    """Names accepted by ``cov=``."""
    return tuple(_REGISTRY)


def check_cov_name(name: object) -> None:
    """Raise :class:`~orthoccp.InputError` unless ``name`` is a registered covariance."""
    if not isinstance(name, str) or name not in _REGISTRY:
        raise InputError(
            f"cov {name!r} is unknown; valid names: {', '.join(_REGISTRY)}."
        )


def cluster_codes(name: str, units: np.ndarray) -> np.ndarray:
    """Cluster code of each row under the covariance ``name`` (the unit codes, or the rows)."""
    check_cov_name(name)
    return _REGISTRY[name].clusters(units)


def clustered_outer(influence: np.ndarray, *, small_sample: bool) -> tuple[np.ndarray, float]:
    """The outer product of per-cluster influence terms, with the small-sample factor.

    Parameters
    ----------
    influence : numpy.ndarray
        (n_g, p) influence terms, one row per cluster.
    small_sample : bool
        Multiply by c = n_g/(n_g - 1).

    Returns
    -------
    cov : numpy.ndarray
        :math:`c \\sum_g \\psi_g \\psi_g'`, (p, p).
    factor : float
        c (1.0 without the small-sample factor).
    """
    n_g = influence.shape[0]
    if n_g < 2:
        raise InputError(
            f"the covariance needs at least two clusters (units), got {n_g}; estimate on data "
            f"with more units (a one-unit sandwich is zero up to rounding)."
        )
    factor = n_g / (n_g - 1) if small_sample else 1.0
    return factor * influence.T @ influence, factor


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
    added: Mapping[str, np.ndarray] | None = None,
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
    added : mapping, optional
        Name -> (p, p) covariance of an independent source of noise that the sandwich does
        not contain (e.g. the simulation noise of forward-simulated values), added to it
        without the small-sample factor and given its own share in the decomposition.
    """
    clusters = cluster_codes(name, units)
    Ginv = np.linalg.inv(jacobian)
    pieces = {k: _sum_by(clusters, v) @ -Ginv.T for k, v in components.items()}
    influence = np.sum(np.stack(list(pieces.values())), axis=0)
    cov, factor = clustered_outer(influence, small_sample=small_sample)
    # Each component's share is Cov(component, psi) / Var(psi) on the same (uncentred) outer
    # product as the covariance: the components add up to psi, so the shares add up to one.
    total = np.diag(cov) / factor
    shares = {k: (v * influence).sum(axis=0) / total for k, v in pieces.items()}
    if added:
        sandwich = np.diag(cov)
        cov = cov + sum(added.values())
        scale = sandwich / np.diag(cov)
        shares = {k: v * scale for k, v in shares.items()}
        shares.update({k: np.diag(v) / np.diag(cov) for k, v in added.items()})
    decomposition = pd.DataFrame(shares, index=pd.Index(parameters, name="parameter"))
    uniq = np.unique(clusters)
    return CovarianceEstimate(
        cov=cov,
        influence=influence,
        clusters=uniq,
        factor=factor,
        decomposition=decomposition,
        name=name,
        parts=pieces,
    )
