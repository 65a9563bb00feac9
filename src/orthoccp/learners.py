"""First-stage learners: a registry of named defaults and support for any scikit-learn-style object.

Every fit uses a fresh :func:`sklearn.base.clone` of the template; the user's instance is never
fitted. Random seeds are set on every ``random_state`` parameter (also inside pipelines) from the
one generator of the estimation run.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.base import clone, is_classifier

from ._errors import InputError
from ._options import check_option

__all__ = ["LearnerPair", "resolve_learners", "learner_names"]


def _threads() -> int:
    """Learner threads: all cores but one (at least one, at most eight).

    Multi-threaded boosting slows down several-fold when another process holds one of its
    cores (measured on a 2-core machine: 100,000 rows took 16 s with 2 threads against 4 s with
    1 while a second process ran), so one core is left free.
    """
    return max(1, min((os.cpu_count() or 1) - 1, 8))


def _lgbm_common() -> dict[str, Any]:
    # Settings chosen to work without tuning from 10^3 to 10^6 rows: shallow trees, moderate
    # shrinkage, row/column subsampling and a minimum leaf size that keeps small-probability
    # regions from being fitted on a handful of rows.
    return dict(
        n_estimators=200,
        learning_rate=0.05,
        num_leaves=15,
        min_child_samples=40,
        subsample=0.8,
        subsample_freq=1,
        colsample_bytree=0.8,
        reg_lambda=1.0,
        n_jobs=_threads(),
        # Histograms built feature by feature and reductions in a fixed order: the numbers do
        # not depend on the thread count, so every backend of orthoccp.backends gives the same
        # estimates (measured: 2 threads against 1 changed the weighted projections of the
        # renewal-robust moments in the 14th digit without these; the same speed at 1 thread).
        force_col_wise=True,
        deterministic=True,
        verbose=-1,
    )


def _lightgbm() -> tuple[Any, Any]:
    from lightgbm import LGBMClassifier, LGBMRegressor

    return LGBMClassifier(**_lgbm_common()), LGBMRegressor(**_lgbm_common())


def _lightgbm_smooth() -> tuple[Any, Any]:
    # A smoother CCP classifier (fewer, shallower trees on larger leaves), the default
    # regressor. Measured on the exit design at 2,000 producers (benchmarks/coverage.py): the
    # second-order remainder of the corrected moment grows with the variance of ln P_R at small
    # anchor probabilities, which these settings reduce. In the renewal design (ebike, 2,000
    # bikes) the same settings double the wear slope's RMSE, so this is not the default.
    from lightgbm import LGBMClassifier, LGBMRegressor

    smooth = {**_lgbm_common(), "n_estimators": 150, "num_leaves": 7, "min_child_samples": 120}
    return LGBMClassifier(**smooth), LGBMRegressor(**_lgbm_common())


def _standardised(est: Any) -> Any:
    """``est`` behind a :class:`~sklearn.preprocessing.StandardScaler` (a two-step pipeline).

    Linear learners see every feature with mean 0 and variance 1, so the scale of a state
    (revenue in dollars, an int64 identifier near 5e18) cannot push the other features below
    the solvers' numerical cut-offs: without it, a state around 5e9 left the least-squares
    continuation regressions rank-deficient and moved the estimates by several standard
    errors. Rescaling a state leaves the fits unchanged (``tests/test_learners.py``). Sample
    weights go to the last step (``nuisance._fit_weighted``); the scaler is unweighted, which
    changes nothing but the rounding, as a linear fit is invariant to an affine map of a
    feature.
    """
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    return make_pipeline(StandardScaler(), est)


def _logit() -> tuple[Any, Any]:
    from sklearn.linear_model import LinearRegression, LogisticRegression

    return (
        _standardised(LogisticRegression(C=1e6, max_iter=5000)),
        _standardised(LinearRegression()),
    )


def _lasso_logit() -> tuple[Any, Any]:
    from sklearn.linear_model import LassoCV, LogisticRegression

    return (
        _standardised(
            LogisticRegression(l1_ratio=1.0, C=0.5, solver="saga", max_iter=2000, tol=1e-3)
        ),
        _standardised(LassoCV(cv=3)),
    )


def _random_forest() -> tuple[Any, Any]:
    from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor

    opts = dict(n_estimators=200, min_samples_leaf=20, max_features="sqrt", n_jobs=_threads())
    return RandomForestClassifier(**opts), RandomForestRegressor(**opts)  # type: ignore[arg-type]


def _cell_frequency() -> tuple[Any, Any]:
    # Hotz & Miller (1993)'s frequency estimator: for discrete or binned states only.
    from .cell import CellFrequencyClassifier, CellFrequencyRegressor

    return CellFrequencyClassifier(), CellFrequencyRegressor()


_REGISTRY: dict[str, Callable[[], tuple[Any, Any]]] = {
    "lightgbm": _lightgbm,
    "logit": _logit,
    "lasso_logit": _lasso_logit,
    "random_forest": _random_forest,
    "cell_frequency": _cell_frequency,
    "lightgbm_smooth": _lightgbm_smooth,
}


def learner_names() -> tuple[str, ...]:
    """Names accepted by ``learner=``."""
    return tuple(_REGISTRY)


@dataclass(frozen=True)
class LearnerPair:
    """Templates for the CCP classifier and the continuation regressor.

    Attributes
    ----------
    classifier, regressor : estimator
        Unfitted templates; :meth:`new_classifier` and :meth:`new_regressor` clone them.
    name : str
        Label used in summaries (registry name or class name).
    """

    classifier: Any
    regressor: Any
    name: str
    regressor_name: str

    def new_classifier(self, rng: np.random.Generator) -> Any:
        return _seeded(clone(self.classifier), rng)

    def new_regressor(self, rng: np.random.Generator) -> Any:
        return _seeded(clone(self.regressor), rng)


def _seeded(est: Any, rng: np.random.Generator) -> Any:
    seed = int(rng.integers(0, 2**31 - 1))
    params = est.get_params(deep=True)
    updates = {k: seed for k in params if k == "random_state" or k.endswith("__random_state")}
    if updates:
        est.set_params(**updates)
    return est


def _describe(obj: Any) -> str:
    steps = getattr(obj, "steps", None)
    if steps:
        return "+".join(type(s[1]).__name__ for s in steps)
    return type(obj).__name__


def _check_instance(obj: Any, role: str) -> None:
    if isinstance(obj, type):
        raise InputError(
            f"{role} {obj.__name__} is a class; pass an instance, e.g. {role}={obj.__name__}()."
        )


def _check_methods(obj: Any, role: str, methods: tuple[str, ...], requirement: str) -> None:
    """Fail clearly when a user's learner lacks a method the cross-fitting calls."""
    _check_instance(obj, role)
    for attr in methods:
        if not callable(getattr(obj, attr, None)):
            raise InputError(f"{role} {type(obj).__name__} has no {attr}() method; {requirement}.")


