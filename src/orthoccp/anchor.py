"""How small is the anchor probability where the CCP correction divides by it?

The CCP correction of the finite-dependence estimator (METHOD §4, step 4) carries
:math:`(1\\{a_{t+1} = R\\} - P_R(x_{t+1}))/P_R(x_{t+1})`. In a renewal model the branch after
the anchor needs :math:`\\ln P_R` at the states that follow a renewal, where a second renewal
is rarest; in a terminal model every next state counts. :func:`check_anchor_probability`
reports the estimated :math:`P_R` there and says in plain words when it is too small.
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from ._errors import InputError
from .data import Panel

__all__ = ["AnchorCheck", "check_anchor_probability"]

THRESHOLD = 1e-3
"""Default warning threshold for the median estimated anchor probability (see Notes of
:func:`check_anchor_probability`)."""

MIN_EXPECTED = 5.0
"""Default minimum expected number of anchor choices at those rows (common practice: the
expected-count-of-five rule for frequency cells)."""


@dataclass(frozen=True)
class AnchorCheck:
    """The estimated anchor probability at the rows where the CCP correction divides by it.

    Attributes
    ----------
    kind : str
        ``"renewal"`` (rows right after an anchor choice) or ``"terminal"`` (every row with a
        predecessor).
    anchor : hashable
        The anchor choice.
    n_rows : int
        Rows examined.
    median, minimum, q10 : float
        Median, minimum and 10 % quantile of the estimated :math:`P_R` there (NaN without rows).
    expected_anchor : float
        :math:`\\sum \\hat P_R` over those rows: how many anchor choices the estimate expects.
    observed_anchor : int
        How many were observed.
    max_inverse : float
        The largest :math:`1/\\hat P_R`, the factor a single anchor choice there carries into
        the correction.
    warning : str or None
        A plain-language warning, or None when the probability is large enough.
    """

    kind: str
    anchor: Hashable
    n_rows: int
    median: float
    minimum: float
    q10: float
    expected_anchor: float
    observed_anchor: int
    max_inverse: float
    warning: str | None

    def readings(self) -> list[str]:
        """One plain sentence, plus the warning if any."""
        where = ("the states right after a renewal" if self.kind == "renewal"
                 else "the next states")
        if self.n_rows == 0:
            return [f"Anchor probability: no rows at {where} to examine."]
        out = [
            f"Anchor probability at {where} ({self.n_rows} rows): median {self.median:.2g}, "
            f"minimum {self.minimum:.2g}; {self.expected_anchor:.1f} anchor choices expected, "
            f"{self.observed_anchor} observed."
        ]
        if self.warning:
            out.append("Warning: " + self.warning)
        return out


def check_anchor_probability(
    panel: Panel,
    ccp: np.ndarray,
    *,
    anchor: Hashable,
    kind: Literal["renewal", "terminal"] = "renewal",
    threshold: float = THRESHOLD,
    min_expected: float = MIN_EXPECTED,
) -> AnchorCheck:
    """Estimated anchor probability at the states that follow a renewal, with a warning.

    Parameters
    ----------
    panel : Panel
        The data.
    ccp : numpy.ndarray
        (n_rows, J) estimated CCPs at every row, columns in the order of ``panel.choices``
        (e.g. ``Nuisances.ccp``, or a discrete estimator's ``ccp`` at the rows' states).
    anchor : hashable
        The anchor choice R.
    kind : {"renewal", "terminal"}, default="renewal"
        Renewal: the rows whose previous row (same unit, previous period) chose R.
        Terminal: every row with a previous row (R ends the problem, so every next state
        of the correction is reached by another choice).
    threshold : float, default=1e-3
        Warn when the median estimated :math:`P_R` at those rows is below this.
    min_expected : float, default=5.0
        Warn when fewer than this many anchor choices are expected at those rows.

    Returns
    -------
    AnchorCheck

    Notes
    -----
    How the defaults were chosen. The correction term carries
    :math:`(1\\{a' = R\\} - P_R)/P_R`, whose conditional variance is :math:`(1 - P_R)/P_R`:
    at :math:`P_R = 10^{-3}` it is about 1000, against at most 1/4 for the score term
    :math:`1\\{a = j\\} - \\Lambda_j` it corrects, and one anchor choice at such a state moves
    the correction by a factor 1000. Estimating :math:`P_R` there to within half its size
    takes about :math:`4/P_R = 4000` rows per state; on the bus design of Su & Judd (2012,
    50 units x 120 periods) has :math:`P_R \\approx 10^{-5}` at those states, and there the
    correction made the estimator worse (METHOD §4 and the discrete reference benchmark).
    Below :math:`10^{-3}` we therefore call the correction unreliable; ``min_expected`` adds
    the common-practice rule that a frequency cell needs about five expected events.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> from orthoccp import Panel
    >>> df = pd.DataFrame({"id": [0, 0, 0], "t": [0, 1, 2], "a": ["k", "r", "k"], "x": [1, 2, 0]})
    >>> p = Panel(df, unit="id", period="t", choice="a", states=["x"])
    >>> chk = check_anchor_probability(p, np.array([[0.9, 0.1], [0.5, 0.5], [0.9999, 1e-4]]),
    ...                                anchor="r")
    >>> chk.n_rows, chk.warning is not None
    (1, True)
    """
    if kind not in ("renewal", "terminal"):
        raise InputError(f"kind must be 'renewal' or 'terminal', got {kind!r}.")
    R = panel.choice_index(anchor)
    P = np.asarray(ccp, dtype=np.float64)
    if P.shape != (panel.n_rows, len(panel.choices)):
        raise InputError(
            f"ccp must have shape (n_rows, J) = ({panel.n_rows}, {len(panel.choices)}) with "
            f"columns in the order of panel.choices, got {P.shape}."
        )
    for name, v in (("threshold", threshold), ("min_expected", min_expected)):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not v >= 0:
            raise InputError(f"{name} must be a number >= 0, got {v!r}.")
    linked = panel.next_row >= 0
    if kind == "renewal":
        linked &= panel.choice_codes == R
    rows = panel.next_row[linked]
    pr = P[rows, R]
    observed = int((panel.choice_codes[rows] == R).sum())
    if rows.size == 0:
        return AnchorCheck(kind, anchor, 0, float("nan"), float("nan"), float("nan"), 0.0,
                           0, float("nan"), None)
    median, minimum = float(np.median(pr)), float(pr.min())
    expected = float(pr.sum())
    problems = []
    if median < threshold:
        problems.append(f"its median estimate there is {median:.2g}, below {threshold:g}")
    if expected < min_expected:
        problems.append(f"only {expected:.1f} anchor choices are expected there "
                        f"(fewer than {min_expected:g})")
    warning = None
    if problems:
        where = "right after a renewal" if kind == "renewal" else "at the next states"
        warning = (
            f"the anchor choice {anchor!r} is so rare {where} that the CCP correction, "
            f"which divides by its probability, is unreliable: {'; '.join(problems)}. Use the "
            f"discrete-state estimators (orthoccp.discrete.estimate_discrete: NPL or forward "
            f"simulation, which need no anchor) or, in a renewal model, the renewal-robust "
            f"moments (Model(persistent=[...]), moments='renewal_robust')."
        )
    return AnchorCheck(
        kind=kind, anchor=anchor, n_rows=int(rows.size), median=median, minimum=minimum,
        q10=float(np.quantile(pr, 0.1)), expected_anchor=expected, observed_anchor=observed,
        max_inverse=float(1.0 / max(minimum, 1e-300)), warning=warning,
    )
