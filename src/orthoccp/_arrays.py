"""Small array helpers shared by the estimators."""

from __future__ import annotations

import numpy as np

__all__ = ["group_sums"]


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
