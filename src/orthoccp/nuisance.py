"""Cross-fitted first stage: CCPs and continuation expectations (METHOD §2 and §5).

Nuisances
    * CCP :math:`P(x)`: a classifier of :math:`a_t` on :math:`x_t` over all rows.
    * Continuation expectations :math:`\\mu_j(x) = E[q(x_{t+1}) \\mid x_t = x, a_t = j]` with
      :math:`q(x') = (z_R(x'), \\ln P_R(x'))`: regressions of the *generated* target on
      :math:`x_t` among rows with :math:`a_t = j` and a linked next row.

Every prediction for a row comes from learners that never saw the row's unit (folds by unit).
Two schemes build the :math:`\\ln P_R` target of the continuation regressions:

``"plain"``
    each row's own out-of-fold CCP (cheap; fold k's regression target has seen fold k
    through the other folds' CCP fits);
``"nested"``
    for the training rows in fold l of the regression that predicts fold k, the CCP is
    fitted on folds outside {k, l}, so nothing used for fold k has seen fold k
    (K(K-1)/2 extra classifier fits).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from ._errors import InputError
from .learners import LearnerPair, checked_proba
from .model import BoundModel

__all__ = ["Nuisances", "crossfit_nuisances", "nuisances_from_truth", "clip_probabilities"]

Scheme = Literal["plain", "nested"]


@dataclass(frozen=True, eq=False)
class Nuisances:
    """First-stage values at every row of the panel.

    Attributes
    ----------
    ccp : numpy.ndarray
        (n_rows, J) choice probabilities at each row's state (clipped, rows sum to one).
    mu : numpy.ndarray
        (n_rows, J, d) continuation expectations at each row's state; NaN for choices
        without one (the anchor of a terminal model) or when ``discount == 0``.
    clipped : dict
        Per choice label, the number of rows whose probability was clipped.
    n_fits : int
        Learner fits performed.
    timings : dict
        Seconds spent in the CCP and continuation fits.
    folds : numpy.ndarray or None
        Fold of each row (None for externally supplied nuisances).
    """

    ccp: np.ndarray
    mu: np.ndarray
    clipped: dict[Any, int] = field(default_factory=dict)
    n_fits: int = 0
    timings: dict[str, float] = field(default_factory=dict)
    folds: np.ndarray | None = None
    clipped_rows: np.ndarray | None = None


def clip_probabilities(P: np.ndarray, eps: float) -> tuple[np.ndarray, np.ndarray]:
    """Clip each probability to [eps, 1 - eps] and renormalise rows.

    Returns the clipped matrix and a boolean matrix of the entries that were clipped.
    """
    hit = (P < eps) | (P > 1.0 - eps)
    Q = np.clip(P, eps, 1.0 - eps)
    Q /= Q.sum(axis=1, keepdims=True)
    return Q, hit


def _fit_classifier(
    pair: LearnerPair,
    X: np.ndarray,
    codes: np.ndarray,
    train: np.ndarray,
    J: int,
    rng: np.random.Generator,
    fold_label: str,
    choices: tuple[Any, ...],
) -> Any:
    present = np.bincount(codes[train], minlength=J)
    if (present == 0).any():
        missing = [choices[j] for j in np.flatnonzero(present == 0)]
        raise InputError(
            f"choice(s) {', '.join(map(repr, missing))} never occur in the training rows of "
            f"{fold_label}; every choice must be observed outside each fold. Use fewer folds "
            f"or more units."
        )
    est = pair.new_classifier(rng)
    est.fit(X[train], codes[train])
    return est


def _fit_predict_regression(
    pair: LearnerPair,
    X: np.ndarray,
    y: np.ndarray,
    train: np.ndarray,
    predict: np.ndarray,
    rng: np.random.Generator,
    what: str,
) -> np.ndarray:
    if train.size < 2:
        raise InputError(
            f"only {train.size} training row(s) for the continuation regression of {what}; the "
            f"choice is too rare for cross-fitting. Use fewer folds or more units."
        )
    est = pair.new_regressor(rng)
    est.fit(X[train], y[train])
    out = np.asarray(est.predict(X[predict]), dtype=np.float64).reshape(-1)
    if out.shape[0] != predict.size or not np.all(np.isfinite(out)):
        raise InputError(
            f"regressor {type(est).__name__}.predict returned a bad result for {what} "
            f"(shape {out.shape}, finite={bool(np.all(np.isfinite(out)))})."
        )
    return out


def crossfit_nuisances(
    bound: BoundModel,
    pair: LearnerPair,
    folds: np.ndarray,
    rng: np.random.Generator,
    *,
    scheme: Scheme = "nested",
    clip: float = 1e-4,
    anchor_features: np.ndarray | None = None,
) -> Nuisances:
    """Out-of-fold CCPs and continuation expectations for every row.

    Parameters
    ----------
    bound : BoundModel
        Model bound to the panel.
    pair : LearnerPair
        Classifier and regressor templates (cloned per fit).
    folds : numpy.ndarray
        Fold per row (all rows of a unit in one fold).
    rng : numpy.random.Generator
        Seeds every learner, in a fixed order.
    scheme : {"plain", "nested"}, default="nested"
        How the ln P_R target of the continuation regressions is built (module docstring).
    clip : float, default=1e-4
        Probabilities are clipped to [clip, 1 - clip].
    anchor_features : numpy.ndarray, optional
        Feature columns (the persistent states) for the anchor's continuation regression of a
        renewal model: after a renewal the next state depends on them only (METHOD §4b).
    """
    if scheme not in ("plain", "nested"):
        raise InputError(f"scheme must be 'plain' or 'nested', got {scheme!r}.")
    panel = bound.panel
    X = panel.features
    codes = panel.choice_codes
    J = len(panel.choices)
    R = bound.anchor_index
    n = panel.n_rows
    K = int(folds.max()) + 1
    canon = panel.canonical_order

    def rows_where(mask: np.ndarray) -> np.ndarray:
        # Training rows in canonical order (label-free), so fits do not depend on unit labels.
        return canon[mask[canon]]

    fold_rows = [np.flatnonzero(folds == k) for k in range(K)]
    n_fits = 0

    t0 = time.perf_counter()
    raw = np.empty((n, J))
    for k in range(K):
        train = rows_where(folds != k)
        est = _fit_classifier(pair, X, codes, train, J, rng, f"fold {k}", panel.choices)
        raw[fold_rows[k]] = checked_proba(est, X[fold_rows[k]], J, k)
        n_fits += 1
    ccp, hit = clip_probabilities(raw, clip)
    clipped = {panel.choices[j]: int(hit[:, j].sum()) for j in range(J)}
    t_ccp = time.perf_counter() - t0

    d = bound.n_targets
    mu = np.full((n, J, d), np.nan)
    if not bound.has_next_stage:
        return Nuisances(ccp=ccp, mu=mu, clipped=clipped, n_fits=n_fits,
                         timings={"ccp_s": t_ccp, "continuation_s": 0.0}, folds=folds,
                         clipped_rows=np.asarray(hit.any(axis=1)))

    t1 = time.perf_counter()
    nxt = panel.next_row
    linked = nxt >= 0
    zR_data = bound.next_targets_data()
    # Realised data targets at the next row (the z_R columns do not depend on the CCP).
    q_data = np.full((n, d - 1), np.nan)
    q_data[linked] = zR_data[nxt[linked]]
    ell_plain = np.full(n, np.nan)
    ell_plain[linked] = np.log(ccp[nxt[linked], R])

    nested_ell: dict[tuple[int, int], np.ndarray] = {}
    if scheme == "nested":
        for k in range(K):
            for l in range(k + 1, K):
                train = rows_where((folds != k) & (folds != l))
                est = _fit_classifier(
                    pair, X, codes, train, J, rng, f"folds outside {{{k}, {l}}}", panel.choices
                )
                rows = np.concatenate([fold_rows[k], fold_rows[l]])
                P, _ = clip_probabilities(checked_proba(est, X[rows], J, k), clip)
                full = np.full(n, np.nan)
                full[rows] = np.log(P[:, R])
                ell = np.full(n, np.nan)
                ok = linked & ((folds == k) | (folds == l))
                ell[ok] = full[nxt[ok]]
                nested_ell[(k, l)] = ell
                n_fits += 1

    for j in bound.continuation_choices():
        Xj = X[:, anchor_features] if (anchor_features is not None and j == R) else X
        rows_j = linked & (codes == j)
        for k in range(K):
            train = rows_where(rows_j & (folds != k))
            pred = fold_rows[k]
            label = f"choice {panel.choices[j]!r}, fold {k}"
            for c in range(d - 1):
                mu[pred, j, c] = _fit_predict_regression(
                    pair, Xj, q_data[:, c], train, pred, rng, label
                )
                n_fits += 1
            if scheme == "plain":
                target = ell_plain
            else:
                target = np.full(n, np.nan)
                for l in range(K):
                    if l == k:
                        continue
                    key = (min(k, l), max(k, l))
                    in_l = folds == l
                    target[in_l] = nested_ell[key][in_l]
            mu[pred, j, d - 1] = _fit_predict_regression(pair, Xj, target, train, pred, rng, label)
            n_fits += 1
    t_cont = time.perf_counter() - t1
    return Nuisances(
        ccp=ccp,
        mu=mu,
        clipped=clipped,
        n_fits=n_fits,
        timings={"ccp_s": t_ccp, "continuation_s": t_cont},
        folds=folds,
        clipped_rows=np.asarray(hit.any(axis=1)),
    )


def nuisances_from_truth(
    bound: BoundModel, ccp: np.ndarray, mu: np.ndarray, *, clip: float = 0.0
) -> Nuisances:
    """Wrap known nuisance values (e.g. the simulator's exact ones) as :class:`Nuisances`.

    Parameters
    ----------
    ccp : numpy.ndarray
        (n_rows, J) probabilities in the panel's row order and ``panel.choices`` order.
    mu : numpy.ndarray
        (n_rows, J, d) continuation expectations, or (n_rows, J) when d = 1.
    """
    panel = bound.panel
    J = len(panel.choices)
    ccp = np.asarray(ccp, dtype=np.float64)
    mu = np.asarray(mu, dtype=np.float64)
    if mu.ndim == 2:
        mu = mu[:, :, None]
    if ccp.shape != (panel.n_rows, J):
        raise InputError(f"ccp must have shape {(panel.n_rows, J)}, got {ccp.shape}.")
    if mu.shape != (panel.n_rows, J, bound.n_targets):
        raise InputError(
            f"mu must have shape {(panel.n_rows, J, bound.n_targets)}, got {mu.shape}."
        )
    hit = np.zeros_like(ccp, dtype=bool)
    if clip > 0:
        ccp, hit = clip_probabilities(ccp, clip)
    clipped = {panel.choices[j]: int(hit[:, j].sum()) for j in range(J)}
    return Nuisances(ccp=ccp, mu=mu, clipped=clipped, n_fits=0, timings={}, folds=None,
                     clipped_rows=np.asarray(hit.any(axis=1)))
