"""Numerical orthogonality self-check of a corrected moment (METHOD §7 check 3, for user moments).

Each nuisance :math:`\\gamma` is moved along random smooth directions,
:math:`\\gamma_\\tau = \\gamma + \\tau\\delta` (on the logit scale for probabilities), and the
central-difference slope in :math:`\\tau` of the mean moment is computed at the estimate, for
the uncorrected :math:`m` and for the corrected :math:`\\psi = m + \\phi`. Later nuisances whose
generated target uses the moved one follow it: their shift is the projection of the target's
change on their dictionary (what a refit would give). A Neyman-orthogonal moment has corrected
slopes near zero (Chernozhukov, Escanciano, Ichimura, Newey & Robins 2022): the check reports
the ratio of corrected to uncorrected slopes and the corrected slopes in clustered standard
errors.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import expit, logit

from .._errors import InputError
from .._options import check_option
from ._crossfit import FittedNuisance, evaluate_target
from ._dictionary import Dictionary, build_dictionary
from ._estimate import MomentFit, MomentResults
from ._gmm import cluster_sums
from ._spec import NuisanceDesign, Rows

__all__ = ["OrthogonalityCheck", "check_orthogonality"]

_CHUNK = 4096


@dataclass(frozen=True)
class OrthogonalityCheck:
    """Result of :func:`check_orthogonality`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per nuisance, direction and moment component: ``slope_plain`` (of m),
        ``slope_corrected`` (of psi), ``se_corrected`` (clustered), ``z`` and ``ratio``.
    ratios : pandas.Series
        Per nuisance, :math:`\\lVert S_\\psi\\rVert / \\lVert S_m\\rVert` over its directions and
        components (each component scaled by its spread).
    ratio : float
        The largest of ``ratios``.
    orthogonal : bool
        False when some nuisance has a ratio above ``tol`` *and* a corrected slope more than
        3 standard errors from zero.
    reading : str
        One line saying what the numbers mean.
    """

    table: pd.DataFrame
    ratios: pd.Series
    ratio: float
    orthogonal: bool
    reading: str

    def __str__(self) -> str:
        return self.reading


def _direction(design: NuisanceDesign, rng: np.random.Generator) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    X = design.X
    mean, sd = X.mean(axis=0), X.std(axis=0)
    sd = np.where(sd > 0, sd, 1.0)
    f = X.shape[1]
    w1 = rng.standard_normal(f) / np.sqrt(f)
    w2 = rng.standard_normal(f) / np.sqrt(f)
    phase = rng.uniform(0, 2 * np.pi)
    coef = rng.uniform(0.5, 1.5, size=len(design.strata)) * rng.choice([-1.0, 1.0], size=len(design.strata))

    def delta(Xp: np.ndarray, stratum: np.ndarray) -> np.ndarray:
        Z = (np.nan_to_num(Xp) - mean) / sd
        base = np.tanh(Z @ w1) + 0.5 * np.sin(Z @ w2 + phase)
        ok = (stratum >= 0) & np.all(np.isfinite(Xp), axis=1)
        return np.where(ok, coef[np.maximum(stratum, 0)] * base, 0.0)

    return delta


def _moved(fit: FittedNuisance, label: str, shift: np.ndarray, tau: float, scale: float) -> np.ndarray:
    v = fit.values[label]
    if fit.design.spec.binary:
        return np.asarray(expit(logit(v) + tau * shift))
    return v + tau * scale * shift


def _projection(fit: FittedNuisance, dy: np.ndarray) -> tuple[Dictionary, np.ndarray]:
    d = fit.design
    tr = np.flatnonzero(fit.train)
    dic = build_dictionary(d.spec.dictionary, d.X[tr], d.stratum[tr], len(d.strata), d.feature_names, d.name)
    BtB = np.zeros((dic.size, dic.size))
    Bty = np.zeros(dic.size)
    for s in range(0, tr.size, _CHUNK):
        idx = tr[s : s + _CHUNK]
        B = dic(d.X[idx], d.stratum[idx])
        BtB += B.T @ B
        Bty += B.T @ dy[idx]
    return dic, np.linalg.lstsq(BtB, Bty, rcond=None)[0]


def _apply(dic: Dictionary, X: np.ndarray, S: np.ndarray, coef: np.ndarray) -> np.ndarray:
    out = np.zeros(X.shape[0])
    for s in range(0, X.shape[0], _CHUNK):
        out[s : s + _CHUNK] = dic(X[s : s + _CHUNK], S[s : s + _CHUNK]) @ coef
    return out


def _perturbed(
    fit: MomentFit, j: int, delta: Callable[[np.ndarray, np.ndarray], np.ndarray], tau: float
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Nuisance values moved by +tau and -tau along delta (later nuisances following)."""
    base = fit.values()
    fj = fit.fitted[j]
    own = fj.values[fj.name][fj.train]
    scale = float(np.std(own)) or 1.0
    moved = {sign: dict(base) for sign in (1, -1)}
    for lab, pt in fj.design.points.items():
        shift = delta(pt.X, pt.stratum)
        for sign in (1, -1):
            moved[sign][lab] = _moved(fj, lab, shift, sign * tau, scale)
    for fi in fit.fitted[j + 1 :]:
        if not callable(fi.design.spec.target):
            continue
        yp = evaluate_target(fi.design, fit.rows, moved[1])
        ym = evaluate_target(fi.design, fit.rows, moved[-1])
        dy = np.where(fi.train, (yp - ym) / (2 * tau), 0.0)
        if not np.any(dy != 0):
            continue
        dic, coef = _projection(fi, dy)
        for lab, pt in fi.design.points.items():
            shift = np.where(pt.defined, _apply(dic, pt.X, pt.stratum, coef), 0.0)
            for sign in (1, -1):
                moved[sign][lab] = fi.values[lab] + sign * tau * shift
    return moved[1], moved[-1]


