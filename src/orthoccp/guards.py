"""Post-estimation guards: checks on a :class:`~orthoccp.Results` that warn instead of failing.

:func:`dominant_units` flags parameters whose variance rests on a handful of decision makers:
with clustered standard errors, each unit's influence term contributes its square to the
variance, so one unit with a huge influence (an outlier, or a state where a probability is
nearly zero and the correction divides by it) can set the interval on its own.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
import pandas as pd

from ._errors import InputError, OrthoCCPWarning
from ._labels import plain_label

__all__ = ["dominant_units"]

_SHOWN = 5  # unit labels named in a warning



def dominant_units(
    results: Any,
    *,
    top_share: float = 0.01,
    threshold: float = 0.25,
    warn: bool = True,
    stacklevel: int = 2,
) -> pd.DataFrame:
    """How much of each parameter's variance the most influential units carry.

    Unit g's share of parameter k's variance is :math:`s_{gk}^2 / \\sum_h s_{hk}^2`, with
    :math:`s_{gk}` its influence term (``results.influence``, one row per unit). The top
    ``top_share`` of units (at least one) by that share are summed.

    Parameters
    ----------
    results : Results
        An estimation result (anything with ``influence``, ``influence_units`` and
        ``params``).
    top_share : float, default=0.01
        Fraction of units in the top group, in (0, 1]; the group has
        ``max(1, floor(top_share * n_units))`` units.
    threshold : float, default=0.25
        A parameter is flagged when its top group carries more than this share of its
        variance, in (0, 1).
    warn : bool, default=True
        Issue an :class:`~orthoccp.OrthoCCPWarning` for each flagged parameter, naming the
        parameter, the share and the top unit labels.
    stacklevel : int, default=2
        Passed to :func:`warnings.warn` (2 points at the caller of this function).

    Returns
    -------
    pandas.DataFrame
        Indexed by parameter, with columns ``n_units``, ``n_top``, ``share`` (variance share
        of the top group; NaN when the variance is zero), ``dominated`` (``share >
        threshold``) and ``top_units`` (their labels, largest contribution first).

    Examples
    --------
    >>> import types
    >>> import numpy as np, pandas as pd
    >>> res = types.SimpleNamespace(
    ...     params=pd.Series([0.0], index=["cost"]),
    ...     influence=np.array([[10.0]] + [[1.0]] * 99),
    ...     influence_units=np.arange(100),
    ... )
    >>> table = dominant_units(res, warn=False)
    >>> row = table.loc["cost"]
    >>> int(row["n_top"]), bool(row["dominated"]), round(float(row["share"]), 3), row["top_units"]
    (1, True, 0.503, [0])
    """
    if isinstance(top_share, bool) or not isinstance(top_share, (int, float)) or not (
        0.0 < float(top_share) <= 1.0
    ):
        raise InputError(f"top_share must be a fraction in (0, 1], got {top_share!r}.")
    if isinstance(threshold, bool) or not isinstance(threshold, (int, float)) or not (
        0.0 < float(threshold) < 1.0
    ):
        raise InputError(f"threshold must be a share in (0, 1), got {threshold!r}.")
    influence = np.asarray(results.influence, dtype=np.float64)
    names = [str(p) for p in results.params.index]
    if influence.ndim != 2 or influence.shape[1] != len(names):
        raise InputError(
            f"results.influence has shape {influence.shape}; expected (units, {len(names)})."
        )
    n_units = influence.shape[0]
    labels = np.asarray(getattr(results, "influence_units", np.arange(n_units)))
    if labels.shape[0] != n_units:
        labels = np.arange(n_units)
    n_top = max(1, int(math.floor(float(top_share) * n_units)))

    squares = influence**2
    totals = squares.sum(axis=0)
    rows = []
    for k, name in enumerate(names):
        order = np.argsort(-squares[:, k], kind="stable")[:n_top]
        total = float(totals[k])
        share = float(squares[order, k].sum() / total) if total > 0 and math.isfinite(total) else math.nan
        rows.append(
            {
                "parameter": name,
                "n_units": n_units,
                "n_top": n_top,
                "share": share,
                "dominated": bool(share > threshold),
                "top_units": [plain_label(u) for u in labels[order]],
            }
        )
    table = pd.DataFrame(rows).set_index("parameter")

    if warn:
        for name, row in table[table["dominated"]].iterrows():
            shown = ", ".join(repr(u) for u in row["top_units"][:_SHOWN])
            more = f" and {row['n_top'] - _SHOWN} more" if row["n_top"] > _SHOWN else ""
            who = "unit" if row["n_top"] == 1 else f"{row['n_top']} units"
            warnings.warn(
                f"parameter {name!r}: the top {who} of {n_units} ({shown}{more}) {'carries' if row['n_top'] == 1 else 'carry'} "
                f"{row['share']:.0%} of its variance (more than {float(threshold):.0%}), so "
                f"its interval rests on a few units. Inspect them (outliers, probabilities "
                f"near the clip bound) before trusting it.",
                OrthoCCPWarning,
                stacklevel=stacklevel,
            )
    return table
