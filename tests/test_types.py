"""Specification of orthoccp.types: permanent unobserved types by EM (Arcidiacono & Miller 2011).

Outside references: the maximum of the mixture likelihood found directly by
scipy.optimize.minimize, with each type's values solved by this file's own value iteration
(not the package's solvers), and its sandwich covariance from central-difference scores and
Hessian of that likelihood (Newey & McFadden 1994, section 4: the MLE's robust covariance). The
transition correction is checked against brute force: re-estimating with one unit's transitions
weighted by 1 +/- eps moves the estimate by the correction's influence term.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import optimize
from scipy.special import logsumexp

import orthoccp as oc
from orthoccp import EstimationError, InputError
from orthoccp.types import TypesDesign, TypesResults, estimate_types, simulate_types

UTILITY = {"keep": {"wear": "x"}, "replace": {"replace": "1"}}
DESIGN = TypesDesign(n_states=6, wear=-0.4, replace=-2.5, shifts=(0.0, 1.5), shares=(0.6, 0.4),
                     increments=(0.35, 0.45, 0.2), discount=0.9)


@pytest.fixture(scope="module")
def data() -> pd.DataFrame:
    return simulate_types(DESIGN, units=300, periods=10, seed=3)


def _panel(df: pd.DataFrame) -> oc.Panel:
    return oc.Panel(df, unit="unit", period="period", choice="choice", states=["x"])


def _frequencies(df: pd.DataFrame, S: int, weights: np.ndarray | None = None) -> np.ndarray:
    """(2, S, S) transition frequencies counted by hand (unit weights optional)."""
    d = df.sort_values(["unit", "period"])
    nxt = d.groupby("unit")["x"].shift(-1)
    ok = nxt.notna().to_numpy()
    s, s1 = d["x"].to_numpy()[ok], nxt.to_numpy()[ok].astype(int)
    a = (d["choice"].to_numpy()[ok] == "replace").astype(int)
    w = np.ones(s.size) if weights is None else weights[d["unit"].to_numpy()[ok]]
    F = np.zeros((2, S, S))
    np.add.at(F, (a, s, s1), w)
    return F / F.sum(axis=2, keepdims=True)


def _type_logliks(eta: np.ndarray, df: pd.DataFrame, F: np.ndarray, beta: float) -> np.ndarray:
    """(n_units, 2) each unit's log-likelihood as type 1 and as type 2, by this file's own
    value iteration."""
    wear, rc, shift = eta[:3]
    slope = eta[3] if eta.size == 5 else 0.0  # a type-2 wear shift, when the model has one
    S = F.shape[1]
    x = np.arange(S)
    logp = []
    for alpha, w in ((0.0, wear), (shift, wear + slope)):
        u = np.stack([w * x, np.full(S, rc + alpha)], axis=1)
        V = np.zeros(S)
        for _ in range(5000):
            v = u + beta * np.einsum("jst,t->sj", F, V)
            V_new = logsumexp(v, axis=1)
            if np.max(np.abs(V_new - V)) < 1e-14:
                break
            V = V_new
        logp.append(v - logsumexp(v, axis=1, keepdims=True))
    a = (df["choice"].to_numpy() == "replace").astype(int)
    s = df["x"].to_numpy()
    units = df["unit"].to_numpy()
    return np.column_stack([np.bincount(units, weights=lp[s, a]) for lp in logp])


def _mixture_loglik(eta: np.ndarray, df: pd.DataFrame, F: np.ndarray, beta: float,
                    per_unit: bool = False) -> np.ndarray | float:
    """The mixture log-likelihood (per unit, or summed)."""
    share = eta[-1]
    ll = logsumexp(_type_logliks(eta, df, F, beta) + np.log([1 - share, share]), axis=1)
    return ll if per_unit else float(ll.sum())


@pytest.fixture(scope="module")
def direct(data: pd.DataFrame) -> dict[str, np.ndarray]:
    F = _frequencies(data, DESIGN.n_states)
    out = optimize.minimize(lambda e: -_mixture_loglik(e, data, F, DESIGN.discount),
                            x0=np.array([-0.3, -2.0, 1.0, 0.5]), method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000,
                                     "maxfev": 40000})
    assert out.success
    return {"eta": out.x, "F": F, "loglik": -out.fun}


@pytest.fixture(scope="module")
def fitted(data: pd.DataFrame) -> TypesResults:
    return estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                          type_shifts=["replace"], n_states=DESIGN.n_states, starts=3,
                          small_sample=False, transition_noise=False)


def test_em_fixed_point_is_the_direct_mixture_mle(fitted: TypesResults, direct: dict) -> None:
    # Issue 28: the model-updated EM's fixed point equals scipy's direct maximum to 1e-6
    np.testing.assert_allclose(fitted.params.to_numpy(), direct["eta"], atol=1e-6)
    assert list(fitted.params.index) == ["wear", "replace", "replace:type2", "share:type2"]
    assert fitted.details.loglik == pytest.approx(direct["loglik"], abs=1e-7)
    assert fitted.details.starts_agreeing == 3 and fitted.details.ccp_update == "model"


def test_standard_errors_are_the_mle_sandwich(fitted: TypesResults, data: pd.DataFrame,
                                             direct: dict) -> None:
    """Without transition noise: H^-1 (sum_i s_i s_i') H^-1 from central differences of the
    independently computed likelihood (relative tolerance 1e-4: the differences' error)."""
    eta, F = fitted.params.to_numpy(), direct["F"]
    h = 1e-5 * np.maximum(1.0, np.abs(eta))
    scores = np.column_stack([
        (_mixture_loglik(eta + h[j] * np.eye(4)[j], data, F, DESIGN.discount, per_unit=True)
         - _mixture_loglik(eta - h[j] * np.eye(4)[j], data, F, DESIGN.discount, per_unit=True))
        / (2 * h[j]) for j in range(4)])
    H = optimize.approx_fprime(eta, lambda e: np.array([
        (_mixture_loglik(e + h[j] * np.eye(4)[j], data, F, DESIGN.discount)
         - _mixture_loglik(e - h[j] * np.eye(4)[j], data, F, DESIGN.discount)) / (2 * h[j])
        for j in range(4)]), 1e-5)
    Hinv = np.linalg.inv(0.5 * (H + H.T))
    V = Hinv @ scores.T @ scores @ Hinv
    np.testing.assert_allclose(fitted.std_errors.to_numpy(), np.sqrt(np.diag(V)), rtol=1e-4)
    # the shares: type 1's standard error equals type 2's (they sum to one)
    assert fitted.details.shares[0] == pytest.approx(1 - fitted.params["share:type2"], abs=1e-12)
    assert fitted.details.share_errors[0] == pytest.approx(fitted.std_errors["share:type2"],
                                                           rel=1e-10)


def test_posteriors_are_bayes_rule_at_the_estimate(fitted: TypesResults, data: pd.DataFrame,
                                                   direct: dict) -> None:
    eta, F = fitted.params.to_numpy(), direct["F"]
    full = _mixture_loglik(eta, data, F, DESIGN.discount, per_unit=True)
    as_type2 = _type_logliks(eta, data, F, DESIGN.discount)[:, 1]
    q2 = np.exp(np.log(eta[3]) + as_type2 - full)  # Bayes' rule
    post = fitted.details.posteriors
    assert post.shape == (300, 2)
    np.testing.assert_allclose(post["type2"].to_numpy(), q2, atol=1e-8)
    # the posteriors separate the true types better than chance (the design's shift is 1.5)
    truth = data.groupby("unit")["type"].first().to_numpy()
    assert post["type2"].to_numpy()[truth == 2].mean() > post["type2"].to_numpy()[truth == 1].mean() + 0.2


@pytest.mark.parametrize("update", ["model", "data"])
def test_transition_correction_matches_brute_force(data: pd.DataFrame, update: str) -> None:
    """Weighting unit i's transitions by 1 + eps in the frequencies moves the estimate by
    -H^-1 c_i eps: the difference of the influence terms with and without transition noise.
    For the data update H is the Jacobian of the whole moment system (CCPs included)."""
    panel = _panel(data)
    opts = dict(utility=UTILITY, discount=DESIGN.discount, type_shifts=["replace"],
                n_states=DESIGN.n_states, starts=1, small_sample=False, ccp_update=update)
    with_noise = estimate_types(panel, **opts)
    without = estimate_types(panel, **opts, transition_noise=False)
    S = DESIGN.n_states
    for unit in (0, 7):
        moved = []
        for eps in (1e-3, -1e-3):
            w = np.ones(300)
            w[unit] += eps
            F = _frequencies(data, S, w)
            r = estimate_types(panel, **{**opts, "starts": 1}, transition_noise=False,
                               transitions={"keep": F[0], "replace": F[1]})
            moved.append(r.params.to_numpy())
        brute = (moved[0] - moved[1]) / 2e-3
        effect = with_noise.influence[unit] - without.influence[unit]
        np.testing.assert_allclose(effect, brute, rtol=2e-3, atol=1e-6)
    assert with_noise.std_errors["wear"] > without.std_errors["wear"]


def test_types_are_ordered_and_starts_agree(data: pd.DataFrame) -> None:
    res = estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                         type_shifts=["replace"], n_states=DESIGN.n_states, starts=4, seed=9)
    assert res.params["replace:type2"] > 0  # type 1 has the lowest replacement constant
    assert res.details.starts_agreeing == 4 and res.details.starts_failed == 0
    text = res.summary()
    assert "type shares (s.e.) [95% interval on the log-odds scale]: type 1" in text
    assert "starts: 4 of 4 reached this maximum" in text
    assert "independent of the first observed state" in text


def test_json_roundtrip_keeps_the_posteriors(fitted: TypesResults) -> None:
    back = oc.Results.from_json(fitted.to_json())
    assert isinstance(back, TypesResults)
    pd.testing.assert_series_equal(back.params, fitted.params)
    np.testing.assert_array_equal(back.details.posteriors.to_numpy(),
                                  fitted.details.posteriors.to_numpy())
    assert back.details.shares == fitted.details.shares
    assert json.loads(back.to_json())["details"]["kind"] == "types"


def test_ignoring_the_types_biases_the_state_dependence(data: pd.DataFrame,
                                                        fitted: TypesResults) -> None:
    """The single-type MLE on the same data (orthoccp.discrete, NPL) lands further from the
    truth in the replacement constant than the mixture does."""
    one = oc.discrete.estimate_discrete(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                                        n_states=DESIGN.n_states)
    truth = DESIGN.truth
    assert abs(fitted.params["replace"] - truth["replace"]) < 3 * fitted.std_errors["replace"]
    assert abs(one.params["replace"] - truth["replace"]) > abs(fitted.params["replace"]
                                                               - truth["replace"])


@pytest.mark.parametrize("kwargs, message", [
    ({"n_types": 1}, "n_types must be an integer >= 2"),
    ({"type_shifts": ["scrap"]}, "type_shifts names 'scrap', which is not a choice"),
    ({"type_shifts": "scrap"}, "type_shifts must list at least one choice"),
    ({"type_shifts": []}, "type_shifts must list at least one choice"),
    ({"type_shifts": ["keep"]}, "choice 'keep' has no constant in utility"),
    ({"starts": 0}, "starts must be an integer >= 1"),
    ({"tol": 0}, "tol must be a number in"),
    ({"ccp_update": "both"}, "ccp_update must be 'model' or 'data'"),
    ({"type_slopes": ["speed"]}, "type_slopes names 'speed', which is not a parameter"),
    ({"type_slopes": ["replace"]}, "'replace' already differs by type"),
    ({"type_slopes": "wear"}, "type_slopes must be a list of parameter names"),
])
def test_bad_options_are_named(data: pd.DataFrame, kwargs: dict, message: str) -> None:
    opts = dict(utility=UTILITY, discount=DESIGN.discount, type_shifts=["replace"],
                n_states=DESIGN.n_states)
    with pytest.raises(InputError, match=message):
        estimate_types(_panel(data), **{**opts, **kwargs})


def test_a_design_without_types_is_refused_not_reported() -> None:
    """With one true type the second type has nothing to explain: the likelihood is flat
    along the share once the shift is zero, so there is no interval to report."""
    one = TypesDesign(n_states=6, wear=-0.4, replace=-2.5, shifts=(0.0,), shares=(1.0,),
                      increments=(0.35, 0.45, 0.2), discount=0.9)
    df = simulate_types(one, units=200, periods=8, seed=2)
    with pytest.raises(EstimationError, match="the 2 types are not identified in this sample"):
        estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                       n_states=6, starts=3)


