"""Specification of orthoccp.figures and orthoccp.report: files a researcher can file."""

from __future__ import annotations

from pathlib import Path

import pytest
from _support import panel_and_model

import orthoccp as oc
from orthoccp import figures
from orthoccp.compare import compare
from orthoccp.report import render_report, write_report

pytest.importorskip("matplotlib")


@pytest.fixture(scope="module")
def comparison(small_ebike):  # type: ignore[no-untyped-def]
    panel, model, _ = panel_and_model(small_ebike)
    return compare(panel, model, first_stages={"logit": "logit", "lasso": "lasso_logit"}, folds=3)


@pytest.mark.parametrize("suffix", [".png", ".svg"])
def test_figures_are_written(comparison, tmp_path: Path, suffix: str) -> None:  # type: ignore[no-untyped-def]
    res = comparison.results["lasso"]
    for name, fn, arg in [
        ("cal", figures.calibration_plot, res),
        ("overlap", figures.overlap_plot, res),
        ("variance", figures.variance_plot, res),
        ("coef", figures.coefficient_plot, comparison),
    ]:
        path = tmp_path / f"{name}{suffix}"
        fig = fn(arg, path=path)
        assert path.stat().st_size > 1000
        assert fig.axes


def test_bad_figure_path(comparison, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(oc.InputError, match="must end in .png, .svg or .pdf"):
        figures.variance_plot(comparison.results["logit"], path=tmp_path / "v.jpg")


def test_report_is_self_contained(comparison, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    path = write_report(comparison, tmp_path / "report.html", title="E-bike fleet")
    text = path.read_text()
    assert text.startswith("<!DOCTYPE html>") and "<h1>E-bike fleet</h1>" in text
    assert text.count("data:image/png;base64,") >= 7  # coefficient plot + 3 per first stage
    assert "First stage: lasso" in text and "Assumptions" in text
    for a in oc.ASSUMPTIONS:
        assert a in text
    assert "src=\"http" not in text  # nothing loaded from outside
    assert render_report(comparison) != ""
