"""Automatic correction terms: Riesz representers found without a formula (METHOD §8).

For a nuisance :math:`\\gamma = E[Y \\mid Z]` that the moment (or a later nuisance's generated
target) reads at evaluation points :math:`Z^{L}_t`, the correction is
:math:`\\phi_s = \\alpha(Z_s)(Y_s - \\gamma(Z_s))` on the nuisance's training rows, where
:math:`\\alpha` is the Riesz representer of the linear functional
:math:`\\delta \\mapsto \\sum_t \\sum_L D^L_t\\, \\delta(Z^L_t)` with
:math:`D^L_t = \\partial(m_t + \\textstyle\\sum_{\\text{later}} \\phi_t)/\\partial\\gamma(Z^L_t)`
(Chernozhukov, Newey & Singh 2022). Nuisances are processed from the last to the first, so a
nuisance inside a later one's target picks up that target's correction (the path of
:math:`\\ln P_R` inside the continuation regressions of a CCP model).

``method="lasso"``
    :math:`\\alpha = b'\\rho`, :math:`\\rho = \\arg\\min -2M'\\rho + \\rho'G\\rho + 2r\\lVert\\rho\\rVert_1`,
    :math:`M = n^{-1}\\sum_t\\sum_L D^L_t b(Z^L_t)`, :math:`G = n^{-1}\\sum_s b(Z_s)b(Z_s)'`,
    :math:`r = c\\,\\hat\\sigma_\\alpha\\sqrt{\\ln p / n}` (c = ``penalty``; :math:`\\hat\\sigma_\\alpha`
    the root mean square of the current :math:`\\alpha`, updated twice from a ridge start).
``method="learner"``
    :math:`\\alpha(z) = E[D \\mid Z^{L} = z]\\cdot f_{\\text{eval}}(z)/f_{\\text{train}}(z)`: a
    regression of the stacked derivatives on the evaluation points times a density ratio
    from a classifier of evaluation points against training rows, :math:`p/(1-p)`.

Both are cross-fitted: rows of fold k get :math:`\\alpha` fitted on the other folds.

Values read at a counterfactual stratum of a nuisance fitted ``by`` a discrete column, when
the user gives the model's stratum probabilities (``Nuisance(by_probability=...)``)
    :math:`\\alpha_t = D^{L}_t / \\pi_s(\\theta; x_t)` on the training rows of stratum s (the
    value of ``by`` that label L sets): the Riesz representer of
    :math:`\\delta \\mapsto E[D^L \\delta(x, s)]` in :math:`L_2` of the stratum-s rows is
    :math:`E[D^L \\mid x] / P(s \\mid x)`, and the model's :math:`\\pi_s(\\theta)` equals
    :math:`P(s \\mid x)` at the truth. This is step 2 of METHOD §4 ("evaluate :math:`P_a` with
    the model-implied :math:`\\Lambda_a(\\theta)`"): in a choice model the inverse probability then
    cancels against :math:`\\Lambda'` inside D and the weight stays bounded, where a data-driven
    representer (either method above) divides by an estimate of the choice frequencies.
    It needs :math:`E[D^L \\mid x, s] = E[D^L \\mid x]` (the derivative does not depend on the
    row's own stratum), which holds when the moment reads the stratum only through the
    nuisance.

Values at the unit's next row can instead be corrected on the moment row itself
(``next_weights="observed"``): :math:`\\phi_t = D_t (Y_{t+1} - \\gamma(Z_{t+1}))` with the
observed derivative as weight. That needs :math:`E[Y_{t+1} - \\gamma(Z_{t+1}) \\mid
\\text{row } t, Z_{t+1}] = 0` — the conditional independence of dynamic discrete choice
(METHOD §1) — and is the form of the analytic CCP correction of METHOD §4.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from .._errors import InputError
from .._labels import find_label, keys_by_label, show_label, show_labels
from ..backends import resolve_backend
from ..learners import LearnerPair
from ..nuisance import FoldFit, fit_predict, learner_dtype
from ._crossfit import FittedNuisance, evaluate_target
from ._dictionary import build_dictionary
from ._functions import MomentFunction, fd_steps, rowwise_derivative
from ._spec import Rows

__all__ = ["RieszFit", "fit_corrections", "correction_terms"]

Method = Literal["lasso", "learner"]
NextWeights = Literal["projected", "observed"]
_CHUNK = 4096


@dataclass(frozen=True, eq=False)
class RieszFit:
    """Weights of one nuisance's correction.

    Attributes
    ----------
    alpha : numpy.ndarray
        (n_rows, k) Riesz weight at each training row (0 elsewhere).
    next_weights : numpy.ndarray or None
        (n_rows, k) weight on row t of the residual at its next row (``"observed"`` mode).
    n_terms : int
        Dictionary size (0 for the learner method).
    model_probability : bool
        Counterfactual strata weighted by the user's ``by_probability``.
    """

    name: str
    alpha: np.ndarray
    next_weights: np.ndarray | None
    n_terms: int
    model_probability: bool = False


def correction_terms(
    fitted: list[FittedNuisance],
    riesz: list[RieszFit],
    rows: Rows,
    nu: Mapping[str, np.ndarray],
) -> dict[str, np.ndarray]:
    """:math:`\\phi` of every nuisance per row, with targets recomputed from ``nu``."""
    out: dict[str, np.ndarray] = {}
    nx = rows.next_row
    for fit, rz in zip(fitted, riesz):
        y = evaluate_target(fit.design, rows, nu) if callable(fit.design.spec.target) else fit.target
        resid = np.where(fit.train, y - np.asarray(nu[fit.name]), 0.0)
        phi = rz.alpha * resid[:, None]
        if rz.next_weights is not None:
            ok = nx >= 0
            r_next = np.zeros(rows.n_rows)
            r_next[ok] = resid[nx[ok]]
            phi = phi + rz.next_weights * r_next[:, None]
        out[fit.name] = phi
    return out


def _all_values(fitted: list[FittedNuisance]) -> dict[str, np.ndarray]:
    nu: dict[str, np.ndarray] = {}
    for f in fitted:
        nu.update(f.values)
    return nu


def _soft(x: np.ndarray, t: np.ndarray) -> np.ndarray:
    return np.sign(x) * np.maximum(np.abs(x) - t, 0.0)


def _lasso_gram(G: np.ndarray, M: np.ndarray, r: np.ndarray, start: np.ndarray) -> np.ndarray:
    """:math:`\\arg\\min \\rho'G\\rho - 2M'\\rho + 2r\\lVert\\rho\\rVert_1` by accelerated proximal
    gradient (Beck & Teboulle 2009) with restarts, every column of M at once (r per column)."""
    step = 1.0 / max(float(np.linalg.eigvalsh(G)[-1]), 1e-300)
    x = start.copy()
    y = x.copy()
    t = 1.0
    for _ in range(20000):
        x_new = _soft(y - step * (G @ y - M), step * r[None, :])
        t_new = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        if np.sum((x_new - x) * (y - x_new)) > 0:  # adaptive restart (O'Donoghue & Candes 2015)
            t_new, y = 1.0, x_new.copy()
        else:
            y = x_new + ((t - 1.0) / t_new) * (x_new - x)
        done = np.max(np.abs(x_new - x)) <= 1e-9 * (1.0 + np.max(np.abs(x_new)))
        x, t = x_new, t_new
        if done:
            break
    return x


def _penalised(G: np.ndarray, M: np.ndarray, penalty: float, n: float, share: float) -> np.ndarray:
    """:math:`\\arg\\min -2M'\\rho + \\rho'G\\rho + 2r\\lVert\\rho\\rVert_1` per column of M (p, k).

    :math:`r = c\\,\\hat\\sigma_\\alpha\\sqrt{\\ln p / n}` with :math:`\\hat\\sigma_\\alpha` the root mean
    square of :math:`\\alpha` on the training rows, from a ridge start and then from the
    previous lasso fit (two rounds).
    """
    # Columns without training rows in these folds have no curvature: their weight is not
    # identified (no overlap), so it is set to zero, as the minimum-norm projection does.
    supported = np.diag(G) > 1e-12 * max(float(np.diag(G).max()), 1e-300)
    if not supported.all():
        out = np.zeros_like(M)
        out[supported] = _penalised(G[np.ix_(supported, supported)], M[supported], penalty, n, share)
        return out
    p = G.shape[0]
    if penalty == 0.0:
        return np.linalg.lstsq(G, M, rcond=None)[0]
    tr = float(np.trace(G)) / p
    rho = np.linalg.solve(G + 1e-6 * tr * np.eye(p), M)
    for _ in range(2):
        sigma = np.sqrt(np.maximum(np.einsum("pc,pq,qc->c", rho, G, rho), 0.0) / share)
        r = penalty * sigma * np.sqrt(np.log(max(p, 2)) / n)
        rho = _lasso_gram(G, M, r, rho)
    return rho


def _lasso_alpha(
    fit: FittedNuisance, D: dict[str, np.ndarray], folds: np.ndarray, penalty: float
) -> tuple[np.ndarray, int]:
    design = fit.design
    train = fit.train
    K = int(folds.max()) + 1
    k = next(iter(D.values())).shape[1]
    dic = build_dictionary(
        design.spec.dictionary, design.X[train], design.stratum[train], len(design.strata),
        design.feature_names, design.name,
    )
    p = dic.size
    G = np.zeros((K, p, p))
    M = np.zeros((K, k, p))
    tr_idx = np.flatnonzero(train)
    for start in range(0, tr_idx.size, _CHUNK):
        idx = tr_idx[start : start + _CHUNK]
        B = dic(design.X[idx], design.stratum[idx])
        for f in np.unique(folds[idx]):
            Bf = B[folds[idx] == f]
            G[f] += Bf.T @ Bf
    for label, DL in D.items():
        pt = design.points[label]
        use = np.flatnonzero(np.any(DL != 0, axis=1) & pt.defined)
        for start in range(0, use.size, _CHUNK):
            idx = use[start : start + _CHUNK]
            B = dic(pt.X[idx], pt.stratum[idx])
            for f in np.unique(folds[idx]):
                sel = folds[idx] == f
                M[f] += DL[idx][sel].T @ B[sel]
    n_fold = np.bincount(folds, minlength=K).astype(np.float64)
    tr_fold = np.bincount(folds[train], minlength=K).astype(np.float64)
    alpha = np.zeros((folds.size, k))
    for f in range(K):
        n = n_fold.sum() - n_fold[f]
        share = (tr_fold.sum() - tr_fold[f]) / n
        Gk = (G.sum(axis=0) - G[f]) / n
        Mk = (M.sum(axis=0) - M[f]) / n
        rho = _penalised(Gk, Mk.T, penalty, n, share)
        idx = tr_idx[folds[tr_idx] == f]
        for start in range(0, idx.size, _CHUNK):
            sub = idx[start : start + _CHUNK]
            alpha[sub] = dic(design.X[sub], design.stratum[sub]) @ rho
    return alpha, p


def _learner_alpha(
    fit: FittedNuisance,
    D: dict[str, np.ndarray],
    folds: np.ndarray,
    pair: LearnerPair,
    rng: np.random.Generator,
    clip: float,
) -> tuple[np.ndarray, int]:
    design = fit.design
    train = fit.train
    K = int(folds.max()) + 1
    k = next(iter(D.values())).shape[1]
    Xs, Ss, Ds, Fs = [], [], [], []
    for label, DL in D.items():
        pt = design.points[label]
        use = np.any(DL != 0, axis=1) & pt.defined & (pt.stratum >= 0)
        Xs.append(pt.X[use])
        Ss.append(pt.stratum[use])
        Ds.append(DL[use])
        Fs.append(folds[use])
    own = design.name
    only_own = all(not np.any(D[lab] != 0) for lab in D if lab != own)
    same_population = only_own and not np.any(np.any(D[own] != 0, axis=1) & ~train)
    if same_population:
        # Evaluation points are the training rows themselves: no density ratio needed.
        Xs = [design.X[train]]
        Ss = [design.stratum[train]]
        Ds = [D[own][train]]
        Fs = [folds[train]]
    Xe, Se, De, Fe = np.vstack(Xs), np.concatenate(Ss), np.vstack(Ds), np.concatenate(Fs)
    # One shared matrix for the engine: the evaluation points, then the nuisance's own rows.
    shared = np.vstack([Xe, design.X])
    own_at = Xe.shape[0]
    dtype = learner_dtype(pair.classifier, pair.regressor)
    alpha = np.zeros((folds.size, k))
    # Every seed before any fit, in the order stratum, fold, component (then the classifier).
    tasks: list[FoldFit] = []
    cells: list[tuple[np.ndarray, int]] = []  # (target rows, component or -1 for the ratio)
    for s in range(len(design.strata)):
        for f in range(K):
            target_rows = np.flatnonzero(train & (design.stratum == s) & (folds == f))
            ev = np.flatnonzero((Se == s) & (Fe != f))
            if target_rows.size == 0 or ev.size == 0:
                continue
            where = f"the Riesz weight of {design.name!r}, fold {f}"
            for c in range(k):
                tasks.append(FoldFit(pair.new_regressor(rng), ev, own_at + target_rows,
                                     De[ev, c], None, dtype, where, f))
                cells.append((target_rows, c))
            if same_population:
                continue
            tr_other = np.flatnonzero(train & (design.stratum == s) & (folds != f))
            yc = np.concatenate([np.ones(ev.size, dtype=np.int64), np.zeros(tr_other.size, dtype=np.int64)])
            tasks.append(FoldFit(pair.new_classifier(rng), np.concatenate([ev, own_at + tr_other]),
                                 own_at + target_rows, yc, None, dtype, where, f, 2))
            cells.append((target_rows, -1))
    reg: np.ndarray | None = None
    with resolve_backend("sequential").session(shared, dtype=dtype) as session:
        for (target_rows, c), pred in zip(cells, session.map(fit_predict, tasks)):
            if c == 0:
                reg = np.zeros((target_rows.size, k))
            assert reg is not None, "components are fitted in order"
            if c >= 0:
                reg[:, c] = pred
                if c == k - 1 and same_population:
                    alpha[target_rows] = reg
                continue
            pr = np.clip(pred[:, 1], clip, 1 - clip)
            alpha[target_rows] = reg * (pr / (1 - pr))[:, None]
    return alpha, len(tasks)


def _model_weights(
    fit: FittedNuisance,
    D: dict[str, np.ndarray],
    theta: np.ndarray,
    rows: Rows,
    nu: Mapping[str, np.ndarray],
) -> np.ndarray | None:
    """Inverse-probability weights :math:`D_t/\\pi_s(\\theta; x_t)` of the labels that read a
    counterfactual stratum, from the user's ``by_probability``; those labels are removed from
    ``D`` (set to zero in place). None when the nuisance has no ``by_probability``."""
    design = fit.design
    spec = design.spec
    if spec.by_probability is None:
        return None
    points = spec.points()
    handled = [
        lab for lab, pt in design.points.items()
        if pt.kind == "counterfactual" and set(points[lab]) == {spec.by} and np.any(D[lab] != 0)
    ]
    if not handled:
        return None
    try:
        probs = spec.by_probability(np.array(theta, dtype=np.float64), rows, nu)
    except KeyError as exc:
        raise InputError(
            f"Nuisance {spec.name!r}: by_probability asked for {exc.args[0]!r}, which is not a "
            f"nuisance value or column (nuisance values: {', '.join(nu)})."
        ) from exc
    if not isinstance(probs, Mapping):
        raise InputError(
            f"Nuisance {spec.name!r}: by_probability must return a mapping {{value of "
            f"{spec.by!r}: probability per row}}, got {type(probs).__name__}."
        )
    alpha = np.zeros_like(D[handled[0]])
    by = spec.by
    assert by is not None, "by_probability is only accepted with by"
    for lab in handled:
        point = points[lab]
        assert isinstance(point, Mapping)
        value = point[by]
        s = find_label(value, design.strata, role=f"{by} value")
        assert s is not None, "counterfactual strata are checked when the points are resolved"
        key = keys_by_label(probs, [value], role="by_probability key")[0]
        if key is None:
            raise InputError(
                f"Nuisance {spec.name!r}: by_probability returned no probability for "
                f"{spec.by}={show_label(value)} (read at {lab!r}); it returned keys "
                f"{show_labels(probs)}."
            )
        pi = np.asarray(probs[key], dtype=np.float64).reshape(-1)
        if pi.shape[0] != rows.n_rows:
            raise InputError(
                f"Nuisance {spec.name!r}: by_probability[{show_label(value)}] has {pi.shape[0]} values; "
                f"expected one per row ({rows.n_rows})."
            )
        on = fit.train & (design.stratum == s)
        bad = on & ~(np.isfinite(pi) & (pi > 0) & (pi <= 1))
        if bad.any():
            raise InputError(
                f"Nuisance {spec.name!r}: by_probability[{show_label(value)}] must be a probability in "
                f"(0, 1] on the rows with {spec.by}={show_label(value)}; it is not on {int(bad.sum())} "
                f"of them (e.g. {pi[bad][:3].tolist()}) at theta={np.round(theta, 6).tolist()}."
            )
        alpha[on] += D[lab][on] / pi[on][:, None]
        D[lab] = np.zeros_like(D[lab])
    return alpha


def fit_corrections(
    moment: MomentFunction,
    theta: np.ndarray,
    fitted: list[FittedNuisance],
    rows: Rows,
    folds: np.ndarray,
    *,
    method: Method,
    penalty: float,
    next_weights: NextWeights,
    riesz_pair: LearnerPair | None,
    rng: np.random.Generator,
    clip: float,
) -> tuple[list[RieszFit], int]:
    """Riesz weights of every nuisance at ``theta`` (last nuisance first)."""
    nu = _all_values(fitted)
    steps = {f.name: {lab: fd_steps(v, bool(f.design.spec.binary)) for lab, v in f.values.items()}
             for f in fitted}
    Dm = {
        lab: rowwise_derivative(lambda v: moment(theta, v), nu, lab, steps[f.name][lab],
                                what="the moment")
        for f in fitted for lab in f.values
    }
    # dY_i / d value, for the generated targets (functions of earlier nuisances' values).
    dY: list[dict[str, np.ndarray]] = []
    for i, fi in enumerate(fitted):
        grads: dict[str, np.ndarray] = {}
        if callable(fi.design.spec.target):
            design_i = fi.design

            def target_i(v: Mapping[str, np.ndarray], d: Any = design_i) -> np.ndarray:
                return evaluate_target(d, rows, v)

            for fj in fitted[:i]:
                for lab in fj.values:
                    g = rowwise_derivative(
                        target_i, nu, lab,
                        steps[fj.name][lab], what=f"the target of {fi.name!r}",
                    )[:, 0]
                    g = np.where(fi.train, g, 0.0)
                    if np.any(g != 0):
                        grads[lab] = g
        dY.append(grads)
    nx = rows.next_row
    out: list[RieszFit | None] = [None] * len(fitted)
    n_fits = 0
    for j in range(len(fitted) - 1, -1, -1):
        fj = fitted[j]
        D = {lab: Dm[lab].copy() for lab in fj.values}
        for i in range(j + 1, len(fitted)):
            rz = out[i]
            assert rz is not None
            for lab, g in dY[i].items():
                if lab not in D:
                    continue
                D[lab] += rz.alpha * g[:, None]
                if rz.next_weights is not None:
                    t = np.flatnonzero((nx >= 0) & np.any(rz.next_weights != 0, axis=1))
                    np.add.at(D[lab], nx[t], rz.next_weights[t] * g[nx[t]][:, None])
        W = None
        if next_weights == "observed":
            for lab, pt in fj.design.points.items():
                if pt.kind != "next":
                    continue
                ok = (nx >= 0) & np.any(D[lab] != 0, axis=1)
                ok[ok] = fj.train[nx[ok]]
                if ok.any():
                    W = np.zeros_like(D[lab]) if W is None else W
                    W[ok] += D[lab][ok]
                    D[lab][ok] = 0.0
        model_alpha = _model_weights(fj, D, theta, rows, nu)
        if not any(np.any(d != 0) for d in D.values()):
            alpha, n_terms = np.zeros((rows.n_rows, next(iter(D.values())).shape[1])), 0
        elif method == "lasso":
            alpha, n_terms = _lasso_alpha(fj, D, folds, penalty)
        else:
            assert riesz_pair is not None
            alpha, fits = _learner_alpha(fj, D, folds, riesz_pair, rng, clip)
            n_fits += fits
            n_terms = 0
        if model_alpha is not None:
            alpha = alpha + model_alpha
        alpha[~fj.train] = 0.0
        out[j] = RieszFit(fj.name, alpha, W, n_terms, model_alpha is not None)
    return [r for r in out if r is not None], n_fits


def check_method(method: Any, penalty: Any, next_weights: Any) -> None:
    """Validate the correction options."""
    if method not in ("lasso", "learner"):
        raise InputError(f"riesz must be 'lasso' or 'learner', got {method!r}.")
    if isinstance(penalty, bool) or not isinstance(penalty, (int, float)) or not (
        np.isfinite(penalty) and penalty >= 0
    ):
        raise InputError(f"penalty must be a non-negative number, got {penalty!r}.")
    if next_weights not in ("projected", "observed"):
        raise InputError(
            f"next_weights must be 'projected' or 'observed', got {next_weights!r}."
        )
