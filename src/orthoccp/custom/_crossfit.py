"""Cross-fitting of user-declared nuisances by unit (METHOD §5, §8).

Nuisances are fitted in the order given; a generated target may use the values of earlier
nuisances, which are themselves out of fold (the "plain" scheme of METHOD §5). Every value
at a row of fold k — at the row itself, at its next row (same unit, same fold) or at a
counterfactual point — comes from learners trained on the other folds.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._errors import InputError
from .._labels import show_label
from ..backends import Backend, resolve_backend
from ..learners import LearnerPair, _check_methods, _describe, resolve_learners
from ..nuisance import FoldFit, fit_predict, learner_dtype
from ._spec import NuisanceDesign, Rows

__all__ = ["FittedNuisance", "crossfit", "evaluate_target", "learner_template"]


@dataclass(frozen=True, eq=False)
class FittedNuisance:
    """Out-of-fold values of one nuisance.

    Attributes
    ----------
    target : numpy.ndarray
        Y per row (NaN where it is not defined).
    train : numpy.ndarray
        Rows that train the nuisance (finite target, a fitted stratum).
    values : dict
        Label -> value per row at that evaluation point (NaN where undefined).
    """

    design: NuisanceDesign
    target: np.ndarray
    train: np.ndarray
    values: dict[str, np.ndarray]
    clipped: int
    n_fits: int
    learner_name: str

    @property
    def name(self) -> str:
        return self.design.name


def learner_template(learner: Any, binary: bool, name: str) -> tuple[LearnerPair, str]:
    """Resolve ``Nuisance(learner=...)`` into a pair whose relevant member is used."""
    if isinstance(learner, str):
        try:
            pair = resolve_learners(learner)
        except InputError as exc:
            raise InputError(f"Nuisance {name!r}: {exc}") from exc
        return pair, learner
    if binary:
        _check_methods(learner, f"Nuisance {name!r} learner", ("fit", "predict_proba", "get_params"),
                       "a binary nuisance needs a scikit-learn-style classifier")
    else:
        _check_methods(learner, f"Nuisance {name!r} learner", ("fit", "predict", "get_params"),
                       "a nuisance needs a scikit-learn-style regressor")
    label = _describe(learner)
    return LearnerPair(classifier=learner, regressor=learner, name=label, regressor_name=label), label


def evaluate_target(
    design: NuisanceDesign, rows: Rows, nu: Mapping[str, np.ndarray]
) -> np.ndarray:
    """The target Y of a nuisance per row (NaN where it is not defined)."""
    spec = design.spec
    if isinstance(spec.target, str):
        raw: Any = rows[spec.target]
    else:
        try:
            raw = spec.target(rows, nu)
        except KeyError as exc:
            raise InputError(
                f"Nuisance {spec.name!r}: its target asked for {exc.args[0]!r}, which is not a "
                f"value of an earlier nuisance (available: {', '.join(nu) or 'none'}); list "
                f"nuisances so that targets only use earlier ones."
            ) from exc
    try:
        y = np.asarray(raw, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"Nuisance {spec.name!r}: the target must be numeric (or boolean), got "
            f"{type(raw).__name__} ({exc})."
        ) from exc
    if y.shape[0] != rows.n_rows:
        raise InputError(
            f"Nuisance {spec.name!r}: the target has {y.shape[0]} values; expected one per row "
            f"({rows.n_rows})."
        )
    if np.isinf(y).any():
        raise InputError(
            f"Nuisance {spec.name!r}: the target has {int(np.isinf(y).sum())} infinite values; "
            f"use NaN for rows where it is not defined."
        )
    if spec.binary:
        fin = y[np.isfinite(y)]
        if not np.all((fin == 0) | (fin == 1)):
            raise InputError(
                f"Nuisance {spec.name!r}: binary=True needs a 0/1 target, got values such as "
                f"{fin[(fin != 0) & (fin != 1)][:3].tolist()}."
            )
    return y


def _check_training(design: NuisanceDesign, y: np.ndarray, train: np.ndarray, where: str) -> None:
    spec = design.spec
    if train.size < 2:
        raise InputError(
            f"Nuisance {spec.name!r}: only {train.size} training row(s) in {where}; use fewer "
            f"folds or more units."
        )
    if spec.binary and np.unique(y[train]).size < 2:
        raise InputError(
            f"Nuisance {spec.name!r}: the target takes one value only in the training rows "
            f"of {where}; a probability needs both 0 and 1 outside each fold."
        )


def _shared_matrix(design: NuisanceDesign) -> tuple[np.ndarray, dict[str, int]]:
    """The nuisance's features and every evaluation point's, stacked into one matrix.

    The cross-fitting engine names rows of one shared matrix (:class:`~orthoccp.nuisance.
    FoldFit`); a point that reads the rows themselves shares the training block.
    Returns the matrix and the offset of each point's block.
    """
    blocks = [design.X]
    offsets: dict[str, int] = {}
    at = design.X.shape[0]
    for label, pt in design.points.items():
        if pt.X is design.X:
            offsets[label] = 0
            continue
        offsets[label] = at
        blocks.append(pt.X)
        at += pt.X.shape[0]
    shared = blocks[0] if len(blocks) == 1 else np.vstack(blocks)
    return shared, offsets


def crossfit(
    designs: list[NuisanceDesign],
    rows: Rows,
    folds: np.ndarray,
    canon: np.ndarray,
    rng: np.random.Generator,
    *,
    clip: float,
    backend: Backend | None = None,
) -> list[FittedNuisance]:
    """Fit every nuisance on K-1 folds and predict its values on the held-out fold.

    The fits run on the one cross-fitting engine of the built-in first stage
    (:func:`orthoccp.nuisance.fit_predict` on a :mod:`orthoccp.backends` session): training
    rows in the panel's canonical order, the feature dtype of :func:`~orthoccp.nuisance.
    learner_dtype`, every learner seeded from ``rng`` before any fit, in the order
    nuisance, stratum, fold.
    """
    K = int(folds.max()) + 1
    backend = backend if backend is not None else resolve_backend("sequential")
    fitted: list[FittedNuisance] = []
    nu: dict[str, np.ndarray] = {}
    for design in designs:
        spec = design.spec
        pair, lname = learner_template(spec.learner, bool(spec.binary), spec.name)
        y = evaluate_target(design, rows, nu)
        train = np.isfinite(y) & (design.stratum >= 0)
        if not train.any():
            raise InputError(f"Nuisance {spec.name!r}: the target is NaN on every row.")
        dtype = learner_dtype(pair.classifier, pair.regressor)
        shared, offsets = _shared_matrix(design)
        values = {label: np.full(rows.n_rows, np.nan) for label in design.points}
        # Every check and every seed before any fit, in the order of the sequential loops.
        tasks: list[FoldFit] = []
        placed: list[list[tuple[str, np.ndarray]]] = []
        for s, stratum in enumerate(design.strata):
            in_s = train & (design.stratum == s)
            if not in_s.any():
                continue
            for k in range(K):
                tr = canon[(in_s & (folds != k))[canon]]
                where = f"fold {k}" + ("" if spec.by is None else f", {spec.by}={show_label(stratum)}")
                _check_training(design, y, tr, where)
                targets = []
                for label, pt in design.points.items():
                    idx = np.flatnonzero((folds == k) & pt.defined & (pt.stratum == s))
                    targets.append((label, idx))
                predict = np.concatenate([offsets[label] + idx for label, idx in targets])
                if spec.binary:
                    est, ty, n_classes = pair.new_classifier(rng), y[tr].astype(np.int64), 2
                else:
                    est, ty, n_classes = pair.new_regressor(rng), y[tr], 0
                tasks.append(FoldFit(est, tr, predict, ty, None, dtype,
                                     f"nuisance {spec.name!r} in {where}", k, n_classes,
                                     blocks=tuple(idx.size for _, idx in targets)))
                placed.append(targets)
        with backend.session(shared, dtype=dtype) as session:
            for targets, pred in zip(placed, session.map(fit_predict, tasks)):
                if spec.binary:
                    pred = pred[:, 1]
                at = 0
                for label, idx in targets:
                    values[label][idx] = pred[at : at + idx.size]
                    at += idx.size
        clipped = 0
        if spec.binary:
            for label, v in values.items():
                hit = np.isfinite(v) & ((v < clip) | (v > 1 - clip))
                if label == spec.name:
                    clipped = int(hit.sum())
                values[label] = np.clip(v, clip, 1 - clip)
        for v in values.values():
            v.setflags(write=False)
        fitted.append(FittedNuisance(design, y, train, values, clipped, len(tasks), lname))
        nu.update(values)
    return fitted
