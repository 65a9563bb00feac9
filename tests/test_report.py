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


def test_truth_table_and_stability_section(comparison, small_ebike, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    from orthoccp.report import truth_table
    from orthoccp.stability import fold_stability

    truth = dict(small_ebike.truth)
    t = truth_table(comparison, truth)
    for (label, name), row in t.iterrows():
        res = comparison.results[label]
        assert row["estimate"] == res.params[name] and row["truth"] == truth[name]
        assert row["covers"] == (row["ci_lower"] <= truth[name] <= row["ci_upper"])
    with pytest.raises(oc.InputError, match="truth has no value for parameter 'swap_cost'"):
        truth_table(comparison, {"wear_cost": -1.0})
    panel, model, _ = panel_and_model(small_ebike)
    fs = fold_stability(panel, model, learner="logit", folds=3)
    text = write_report(comparison, tmp_path / "r.html", truth=truth, stability={"lasso": fs}).read_text()
    assert "Estimates against the truth (simulated data)" in text
    assert text.count("<h3>Fold stability</h3>") == 1 and fs.reading() in text.replace("&#x27;", "'")


@pytest.mark.slow
def test_report_renders_in_headless_chromium(comparison, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    """Debian's chromium opens the page offline and decodes every embedded figure."""
    import shutil
    import subprocess

    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (Debian package 'chromium')")
    page = write_report(comparison, tmp_path / "report.html").read_text()
    n_images = page.count("<img ")
    probe = (
        "<script>window.addEventListener('load', () => { document.body.setAttribute('data-widths', "
        "Array.from(document.images).map(i => i.naturalWidth).join(',')); });</script>"
    )
    (tmp_path / "probe.html").write_text(page.replace("</body>", probe + "</body>"))
    proc = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
         "--dump-dom", (tmp_path / "probe.html").as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    import re

    m = re.search(r'data-widths="([\d,]*)"', proc.stdout)
    assert m is not None, proc.stdout[:2000]
    widths = [int(w) for w in m.group(1).split(",") if w]
    assert len(widths) == n_images >= 7 and all(w > 100 for w in widths), widths
    assert "First stage: lasso" in proc.stdout
