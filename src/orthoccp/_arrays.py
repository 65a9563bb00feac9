"""Small array helpers shared by the estimators."""

from __future__ import annotations

import functools
from collections.abc import Hashable, Iterable

import numpy as np
import pandas as pd

__all__ = ["group_sums", "label_index"]


def group_sums(codes: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    """Sum the rows of ``values`` within groups: ``out[g] = sum of values[i] with codes[i] == g``.

    Parameters
    ----------
    codes : numpy.ndarray
        (n,) integer group codes in 0..n_groups-1.
    values : numpy.ndarray
        (n,) or (n, p) float values.
    n_groups : int
        Number of groups (rows of the output).

    Returns
    -------
    numpy.ndarray
        (n_groups,) or (n_groups, p).

    Notes
    -----
    One ``np.bincount`` per column. It adds the values in row order, as ``np.add.at`` does,
    so the sums are the same to the last bit, at a fraction of the time.
    """
    codes = np.asarray(codes)
    values = np.asarray(values, dtype=np.float64)
    if values.ndim == 1:
        return np.bincount(codes, weights=values, minlength=n_groups)
    out = np.empty((n_groups, values.shape[1]))
    for k in range(values.shape[1]):
        out[:, k] = np.bincount(codes, weights=values[:, k], minlength=n_groups)
    return out


@functools.lru_cache(maxsize=256)
def _label_template(labels: tuple[Hashable, ...], kinds: tuple[type, ...],
                    name: Hashable) -> pd.Index:
    return pd.Index(list(labels), name=name)


def label_index(labels: Iterable[Hashable], name: Hashable = None) -> pd.Index:
    """``pd.Index(list(labels), name=name)``, a fresh object each call.

    Inferring the dtype of text labels makes building a small Index cost tens of
    microseconds, which adds up in estimators called thousands of times (Monte Carlo runs,
    benchmarks). The Index is built once per distinct labels and then copied, so every caller
    gets its own object (renaming it in place cannot leak to others). The labels' types are
    part of the cache key, so ``(1, 2)`` and ``(1.0, 2.0)`` keep their own dtypes.
    """
    labels = tuple(labels)
    return _label_template(labels, tuple(type(v) for v in labels), name).copy()
