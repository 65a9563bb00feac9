"""Specification of :mod:`orthoccp.interval_checks`: signs that a normal interval may not hold.

The signals are checked against their definitions (hand computations on small arrays); the
identification share against its closed form for a regressor diluted by a known factor, whose
Schur complement scales by the square of that factor (a property of the information matrix,
Newey & McFadden 1994 §3). The unseen variance of the CCP correction is checked by hand on a
two-choice system and, on average over draws, against the Bernoulli variance
:math:`E[((d - P)/P)^2] = (1 - P)/P` (textbook).
"""

from __future__ import annotations

import numpy as np
import pytest

import orthoccp as oc
from orthoccp.interval_checks import (
    GAP_LIMIT,
    UNSEEN_LIMIT,
    WEAK_LIMIT,
    identification_strength,
    interval_check,
    unseen_variance,
)
from orthoccp.moments import MomentSystem

from _support import panel_and_model


def _check(**overrides):  # type: ignore[no-untyped-def]
    args = dict(
        estimates=np.array([[1.0, 2.0]]),
        plugins=np.array([[0.0, 2.0]]),
        one_steps=np.array([[0.9, 2.0]]),
        std_errors=np.array([0.5, 1.0]),
        influence=np.array([[1.0, 1.0], [1.0, 1.0], [2.0, 1.0]]),
    )
    args.update(overrides)
    return interval_check(["a", "b"], **args)


def test_signals_match_their_definitions() -> None:
    t = _check().table
    assert t.loc["a", "linearity_gap"] == pytest.approx(0.1 / 0.5)
    assert t.loc["a", "correction_shift"] == pytest.approx(1.0 / 0.5)
    assert t.loc["b", "linearity_gap"] == 0.0
    # influence column a: squares 1, 1, 4 -> top share 4/6, effective units 36/18 = 2
    assert t.loc["a", "top_unit_share"] == pytest.approx(4 / 6)
    assert t.loc["a", "effective_units"] == pytest.approx(2.0)
    assert t.loc["b", "effective_units"] == pytest.approx(3.0)
    assert np.isnan(t.loc["a", "split_spread"])  # one split
    assert not t["flagged"].any()


def test_a_large_gap_flags_and_says_why() -> None:
    check = _check(one_steps=np.array([[1.0 - 0.5 * (GAP_LIMIT + 0.1), 2.0]]))
    assert check.flagged == ["a"]
    (reading,) = check.readings()
    assert "'a'" in reading and "from the one-step estimate" in reading


def test_split_spread_needs_several_splits() -> None:
    est = np.array([[1.0, 2.0], [2.0, 2.0], [1.5, 2.0]])
    check = _check(estimates=est, plugins=est, one_steps=est)
    # sd of (1, 2, 1.5) with ddof=1 is 0.5, over se 0.5
    assert check.table.loc["a", "split_spread"] == pytest.approx(1.0)
    assert check.flagged == ["a"] and "fold splits" in check.readings()[0]


def test_identification_share_of_a_diluted_regressor() -> None:
    rng = np.random.default_rng(0)
    n = 2000
    D = np.zeros((n, 2, 2))
    D[:, 0, 0] = rng.normal(size=n)
    D[:, 0, 1] = rng.normal(size=n)
    lam = np.full((n, 2), 0.5)
    X = D.copy()
    X[:, 0, 1] *= 0.05  # (1 - beta) with beta = 0.95
    share = identification_strength(X, D, lam)
    np.testing.assert_allclose(share, [1.0, 0.05**2], rtol=1e-10)
    check = _check(identification=share)
    assert check.flagged == ["b"] and share[1] < WEAK_LIMIT
    assert "weakly identified" in check.readings()[0]


def test_estimate_carries_the_checks(small_ebike) -> None:  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    res = oc.estimate(panel, model, learner="lightgbm", folds=3, seed=0)
    t = res.interval_check.table
    assert list(t.index) == list(res.params.index)
    # both parameters enter the flow utility directly: all their information reaches X
    np.testing.assert_allclose(t["identification"], 1.0)
    assert res.to_dict()["details"]["interval_check"]["wear_cost"]["flagged"] == bool(t.loc["wear_cost", "flagged"])
    assert any(r.startswith("Interval check:") for r in res.summary().splitlines())
    naive = oc.estimate(panel, model, learner="logit", folds=3, seed=0, debias=False)
    assert naive.interval_check is None


def test_a_one_step_fallback_flags_every_parameter() -> None:
    check = _check(routes=("newton", "one_step"))
    assert check.flagged == ["a", "b"]
    assert "no root near the plug-in solution in 1 of 2 split(s)" in check.readings()[0]
    assert _check(routes=("newton", "root")).flagged == []


