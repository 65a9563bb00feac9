r"""Checks of the model's assumptions that the data can refute; each warns, naming what it saw.

* :func:`warn_if_not_persistent`: a declared persistent state that changes right after a
  renewal more often than after the other choices (exogenous states that change whatever the
  choice are persistent too).
* :func:`renewal_reset_test`: after a renewal, does the next state still depend on the state
  before it? (below)

(Rows after a terminal choice are an error, raised by :func:`orthoccp.estimate.account_rows`.)

The reset test
--------------
A renewal R resets the states it resets: given the persistent states f, the state y after a
renewal is drawn afresh, independently of everything before the renewal (METHOD §4b; without
declared persistent states, f is the states that never change within a unit, which no choice
can move). So for two renewals r < q of the same unit (with the same f),

.. math::

    E[(y_r - y_q)\, h(x_r)] = 0

for the state :math:`x_r` just before renewal r and any function h: both :math:`y_r` and
:math:`y_q` have mean :math:`g(f)` given everything up to renewal r, whatever g is. The test
takes h(x) = x - mean(x) for each reset state (a state that varies within units and is not
declared persistent) and, for each next-period reset state, a Wald test of the per-unit sums
over pairs (clustered by unit, chi-squared with one degree of freedom per pre-renewal
state), with the Bonferroni level :data:`RESET_P` / (states tested).

The unknown g(f) cancels in the difference, so a non-linear effect of f cannot cause a false
alarm; a regression on f could not promise that. Measured on the project's renewal scenarios
(``ebike``, ``ebike3``), whose wear after a swap depends on the bike's covariates through
interactions, a sine and thresholds, 20 panels each, with and without the covariates declared
persistent: a cross-fitted regression of the next wear on the wear before the swap (out-of-fold
R² gain given the covariates linearly, with an F-test) warned on 80 of 80 runs at 1,000 bikes x
12 weeks and 20 of 80 at 300 x 8; this test warned on none (smallest p-value 0.011). Where the
wear after a swap keeps half the wear before it, it warned on 40 of 40 panels at 1,000 x 12,
but on 1 of 40 at 300 x 8, where few bikes swap twice (``tests/test_checks.py``).
It needs units with at least two renewals.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ._arrays import group_sums
from ._errors import OrthoCCPWarning
from .data import Panel
from .instruments import persistent_feature_columns
from .model import BoundModel

__all__ = ["RATE_Z", "RESET_P", "ResetTest", "renewal_reset_test", "warn_if_not_persistent",
           "warn_if_not_reset"]

RESET_P = 1e-3
"""Level of the reset test, divided among the next-period states tested."""

_EXAMPLES = 3


def _example_units(bound: BoundModel, unit_codes: np.ndarray) -> str:
    panel = bound.panel
    labels = panel.unit_labels[np.unique(unit_codes)[:_EXAMPLES]]
    return ", ".join(f"{panel.unit}={_plain(v)!r}" for v in labels)


def _plain(value: object) -> object:
    return value.item() if isinstance(value, np.generic) else value


def _changes_within_units(panel: Panel, values: np.ndarray) -> np.ndarray:
    """Rows whose value differs from the unit's previous row (any period gap)."""
    codes = panel.unit_codes
    changed = np.zeros(values.shape[0], dtype=bool)
    same = codes[1:] == codes[:-1]
    differ = values[1:] != values[:-1]
    if differ.ndim > 1:
        differ = differ.any(axis=1)
    changed[1:] = same & differ
    return changed


RATE_Z = 3.0
"""A persistent state is reported as moved by the renewal when it changes right after a renewal
more often than after the other choices by this many standard errors (two-proportion test)."""