def test_data_updated_fixed_point_against_statsmodels(data: pd.DataFrame, direct: dict) -> None:
    """ccp_update="data": at the reported estimate (i) each type's CCPs at occupied states are
    the posterior-weighted frequencies (0.5 pseudo-observations spread by the choice shares),
    computed here by hand; (ii) the shares are the mean posteriors; (iii) theta maximises the
    posterior-weighted pseudo-likelihood at those CCPs: statsmodels' binomial GLM with
    frequency weights and offset, on choice values from this file's own Hotz-Miller inversion
    (V = (I - beta F^P)^-1 sum_j P_j (u_j + gamma - ln P_j)), gives the same theta to 1e-6."""
    import statsmodels.api as sm

    res = estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                         type_shifts=["replace"], n_states=DESIGN.n_states, starts=2,
                         ccp_update="data")
    assert res.details.ccp_update == "data" and "updated from the data" in res.summary()
    S, beta, F = DESIGN.n_states, DESIGN.discount, direct["F"]
    q = res.details.posteriors.to_numpy()
    P = res.details.ccp.to_numpy().reshape(2, S, 2)
    a = (data["choice"].to_numpy() == "replace").astype(int)
    s, unit = data["x"].to_numpy(), data["unit"].to_numpy()
    shares = np.bincount(a, minlength=2) / a.size
    assert res.params["share:type2"] == pytest.approx(q[:, 1].mean(), abs=1e-9)
    counts = np.zeros((2, S, 2))
    for k in range(2):
        np.add.at(counts[k], (s, a), q[unit, k])
        freq = (counts[k] + 0.5 * shares) / (counts[k].sum(axis=1, keepdims=True) + 0.5)
        np.testing.assert_allclose(P[k], freq, atol=1e-8)  # every state is occupied here
    # (iii) the weighted pseudo-likelihood at P, as a GLM in (wear, replace, shift)
    x = np.arange(S, dtype=float)
    X, off, y, w = [], [], [], []
    for k in range(2):
        FP = P[k][:, :1] * F[0] + P[k][:, 1:] * F[1]
        inv = np.linalg.inv(np.eye(S) - beta * FP)
        ent = (P[k] * (np.euler_gamma - np.log(P[k]))).sum(axis=1)
        Wz = np.column_stack([inv @ (P[k][:, 0] * x), inv @ P[k][:, 1], inv @ P[k][:, 1] * k])
        We = inv @ ent
        dz = np.column_stack([-x, np.ones(S), np.full(S, float(k))]) + beta * (F[1] - F[0]) @ Wz
        de = beta * (F[1] - F[0]) @ We
        for j in (0, 1):
            X.append(dz)
            off.append(de)
            y.append(np.full(S, float(j)))
            w.append(counts[k][:, j])
    glm = sm.GLM(np.concatenate(y), np.vstack(X), family=sm.families.Binomial(),
                 offset=np.concatenate(off), freq_weights=np.concatenate(w)).fit(tol=1e-14)
    np.testing.assert_allclose(res.params[["wear", "replace", "replace:type2"]].to_numpy(),
                               glm.params, atol=1e-6)