def test_a_parameter_that_moves_with_a_weak_one_is_flagged() -> None:
    ident = np.array([1.0, 0.001])
    se = np.array([0.5, 1.0])
    for r, flagged in ((0.6, ["a", "b"]), (0.1, ["b"])):
        cov = np.array([[0.25, r * 0.5], [r * 0.5, 1.0]])
        check = _check(identification=ident, cov=cov, std_errors=se)
        assert check.flagged == flagged
    assert "moves with the weakly identified 'b' (correlation +0.60)" in _check(
        identification=ident, std_errors=se, cov=np.array([[0.25, 0.3], [0.3, 1.0]])
    ).table.loc["a", "reason"]


def _two_choice_system(x, chosen, units, p_next, next_anchor, beta=0.9):  # type: ignore[no-untyped-def]
    """Keep (0) against the anchor (1), one parameter with regressor x under keep."""
    n = x.size
    X = np.zeros((n, 2, 1))
    X[:, 0, 0] = x
    return MomentSystem(
        X=X, offset=np.zeros((n, 2)), chosen=chosen, units=units,
        corrected=np.ones(n, dtype=bool), target_resid=np.zeros((n, 1)),
        ccp_score=(next_anchor.astype(float) - p_next) / p_next,
        zR_params=np.array([], dtype=np.int64), discount=beta, anchor=1,
        next_anchor_p=p_next,
    )


def test_unseen_variance_matches_its_definition_by_hand() -> None:
    rng = np.random.default_rng(3)
    n, theta, beta = 40, np.array([0.7]), 0.9
    x = rng.normal(size=n)
    chosen = (rng.random(n) < 0.3).astype(np.int64)
    units = np.repeat(np.arange(10), 4)
    p_next = np.full(n, 1e-3)
    system = _two_choice_system(x, chosen, units, p_next, np.zeros(n, dtype=bool), beta)
    lam = 1.0 / (1.0 + np.exp(-x * theta[0]))  # keep probability
    own = np.where(chosen == 0, (1.0 - lam) * x, -lam * x)  # A_a - Abar
    G = -np.sum(lam * (1.0 - lam) * x**2)
    o = beta * own / G
    expected = np.sum(o**2 * (1.0 - p_next) / p_next)
    realised = np.sum(np.bincount(units, weights=o * -1.0) ** 2)  # no anchor choice occurred
    np.testing.assert_allclose(unseen_variance(system, theta), [expected - realised], rtol=1e-10)


def test_unseen_variance_is_zero_on_average_when_anchor_choices_occur_as_predicted() -> None:
    rng = np.random.default_rng(4)
    n, theta = 400, np.array([0.5])
    x = rng.normal(size=n)
    chosen = (rng.random(n) < 0.4).astype(np.int64)
    units = np.repeat(np.arange(100), 4)
    p_next = rng.uniform(0.05, 0.5, size=n)
    draws = np.array([
        unseen_variance(_two_choice_system(x, chosen, units, p_next, rng.random(n) < p_next),
                        theta)[0]
        for _ in range(400)
    ])
    system = _two_choice_system(x, chosen, units, p_next, np.zeros(n, dtype=bool))
    lam = 1.0 / (1.0 + np.exp(-x * theta[0]))
    own = np.where(chosen == 0, (1.0 - lam) * x, -lam * x)
    scale = np.sum((0.9 * own / np.sum(lam * (1 - lam) * x**2)) ** 2 * (1 - p_next) / p_next)
    assert unseen_variance(system, theta)[0] > 0  # sanity: no anchor choice at all is unseen
    # the mean over draws is zero within 4 Monte Carlo standard errors, and small against the
    # expected variance itself
    assert abs(draws.mean()) < 4 * draws.std(ddof=1) / np.sqrt(draws.size)
    assert abs(draws.mean()) < 0.05 * scale


def test_unseen_variance_above_the_limit_flags_and_says_why() -> None:
    se = np.array([0.5, 1.0])
    unseen = np.array([[(UNSEEN_LIMIT + 0.5) * 0.25, 0.2]])
    check = _check(unseen=unseen)
    assert check.table.loc["a", "unseen_variance"] == pytest.approx(UNSEEN_LIMIT + 0.5)
    assert check.table.loc["b", "unseen_variance"] == pytest.approx(0.2 / se[1] ** 2)
    assert check.flagged == ["a"]
    assert "has not shown" in check.readings()[0] and "too narrow" in check.readings()[0]
    assert np.isnan(_check().table.loc["a", "unseen_variance"])