def warn_if_not_persistent(bound: BoundModel, *, stacklevel: int = 3) -> None:
    """Warn for each declared persistent state that the renewal appears to reset or move.

    Persistent states are those a renewal does not reset: time-invariant characteristics, or
    exogenous states that evolve whatever the choice (METHOD §4b). So a persistent state may
    change within a unit, but it should change right after a renewal as often as after the
    other choices. The check compares the two shares of rows (with a next row) after which the
    state changes: it warns when it changes after renewals and either never after the other
    choices, or more often after renewals by :data:`RATE_Z` standard errors.
    """
    panel = bound.panel
    linked = panel.next_row >= 0
    renewal = (panel.choice_codes == bound.anchor_index) & linked
    other = ~(panel.choice_codes == bound.anchor_index) & linked
    if not renewal.any():
        return
    for col in bound.model.persistent:
        values = panel.frame[col].to_numpy()
        nxt = panel.next_row
        changed = np.zeros(values.shape[0], dtype=bool)
        changed[linked] = values[linked] != values[nxt[linked]]
        n_r, n_o = int(renewal.sum()), int(other.sum())
        c_r, c_o = int(changed[renewal].sum()), int(changed[other].sum())
        if c_r == 0:
            continue
        p_r, p_o = c_r / n_r, (c_o / n_o if n_o else 0.0)
        pooled = (c_r + c_o) / (n_r + n_o)
        se = np.sqrt(pooled * (1 - pooled) * (1 / n_r + (1 / n_o if n_o else 0.0)))
        z = (p_r - p_o) / se if se > 0 else np.inf
        if c_o > 0 and z < RATE_Z:
            continue  # it moves as often after every choice: an exogenous state
        units = panel.unit_codes[np.flatnonzero(renewal & changed)]
        where = (
            f"persistent state {col!r} changes right after a renewal in {c_r} of {n_r} renewal "
            f"rows ({p_r:.1%}; e.g. {_example_units(bound, units)}), against {c_o} of {n_o} rows "
            f"after the other choices ({p_o:.1%})"
        )
        warnings.warn(
            f"{where}: the renewal appears to reset or move it. The renewal-robust moments "
            f"assume a renewal does not reset the persistent states. Remove it from persistent "
            f"or use moments='standard'.",
            OrthoCCPWarning,
            stacklevel=stacklevel,
        )


@dataclass(frozen=True)
class ResetTest:
    """The reset test's result (see the module docstring).

    Attributes
    ----------
    n_pairs, n_units : int
        Pairs of renewals (of the same unit and persistent states) and the units they come
        from.
    states : tuple of str
        The reset states: pre-renewal instruments and next-period outcomes.
    p_values : dict
        Per next-period state, the Wald test's p-value.
    slopes : dict
        Per next-period state, the implied slope on each pre-renewal state, in standard
        deviations of the next state per standard deviation of the pre-renewal state.
    flagged : tuple of str
        The next-period states whose p-value is below the Bonferroni level.
    """

    n_pairs: int
    n_units: int
    states: tuple[str, ...]
    p_values: dict[str, float]
    slopes: dict[str, dict[str, float]]
    flagged: tuple[str, ...]

    def message(self) -> str:
        """The warning text (empty when nothing is flagged)."""
        if not self.flagged:
            return ""
        parts = "; ".join(
            f"next {s!r}: p = {self.p_values[s]:.1g}, slope "
            + ", ".join(f"{b:+.2f} s.d. per s.d. of {x!r}" for x, b in self.slopes[s].items())
            for s in self.flagged
        )
        return (
            f"after a renewal the next state still depends on the state before it, in "
            f"{self.n_pairs} pairs of renewals of the same unit ({self.n_units} units): "
            f"{parts}. The renewal model assumes the renewal resets these states (given the "
            f"persistent ones). Check the anchor choice and the persistent states, or use a "
            f"model in which this choice is not a renewal."
        )


