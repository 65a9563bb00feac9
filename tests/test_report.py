"""Specification of orthoccp.figures and orthoccp.report: files a researcher can file."""

from __future__ import annotations

import dataclasses
import re
import shutil
import subprocess
import warnings
from pathlib import Path

import pytest
from _support import panel_and_model

import orthoccp as oc
from orthoccp import figures
from orthoccp.compare import compare
from orthoccp.report import _joint_note, _reading, favoured_first_stage, render_report, write_report

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
        ("state", figures.ccp_state_plot, comparison),
    ]:
        path = tmp_path / f"{name}{suffix}"
        fig = fn(arg, path=path)
        assert path.stat().st_size > 1000
        assert fig.axes


def test_bad_figure_path(comparison, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(oc.InputError, match="must end in .png, .svg or .pdf"):
        figures.variance_plot(comparison.results["logit"], path=tmp_path / "v.jpg")


SECTIONS = ["reading", "estimates", "data", "first-stages", "discount", "provenance",
            "assumptions"]


@pytest.fixture(scope="module")
def extras(small_ebike):  # type: ignore[no-untyped-def]
    """Fold stability of the non-baseline first stage and a two-point discount sensitivity."""
    from orthoccp.stability import fold_stability

    panel, model, _ = panel_and_model(small_ebike)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fs = fold_stability(panel, model, learner="lasso_logit", folds=3)
        sens = oc.discount_sensitivity(panel, model, discounts=[0.9, 0.95], learner="lasso_logit",
                                       folds=3)
    return {"panel": panel, "stability": {"lasso": fs}, "sensitivity": sens}


def _full_report(comparison, extras, small_ebike, path: Path) -> Path:  # type: ignore[no-untyped-def]
    return write_report(comparison, path, title="E-bike fleet", truth=dict(small_ebike.truth),
                        provenance={"data file": "panel.csv", "spec file": "panel.toml",
                                    "command": "orthoccp report panel.csv --spec panel.toml"},
                        **extras)


def test_report_is_self_contained(comparison, extras, small_ebike, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    text = _full_report(comparison, extras, small_ebike, tmp_path / "report.html").read_text()
    assert text.startswith("<!DOCTYPE html>") and "<h1>E-bike fleet</h1>" in text
    for section in SECTIONS:
        assert f"id='{section}'" in text, section
    # coefficient plot, CCP by state, 3 per first stage, the discount figure
    assert text.count("data:image/png;base64,") == 1 + 1 + 3 * 2 + 1
    for a in oc.ASSUMPTIONS:
        assert a in text
    assert "src=\"http" not in text and "<link" not in text and "@import" not in text
    words = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text)
    assert not re.search(r"\bnan\b", words, flags=re.IGNORECASE)  # no NaN anywhere on the page
    assert "not drawn" not in text
    # the estimates once: each debiased estimate in one table cell, no text dump (the
    # sensitivity table repeats it at the assumed discount factor, marked as such)
    res = comparison.results["lasso"]
    assert text[:text.index("id='discount'")].count(f"{res.params['wear_cost']:.4f}") == 1
    assert "<pre>" not in text
    assert render_report(comparison) != ""


def test_plug_in_and_debiased_side_by_side(comparison, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    text = render_report(comparison)
    head = text[text.index("id='estimates'"):]
    row = head[head.index("<td class=\"l\">wear_cost</td><td class=\"l\">lasso</td>"):]
    row = row[:row.index("</tr>")]
    res = comparison.results["lasso"]
    assert f"<td>{res.plugin_params['wear_cost']:.4f}</td><td>{res.params['wear_cost']:.4f}</td>" in row


def test_truth_table(comparison, small_ebike) -> None:  # type: ignore[no-untyped-def]
    from orthoccp.report import truth_table

    truth = dict(small_ebike.truth)
    t = truth_table(comparison, truth)
    for (label, name), row in t.iterrows():
        res = comparison.results[label]
        assert row["estimate"] == res.params[name] and row["truth"] == truth[name]
        assert row["covers"] == (row["ci_lower"] <= truth[name] <= row["ci_upper"])
    with pytest.raises(oc.InputError, match="truth has no value for parameter 'swap_cost'"):
        truth_table(comparison, {"wear_cost": -1.0})


def _fake(comparison, loss: dict[str, float], p_single: list[float], p_joint: float):  # type: ignore[no-untyped-def]
    """The comparison with chosen out-of-fold log-losses and test p-values."""
    results = {}
    for label, res in comparison.results.items():
        d = res.diagnostics
        q = d.ccp_quality.assign(log_loss=loss[label])
        results[label] = dataclasses.replace(res, details=dataclasses.replace(
            res.details, diagnostics=dataclasses.replace(d, ccp_quality=q)))
    test = comparison.tests["lasso"].copy()
    test["p_value"] = p_single
    test.attrs["wald"] = {"statistic": 9.0, "df": 2, "p_value": p_joint}
    return dataclasses.replace(comparison, results=results, tests={"lasso": test})


def test_reading_rule(comparison, extras) -> None:  # type: ignore[no-untyped-def]
    cmp = _fake(comparison, {"logit": 0.30, "lasso": 0.29}, [0.6, 0.7], 0.8)
    assert favoured_first_stage(cmp)[0] == "lasso"
    cmp = _fake(comparison, {"logit": 0.28, "lasso": 0.29}, [0.6, 0.7], 0.8)
    assert favoured_first_stage(cmp)[0] == "logit"
    # a better-fitting but unstable first stage is passed over
    fs = extras["stability"]["lasso"]
    shaky = dataclasses.replace(fs, table=fs.table.assign(change_se=1.0))
    cmp = _fake(comparison, {"logit": 0.30, "lasso": 0.29}, [0.6, 0.7], 0.8)
    assert favoured_first_stage(cmp, stability={"lasso": shaky})[0] == "logit"
    text = _reading(cmp, {})
    assert "The evidence favours <b>lasso</b>" in text and "agree within their noise" in text


def test_joint_rejection_without_single_rejection_is_explained(comparison) -> None:  # type: ignore[no-untyped-def]
    note = "the differences of the parameters are strongly correlated"
    loss = {"logit": 0.3, "lasso": 0.29}
    assert note in render_report(_fake(comparison, loss, [0.4, 0.5], 0.01))  # where it appears
    assert note not in _joint_note(_fake(comparison, loss, [0.01, 0.5], 0.01).tests["lasso"])
    assert note not in _joint_note(_fake(comparison, loss, [0.4, 0.5], 0.3).tests["lasso"])


def test_report_renders_in_headless_chromium(comparison, extras, small_ebike, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    """Chromium opens the page offline: every figure decodes, no section is empty, no NaN."""
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (Debian package 'chromium')")
    page = _full_report(comparison, extras, small_ebike, tmp_path / "report.html").read_text()
    n_images = page.count("<img ")
    probe = """<script>window.addEventListener('load', () => {
      const b = document.body;
      b.setAttribute('data-widths', Array.from(document.images).map(i => i.naturalWidth).join(','));
      const empty = [];
      for (const h of document.querySelectorAll('h2')) {
        let n = h.nextElementSibling, text = '', imgs = 0;
        while (n && n.tagName !== 'H2') { text += n.innerText; imgs += n.querySelectorAll('img').length; n = n.nextElementSibling; }
        if (text.trim().length < 20 && imgs === 0) empty.push(h.id);
      }
      b.setAttribute('data-empty', empty.join(','));
      b.setAttribute('data-nan', /\\bnan\\b/i.test(b.innerText) ? 'yes' : 'no');
      b.setAttribute('data-wide', String(document.documentElement.scrollWidth > window.innerWidth));
    });</script>"""
    (tmp_path / "probe.html").write_text(page.replace("</body>", probe + "</body>"))
    common = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
              "--window-size=1280,4000"]
    proc = subprocess.run([*common, "--dump-dom", (tmp_path / "probe.html").as_uri()],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    attrs = dict(re.findall(r'data-(widths|empty|nan|wide)="([^"]*)"', proc.stdout))
    assert set(attrs) == {"widths", "empty", "nan", "wide"}, proc.stdout[:2000]
    widths = [int(w) for w in attrs["widths"].split(",") if w]
    assert len(widths) == n_images == 9 and all(w > 100 for w in widths), widths
    assert attrs["empty"] == "", f"empty sections: {attrs['empty']}"
    assert attrs["nan"] == "no"
    assert attrs["wide"] == "false"  # nothing wider than the window: long tables scroll in a box
    shot = tmp_path / "report.png"
    proc = subprocess.run([*common, f"--screenshot={shot}", (tmp_path / "report.html").as_uri()],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and shot.stat().st_size > 10_000, proc.stderr[-2000:]


def test_data_section_counts_gaps_and_shares(small_ebike, comparison) -> None:  # type: ignore[no-untyped-def]
    from orthoccp.report import _data_section

    sim = small_ebike
    data = sim.data
    periods = sorted(data[sim.period].unique())
    units = sorted(data[sim.unit].unique())[:3]
    holes = data[sim.unit].isin(units) & (data[sim.period] == periods[3])
    panel = oc.Panel(data[~holes], unit=sim.unit, period=sim.period, choice=sim.choice,
                     states=list(sim.states))
    text = _data_section(panel, comparison.results["logit"])
    assert "3 gap(s) between observed periods, in 3 unit(s)" in text
    # period 3 lost three rows: its row count and swap share are those of the rows kept
    kept = data[~holes]
    share = (kept[kept[sim.period] == periods[3]][sim.choice] == "swap").mean()
    n_rows = int((~holes & (data[sim.period] == periods[3])).sum())
    assert f"{100 * share:.1f}%" in text and f"<td>{n_rows}</td>" in text


def test_the_counterfactual_section(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """``counterfactual=``: the changes in words, the solver's record and the difference rows,
    as the Counterfactual's own table has them."""
    from orthoccp.simulate import simulate

    sim = simulate("ebike", units=250, periods=6, seed=2)
    panel, model = sim.panel(), sim.model()
    res = oc.estimate(panel, model, learner="logit", folds=3)
    cf = oc.counterfactual(res, panel, model, shift={"swap": 1.0})
    path = oc.write_report(res, tmp_path / "r.html", counterfactual=cf)
    html = path.read_text()
    section = html[html.index("<h2 id='counterfactual'>"):html.index("<h2 id='provenance'>")]
    assert "swap +1 util" in section and "forest averager" in section
    d = cf.table.loc[("share[swap]", "difference"), "estimate"]
    assert f"{d:.4f}" in section
    assert "not the noise of the transition averager" in section
