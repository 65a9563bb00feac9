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
from collections.abc import Iterator, Sequence
from typing import Any, Literal

import numpy as np

from ._errors import InputError
from ._options import check_option
from .backends import Backend, limit_threads, resolve_backend, take_rows
from .learners import LearnerPair, checked_proba
from .model import BoundModel

__all__ = [
    "FoldFit",
    "Nuisances",
    "clip_probabilities",
    "crossfit_nuisances",
    "fit_predict",
    "learner_dtype",
    "nuisances_from_truth",
    "refit_anchor_target",
]

Scheme = Literal["plain", "nested"]


@dataclass(frozen=True, eq=False)
class Nuisances:
    r"""First-stage values at every row of the panel.

    Attributes
    ----------
    ccp : numpy.ndarray
        (n_rows, J) choice probabilities at each row's state (clipped, rows sum to one).
    mu : numpy.ndarray
        (n_rows, J, d) continuation expectations at each row's state; NaN for choices
        without one (the anchor of a terminal model) or when ``discount == 0``.
        ``mu[t, j, c]`` is :math:`E[q_c(x_{t+1}) \mid x_t, a_t = j]` with
        :math:`q = (z_R` data columns, :math:`\ln P_R)`: first the next-period value of
        the anchor's utility column of every parameter that reads one (in parameter
        order), last the log anchor probability. :func:`orthoccp.first_stage` names the
        components (``FirstStage.components``).
    clipped : dict
        Per choice label, the number of rows whose probability was clipped.
    n_fits : int
        Learner fits performed.
    timings : dict
        Seconds spent in the classifier fits (``ccp_s``: the K fold fits and the nested
        scheme's pair fits) and the continuation regressions (``continuation_s``).
    folds : numpy.ndarray or None
        Fold of each row (None for externally supplied nuisances).
    clipped_rows : numpy.ndarray or None
        (n_rows,) whether any probability of the row was clipped.
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


def clip_record(choices: Sequence[Any], hit: np.ndarray) -> tuple[dict[Any, int], np.ndarray]:
    """Per choice label, how many entries of ``hit`` were clipped, and which rows had any."""
    counts = {choices[j]: int(hit[:, j].sum()) for j in range(hit.shape[1])}
    return counts, np.asarray(hit.any(axis=1))


def learner_dtype(*templates: Any) -> type:
    """Feature dtype for the learners: float32 when every template is a tree ensemble.

    Tree learners only compare a feature with split thresholds. scikit-learn's trees and
    forests convert their input to float32 themselves, so for them float32 changes nothing.
    LightGBM bins each feature into at most ``max_bin`` (255) intervals between observed
    values; rounding to float32 (relative error below 6e-8) moves those boundaries by as
    much and can only merge values that differ by less, so the fit sees the same ordering of
    the data up to such near-ties. Any other learner (linear models, user objects whose
    arithmetic may depend on the dtype) gets float64.
    """
    for est in templates:
        steps = getattr(est, "steps", None)
        last = steps[-1][1] if steps else est
        module = type(last).__module__
        if not (module.startswith("lightgbm") or module.startswith("sklearn.ensemble._forest")
                or module.startswith("sklearn.tree")):
            return np.float64
    return np.float32


@dataclass(frozen=True, eq=False)
class FoldFit:
    """One learner fit on rows of the shared feature matrix and its out-of-fold predictions.

    Attributes
    ----------
    est : estimator
        A seeded, unfitted clone.
    train, predict : numpy.ndarray
        Row positions (in the shared matrix) to fit on, in this order, and to predict at.
    y : numpy.ndarray
        Target of each training row (choice codes for a classifier).
    cols : numpy.ndarray or None
        Feature columns used (all when None).
    dtype : type
        Feature dtype handed to the learner (:func:`learner_dtype`).
    what : str
        Names the fit in error messages.
    fold : int
        Fold predicted (for ``predict_proba`` messages).
    n_classes : int
        Choices J for a classifier (probabilities aligned through ``classes_``); 0 for a
        regressor.
    weight : numpy.ndarray or None
        Sample weights of the training rows.
    blocks : tuple of int, optional
        Sizes of consecutive blocks of ``predict`` that are predicted by separate calls (the
        evaluation points of a user nuisance); one call for all rows when None. Learners'
        arithmetic (BLAS blocking) may depend on how many rows one call holds, so the split
        is part of the task.
    """

    est: Any
    train: np.ndarray
    predict: np.ndarray
    y: np.ndarray
    cols: np.ndarray | None
    dtype: type
    what: str
    fold: int = 0
    n_classes: int = 0
    weight: np.ndarray | None = None
    blocks: tuple[int, ...] | None = None


def fit_predict(shared: np.ndarray, task: FoldFit, threads: int | None) -> tuple[np.ndarray, float, float]:
    """Run a :class:`FoldFit`: the predictions and the seconds in ``fit`` and in ``predict``.

    This is the unit of work every backend runs (:mod:`orthoccp.backends`).
    """
    est = limit_threads(task.est, threads)
    X_train = take_rows(shared, task.train, task.cols, task.dtype)
    t0 = time.perf_counter()
    if task.weight is None:
        est.fit(X_train, task.y)
    else:
        _fit_weighted(est, X_train, task.y, task.weight)
    fit_s = time.perf_counter() - t0
    del X_train
    t1 = time.perf_counter()
    sizes = task.blocks if task.blocks is not None else (task.predict.size,)
    parts = []
    for rows in np.split(task.predict, np.cumsum(sizes)[:-1]):
        if rows.size == 0:  # nothing held out here (learners refuse zero rows)
            parts.append(np.empty((0, task.n_classes) if task.n_classes else 0))
            continue
        X_pred = take_rows(shared, rows, task.cols, task.dtype)
        if task.n_classes:
            parts.append(checked_proba(est, X_pred, task.n_classes, task.fold))
            continue
        out = np.asarray(est.predict(X_pred), dtype=np.float64).reshape(-1)
        if out.shape[0] != rows.size or not np.all(np.isfinite(out)):
            raise InputError(
                f"regressor {type(est).__name__}.predict returned a bad result for {task.what} "
                f"(shape {out.shape}, finite={bool(np.all(np.isfinite(out)))})."
            )
        parts.append(out)
    out = parts[0] if len(parts) == 1 else np.concatenate(parts)
    return out, fit_s, time.perf_counter() - t1


def _fit_weighted(est: Any, X: np.ndarray, y: np.ndarray, w: np.ndarray) -> None:
    """Fit with sample weights; for a pipeline, route them to its last step."""
    steps = getattr(est, "steps", None)
    key = f"{steps[-1][0]}__sample_weight" if steps else "sample_weight"
    try:
        est.fit(X, y, **{key: w})
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"regressor {type(est).__name__} does not accept sample_weight, which the "
            f"renewal-robust moments need; use a registry regressor or moments='standard'."
        ) from exc


def _check_choices(present: np.ndarray, fold_label: str, choices: tuple[Any, ...]) -> None:
    if (present == 0).any():
        missing = [choices[j] for j in np.flatnonzero(present == 0)]
        raise InputError(
            f"choice(s) {', '.join(map(repr, missing))} never occur in the training rows of "
            f"{fold_label}; every choice must be observed outside each fold. Use fewer folds "
            f"or more units."
        )


def _check_regression_rows(n_train: int, what: str) -> None:
    if n_train < 2:
        raise InputError(
            f"only {n_train} training row(s) for the continuation regression of {what}; the "
            f"choice is too rare for cross-fitting. Use fewer folds or more units."
        )


def crossfit_nuisances(
    bound: BoundModel,
    pair: LearnerPair,
    folds: np.ndarray,
    rng: np.random.Generator,
    *,
    scheme: Scheme = "nested",
    clip: float = 1e-4,
    anchor_features: np.ndarray | None = None,
    backend: Backend | None = None,
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
        Seeds every learner, in a fixed order, before any fit runs.
    scheme : {"plain", "nested"}, default="nested"
        How the ln P_R target of the continuation regressions is built (module docstring).
    clip : float, default=1e-4
        Probabilities are clipped to [clip, 1 - clip].
    anchor_features : numpy.ndarray, optional
        Feature columns (the persistent states) for the anchor's continuation regression of a
        renewal model: after a renewal the next state depends on them only (METHOD §4b).
    backend : Backend, optional
        Where the fits run (:func:`orthoccp.backends.resolve_backend`); sequential by default.
        The numbers do not depend on it.

    Notes
    -----
    The fits run in two rounds of independent tasks: every classifier (the K fold fits and,
    for ``scheme="nested"``, the K(K-1)/2 pair fits), then every continuation regression.
    Tasks name their rows by index arrays into the one feature matrix
    (``Panel.features``), which is never copied per fold.
    """
    check_option("scheme", scheme)
    backend = backend if backend is not None else resolve_backend("sequential")
    panel = bound.panel
    X = panel.features
    codes = panel.choice_codes
    J = len(panel.choices)
    R = bound.anchor_index
    n = panel.n_rows
    K = int(folds.max()) + 1
    index = np.int32 if n < 2**31 else np.int64
    canon = panel.canonical_order.astype(index)

    def rows_where(mask: np.ndarray) -> np.ndarray:
        # Training rows in canonical order (label-free), so fits do not depend on unit labels.
        return canon[mask[canon]]

    fold_rows = [np.flatnonzero(folds == k).astype(index) for k in range(K)]
    counts = np.bincount(folds * J + codes, minlength=K * J).reshape(K, J)
    nested = scheme == "nested" and bound.has_next_stage
    pairs = [(k, l) for k in range(K) for l in range(k + 1, K)] if nested else []
    dtype = learner_dtype(pair.classifier, pair.regressor)

    # Every check and every seed before any fit, in the order of the sequential loops.
    clf_jobs: list[tuple[tuple[int, ...], Any, str]] = []
    for k in range(K):
        _check_choices(counts.sum(axis=0) - counts[k], f"fold {k}", panel.choices)
        clf_jobs.append(((k,), pair.new_classifier(rng), f"fold {k}"))
    for k, l in pairs:
        label = f"folds outside {{{k}, {l}}}"
        _check_choices(counts.sum(axis=0) - counts[k] - counts[l], label, panel.choices)
        clf_jobs.append(((k, l), pair.new_classifier(rng), label))

    def classifier_tasks() -> Iterator[FoldFit]:
        for held_out, est, label in clf_jobs:
            outside = np.isin(folds, held_out, invert=True)
            train = rows_where(outside)
            rows = np.concatenate([fold_rows[f] for f in held_out])
            yield FoldFit(est, train, rows, codes[train], None, dtype, label, held_out[0], J)

    with backend.session(X, dtype=dtype) as session:
        t0 = time.perf_counter()
        probas = session.map(fit_predict, classifier_tasks())
        raw = np.empty((n, J))
        for k in range(K):
            raw[fold_rows[k]] = next(probas)
        ccp, hit = clip_probabilities(raw, clip)
        del raw
        clipped, clipped_rows = clip_record(panel.choices, hit)
        n_fits = len(clf_jobs)

        d = bound.n_targets
        mu = np.full((n, J, d), np.nan)
        nxt = panel.next_row
        linked = nxt >= 0
        if nested:
            # targets[k]: the ln P_R target of the regressions that predict fold k, at the
            # linked rows of every other fold l, from the CCP fitted outside {k, l}.
            targets = np.full((K, n), np.nan)
            scratch = np.empty(n)
            for k, l in pairs:
                P, _ = clip_probabilities(next(probas), clip)
                rows = np.concatenate([fold_rows[k], fold_rows[l]])
                scratch[rows] = np.log(P[:, R])
                for target_of, source in ((k, l), (l, k)):
                    ok = fold_rows[source][linked[fold_rows[source]]]
                    targets[target_of, ok] = scratch[nxt[ok]]
        t_ccp = time.perf_counter() - t0
        if not bound.has_next_stage:
            return Nuisances(ccp=ccp, mu=mu, clipped=clipped, n_fits=n_fits,
                             timings={"ccp_s": t_ccp, "continuation_s": 0.0}, folds=folds,
                             clipped_rows=clipped_rows)

        t1 = time.perf_counter()
        zR_data = bound.next_targets_data()
        # Realised data targets at the next row (the z_R columns do not depend on the CCP).
        q_data = np.full((n, d - 1), np.nan)
        q_data[linked] = zR_data[nxt[linked]]
        if not nested:
            targets = np.full((1, n), np.nan)
            targets[0, linked] = np.log(ccp[nxt[linked], R])

        reg_jobs: list[tuple[int, int, int, Any, str]] = []  # (choice, fold, target, est, label)
        for j in bound.continuation_choices():
            rows_j = linked & (codes == j)
            per_fold = np.bincount(folds[rows_j], minlength=K)
            for k in range(K):
                label = f"choice {panel.choices[j]!r}, fold {k}"
                _check_regression_rows(int(rows_j.sum() - per_fold[k]), label)
                for c in range(d):
                    reg_jobs.append((j, k, c, pair.new_regressor(rng), label))

        def regression_tasks() -> Iterator[FoldFit]:
            for j, k, c, est, label in reg_jobs:
                cols = anchor_features if (anchor_features is not None and j == R) else None
                train = rows_where(linked & (codes == j) & (folds != k))
                if c < d - 1:
                    y = q_data[train, c]
                else:
                    y = targets[k if nested else 0, train]
                yield FoldFit(est, train, fold_rows[k], y, cols, dtype, label, k)

        for (j, k, c, _, _), pred in zip(reg_jobs, session.map(fit_predict, regression_tasks())):
            mu[fold_rows[k], j, c] = pred
        n_fits += len(reg_jobs)
        t_cont = time.perf_counter() - t1
    return Nuisances(
        ccp=ccp,
        mu=mu,
        clipped=clipped,
        n_fits=n_fits,
        timings={"ccp_s": t_ccp, "continuation_s": t_cont},
        folds=folds,
        clipped_rows=clipped_rows,
    )