def _group_reverse_sums(groups: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For rows sorted by group: how many later rows share the group, and their values' sum."""
    n = groups.size
    last = np.r_[groups[1:] != groups[:-1], True]
    end = np.flatnonzero(last)  # last row of each group
    group_end = np.repeat(end, np.diff(np.r_[-1, end]))
    later = group_end - np.arange(n)
    csum = np.cumsum(values, axis=0)
    later_sum = csum[group_end] - csum
    return later, later_sum


def renewal_reset_test(bound: BoundModel) -> ResetTest | None:
    """The reset test of a renewal model; ``None`` when it cannot run.

    It cannot run without reset states (every state is persistent or constant within
    units), or with fewer than 10 units that renew at least twice (with the same persistent
    states).
    """
    panel = bound.panel
    if bound.model.kind != "renewal" or not bound.has_next_stage:
        return None
    X = panel.features
    rows = np.flatnonzero((panel.choice_codes == bound.anchor_index) & (panel.next_row >= 0))
    same = panel.unit_codes[1:] == panel.unit_codes[:-1]
    moving = np.array([bool(((X[1:, c] != X[:-1, c]) & same).any()) for c in range(X.shape[1])],
                      dtype=bool)
    persistent = np.zeros(X.shape[1], dtype=bool)
    persistent[persistent_feature_columns(bound)] = True
    reset = np.flatnonzero(moving & ~persistent)
    if reset.size == 0 or rows.size < 2:
        return None
    # Pairs only within a unit and value of the persistent states (rows stay in time order).
    fixed = np.flatnonzero(persistent & moving)
    key = panel.unit_codes[rows]
    if fixed.size:
        _, fkey = np.unique(X[rows][:, fixed], axis=0, return_inverse=True)
        key = key * (int(fkey.max()) + 1) + fkey.reshape(-1)
    order = np.argsort(key, kind="stable")
    rows, key = rows[order], key[order]
    _, groups, sizes = np.unique(key, return_inverse=True, return_counts=True)
    if int((sizes >= 2).sum()) < 10:
        return None
    before = X[rows][:, reset]
    after = X[panel.next_row[rows]][:, reset]
    later, later_sum = _group_reverse_sums(groups, after)
    # d_r = sum over later renewals q of (y_r - y_q); h_r = x_r - mean.
    d = after * later[:, None] - later_sum
    h = before - before.mean(axis=0)
    names = [panel.feature_names[c] for c in reset]
    n_groups = int(groups.max()) + 1
    p_values: dict[str, float] = {}
    slopes: dict[str, dict[str, float]] = {}
    # Denominator of the implied slopes: the same moment with x in place of y.
    later_x, later_sum_x = _group_reverse_sums(groups, before)
    dx = before * later_x[:, None] - later_sum_x
    sd_x, sd_y = before.std(axis=0), after.std(axis=0)
    for j, name in enumerate(names):
        if sd_y[j] == 0:
            continue  # the renewal sets it to one value: nothing can depend on the past
        s = group_sums(groups, d[:, j : j + 1] * h, n_groups)
        mean = s.mean(axis=0)
        cov = np.cov(s, rowvar=False, bias=False).reshape(h.shape[1], h.shape[1]) / n_groups
        rank = np.linalg.matrix_rank(cov)
        if rank == 0:
            continue
        wald = float(mean @ np.linalg.pinv(cov) @ mean)
        p_values[name] = float(stats.chi2.sf(wald, rank))
        slopes[name] = {}
        for k, x in enumerate(names):
            denom = float((dx[:, k] * h[:, k]).sum())
            if denom != 0 and sd_x[k] > 0:
                b = float((d[:, j] * h[:, k]).sum()) / denom
                slopes[name][x] = b * sd_x[k] / sd_y[j]
    if not p_values:
        return None
    level = RESET_P / len(p_values)
    flagged = tuple(s for s in p_values if p_values[s] < level)
    n_pairs = int((sizes * (sizes - 1) // 2).sum())
    n_units = int(np.unique(panel.unit_codes[rows][sizes[groups] >= 2]).size)
    return ResetTest(n_pairs, n_units, tuple(names), p_values, slopes, flagged)


def warn_if_not_reset(bound: BoundModel, *, stacklevel: int = 3) -> ResetTest | None:
    """Run :func:`renewal_reset_test` and warn when it flags a state."""
    result = renewal_reset_test(bound)
    if result is not None and result.flagged:
        warnings.warn(result.message(), OrthoCCPWarning, stacklevel=stacklevel)
    return result
