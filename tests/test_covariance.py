"""Specification of orthoccp.covariance: the one sandwich path of every estimator.

Outside reference: statsmodels' cluster-robust and heteroskedasticity-robust (HC0) covariances
of a logit fitted by maximum likelihood (``statsmodels.discrete.discrete_model.Logit``,
``cov_type="cluster"`` / ``"HC0"``) on the Spector & Mazzeo (1980) grade data shipped with
statsmodels (``statsmodels.api.datasets.spector``; 32 students). For a likelihood the
sandwich's moment is the score and G its Hessian, so orthoccp's sandwich evaluated at statsmodels' estimates must give statsmodels' covariance.
statsmodels' cluster correction is n_g/(n_g - 1) * (N - 1)/(N - K); orthoccp's small-sample
factor is the first part alone (Cameron & Miller 2015, J. Human Resources 50).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from orthoccp import InputError
from orthoccp.covariance import (
    check_cov_name,
    cluster_codes,
    clustered_outer,
    covariance_names,
    estimate_covariance,
)

# An arbitrary grouping of the 32 students into 8 clusters of 4 consecutive rows.
GROUPS = np.arange(32) // 4


@pytest.fixture(scope="module")
def spector():  # type: ignore[no-untyped-def]
    data = sm.datasets.spector.load_pandas()
    X = sm.add_constant(data.exog, prepend=True)
    y = data.endog.to_numpy()
    ref = sm.Logit(y, X).fit(disp=0)
    theta = ref.params.to_numpy()
    Xa = X.to_numpy()
    p = 1 / (1 + np.exp(-Xa @ theta))
    scores = Xa * (y - p)[:, None]
    hessian = -(Xa * (p * (1 - p))[:, None]).T @ Xa
    return dict(X=X, y=y, scores=scores, hessian=hessian, names=tuple(X.columns))


def _statsmodels_cov(spector, **fit) -> np.ndarray:  # type: ignore[no-untyped-def]
    return np.asarray(sm.Logit(spector["y"], spector["X"]).fit(disp=0, **fit).cov_params())


def _ours(spector, name: str, *, small_sample: bool, **kw):  # type: ignore[no-untyped-def]
    return estimate_covariance(name, jacobian=spector["hessian"],
                               components={"m": spector["scores"]}, units=GROUPS,
                               parameters=spector["names"], small_sample=small_sample, **kw)


def test_clustered_sandwich_matches_statsmodels_cluster_robust(spector) -> None:  # type: ignore[no-untyped-def]
    plain = _statsmodels_cov(spector, cov_type="cluster",
                             cov_kwds={"groups": GROUPS, "use_correction": False})
    ce = _ours(spector, "clustered", small_sample=False)
    np.testing.assert_allclose(ce.cov, plain, rtol=1e-6)
    assert ce.factor == 1.0 and ce.influence.shape == (8, 4)
    np.testing.assert_array_equal(ce.clusters, np.arange(8))

    corrected = _statsmodels_cov(spector, cov_type="cluster",
                                 cov_kwds={"groups": GROUPS, "use_correction": True})
    n, k = spector["X"].shape
    ce = _ours(spector, "clustered", small_sample=True)
    assert ce.factor == pytest.approx(8 / 7)
    np.testing.assert_allclose(ce.cov, corrected * (n - k) / (n - 1), rtol=1e-6)


def test_heteroskedastic_sandwich_matches_statsmodels_hc0(spector) -> None:  # type: ignore[no-untyped-def]
    ce = _ours(spector, "heteroskedastic", small_sample=False)
    np.testing.assert_allclose(ce.cov, _statsmodels_cov(spector, cov_type="HC0"), rtol=1e-6)
    assert ce.influence.shape == (32, 4)
    # rows are the clusters: the influence rows are labelled by row number, not by unit
    np.testing.assert_array_equal(ce.cluster_labels(np.array(list("abcdefgh"))), np.arange(32))
    clustered = _ours(spector, "clustered", small_sample=False)
    assert clustered.cluster_labels(np.array(list("abcdefgh"))).tolist() == list("abcdefgh")


def test_components_add_up_and_the_decomposition_sums_to_one(spector) -> None:  # type: ignore[no-untyped-def]
    whole = _ours(spector, "clustered", small_sample=True)
    rng = np.random.default_rng(0)
    part = spector["scores"] * rng.random(spector["scores"].shape)
    split = estimate_covariance("clustered", jacobian=spector["hessian"],
                                components={"a": part, "b": spector["scores"] - part},
                                units=GROUPS, parameters=spector["names"])
    np.testing.assert_allclose(split.cov, whole.cov, rtol=1e-12)
    np.testing.assert_allclose(split.parts["a"] + split.parts["b"], split.influence, atol=1e-12)
    assert list(split.decomposition.columns) == ["a", "b"]
    np.testing.assert_allclose(split.decomposition.sum(axis=1), 1.0, atol=1e-12)
    # Bilinearity of the covariance: Cov(a, a + b) = Var(a) + Cov(a, b), so each share is the
    # part's own variance plus half of the cross term, over the total (on the uncentred sums).
    a, b = split.parts["a"], split.parts["b"]
    total = ((a + b) ** 2).sum(axis=0)
    np.testing.assert_allclose(split.decomposition["a"],
                               ((a**2).sum(axis=0) + (a * b).sum(axis=0)) / total, rtol=1e-10)
    np.testing.assert_allclose(split.decomposition["b"],
                               ((b**2).sum(axis=0) + (a * b).sum(axis=0)) / total, rtol=1e-10)
    np.testing.assert_allclose(whole.decomposition["m"], 1.0)


def test_an_added_variance_is_added_with_its_own_share(spector) -> None:  # type: ignore[no-untyped-def]
    base = _ours(spector, "clustered", small_sample=True)
    extra = np.diag(np.diag(base.cov)) * 0.25
    ce = _ours(spector, "clustered", small_sample=True, added={"simulation": extra})
    np.testing.assert_allclose(ce.cov, base.cov + extra, rtol=1e-14)
    np.testing.assert_allclose(ce.decomposition["simulation"], 0.2, rtol=1e-12)
    np.testing.assert_allclose(ce.decomposition["m"], 0.8, rtol=1e-12)


def test_clustered_outer_and_the_registry() -> None:
    infl = np.array([[1.0, 0.0], [0.0, 2.0], [1.0, 1.0]])
    cov, factor = clustered_outer(infl, small_sample=True)
    assert factor == 1.5
    np.testing.assert_allclose(cov, 1.5 * np.array([[2.0, 1.0], [1.0, 5.0]]))
    with pytest.raises(InputError, match="at least two clusters"):
        clustered_outer(infl[:1], small_sample=False)
    assert covariance_names() == ("clustered", "heteroskedastic")
    units = np.array([0, 0, 1, 1, 1])
    np.testing.assert_array_equal(cluster_codes("clustered", units), units)
    np.testing.assert_array_equal(cluster_codes("heteroskedastic", units), np.arange(5))
    with pytest.raises(InputError, match="cov 'robust' is unknown; valid names: clustered"):
        check_cov_name("robust")