def test_data_and_model_updates_agree_to_sampling_error(data: pd.DataFrame,
                                                        fitted: TypesResults) -> None:
    """The two fixed points differ at order n^-1/2 (Arcidiacono & Miller 2011): here by less
    than half a standard error in every parameter (common practice for a sanity bound)."""
    res = estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                         type_shifts=["replace"], n_states=DESIGN.n_states, starts=2,
                         small_sample=False, transition_noise=False, ccp_update="data")
    gap = (res.params - fitted.params).abs() / fitted.std_errors
    assert gap.max() < 0.5, gap.to_dict()


def test_type_specific_slope_is_the_direct_mixture_mle() -> None:
    """type_slopes: the types differ in the wear coefficient too; the EM's fixed point equals
    scipy's direct maximum of the five-parameter mixture likelihood to 1e-6."""
    design = TypesDesign(n_states=6, wear=-0.4, replace=-2.5, shifts=(0.0, 1.5),
                         shares=(0.6, 0.4), increments=(0.35, 0.45, 0.2), discount=0.9,
                         wear_shifts=(0.0, 0.2))
    df = simulate_types(design, units=400, periods=10, seed=5)
    res = estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                         type_slopes=["wear"], n_states=6, starts=2)
    assert list(res.params.index) == list(design.truth)
    assert "shifting replace, the wear slope" in res.summary()
    F = _frequencies(df, 6)
    out = optimize.minimize(lambda e: -_mixture_loglik(e, df, F, 0.9),
                            x0=res.params.to_numpy() + 0.05, method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 40000,
                                     "maxfev": 80000})
    assert out.success
    np.testing.assert_allclose(res.params.to_numpy(), out.x, atol=1e-6)