def resolve_learners(learner: Any, regressor: Any = None) -> LearnerPair:
    """Turn ``learner=`` / ``regressor=`` options into a :class:`LearnerPair`.

    Parameters
    ----------
    learner : str or classifier
        A registry name (see :func:`learner_names`) or any object with ``fit`` and
        ``predict_proba``.
    regressor : str or regressor, optional
        For the continuation regressions; defaults to the registry partner of ``learner``
        (``"lightgbm"``'s when ``learner`` is an object).
    """
    if isinstance(learner, str):
        check_option("learner", learner)
        clf, reg = _REGISTRY[learner]()
        name = learner
    else:
        _check_methods(learner, "learner", ("fit", "predict_proba", "get_params"),
                       "the CCP learner must be a scikit-learn-style classifier with fit and "
                       "predict_proba")
        clf = learner
        reg = _REGISTRY["lightgbm"]()[1]
        name = _describe(learner)
    if regressor is None:
        reg_name = name if isinstance(learner, str) else "lightgbm"
    elif isinstance(regressor, str):
        check_option("regressor", regressor)
        reg = _REGISTRY[regressor]()[1]
        reg_name = regressor
    else:
        _check_methods(regressor, "regressor", ("fit", "predict", "get_params"),
                       "it must be a scikit-learn-style regressor")
        if is_classifier(regressor):
            raise InputError(
                f"regressor {_describe(regressor)} is a classifier; the regressor must be a "
                f"regressor with fit/predict for continuous targets (the continuation "
                f"regressions predict ln P_R and utility columns), e.g. "
                f"regressor=LinearRegression() or regressor='lightgbm'. Pass a classifier "
                f"as learner=."
            )
        reg = regressor
        reg_name = _describe(regressor)
    return LearnerPair(classifier=clf, regressor=reg, name=name, regressor_name=reg_name)


def checked_proba(est: Any, X: np.ndarray, n_classes: int, fold: int) -> np.ndarray:
    """``predict_proba`` aligned to codes 0..n_classes-1 through ``classes_`` and validated."""
    name = type(est).__name__
    returned = est.predict_proba(X)
    try:
        raw = np.asarray(returned, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"learner {name}.predict_proba did not return a numeric array in fold {fold} "
            f"({type(exc).__name__}: {exc})."
        ) from exc
    if raw.ndim != 2:
        raise InputError(
            f"learner {name}.predict_proba returned an array of shape {raw.shape}; expected "
            f"one row per observation and one column per class, ({X.shape[0]}, {n_classes})."
        )
    classes = np.asarray(getattr(est, "classes_", np.arange(raw.shape[1])))
    if raw.shape != (X.shape[0], classes.size):
        raise InputError(
            f"learner {name}.predict_proba returned shape {raw.shape}; expected "
            f"({X.shape[0]}, {classes.size})."
        )
    # The learners are fitted on the choice codes 0..n_classes-1, so classes_ must hold them.
    valid = classes.dtype.kind in "iub" or (
        classes.dtype.kind == "f" and bool(np.all(classes == np.round(classes)))
    )
    if not valid or classes.size == 0 or classes.min() < 0 or classes.max() >= n_classes or (
        np.unique(classes).size != classes.size
    ):
        raise InputError(
            f"learner {name}.classes_ is {classes.tolist()!r}; it must list distinct choice "
            f"codes in 0..{n_classes - 1} (the codes the learner was fitted on)."
        )
    finite = np.isfinite(raw)
    if not finite.all():
        raise InputError(
            f"learner {name}.predict_proba returned {int((~finite).sum())} non-finite values "
            f"(NaN or infinite) in fold {fold}."
        )
    if raw.min() < -1e-9 or raw.max() > 1 + 1e-9:
        raise InputError(
            f"learner {name}.predict_proba returned values outside [0, 1] "
            f"(min {raw.min():.3g}, max {raw.max():.3g}) in fold {fold}."
        )
    sums = raw.sum(axis=1)
    if np.max(np.abs(sums - 1.0)) > 1e-6:
        raise InputError(
            f"learner {name}.predict_proba rows do not sum to 1 (largest "
            f"deviation {np.max(np.abs(sums - 1.0)):.3g}) in fold {fold}."
        )
    out = np.zeros((X.shape[0], n_classes))
    out[:, classes.astype(np.int64)] = raw
    return out