def check_orthogonality(
    results: MomentResults | MomentFit,
    *,
    directions: int = 3,
    seed: int = 0,
    step: float = 1e-3,
    tol: float = 0.1,
    correction: Callable[[np.ndarray, Rows, Mapping[str, np.ndarray]], Any] | None = None,
) -> OrthogonalityCheck:
    """Slopes of the uncorrected and corrected sample moments along nuisance perturbations.

    Parameters
    ----------
    results : MomentResults or MomentFit
        An :func:`estimate_moments` result (its nuisances, weights and estimate are used).
    directions : int, default=3
        Random smooth directions per nuisance.
    seed : int, default=0
        Draws the directions.
    step : float, default=1e-3
        :math:`\\tau` of the central differences (directions are scaled to the nuisance's
        spread; probabilities move on the logit scale).
    tol : float, default=0.1
        Largest acceptable ratio of corrected to uncorrected slopes.
    correction : callable, optional
        A hand-written correction ``correction(theta, rows, nu) -> (n_rows, k)`` to check
        instead of the automatic one; it is evaluated at the moved nuisance values.

    Returns
    -------
    OrthogonalityCheck
        The table, per-nuisance ratios, the verdict and a one-line reading.

    Notes
    -----
    For moment rows t, :math:`\\text{slope} = n_g^{-1}\\sum_t [\\psi_t(\\tau) - \\psi_t(-\\tau)]/(2\\tau)`;
    its standard error sums the per-row slopes by unit. An orthogonal moment has
    :math:`\\partial E[\\psi]/\\partial\\tau = 0` at the truth (Neyman orthogonality).
    """
    fit = results.details.fit if isinstance(results, MomentResults) else results
    if not isinstance(fit, MomentFit):
        raise InputError(
            f"results must come from estimate_moments (a MomentResults or MomentFit), got "
            f"{type(results).__name__}."
        )
    if isinstance(directions, bool) or not isinstance(directions, (int, np.integer)) or directions < 1:
        raise InputError(f"directions must be a positive integer, got {directions!r}.")
    check_option("seed", seed)
    for name, v in (("step", step), ("tol", tol)):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (np.isfinite(v) and v > 0):
            raise InputError(f"{name} must be a positive number, got {v!r}.")
    if correction is not None and not callable(correction):
        raise InputError(f"correction must be a function correction(theta, rows, nu), got {type(correction).__name__}.")
    if correction is None and not fit.riesz:
        raise InputError(
            "no correction to check: the estimate was not debiased; estimate with debias=True "
            "or pass correction=your_function."
        )
    theta = fit.theta
    rng = np.random.default_rng(seed)
    m0 = fit.moment(theta, fit.values())
    use = fit.moment.use
    assert use is not None
    scale = np.sqrt((m0[use] ** 2).mean(axis=0))
    scale = np.where(scale > 0, scale, 1.0)

    def corrected(nu: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        m = fit.moment(theta, nu)
        if correction is None:
            phi = sum(fit.corrections(nu).values(), np.zeros_like(m))
        else:
            phi = np.asarray(correction(theta, fit.rows, nu), dtype=np.float64)
            phi = phi[:, None] if phi.ndim == 1 else phi
            if phi.shape != m.shape:
                raise InputError(f"correction returned shape {phi.shape}; expected {m.shape}.")
            phi = np.where(np.isfinite(phi), phi, 0.0)
        return m, m + phi

    records = []
    for j, fj in enumerate(fit.fitted):
        for d in range(int(directions)):
            delta = _direction(fj.design, rng)
            plus, minus = _perturbed(fit, j, delta, float(step))
            mp, pp = corrected(plus)
            mm, pm = corrected(minus)
            dm = (mp - mm) / (2 * step)
            dp = (pp - pm) / (2 * step)
            sp = cluster_sums(dp, fit.units, fit.n_units)
            se = np.sqrt(((sp - sp.mean(axis=0)) ** 2).sum(axis=0)) / fit.n_units
            for c in range(m0.shape[1]):
                s_m = float(dm[:, c].sum() / fit.n_units)
                s_p = float(dp[:, c].sum() / fit.n_units)
                records.append({
                    "nuisance": fj.name, "direction": d, "moment": c,
                    "slope_plain": s_m, "slope_corrected": s_p, "se_corrected": float(se[c]),
                    "z": s_p / se[c] if se[c] > 0 else (0.0 if s_p == 0 else np.inf),
                    "ratio": abs(s_p) / abs(s_m) if s_m != 0 else np.nan,
                    "_scale": float(scale[c]),
                })
    table = pd.DataFrame.from_records(records)
    ratios = {}
    for name, g in table.groupby("nuisance", sort=False):
        num = np.sqrt(((g.slope_corrected / g._scale) ** 2).sum())
        den = np.sqrt(((g.slope_plain / g._scale) ** 2).sum())
        ratios[name] = float(num / den) if den > 0 else (0.0 if num == 0 else np.inf)
    table = table.drop(columns="_scale")
    ratio_s = pd.Series(ratios, name="ratio").rename_axis("nuisance")
    bad = [
        n for n, r in ratios.items()
        if r > tol and float(np.abs(table.loc[table.nuisance == n, "z"]).max()) > 3
    ]
    worst = str(ratio_s.idxmax())
    ratio = float(ratio_s.max())
    if not bad:
        reading = (
            f"your corrected moment is orthogonal: slope ratio {ratio:.3g} (largest, for "
            f"{worst!r}; corrected over uncorrected slope along {directions} random "
            f"direction(s) per nuisance)."
        )
    else:
        b = max(bad, key=lambda n: ratios[n])
        zmax = float(np.abs(table.loc[table.nuisance == b, "z"]).max())
        reading = (
            f"your corrected moment is NOT orthogonal to {', '.join(map(repr, bad))}: slope "
            f"ratio {ratios[b]:.3g} for {b!r}, corrected slopes up to {zmax:.1f} standard "
            f"errors from zero; check the correction for that nuisance."
        )
    return OrthogonalityCheck(table, ratio_s, ratio, not bad, reading)