def test_unit_bootstrap_agrees_with_the_sandwich(data: pd.DataFrame) -> None:
    """60 unit-bootstrap draws: the bootstrap SD estimates the sampling SD with relative error
    about 1/sqrt(2 * 59) = 9% (Efron & Tibshirani 1993, ch. 6); with the sandwich's own
    finite-sample error a band of 0.6-1.5 for their ratio is about 3.5 such errors."""
    from orthoccp.types import bootstrap_types

    opts = dict(utility=UTILITY, discount=DESIGN.discount, type_shifts=["replace"],
                n_states=DESIGN.n_states)
    panel = _panel(data)
    res = estimate_types(panel, **opts)
    boot = bootstrap_types(res, panel, draws=60, seed=2, **opts)
    assert boot.failed == 0 and boot.estimates.shape == (60, 4)
    assert boot.table["ratio"].between(0.6, 1.5).all(), boot.table["ratio"].to_dict()
    assert (boot.table["lower"] < res.params).all() and (res.params < boot.table["upper"]).all()
    assert str(boot).startswith("unit bootstrap, 60 of 60 draws")
    again = bootstrap_types(res, panel, draws=3, seed=2, **opts)  # same seed, same draws
    pd.testing.assert_frame_equal(again.estimates, boot.estimates.iloc[:3])
    with pytest.raises(InputError, match="draws must be an integer >= 2"):
        bootstrap_types(res, panel, draws=1, **opts)
    with pytest.raises(InputError, match="panel must be the panel the result was estimated on"):
        bootstrap_types(res, _panel(data[data["unit"] < 100]), draws=2, **opts)


