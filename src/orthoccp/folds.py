"""Fold assignment by decision maker (all rows of a unit in one fold)."""

from __future__ import annotations

import numpy as np

from ._errors import InputError
from ._options import check_option

__all__ = ["unit_folds"]


def unit_folds(
    unit_codes: np.ndarray,
    n_folds: int,
    rng: np.random.Generator,
    *,
    unit_keys: np.ndarray | None = None,
) -> np.ndarray:
    """Assign every row to a fold so that each unit's rows share one fold.

    Parameters
    ----------
    unit_codes : numpy.ndarray
        Integer unit code per row, values 0..n_units-1.
    n_folds : int
        Number of folds K (at least 2, at most the number of units).
    rng : numpy.random.Generator
        Shuffles units before they are dealt into folds of (nearly) equal unit counts.
    unit_keys : numpy.ndarray, optional
        A label-free key per unit (e.g. a hash of its rows). Units are put in key order
        before the shuffle, so relabelling units or reordering rows leaves the folds, and
        hence the estimates, unchanged.

    Returns
    -------
    numpy.ndarray
        Fold index (0..K-1) per row.
    """
    n_units = int(unit_codes.max()) + 1 if unit_codes.size else 0
    check_option("folds", n_folds)
    if n_units < n_folds:
        raise InputError(
            f"folds={n_folds} but the data have only {n_units} unit(s); cross-fitting by unit "
            f"needs at least as many units as folds. Use folds<={max(n_units, 2)} or more units."
        )
    canonical = np.arange(n_units) if unit_keys is None else np.argsort(unit_keys, kind="stable")
    order = canonical[rng.permutation(n_units)]
    unit_fold = np.empty(n_units, dtype=np.int64)
    unit_fold[order] = np.arange(n_units) % n_folds
    folds = unit_fold[unit_codes]
    # Partition check: every fold non-empty, every row assigned once.
    counts = np.bincount(folds, minlength=n_folds)
    assert counts.sum() == unit_codes.size and (counts > 0).all()
    return folds
