"""Discount 0 reduces the CCP estimator to a static logit (METHOD §7 check 4).

Reference: the Spector & Mazzeo (1980) grade data as shipped with statsmodels, and
statsmodels' ``Logit`` maximum-likelihood fit with HC0 and cluster-robust covariances.
Greene, Econometric Analysis (logit example), publishes const -13.021, GPA 2.826, TUCE 0.095,
PSI 2.379 (values as quoted in ../shared/design/METHOD.md).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc

sm = pytest.importorskip("statsmodels.api")


@pytest.fixture(scope="module")
def spector() -> pd.DataFrame:
    d = sm.datasets.spector.load_pandas().data.copy()
    d["student"] = np.arange(len(d))
    d["t"] = 0
    d["grade"] = d["GRADE"].astype(int)
    return d


def _fit(d: pd.DataFrame, **kw: object) -> oc.Results:
    panel = oc.Panel(d, unit="student", period="t", choice="grade", states=["GPA", "TUCE", "PSI"])
    model = oc.Model(
        anchor=0, kind="renewal", discount=0.0,
        utility={0: {}, 1: {"const": "1", "GPA": "GPA", "TUCE": "TUCE", "PSI": "PSI"}},
    )
    return oc.estimate(panel, model, **kw)  # type: ignore[arg-type]


def test_matches_greene_published_coefficients(spector: pd.DataFrame) -> None:
    res = _fit(spector)
    greene = pd.Series({"const": -13.021, "GPA": 2.826, "TUCE": 0.095, "PSI": 2.379})
    # Greene reports three decimals: agreement to rounding.
    np.testing.assert_allclose(res.params[greene.index], greene, atol=6e-4)


def test_matches_statsmodels_logit_and_robust_errors(spector: pd.DataFrame) -> None:
    X = sm.add_constant(spector[["GPA", "TUCE", "PSI"]])
    ref = sm.Logit(spector["GRADE"], X).fit(disp=0, cov_type="HC0", tol=1e-12)
    res = _fit(spector, small_sample=False)
    np.testing.assert_allclose(res.params.to_numpy(), ref.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(res.std_errors.to_numpy(), ref.bse.to_numpy(), rtol=1e-6)
    # The n/(n-1) factor is statsmodels' cluster correction without the (N-1)/(N-K) part.
    ref_cl = sm.Logit(spector["GRADE"], X).fit(
        disp=0, cov_type="cluster", cov_kwds={"groups": spector["student"], "use_correction": False}
    )
    res_ss = _fit(spector, small_sample=True)
    np.testing.assert_allclose(res_ss.std_errors.to_numpy(), ref.bse.to_numpy() * np.sqrt(32 / 31), rtol=1e-6)
    np.testing.assert_allclose(res.std_errors.to_numpy(), ref_cl.bse.to_numpy(), rtol=1e-6)


def test_static_model_needs_no_first_stage(spector: pd.DataFrame) -> None:
    res = _fit(spector)
    assert res.n_learner_fits == 0
    assert res.n_moment_rows == 32
    assert "static logit" in res.summary()


def test_multinomial_matches_statsmodels_mnlogit() -> None:
    """Three-choice static logit against statsmodels' MNLogit on the shipped anes96 data."""
    d = sm.datasets.anes96.load_pandas().data.copy()
    # Collapse party identification (0..6) to Democrat / Independent / Republican.
    d["party"] = pd.cut(d["PID"], [-1, 1, 4, 6], labels=[0, 1, 2]).astype(int)
    d["voter"] = np.arange(len(d))
    d["t"] = 0
    d["logpop"] = d["logpopul"]
    cols = ["logpop", "selfLR", "age", "educ"]
    panel = oc.Panel(d, unit="voter", period="t", choice="party", states=cols)
    utility = {0: {}} | {j: {f"{c}_{j}": c for c in cols} | {f"const_{j}": "1"} for j in (1, 2)}
    model = oc.Model(anchor=0, kind="renewal", discount=0.0, utility=utility)
    res = oc.estimate(panel, model, small_sample=False)
    X = sm.add_constant(d[cols])
    ref = sm.MNLogit(d["party"], X).fit(disp=0, method="newton", tol=1e-12, maxiter=200)
    for j in (1, 2):
        ref_j = ref.params[j - 1]
        for c in cols:
            assert res.params[f"{c}_{j}"] == pytest.approx(ref_j[c], rel=1e-6, abs=1e-9)
        assert res.params[f"const_{j}"] == pytest.approx(ref_j["const"], rel=1e-6)
