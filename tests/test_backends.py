"""Specification of orthoccp.backends.

The estimate must not depend on where the fold work runs: the same seed gives the same JSON,
to the last digit, in this process, in two joblib workers and on a Dask cluster (a local one
on loopback here). The reference for "the same" is the sequential run itself; the checks are
exact equality, so no tolerance needs a justification. A second seed must change the JSON,
so the comparisons are not vacuous.
"""

from __future__ import annotations

import json
import sys
from typing import Any

import numpy as np
import pandas as pd
import pytest

import orthoccp as oc
from orthoccp.backends import FeatureRows, limit_threads, resolve_backend, take_rows
from orthoccp.nuisance import learner_dtype

pytestmark = pytest.mark.filterwarnings("ignore::orthoccp.OrthoCCPWarning")


def _lgbm() -> tuple[Any, Any]:
    from lightgbm import LGBMClassifier, LGBMRegressor

    # Two threads each, so the joblib and Dask workers' thread cap (one each on two cores)
    # really changes the learners' threads; deterministic histograms make that harmless.
    opts = dict(n_estimators=20, num_leaves=7, min_child_samples=5, n_jobs=2, verbose=-1,
                deterministic=True, force_col_wise=True)
    return LGBMClassifier(**opts), LGBMRegressor(**opts)


@pytest.fixture(scope="module")
def setting(small_ebike):  # type: ignore[no-untyped-def]
    sim = small_ebike
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    # Persistent states: the default moments are renewal-robust, so the instruments' second
    # cross-fitted stage runs on the backend too.
    model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
                     utility=sim.utility, persistent=sim.persistent)
    return panel, model


@pytest.fixture(scope="module")
def cluster():  # type: ignore[no-untyped-def]
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1", dashboard_address=None) as c:
        yield c


def _json(res: oc.Results) -> str:
    doc = json.loads(res.to_json())
    assert {"learner_fit_s", "learner_predict_s"} <= set(doc["timings"])
    doc["timings"] = None  # wall-clock seconds: the only field allowed to differ
    return json.dumps(doc)


def _run(setting: Any, seed: int = 0, **options: Any) -> str:
    panel, model = setting
    clf, reg = _lgbm()
    return _json(oc.estimate(panel, model, learner=clf, regressor=reg, folds=3, seed=seed,
                             **options))


def test_every_backend_gives_the_same_json(setting, cluster) -> None:  # type: ignore[no-untyped-def]
    from distributed import Client

    reference = _run(setting)
    assert _run(setting, backend="joblib", n_jobs=2) == reference
    with Client(cluster) as client:
        assert _run(setting, backend=client) == reference
        assert _run(setting, backend="dask") == reference  # the session's default client
    assert _run(setting, backend=cluster.scheduler_address) == reference
    assert _run(setting, seed=1) != reference


def test_same_seed_same_json_and_n_jobs_one_or_two(setting) -> None:  # type: ignore[no-untyped-def]
    first = _run(setting, scheme="plain")
    assert _run(setting, scheme="plain") == first
    assert _run(setting, scheme="plain", n_jobs=1) == first
    assert _run(setting, scheme="plain", n_jobs=2) == first


def test_registry_learner_same_across_backends(setting) -> None:  # type: ignore[no-untyped-def]
    panel, model = setting
    runs = [_json(oc.estimate(panel, model, learner="logit", folds=3, **kw))
            for kw in ({}, {"n_jobs": 2})]
    assert runs[0] == runs[1]


class _BadProba:
    """A classifier whose probabilities do not sum to one (for the error path)."""

    def __init__(self, random_state: int | None = None) -> None:
        self.random_state = random_state

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        return {"random_state": self.random_state}

    def set_params(self, **params: Any) -> _BadProba:
        self.random_state = params.get("random_state", self.random_state)
        return self

    def fit(self, X: np.ndarray, y: np.ndarray) -> _BadProba:
        self.classes_ = np.unique(y)
        return self

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        return np.full((X.shape[0], self.classes_.size), 0.7)


def test_a_worker_error_is_raised_as_in_sequential(setting, cluster) -> None:  # type: ignore[no-untyped-def]
    from distributed import Client

    panel, model = setting
    message = r"predict_proba rows do not sum to 1 .* in fold 0"
    with pytest.raises(oc.InputError, match=message):
        oc.estimate(panel, model, learner=_BadProba(), folds=3)
    with pytest.raises(oc.InputError, match=message):
        oc.estimate(panel, model, learner=_BadProba(), folds=3, n_jobs=2)
    with Client(cluster) as client, pytest.raises(oc.InputError, match=message):
        oc.estimate(panel, model, learner=_BadProba(), folds=3, backend=client)