def test_em_cap_is_reported_and_newton_finishes_the_fit(data: pd.DataFrame,
                                                        fitted: TypesResults) -> None:
    """Stopping the EM after 3 iterations changes nothing but the record: the Newton steps on
    the mixture likelihood reach the same maximum (1e-6) and the summary says the EM hit its
    cap."""
    res = estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                         type_shifts="replace", n_states=DESIGN.n_states, starts=3, max_em=3,
                         small_sample=False, transition_noise=False)
    assert not res.details.em_converged and fitted.details.em_converged
    assert "EM stopped at its cap of 3 iterations" in res.summary()
    np.testing.assert_allclose(res.params.to_numpy(), fitted.params.to_numpy(), atol=1e-6)


def test_share_interval_is_built_on_the_log_odds_scale(fitted: TypesResults) -> None:
    """Delta method on logit(pi): se(logit pi) = se(pi) / (pi (1 - pi)); the interval is the
    back-transformed logit(pi) +/- z se(logit pi), inside (0, 1)."""
    from scipy.special import expit, logit
    from scipy.stats import norm

    d = fitted.details
    for k in (1, 2):
        s, e = d.shares[k - 1], d.share_errors[k - 1]
        half = norm.ppf(0.95) * e / (s * (1 - s))
        lo, hi = d.share_interval(k, level=0.90)
        assert (lo, hi) == pytest.approx((expit(logit(s) - half), expit(logit(s) + half)),
                                         rel=1e-12)
        assert 0 < lo < s < hi < 1
    assert "[95% interval on the log-odds scale]" in fitted.summary()