def refit_anchor_target(
    bound: BoundModel,
    pair: LearnerPair,
    base: Nuisances,
    ccp: np.ndarray,
    rng: np.random.Generator,
    *,
    backend: Backend | None = None,
    clipped: np.ndarray | None = None,
) -> Nuisances:
    r"""``base`` with new CCPs and the continuation regressions of their ln P_R target refitted.

    Parameters
    ----------
    bound : BoundModel
        Model bound to the panel.
    pair : LearnerPair
        The regressor template (cloned per fit, seeded from ``rng``).
    base : Nuisances
        Cross-fitted nuisances (its folds are reused; its z_R-target regressions are kept,
        as their targets do not depend on the CCP).
    ccp : numpy.ndarray
        (n_rows, J) new CCPs at every row (already clipped).
    rng : numpy.random.Generator
        Seeds the regressors, in a fixed order, before any fit runs.
    backend : Backend, optional
        As in :func:`crossfit_nuisances`. Every regression uses all features (the standard
        moment's, like :func:`crossfit_nuisances` without ``anchor_features``).
    clipped : numpy.ndarray, optional
        (n_rows, J) which entries of ``ccp`` were clipped; the result's clipping counts come
        from it (default: no entry clipped).

    Returns
    -------
    Nuisances
        ``ccp`` and the refitted :math:`\mu^\ell_j(x) = E[\ln P_R(x_{t+1}) | x_t = x, a_t = j]`:
        fold k's predictions come from regressions fitted on the other folds (plain
        cross-fitting of the regression; the new target is a function of the whole sample
        through the estimate that produced ``ccp``).
    """
    if base.folds is None:
        raise InputError("the CCP refit needs cross-fitted nuisances (their folds).")
    backend = backend if backend is not None else resolve_backend("sequential")
    panel = bound.panel
    folds = base.folds
    codes = panel.choice_codes
    R = bound.anchor_index
    n, K = panel.n_rows, int(folds.max()) + 1
    index = np.int32 if n < 2**31 else np.int64
    canon = panel.canonical_order.astype(index)
    fold_rows = [np.flatnonzero(folds == k).astype(index) for k in range(K)]
    nxt = panel.next_row
    linked = nxt >= 0
    target = np.full(n, np.nan)
    target[linked] = np.log(ccp[nxt[linked], R])
    last = bound.n_targets - 1
    jobs = [(j, k, pair.new_regressor(rng), f"choice {panel.choices[j]!r}, fold {k}")
            for j in bound.continuation_choices() for k in range(K)]
    dtype = learner_dtype(pair.classifier, pair.regressor)  # the first stage's dtype

    def tasks() -> Iterator[FoldFit]:
        for j, k, est, label in jobs:
            mask = linked & (codes == j) & (folds != k)
            train = canon[mask[canon]]
            yield FoldFit(est, train, fold_rows[k], target[train], None, dtype, label, k)

    mu = base.mu.copy()
    t0 = time.perf_counter()
    with backend.session(panel.features, dtype=dtype) as session:
        for (j, k, _, _), pred in zip(jobs, session.map(fit_predict, tasks())):
            mu[fold_rows[k], j, last] = pred
    timings = dict(base.timings)
    timings["continuation_s"] = timings.get("continuation_s", 0.0) + time.perf_counter() - t0
    hit = np.zeros(ccp.shape, dtype=bool) if clipped is None else np.asarray(clipped, dtype=bool)
    counts, clipped_rows = clip_record(panel.choices, hit)
    return Nuisances(ccp=ccp, mu=mu, clipped=counts, n_fits=len(jobs), timings=timings,
                     folds=folds, clipped_rows=clipped_rows)


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
    clipped, clipped_rows = clip_record(panel.choices, hit)
    return Nuisances(ccp=ccp, mu=mu, clipped=clipped, n_fits=0, timings={}, folds=None,
                     clipped_rows=clipped_rows)