@pytest.mark.parametrize(("options", "message"), [
    ({"backend": "threads"}, r"backend must be one of 'sequential', 'joblib', 'dask'.*got 'threads'"),
    ({"backend": 42}, r"backend must be one of .*got int 42"),
    ({"n_jobs": 0}, r"n_jobs must be a positive integer or -1 \(one worker per core\), got 0"),
    ({"n_jobs": -2}, r"n_jobs must be a positive integer or -1.*got -2"),
    ({"n_jobs": 1.5}, r"n_jobs must be a positive integer or -1.*got 1\.5"),
    ({"n_jobs": True}, r"n_jobs must be a positive integer or -1.*got True"),
    ({"n_jobs": "2"}, r"n_jobs must be a positive integer or -1.*got '2'"),
    ({"backend": "sequential", "n_jobs": 2}, r"n_jobs=2 does not apply to backend='sequential'.*backend='joblib'"),
    ({"backend": "tcp://127.0.0.1:8786", "n_jobs": 2}, r"n_jobs=2 does not apply to a Dask backend"),
])
def test_bad_options(setting, options: dict[str, Any], message: str) -> None:  # type: ignore[no-untyped-def]
    panel, model = setting
    with pytest.raises(oc.InputError, match=message):
        oc.estimate(panel, model, learner="logit", folds=3, **options)


def test_dask_without_a_client_or_without_distributed(setting, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    pytest.importorskip("distributed")
    panel, model = setting
    with pytest.raises(oc.InputError, match=r"backend='dask' found no Dask client.*Client"):
        oc.estimate(panel, model, learner="logit", folds=3, backend="dask")
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    with pytest.raises(oc.InputError, match=r"needs dask.distributed.*pip install orthoccp\[dask\]"):
        resolve_backend("dask")


def test_unreachable_scheduler(setting) -> None:  # type: ignore[no-untyped-def]
    dask = pytest.importorskip("dask")
    panel, model = setting
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        with pytest.raises(oc.InputError, match=r"could not connect to a Dask scheduler"):
            oc.estimate(panel, model, learner="logit", folds=3, backend="127.0.0.1:9")


def test_resolve_defaults() -> None:
    assert resolve_backend().kind == "sequential"
    assert resolve_backend(None, 1).kind == "sequential"
    two = resolve_backend(None, 2)
    assert (two.kind, two.n_jobs) == ("joblib", 2)
    assert resolve_backend("joblib", -1).n_jobs >= 1
    assert resolve_backend("10.0.0.5:8786").address == "tcp://10.0.0.5:8786"


def test_take_rows_is_indexing_and_casting() -> None:
    rng = np.random.default_rng(0)
    base = rng.standard_normal((1000, 7))
    rows = rng.permutation(1000)[:300]
    cols = np.array([5, 0, 2])
    np.testing.assert_array_equal(take_rows(base, rows, None, np.float64), base[rows])
    out = take_rows(base, rows, cols, np.float32)
    assert out.dtype == np.float32 and out.flags.c_contiguous
    np.testing.assert_array_equal(out, base[rows][:, cols].astype(np.float32))
    view = FeatureRows(base, rows=rows[::-1], cols=cols)
    assert view.n_rows == 300
    np.testing.assert_array_equal(view.base_rows(np.array([0, 1])), rows[::-1][:2])


def test_limit_threads_caps_only_what_asks_for_more() -> None:
    from lightgbm import LGBMClassifier
    from sklearn.ensemble import RandomForestClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    assert limit_threads(LGBMClassifier(n_jobs=-1), 1).get_params()["n_jobs"] == 1
    assert limit_threads(LGBMClassifier(n_jobs=None), 2).get_params()["n_jobs"] == 2
    assert limit_threads(LGBMClassifier(n_jobs=1), 4).get_params()["n_jobs"] == 1
    # scikit-learn's None means one job already; it is left alone.
    assert limit_threads(RandomForestClassifier(), 2).get_params()["n_jobs"] is None
    pipe = limit_threads(make_pipeline(StandardScaler(), RandomForestClassifier(n_jobs=8)), 2)
    assert pipe.get_params()["randomforestclassifier__n_jobs"] == 2
    assert limit_threads(LGBMClassifier(n_jobs=-1), None).get_params()["n_jobs"] == -1


def test_float32_only_for_tree_learners() -> None:
    from orthoccp.learners import resolve_learners

    assert learner_dtype(*_pair("lightgbm")) is np.float32
    assert learner_dtype(*_pair("random_forest")) is np.float32
    assert learner_dtype(*_pair("logit")) is np.float64
    # One non-tree learner in the pair keeps float64 for both.
    pair = resolve_learners("lightgbm", "logit")
    assert learner_dtype(pair.classifier, pair.regressor) is np.float64


def _pair(name: str) -> tuple[Any, Any]:
    from orthoccp.learners import resolve_learners

    pair = resolve_learners(name)
    return pair.classifier, pair.regressor


def test_panel_holds_float_states_once(small_ebike) -> None:  # type: ignore[no-untyped-def]
    sim = small_ebike
    panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    # The float64 states of the frame are views of the feature matrix, not a second copy ...
    assert np.shares_memory(panel.frame["x0"].to_numpy(), panel.features)
    assert not np.shares_memory(panel.frame["wear"].to_numpy(), panel.features)  # int64: kept
    pd.testing.assert_frame_equal(panel.frame, sim.data.reset_index(drop=True))
    # ... so the matrix is read-only: an in-place edit of the frame copies the column or
    # fails (depending on the pandas path), and never changes the features behind its back.
    assert not panel.features.flags.writeable
    before = panel.features[0, 1]
    try:
        panel.frame.loc[0, "x0"] = before + 1.0
    except ValueError as exc:
        assert "read-only" in str(exc)
    assert panel.features[0, 1] == before
