"""Specification of orthoccp.custom: user moments with automatic debiasing (METHOD §8).

Outside references used below:

* the augmented inverse-propensity-weighted (AIPW) estimator of an average treatment effect
  and its variance (Robins, Rotnitzky & Zhao 1994, JASA 89; the cross-fitted form is
  Chernozhukov et al. 2018, Econometrics Journal 21, §5.1): with cross-fitted cell means
  g(x, d) and propensity pi(x),
  theta = mean[g(x,1) - g(x,0) + d (y - g(x,1)) / pi(x) - (1 - d)(y - g(x,0)) / (1 - pi(x))];
* the two-step linear GMM estimator and Hansen's J (Hansen 1982, Econometrica 50; Hayashi
  2000, Econometrics, §3.5): theta = (b'W a) / (b'W b) for moments a - theta b;
* Neyman orthogonality (Chernozhukov, Escanciano, Ichimura, Newey & Robins 2022).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures

import orthoccp as oc
from orthoccp._random import stream
from orthoccp.cell import CellFrequencyClassifier, CellFrequencyRegressor
from orthoccp.custom import HansenJ, Nuisance, check_orthogonality, estimate_moments
from orthoccp.folds import unit_folds

CELL_PROPENSITY = np.array([0.2, 0.4, 0.6, 0.8])


def _discrete_data(n: int, seed: int, effect_slope: float = 0.5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 4, n)
    d = (rng.random(n) < CELL_PROPENSITY[x]).astype(int)
    y = 1.0 + x + 2.0 * d + effect_slope * x * d + rng.standard_normal(n)
    return pd.DataFrame({"id": np.arange(n), "t": 0, "d": d, "x": x.astype(float), "y": y})


def _panel(df: pd.DataFrame, states: list[str]) -> oc.Panel:
    return oc.Panel(df, unit="id", period="t", choice="d", states=states)


def _outcome(**kw):  # type: ignore[no-untyped-def]
    opts = dict(name="g", target="y", features=["x"], by="d",
                at={"g1": {"d": 1}, "g0": {"d": 0}})
    opts.update(kw)
    return Nuisance(**opts)  # type: ignore[arg-type]


def ate_moment(theta, rows, nu):  # type: ignore[no-untyped-def]
    """Regression at a counterfactual treatment: m = g(x, 1) - g(x, 0) - theta."""
    return nu["g1"] - nu["g0"] - theta[0]


def _aipw_closed_form(panel: oc.Panel, seed: int) -> tuple[float, float]:
    """Cross-fitted AIPW with cell means and cell propensities (RRZ 1994; CCDDHNR 2018 §5.1),
    on the fold split ``estimate_moments`` draws from ``seed`` (its ``folds`` stream)."""
    folds = unit_folds(panel.unit_codes, 5, stream(seed, "folds"), unit_keys=panel.unit_keys)
    fr = panel.frame
    X, D, Y = fr["x"].to_numpy(), fr["d"].to_numpy(), fr["y"].to_numpy()
    psi = np.empty(len(fr))
    for k in range(5):
        for c in np.unique(X):
            tr = (folds != k) & (X == c)
            te = (folds == k) & (X == c)
            pi = D[tr].mean()
            g1, g0 = Y[tr & (D == 1)].mean(), Y[tr & (D == 0)].mean()
            psi[te] = g1 - g0 + D[te] * (Y[te] - g1) / pi - (1 - D[te]) * (Y[te] - g0) / (1 - pi)
    n = psi.size
    theta = psi.mean()
    # Variance of a mean of the score, with the n/(n-1) factor of the clustered sandwich.
    se = np.sqrt(((psi - theta) ** 2).sum() / (n - 1)) / np.sqrt(n)
    return float(theta), float(se)


# --------------------------------------------------------------------------- (a) AIPW


@pytest.mark.parametrize("riesz", ["lasso", "learner"])
def test_saturated_dictionary_gives_the_textbook_aipw_estimate(riesz: str) -> None:
    """A saturated dictionary spans 1/pi(x): the automatic correction is the AIPW one.

    Cell means for g, unpenalised Riesz regression (or cell-frequency learners for the
    learner-based fit, whose density ratio is then N_c / N_c1 = 1 / pi(c)): estimate and
    standard error equal the closed form to 1e-6 relative (rounding only: the moment is
    linear in the nuisance, so the finite differences are exact).
    """
    panel = _panel(_discrete_data(2000, seed=1), ["x"])
    res = estimate_moments(
        panel, ate_moment, [_outcome(learner=CellFrequencyRegressor(), dictionary="saturated")],
        parameters=["ate"], penalty=0.0, seed=3, riesz=riesz, clip=1e-6,
        riesz_learner=(CellFrequencyClassifier(), CellFrequencyRegressor()),
    )
    theta, se = _aipw_closed_form(panel, seed=3)
    assert isinstance(res, oc.Results)
    assert res.params["ate"] == pytest.approx(theta, rel=1e-6)
    assert res.std_errors["ate"] == pytest.approx(se, rel=1e-6)
    # The plug-in (regression imputation) differs beyond that tolerance: the check can fail.
    assert res.plugin_params is not None and res.plugin_params["ate"] != pytest.approx(theta, rel=1e-5)
    assert isinstance(res.hansen_j, oc.NotApplicable)
    assert "just-identified" in res.summary()


def _continuous_data(n: int, rng: np.random.Generator) -> pd.DataFrame:
    x1, x2 = rng.standard_normal(n), rng.standard_normal(n)
    pi = 1 / (1 + np.exp(-(0.6 * x1 - 0.4 * x2 + 0.3 * x1 * x2)))
    d = (rng.random(n) < pi).astype(int)
    y = np.sin(x1) + 0.5 * x2**2 + d * (1.0 + 0.5 * x1) + rng.standard_normal(n)
    return pd.DataFrame({"id": np.arange(n), "t": 0, "d": d, "x1": x1, "x2": x2, "y": y})


@pytest.mark.parametrize(
    "reps, least",
    [(20, 16), pytest.param(100, 89, marks=pytest.mark.slow)],
)
def test_aipw_intervals_cover_in_a_small_monte_carlo(reps: int, least: int) -> None:
    """Quadratic dictionary (does not span 1/pi exactly), lasso Riesz fit, cubic regressions.

    True effect 1 + 0.5 E[x1] = 1. The 95 % intervals must cover in at least ``least`` of
    ``reps`` replications (a binomial(reps, 0.95) count falls below it with probability
    under 0.5 %), and the mean estimate must be within 3 Monte Carlo standard errors of the
    truth.
    """
    rng = np.random.default_rng(2024)
    learner = make_pipeline(PolynomialFeatures(3), LinearRegression())
    estimates, covered = [], 0
    for rep in range(reps):
        df = _continuous_data(600, rng)
        res = estimate_moments(
            _panel(df, ["x1", "x2"]), ate_moment,
            [_outcome(features=["x1", "x2"], learner=learner, dictionary="quadratic")],
            parameters=["ate"], seed=rep,
        )
        ci = res.conf_int().loc["ate"]
        covered += int(ci["lower"] <= 1.0 <= ci["upper"])
        estimates.append(res.params["ate"])
    est = np.array(estimates)
    assert covered >= least, covered
    assert abs(est.mean() - 1.0) < 3 * est.std(ddof=1) / np.sqrt(est.size)


def test_two_step_gmm_and_hansen_j_match_the_linear_gmm_formulas() -> None:
    """Two moments for one effect: g1 - g0 - theta and (g1 - g0 - theta) * (x - 1.5).

    Both hold when the effect does not vary with x. The corrected moment is linear in
    theta, psi_t = a_t - theta b_t, so the two-step estimate and J have closed forms
    (Hansen 1982; Hayashi 2000 §3.5): theta_s = (b'W_s a)/(b'W_s b), W_2 = Omega(theta_1)^-1,
    J = n gbar' W_2 gbar ~ chi2(1). With a heterogeneous effect J must reject.
    """

    def two(theta, rows, nu):  # type: ignore[no-untyped-def]
        e = nu["g1"] - nu["g0"] - theta[0]
        return np.column_stack([e, e * (rows["x"] - 1.5)])

    spec = [_outcome(learner=CellFrequencyRegressor(), dictionary="saturated")]
    panel = _panel(_discrete_data(3000, seed=7, effect_slope=0.0), ["x"])
    res = estimate_moments(panel, two, spec, parameters=["ate"], seed=0, penalty=0.0)
    fit = res.fit
    assert fit is not None
    nu = fit.values()
    phi = sum(fit.corrections().values())
    a = fit.moment(np.zeros(1), nu) + phi
    b = a - (fit.moment(np.ones(1), nu) + phi)
    n = panel.n_units
    abar, bbar = a.sum(axis=0) / n, b.sum(axis=0) / n
    W1 = np.diag(1 / (a**2).mean(axis=0))  # first-step weight: the spread at the start (0)
    th1 = (bbar @ W1 @ abar) / (bbar @ W1 @ bbar)
    s1 = a - th1 * b
    W2 = np.linalg.inv(s1.T @ s1 / n)
    th2 = (bbar @ W2 @ abar) / (bbar @ W2 @ bbar)
    g = abar - th2 * bbar
    J = n * g @ W2 @ g
    assert res.params["ate"] == pytest.approx(th2, rel=1e-6)
    assert isinstance(res.hansen_j, HansenJ) and res.hansen_j.df == 1
    assert res.hansen_j.statistic == pytest.approx(J, rel=1e-5)
    assert res.hansen_j.pvalue == pytest.approx(stats.chi2.sf(J, 1), rel=1e-5)
    assert res.to_dict()["hansen_j"]["applicable"] is True

    hetero = _panel(_discrete_data(3000, seed=7, effect_slope=1.0), ["x"])
    rej = estimate_moments(hetero, two, spec, parameters=["ate"], seed=0, penalty=0.0)
    assert isinstance(rej.hansen_j, HansenJ) and rej.hansen_j.pvalue < 1e-3


# --------------------------------------------------------------------------- (c) self-check


def _saturated_fit() -> oc.Results:
    panel = _panel(_discrete_data(3000, seed=11), ["x"])
    return estimate_moments(
        panel, ate_moment, [_outcome(learner=CellFrequencyRegressor(), dictionary="saturated")],
        parameters=["ate"], seed=0,
    )


def test_self_check_passes_the_automatic_correction_and_flags_wrong_ones() -> None:
    res = _saturated_fit()
    ok = check_orthogonality(res, directions=3, seed=1)
    assert ok.orthogonal, ok.reading
    assert ok.reading.startswith("your corrected moment is orthogonal: slope ratio")
    assert set(ok.table.columns) >= {"nuisance", "slope_plain", "slope_corrected", "se_corrected", "z"}
    assert (ok.table.slope_plain.abs() > 0).all()

    def half_weights(theta, rows, nu):  # type: ignore[no-untyped-def]
        d, y = rows["d"], rows["y"]
        pi = 0.5  # deliberately wrong: ignores the propensity
        return d * (y - nu["g"]) / pi - (1 - d) * (y - nu["g"]) / (1 - pi)

    bad = check_orthogonality(res, directions=3, seed=1, correction=half_weights)
    assert not bad.orthogonal
    assert "NOT orthogonal to 'g'" in bad.reading
    assert bad.ratio > 2 * ok.ratio
    none = check_orthogonality(res, directions=3, seed=1, correction=lambda th, r, nu: np.zeros(r.n_rows))
    assert not none.orthogonal and none.ratio == pytest.approx(1.0)

    def textbook(theta, rows, nu):  # type: ignore[no-untyped-def]
        d, y, x = rows["d"], rows["y"], rows["x"].astype(int)
        pi = CELL_PROPENSITY[x]  # the true propensity: a valid correction
        return d * (y - nu["g"]) / pi - (1 - d) * (y - nu["g"]) / (1 - pi)

    assert check_orthogonality(res, directions=3, seed=1, correction=textbook).orthogonal


# --------------------------------------------------------------------------- (d) bad input


def _tiny() -> oc.Panel:
    return _panel(_discrete_data(200, seed=3), ["x"])


BAD_NUISANCES = [
    (dict(features="x"), "features must be a non-empty list"),
    (dict(at={"g1": "later"}), "is not a point"),
    (dict(at={"g1": {"y": 1}}), "neither by='d' nor one of the features"),
    (dict(at={"g": "next"}), "different from the nuisance's name"),
    (dict(by="x"), "must be a column name that is not also a feature"),
    (dict(target=3), "target must be a column name or a function"),
    (dict(binary="yes"), "binary must be True or False"),
]


@pytest.mark.parametrize("kw, message", BAD_NUISANCES)
def test_bad_nuisance_declarations(kw: dict, message: str) -> None:  # type: ignore[type-arg]
    with pytest.raises(oc.InputError, match=message):
        _outcome(**kw)


def _raises(message: str, *, moment=ate_moment, nuisances=None, **opts):  # type: ignore[no-untyped-def]
    nuisances = nuisances if nuisances is not None else [_outcome(learner=CellFrequencyRegressor())]
    opts.setdefault("parameters", ["ate"])
    with pytest.raises(oc.InputError, match=message):
        estimate_moments(_tiny(), moment, nuisances, **opts)


BAD_CALLS = [
    (dict(moment=lambda th, r, nu: np.ones((3, 1))), r"expected \(n_rows, k\)"),
    (dict(parameters=["a", "b"]), "at least as many moments as parameters"),
    (dict(moment=lambda th, r, nu: nu["g1"] - nu["g1"].mean() - th[0]), "not row-wise"),
    (dict(moment=lambda th, r, nu: nu["h"] - th[0]), "'h', which is not a nuisance value"),
    (dict(riesz="magic"), "riesz must be 'lasso' or 'learner'"),
    (dict(penalty=-1.0), "penalty must be a non-negative number"),
    (dict(next_weights="later"), "next_weights must be 'projected' or 'observed'"),
    (dict(riesz_tol=0.0), "riesz_tol must be a positive number"),
    (dict(riesz_updates=0), "riesz_updates must be a positive integer"),
    (dict(folds=1), "folds must be an integer >= 2"),
    (dict(seed=-2), "seed must be an integer >= 0, got -2"),
    (dict(start=[0.0, 1.0]), "start must hold 1 finite numbers"),
    (dict(parameters="ate"), "parameters must be a non-empty list"),
    (dict(cov="robust"), "cov 'robust' is unknown"),
    (dict(nuisances=["g"]), "list of orthoccp Nuisance objects"),
    (dict(nuisances=[_outcome(learner=CellFrequencyRegressor()), Nuisance(name="h", target="y", features=["x"], at={"g1": "row"})]),
     "used twice"),
    (dict(nuisances=[_outcome(learner="xgb")]), "learner must be one of .*, got 'xgb'"),
    (dict(nuisances=[_outcome(dictionary="cubic")]), "dictionary 'cubic' is unknown"),
    (dict(nuisances=[_outcome(learner=LogisticRegression)]), "is a class; pass an instance"),
    (dict(nuisances=[_outcome(at={"g1": {"d": 5}, "g0": {"d": 0}})]), "never occurs in the data"),
    (dict(nuisances=[_outcome(target=lambda r, nu: nu["later"])]), "not a value of an earlier nuisance"),
    (dict(nuisances=[_outcome(target="y", binary=True)]), "binary=True needs a 0/1 target"),
    (dict(nuisances=[_outcome(features=["nope"])]), "column 'nope' is not in the data"),
]


@pytest.mark.parametrize("kw, message", BAD_CALLS)
def test_bad_estimate_moments_calls(kw: dict, message: str) -> None:  # type: ignore[type-arg]
    _raises(message, **kw)


def test_bad_inputs_outside_the_nuisances() -> None:
    with pytest.raises(oc.InputError, match="panel must be an orthoccp.Panel"):
        estimate_moments(_discrete_data(50, 0), ate_moment, [_outcome()], parameters=["ate"])  # type: ignore[arg-type]
    with pytest.raises(oc.InputError, match="results must come from estimate_moments"):
        check_orthogonality("nothing")  # type: ignore[arg-type]
    plug = estimate_moments(_tiny(), ate_moment, [_outcome(learner=CellFrequencyRegressor())],
                            parameters=["ate"], debias=False)
    with pytest.raises(oc.InputError, match="no correction to check"):
        check_orthogonality(plug)
    with pytest.raises(oc.InputError, match="directions must be a positive integer"):
        check_orthogonality(plug, directions=0, correction=lambda th, r, nu: np.zeros(r.n_rows))


# --------------------------------------------------------------------------- (b) CCP model


def _renewal_spec(sim, learner: str, dictionary, *, model_probability: bool = False):  # type: ignore[no-untyped-def]
    """The binary renewal model of METHOD §3 written as a user moment (see docs/own_moments.md).

    With ``model_probability`` the continuation regressions' counterfactual actions are
    weighted by the model's own choice probabilities Lambda(theta) (``by_probability``),
    as the analytic correction of METHOD §4 does; without it the weights come from the
    penalised Riesz regression on ``dictionary``.
    """
    beta, states = sim.discount, list(sim.states)

    def regressors(r):  # type: ignore[no-untyped-def]
        return np.column_stack([r["wear_scaled"], -np.ones(r.n_rows)])  # z_keep - z_swap

    def lam(theta, r, nu):  # type: ignore[no-untyped-def]
        w = regressors(r) @ theta - beta * (nu["mu_keep"] - nu["mu_swap"])
        return 1 / (1 + np.exp(-w))

    ccp = Nuisance(name="p_swap", target=lambda r, nu: (r["action"] == "swap").astype(float),
                   features=states, learner=learner, binary=True, at={"p_next": "next"},
                   dictionary=dictionary)
    mu = Nuisance(name="mu", target=lambda r, nu: np.log(nu["p_next"]), features=states,
                  by="action", learner=learner, dictionary=dictionary,
                  at={"mu_keep": {"action": "keep"}, "mu_swap": {"action": "swap"}},
                  by_probability=(
                      (lambda th, r, nu: {"keep": lam(th, r, nu), "swap": 1 - lam(th, r, nu)})
                      if model_probability else None
                  ))

    def score(theta, r, nu):  # type: ignore[no-untyped-def]
        d = (r["action"] == "keep").astype(float)
        m = regressors(r) * (d - lam(theta, r, nu))[:, None]
        m[~r.has_next] = np.nan  # moment rows: the next period is observed
        return m

    return score, [ccp, mu]


def _wear_levels(F: pd.DataFrame) -> np.ndarray:
    return (F["wear"].to_numpy()[:, None] == np.arange(25)[None, :]).astype(float)


def _both(sim, learner: str, *, model_probability: bool = False):  # type: ignore[no-untyped-def]
    from _support import panel_and_model

    panel, model, _ = panel_and_model(sim)
    ref = oc.estimate(panel, model, learner=learner, scheme="plain", folds=5, seed=0,
                      moments="standard")
    score, spec = _renewal_spec(sim, learner, _wear_levels, model_probability=model_probability)
    res = estimate_moments(panel, score, spec, parameters=list(ref.params.index), seed=0,
                           next_weights="observed")
    return ref, res


@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
def test_renewal_model_through_the_api_uses_the_same_nuisance_fits(small_ebike) -> None:  # type: ignore[no-untyped-def]
    """Same seed, folds and learners: the plug-in estimates coincide with orthoccp.estimate's.

    Both solve the same pseudo-likelihood score with the same cross-fitted CCPs and
    continuation regressions (scheme "plain"), so they agree to the solvers' tolerance
    (measured: 3e-6 relative, from the iterative logit fits), far below 1e-4 standard errors;
    the debiased estimates then differ only through the correction (METHOD §4 against §8).
    """
    ref, res = _both(small_ebike, "logit")
    assert ref.plugin_params is not None and res.plugin_params is not None
    assert np.all(np.abs(res.plugin_params - ref.plugin_params) < 1e-4 * ref.std_errors)
    assert not np.allclose(res.params, res.plugin_params, rtol=1e-3)


@pytest.mark.slow
def test_tree_learners_get_the_built_in_first_stage_fits() -> None:
    """LightGBM sees float32 features in both pipelines (``orthoccp.nuisance.learner_dtype``).

    LightGBM's bin boundaries move with the feature dtype, and the same seed then gives
    different trees: with float64 features here the CCPs differ by up to 0.099 (7 % in
    relative RMS), and the two estimators would differ through their first stages. (About
    9 s; the fast acceptance test checks the same through the plug-in estimates.)
    """
    from _support import panel_and_model
    from orthoccp.learners import resolve_learners
    from orthoccp.nuisance import crossfit_nuisances
    from orthoccp.simulate import simulate

    sim = simulate("ebike", units=2000, periods=12, seed=5)
    panel, model, _ = panel_and_model(sim)
    small = dict(n_estimators=200)
    pair = resolve_learners("lightgbm")
    pair.classifier.set_params(**small)
    pair.regressor.set_params(**small)
    rng = np.random.default_rng(0)
    folds = unit_folds(panel.unit_codes, 5, rng, unit_keys=panel.unit_keys)
    ref = crossfit_nuisances(model.bind(panel), pair, folds, rng, scheme="plain")
    R = panel.choices.index("swap")
    ccp = Nuisance(name="p_swap", target=lambda r, nu: (r["action"] == "swap").astype(float),
                   features=list(sim.states), learner=pair.classifier, binary=True)
    res = estimate_moments(panel, lambda th, r, nu: nu["p_swap"] - th[0], [ccp],
                           parameters=["mean"], folds=5, seed=0, debias=False)
    assert res.fit is not None
    np.testing.assert_allclose(res.fit.values()["p_swap"], ref.ccp[:, R], rtol=1e-12)


@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
def test_model_probabilities_reproduce_the_analytic_correction(small_ebike) -> None:  # type: ignore[no-untyped-def]
    """``by_probability`` = Lambda(theta): the weights are METHOD §4's, at the final estimate.

    alpha(x, keep) = D_keep / Lambda = beta X (1 - Lambda), alpha(x, swap) = -beta X Lambda,
    and the CCP's next-row weight alpha / P_swap(x'): the analytic phi_mu and phi_P. The
    analytic estimator evaluates them at its own solution; the fixed-point updates do the
    same. Agreement is limited by the finite-difference derivatives and riesz_tol (measured:
    below 1e-5 standard errors and 1e-6 relative in the standard errors).
    """
    ref, res = _both(small_ebike, "logit", model_probability=True)
    assert np.all(np.abs(res.params - ref.params) < 1e-4 * ref.std_errors)
    np.testing.assert_allclose(res.std_errors, ref.std_errors, rtol=1e-4)
    assert "mu 0 + model probabilities" in res.summary()
    assert "weights at the estimate after" in res.summary()


def test_model_probability_of_a_treatment_gives_the_aipw_estimate() -> None:
    """With the true propensity as ``by_probability`` the correction is AIPW's (RRZ 1994).

    theta = mean[g1 - g0 + d (y - g1)/pi - (1 - d)(y - g0)/(1 - pi)] with the cross-fitted
    cell means g and the known propensity pi(x) (here CELL_PROPENSITY), whatever dictionary
    is declared; one update suffices and a second confirms the fixed point.
    """
    panel = _panel(_discrete_data(2000, seed=4), ["x"])
    pi_of = lambda th, r, nu: {1: CELL_PROPENSITY[r["x"].astype(int)], 0: 1 - CELL_PROPENSITY[r["x"].astype(int)]}  # noqa: E731
    res = estimate_moments(
        panel, ate_moment, [_outcome(learner=CellFrequencyRegressor(), dictionary="linear",
                                     by_probability=pi_of)],
        parameters=["ate"], seed=3,
    )
    assert res.fit is not None
    nu, fr = res.fit.values(), panel.frame
    d, y = fr["d"].to_numpy(float), fr["y"].to_numpy()
    pi = CELL_PROPENSITY[fr["x"].to_numpy().astype(int)]
    aipw = nu["g1"] - nu["g0"] + d * (y - nu["g1"]) / pi - (1 - d) * (y - nu["g0"]) / (1 - pi)
    assert res.params["ate"] == pytest.approx(aipw.mean(), rel=1e-6)
    assert "after 2 update(s)" in res.summary()


def test_riesz_updates_warn_when_the_weights_have_not_settled(small_ebike) -> None:  # type: ignore[no-untyped-def]
    score, spec = _renewal_spec(small_ebike, "logit", _wear_levels)
    panel = oc.Panel(small_ebike.data, unit="bike", period="week", choice="action",
                     states=list(small_ebike.states))
    with pytest.warns(oc.OrthoCCPWarning, match="did not reach a fixed point in riesz_updates=1"):
        estimate_moments(panel, score, spec, parameters=["wear_cost", "swap_cost"],
                         next_weights="observed", riesz_updates=1)


BAD_PROBABILITIES = [
    (lambda th, r, nu: np.ones(r.n_rows), "must return a mapping"),
    (lambda th, r, nu: {1: np.full(r.n_rows, 0.5)}, r"no probability for d=0"),
    (lambda th, r, nu: {1: np.full(r.n_rows, 0.5), 0: np.zeros(r.n_rows)}, r"probability in \(0, 1\]"),
    (lambda th, r, nu: {1: np.full(3, 0.5), 0: np.full(3, 0.5)}, "expected one per row"),
    (lambda th, r, nu: {1: nu["pi"], 0: 1 - nu["pi"]}, "by_probability asked for 'pi'"),
]


@pytest.mark.parametrize("fn, message", BAD_PROBABILITIES)
def test_bad_by_probability(fn, message: str) -> None:  # type: ignore[no-untyped-def]
    _raises(message, nuisances=[_outcome(learner=CellFrequencyRegressor(), by_probability=fn)])


def test_by_probability_needs_by() -> None:
    with pytest.raises(oc.InputError, match="by_probability must be a function"):
        _outcome(by=None, at={}, by_probability=lambda th, r, nu: {})
    with pytest.raises(oc.InputError, match="by_probability must be a function"):
        _outcome(by_probability=0.5)


@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
def test_renewal_model_matches_the_analytic_correction() -> None:
    """Acceptance (issue 6): within 0.1 SE of the analytic correction, SEs within 10 %.

    The renewal model through the API with the model's choice probabilities for the
    counterfactual actions (measured at 2,000 units, LightGBM: both differences 1e-7 SE,
    standard-error ratios 1.000000; about 14 s, so not slow-marked).
    """
    from orthoccp.simulate import simulate

    ref, res = _both(simulate("ebike", units=2000, periods=12, seed=5), "lightgbm",
                     model_probability=True)
    assert np.all(np.abs(res.params - ref.params) < 0.1 * ref.std_errors)
    assert np.all(np.abs(res.std_errors / ref.std_errors - 1) < 0.10)
    assert ref.plugin_params is not None and res.plugin_params is not None
    assert np.all(np.abs(res.plugin_params - ref.plugin_params) < 1e-4 * ref.std_errors)


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason=(
    "data-driven weights target D/P(a|x) with the data's choice frequencies, the analytic "
    "ones D/Lambda(theta). Measured at 2,000 units (LightGBM, wear-level dictionary, weights "
    "at the final estimate): 0.15 and 0.21 SE apart, SEs 21-22 % smaller. Even with the "
    "analytic weight in the dictionary the projection stays 0.13-0.14 SE away, and the true "
    "propensity gives 0.42-0.52 SE and SEs 11-13 % larger: the three are equally valid "
    "asymptotically and differ here by first-stage noise"))
@pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")
def test_data_driven_weights_match_the_analytic_correction() -> None:
    """The same criterion for the Riesz-regression weights (no model probabilities)."""
    from orthoccp.simulate import simulate

    ref, res = _both(simulate("ebike", units=2000, periods=12, seed=5), "lightgbm")
    assert np.all(np.abs(res.params - ref.params) < 0.1 * ref.std_errors)
    assert np.all(np.abs(res.std_errors / ref.std_errors - 1) < 0.10)