def test_too_many_types_are_refused(data: pd.DataFrame) -> None:
    """Three types on two-type data: the best point has two types with the same payoffs, so
    their split is not identified; the estimator says so instead of reporting a share with a
    meaningless standard error."""
    with pytest.raises(EstimationError, match="have the same payoffs"):
        estimate_types(_panel(data), utility=UTILITY, discount=DESIGN.discount,
                       type_shifts=["replace"], n_types=3, n_states=DESIGN.n_states, starts=2)


def test_share_covariates_are_the_direct_mixture_mle() -> None:
    """Type probabilities that depend on a unit covariate: with types drawn 50/50 and
    z | type ~ N(-0.6 or +0.6, 1), P(type 2 | z) is logistic with intercept 0 and slope 1.2
    (Bayes' rule for two normals of equal variance). The EM's fixed point equals scipy's
    direct maximum of that mixture likelihood, computed with this file's value iteration, to
    1e-6."""
    design = TypesDesign(n_states=6, wear=-0.4, replace=-2.5, shifts=(0.0, 1.5),
                         shares=(0.5, 0.5), increments=(0.35, 0.45, 0.2), discount=0.9)
    df = simulate_types(design, units=400, periods=10, seed=8)
    rng = np.random.default_rng(8)
    kind = df.groupby("unit")["type"].first().to_numpy()
    z = rng.normal(np.where(kind == 2, 0.6, -0.6), 1.0)
    df["z"] = z[df["unit"].to_numpy()]
    res = estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                         share_covariates=["z"], n_states=6, starts=2)
    assert list(res.params.index) == ["wear", "replace", "replace:type2", "logodds:type2",
                                      "logodds:type2:z"]
    F = _frequencies(df, 6)

    def negloglik(e: np.ndarray) -> float:
        ll = _type_logliks(e[:3], df, F, 0.9)
        p2 = 1 / (1 + np.exp(-(e[3] + e[4] * z)))
        return -float(logsumexp(ll + np.log(np.column_stack([1 - p2, p2])), axis=1).sum())

    out = optimize.minimize(negloglik, x0=res.params.to_numpy() + 0.05, method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 40000,
                                     "maxfev": 80000})
    assert out.success
    np.testing.assert_allclose(res.params.to_numpy(), out.x, atol=1e-6)
    # the shares are the units' average type probabilities; the slope is near its truth
    p2 = 1 / (1 + np.exp(-(res.params["logodds:type2"] + res.params["logodds:type2:z"] * z)))
    assert res.details.shares[1] == pytest.approx(p2.mean(), rel=1e-12)
    assert abs(res.params["logodds:type2:z"] - 1.2) < 3 * res.std_errors["logodds:type2:z"]
    assert res.details.share_covariates == ("z",)
    back = oc.Results.from_json(res.to_json())
    assert back.details.share_covariates == ("z",)
    with pytest.raises(InputError, match="share_covariates column 'period' changes within"):
        estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                       share_covariates=["period"], n_states=6)
    with pytest.raises(InputError, match="share_covariates names 'w', which is not a column"):
        estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                       share_covariates=["w"], n_states=6)
    with pytest.raises(InputError, match="share_covariates needs ccp_update='model'"):
        estimate_types(_panel(df), utility=UTILITY, discount=0.9, type_shifts=["replace"],
                       share_covariates=["z"], n_states=6, ccp_update="data")
