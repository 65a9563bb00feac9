"""Progress bars of the long Python calls: off when stderr is not a terminal, one switch.

Mechanics only (invented scenarios); the numbers of these calls are tested elsewhere.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest

import orthoccp as oc
from orthoccp._progress import progress_enabled

from _support import panel_and_model

MC = dict(reps=2, units=150, periods=6, learner="logit", folds=3, n_covariates=5,
          estimators=("oracle",))


@pytest.fixture(autouse=True)
def _default_progress() -> Iterator[None]:
    oc.set_progress(None)
    yield
    oc.set_progress(None)


def _compare(small_ebike: Any, **kw: Any) -> oc.Comparison:
    panel, model, _ = panel_and_model(small_ebike)
    return oc.compare(panel, model, first_stages={"a": "logit", "b": "logit"}, folds=3, **kw)


def test_off_by_default_when_stderr_is_not_a_terminal(
    small_ebike: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    assert not progress_enabled()  # pytest captures stderr: not a terminal
    oc.run_montecarlo("ebike", **MC)
    _compare(small_ebike)
    assert capsys.readouterr().err == ""


def test_set_progress_switches_the_bars_on_and_the_keyword_wins(
    small_ebike: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    oc.set_progress(True)
    oc.run_montecarlo("ebike", **MC)
    err = capsys.readouterr().err
    assert "Monte Carlo" in err and "/2 [" in err  # the bar's count (updates are throttled)
    _compare(small_ebike)
    err = capsys.readouterr().err
    assert "first stages" in err and "/2 [" in err
    oc.run_montecarlo("ebike", **MC, progress=False)
    assert capsys.readouterr().err == ""
    oc.set_progress(False)
    oc.run_montecarlo("ebike", **MC, progress=True)
    assert "Monte Carlo" in capsys.readouterr().err
    oc.run_montecarlo("ebike", **MC)
    assert capsys.readouterr().err == ""


def test_fold_stability_has_a_bar(small_ebike: Any, capsys: pytest.CaptureFixture[str]) -> None:
    panel, model, _ = panel_and_model(small_ebike)
    oc.fold_stability(panel, model, learner="logit", folds=3, progress=True)
    err = capsys.readouterr().err
    assert "fold stability" in err and "/6 [" in err


def test_set_progress_rejects_other_values() -> None:
    with pytest.raises(oc.InputError, match=r"set_progress takes True, False or None, got 'no'"):
        oc.set_progress("no")  # type: ignore[arg-type]
