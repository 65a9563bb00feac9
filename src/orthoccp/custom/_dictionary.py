"""Dictionaries b(Z) for the Riesz regression, selected by name or supplied as a function.

The dictionary is built once from a nuisance's training rows (standardisation, the cells of
``"saturated"``) and then evaluated at any evaluation point. With ``by`` strata it is the
Kronecker product of the stratum indicators and the base functions, so the Riesz
representer may differ freely between strata. Every column is scaled to unit root mean
square on the training rows (the penalty then treats the columns alike); columns that are
zero on the training rows are dropped.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .._errors import InputError

__all__ = ["Dictionary", "build_dictionary", "dictionary_names"]


def _linear(X: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    return np.hstack([np.ones((X.shape[0], 1)), (X - mean) / sd])


def _quadratic_pairs(X: np.ndarray) -> list[tuple[int, int]]:
    f = X.shape[1]
    few = [np.unique(X[:, i]).size <= 2 for i in range(f)]
    return [(i, j) for i in range(f) for j in range(i, f) if not (i == j and few[i])]


_NAMES = ("linear", "quadratic", "saturated")


def dictionary_names() -> tuple[str, ...]:
    """Names accepted by ``Nuisance(dictionary=...)``."""
    return _NAMES


@dataclass(frozen=True, eq=False)
class Dictionary:
    """A fitted dictionary: evaluate with :meth:`__call__` at features and strata."""

    kind: str
    n_strata: int
    base: Callable[[np.ndarray], np.ndarray]
    keep: np.ndarray
    scale: np.ndarray

    @property
    def size(self) -> int:
        return int(self.keep.sum())

    def __call__(self, X: np.ndarray, stratum: np.ndarray) -> np.ndarray:
        """b(Z) per row; rows with undefined features or stratum -1 are all zero."""
        ok = (stratum >= 0) & np.all(np.isfinite(X), axis=1)
        n = X.shape[0]
        c = np.zeros((n, 0))
        if ok.any():
            c_ok = self.base(X[ok])
            c = np.zeros((n, c_ok.shape[1]))
            c[ok] = c_ok
        q = c.shape[1]
        full = np.zeros((n, self.n_strata * q))
        for s in range(self.n_strata):
            rows = ok & (stratum == s)
            full[rows, s * q : (s + 1) * q] = c[rows]
        return full[:, self.keep] / self.scale


def build_dictionary(
    spec: str | Callable[[pd.DataFrame], Any],
    X_train: np.ndarray,
    stratum_train: np.ndarray,
    n_strata: int,
    feature_names: tuple[str, ...],
    nuisance: str,
) -> Dictionary:
    """Build the dictionary from the training rows of a nuisance.

    Parameters
    ----------
    spec : {"linear", "quadratic", "saturated"} or callable
        Base functions; a callable maps a DataFrame of the features to an (n, p) array.
    X_train, stratum_train : numpy.ndarray
        Features and stratum codes of the training rows.
    """
    mean = X_train.mean(axis=0)
    sd = X_train.std(axis=0)
    sd = np.where(sd > 0, sd, 1.0)
    base: Callable[[np.ndarray], np.ndarray]
    if isinstance(spec, str):
        if spec not in _NAMES:
            raise InputError(
                f"Nuisance {nuisance!r}: dictionary {spec!r} is unknown; valid names: "
                f"{', '.join(_NAMES)} (or pass a function of the features' DataFrame)."
            )
        if spec == "linear":
            base = lambda X: _linear(X, mean, sd)  # noqa: E731
        elif spec == "quadratic":
            pairs = _quadratic_pairs(X_train)
            ii = np.array([p[0] for p in pairs], dtype=np.int64)
            jj = np.array([p[1] for p in pairs], dtype=np.int64)

            def base(X: np.ndarray) -> np.ndarray:
                Z = (X - mean) / sd
                return np.hstack([np.ones((X.shape[0], 1)), Z, Z[:, ii] * Z[:, jj]])

        else:
            cells = np.unique(X_train, axis=0)
            if cells.shape[0] > 5000:
                raise InputError(
                    f"Nuisance {nuisance!r}: dictionary 'saturated' would have "
                    f"{cells.shape[0]} cells; it suits discrete features with few values. "
                    f"Use 'quadratic' or a function."
                )
            index = pd.MultiIndex.from_arrays([cells[:, k] for k in range(cells.shape[1])])

            def base(X: np.ndarray) -> np.ndarray:
                keys = pd.MultiIndex.from_arrays([X[:, k] for k in range(X.shape[1])])
                pos = index.get_indexer(keys)
                out = np.zeros((X.shape[0], cells.shape[0]))
                hit = pos >= 0
                out[np.flatnonzero(hit), pos[hit]] = 1.0
                return out

        kind = spec
    elif callable(spec):
        user = spec

        def base(X: np.ndarray) -> np.ndarray:
            out = np.asarray(user(pd.DataFrame(X, columns=list(feature_names))), dtype=np.float64)
            if out.ndim == 1:
                out = out[:, None]
            if out.ndim != 2 or out.shape[0] != X.shape[0] or not np.all(np.isfinite(out)):
                raise InputError(
                    f"Nuisance {nuisance!r}: the dictionary function returned shape "
                    f"{out.shape} (finite={bool(np.all(np.isfinite(out)))}); it must return "
                    f"finite values of shape ({X.shape[0]}, p)."
                )
            return out

        kind = getattr(spec, "__name__", "function")
    else:
        raise InputError(
            f"Nuisance {nuisance!r}: dictionary must be a name ({', '.join(_NAMES)}) or a "
            f"function, got {type(spec).__name__}."
        )
    c = base(X_train)
    q = c.shape[1]
    full = np.zeros((X_train.shape[0], n_strata * q))
    for s in range(n_strata):
        rows = stratum_train == s
        full[rows, s * q : (s + 1) * q] = c[rows]
    rms = np.sqrt((full**2).mean(axis=0))
    keep = rms > 1e-12
    if not keep.any():
        raise InputError(f"Nuisance {nuisance!r}: the dictionary is zero on every training row.")
    return Dictionary(kind=kind, n_strata=n_strata, base=base, keep=keep, scale=rms[keep])
