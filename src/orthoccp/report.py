"""A self-contained HTML report a researcher can send to a co-author or file with a paper.

One page, readable with no network (inline CSS, figures embedded as PNG data), in this order:
what the page favours and why (a stated rule on out-of-fold fit, difference tests and fold
stability), the estimates (plug-in and debiased side by side, once), the difference tests, a
description of the data, each first stage's fit (the fitted CCP against the main state,
calibration, overlap, continuation regressions, variance shares, fold stability), the
sensitivity to the discount factor when computed, the provenance and the assumptions. With
simulated data, ``truth`` adds the true values and whether each interval covers them.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import math
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from . import figures
from ._errors import InputError
from ._outputs import check_output, writing
from ._version import __version__
from .compare import Comparison
from .results import ASSUMPTIONS, Results, describe_routes

if TYPE_CHECKING:
    from .data import Panel
    from .sensitivity import DiscountSensitivity
    from .stability import FoldStability

__all__ = ["favoured_first_stage", "render_report", "truth_table", "write_report"]

#: Level of the difference tests in the page's reading.
TEST_LEVEL = 0.05
#: A single test with a p-value above this is "far from rejecting" (the joint-test note).
FAR_FROM_REJECTING = 0.2

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
font-size:16px;line-height:1.5;color:#1a1a1a;max-width:62em;margin:2em auto;padding:0 1.2em}
h1{font-size:1.7em;margin-bottom:0.2em}h2{font-size:1.3em;margin-top:2em;
border-bottom:1px solid #ccc;padding-bottom:0.2em}h3{font-size:1.05em;margin-top:1.4em}
p.meta{color:#555;margin-top:0}.scroll{overflow-x:auto;margin:0.6em 0}
table{border-collapse:collapse;font-size:0.92em;font-variant-numeric:tabular-nums}
th,td{padding:3px 10px;border-bottom:1px solid #ddd;text-align:right;white-space:nowrap}
th{background:#f3f3f3;font-weight:600}td.l,th.l{text-align:left}
.verdict{background:#f4f7fb;border-left:4px solid #4a6fa5;padding:0.6em 1em;margin:1em 0}
.note{color:#444;font-size:0.95em}figure{margin:1em 0}img{max-width:100%;height:auto}
figcaption{color:#555;font-size:0.9em}code{font-size:0.9em;background:#f3f3f3;padding:0 3px;
overflow-wrap:anywhere}dl.prov{display:grid;grid-template-columns:max-content 1fr;gap:0.2em 1em}
dl.prov dt{font-weight:600}dl.prov dd{margin:0;overflow-wrap:anywhere}
"""


# --------------------------------------------------------------------------- small helpers
def _e(text: Any) -> str:
    return html.escape(str(text))


def _num(value: Any, digits: int = 4) -> str:
    """A number for the page; missing or non-finite values become an en dash, never NaN."""
    if value is None or isinstance(value, bool):
        return "–" if value is None else ("yes" if value else "no")
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return _e(value)
    if not math.isfinite(v):
        return "–"
    return f"{v:.{digits}f}"


def _pct(value: float) -> str:
    return "–" if not math.isfinite(value) else f"{100 * value:.1f}%"


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]], *, left: int = 1) -> str:
    """An HTML table in a horizontally scrolling box; the first ``left`` columns are text."""
    head = "".join(f'<th class="l">{_e(h)}</th>' if i < left else f"<th>{_e(h)}</th>"
                   for i, h in enumerate(header))
    body = []
    for row in rows:
        cells = []
        for i, v in enumerate(row):
            text = v if isinstance(v, _Raw) else (_e(v) if isinstance(v, str) else _num(v))
            cells.append(f'<td class="l">{text}</td>' if i < left else f"<td>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>'
            + "".join(body) + "</tbody></table></div>")


class _Raw(str):
    """Cell text that is already HTML."""


def _figure(make: Any, caption: str) -> str:
    """The figure ``make()`` returns, as embedded PNG; a short note when it cannot be drawn."""
    try:
        fig = make()
    except Exception as exc:  # a figure is never worth failing the report for: say why
        return f'<p class="note">({_e(caption)}: not drawn, {_e(exc)})</p>'
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=130, bbox_inches="tight")
    plt.close(fig)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return (f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def truth_table(comparison: Comparison, truth: Mapping[str, float], *, level: float = 0.95) -> pd.DataFrame:
    """Per first stage and parameter: truth, estimate, interval and whether it covers.

    For simulated data, whose true parameters are known.
    """
    rows = []
    for label, res in comparison.results.items():
        t = res.to_frame(level)
        for name in t.index:
            if name not in truth:
                raise InputError(f"truth has no value for parameter {name!r}; give every parameter.")
            lo, hi = float(t.loc[name, "ci_lower"]), float(t.loc[name, "ci_upper"])
            value = float(truth[name])
            rows.append({
                "first_stage": label, "parameter": name, "truth": value,
                "estimate": float(t.loc[name, "estimate"]), "ci_lower": lo, "ci_upper": hi,
                "covers": bool(lo <= value <= hi),
            })
    return pd.DataFrame(rows).set_index(["first_stage", "parameter"])


# --------------------------------------------------------------------------- the reading
def _log_loss(res: Results) -> float:
    d = res.diagnostics
    if d is None or d.ccp_quality.empty:
        return float("nan")
    return float(np.average(d.ccp_quality["log_loss"], weights=d.ccp_quality["rows"]))


def _stable(fs: FoldStability | None) -> bool | None:
    from .stability import NOTABLE_CHANGE_SE

    return None if fs is None else bool(fs.max_change_se().max() <= NOTABLE_CHANGE_SE)


def favoured_first_stage(
    comparison: Comparison, *, stability: Mapping[str, FoldStability] | None = None
) -> tuple[str | None, list[str]]:
    """The first stage the evidence favours, by the page's stated rule, and the reasons.

    Rule: the first stage with the lowest out-of-fold log-loss of the CCP (the better
    prediction of held-out units' choices) is favoured, unless refitting one of its folds
    with another seed moves an estimate by more than
    :data:`~orthoccp.stability.NOTABLE_CHANGE_SE` standard errors (then the next best
    stable one is). The difference tests against the baseline say whether the choice
    matters: when none rejects at 5 %, the estimates agree within their noise.

    Returns
    -------
    (str or None, list of str)
        The favoured label (None when no first stage has out-of-fold fit measures) and one
        sentence per piece of evidence.
    """
    stability = stability or {}
    fits = {label: _log_loss(res) for label, res in comparison.results.items()}
    ranked = sorted((v, k) for k, v in fits.items() if math.isfinite(v))
    reasons = []
    if ranked:
        reasons.append("Out-of-fold log-loss of the CCP (lower is better): " + ", ".join(
            f"{k} {v:.4f}" for v, k in ranked) + ".")
    for label, fs in stability.items():
        reasons.append(f"{label}: {fs.reading()}")
    for label, test in comparison.tests.items():
        w = test.attrs["wald"]
        single = test["p_value"].to_numpy(dtype=float)
        rejected = [str(n) for n, p in zip(test.index, single) if p < TEST_LEVEL]
        reasons.append(
            f"{label} against {comparison.baseline}: "
            + (f"the estimates of {', '.join(rejected)} differ (p < {TEST_LEVEL:g})"
               if rejected else f"no single difference is significant at {TEST_LEVEL:g}")
            + f"; joint Wald test p = {w['p_value']:.3f}."
        )
    chosen = None
    for _, label in ranked:
        if _stable(stability.get(label)) is not False:
            chosen = label
            break
    return chosen, reasons


def _reading(comparison: Comparison, stability: Mapping[str, FoldStability]) -> str:
    chosen, reasons = favoured_first_stage(comparison, stability=stability)
    rule = (
        "<p class='note'><b>The rule.</b> The page favours the first stage whose choice "
        "probabilities predict held-out units best (lowest out-of-fold log-loss), provided "
        "its estimate is stable across folds (refitting one fold with another seed moves no "
        "estimate by more than 0.2 standard errors, when the fold stability was computed). "
        "The difference tests say whether the choice matters: when none rejects, the first "
        "stages agree within their noise. The debiased moment is protected against small "
        "first-stage errors, not against a misspecified first stage, so when the estimates "
        "differ the better-predicting first stage is the one to report.</p>"
    )
    if chosen is None:
        verdict = ("No first stage has out-of-fold fit measures (supplied nuisances or a "
                   "static model), so the page favours none.")
    else:
        agree = all(
            (t["p_value"] >= TEST_LEVEL).all() and t.attrs["wald"]["p_value"] >= TEST_LEVEL
            for t in comparison.tests.values()
        )
        if len(comparison.results) == 1:
            verdict = f"Only one first stage, {chosen}, was estimated."
        elif agree:
            verdict = (f"The evidence favours <b>{_e(chosen)}</b>: it predicts held-out choices "
                       f"best, and the first stages agree within their noise (no difference "
                       f"test rejects at {TEST_LEVEL:g}), so the conclusions do not hinge on "
                       f"the choice.")
        else:
            verdict = (f"The evidence favours <b>{_e(chosen)}</b>: it predicts held-out choices "
                       f"best. The first stages give different estimates (a difference test "
                       f"rejects at {TEST_LEVEL:g}), so the choice of first stage matters: "
                       f"report {_e(chosen)} as the main estimate by this rule and show the "
                       f"others beside it.")
    items = "".join(f"<li>{_e(r)}</li>" for r in reasons)
    return f"<div class='verdict'><p>{verdict}</p><ul>{items}</ul></div>{rule}"


def _joint_note(test: pd.DataFrame) -> str:
    """One sentence when the joint test rejects while every single test is far from it."""
    w = test.attrs["wald"]
    if w["p_value"] < TEST_LEVEL and (test["p_value"] > FAR_FROM_REJECTING).all():
        return (
            f"<p class='note'>The joint test rejects (p = {w['p_value']:.3f}) although no single "
            f"difference comes close (every p &gt; {FAR_FROM_REJECTING:g}): the differences of "
            f"the parameters are strongly correlated, so a combination of them is estimated far "
            f"more precisely than any one of them, and it is that combination that differs.</p>"
        )
    return ""


# --------------------------------------------------------------------------- sections
def _estimates_section(comparison: Comparison, truth: Mapping[str, float] | None,
                       level: float) -> str:
    pct = f"{level * 100:g}%"
    header = ["parameter", "first stage", "plug-in", "debiased", "s.e.", f"{pct} lower",
              f"{pct} upper"]
    if truth is not None:
        header += ["truth", "covers"]
    rows = []
    for name in comparison.parameters:
        for label, res in comparison.results.items():
            ci = res.conf_int(level).loc[name]
            plug = res.plugin_params[name] if res.plugin_params is not None else None
            row: list[Any] = [str(name), label, plug, res.params[name], res.std_errors[name],
                              ci["lower"], ci["upper"]]
            if truth is not None:
                if name not in truth:
                    raise InputError(f"truth has no value for parameter {name!r}; give every "
                                     f"parameter.")
                row += [float(truth[name]), bool(ci["lower"] <= truth[name] <= ci["upper"])]
            rows.append(row)
    parts = ["<h2 id='estimates'>Estimates</h2>", _table(header, rows, left=2),
             "<p class='note'>Plug-in: the pseudo-likelihood estimate with the cross-fitted "
             "first stage plugged in. Debiased: the Neyman-orthogonal estimate, whose standard "
             "errors (clustered by unit) and intervals include the first stage's noise. "
             + ("Covers: whether the interval contains the true value (simulated data). "
                if truth is not None else "") + "</p>"]
    for label, why in comparison.failed.items():
        parts.append(f"<p><b>First stage {_e(label)} failed</b> and gave no estimate: "
                     f"{_e(why)}</p>")
    if len(comparison.results) > 1:
        parts.append(_figure(lambda: figures.coefficient_plot(comparison, level=level),
                             f"Debiased estimates and {pct} intervals by first stage"))
    if comparison.tests:
        parts.append("<h3>Difference tests against the baseline "
                     f"({_e(comparison.baseline)})</h3>")
        rows = []
        for label, test in comparison.tests.items():
            for name, r in test.iterrows():
                rows.append([label, str(name), r["difference"], r["std_error"], r["z"],
                             r["p_value"]])
        parts.append(_table(["first stage", "parameter", "difference", "s.e.", "z", "p"], rows,
                            left=2))
        for label, test in comparison.tests.items():
            w = test.attrs["wald"]
            parts.append(f"<p>Joint test {_e(label)} = {_e(comparison.baseline)}: Wald "
                         f"{w['statistic']:.2f} on {w['df']} degrees of freedom, p = "
                         f"{w['p_value']:.3f}.</p>" + _joint_note(test))
        parts.append("<p class='note'>The tests use both estimators' per-unit influence terms "
                     "on the same units (no efficiency assumption); they are valid under the "
                     "model's assumptions.</p>")
    return "\n".join(parts)


def _data_section(panel: Panel, res: Results) -> str:
    frame = panel.frame
    per_unit = np.bincount(panel.unit_codes)
    gap_units = np.unique(panel.unit_codes[panel.gap_after]).size
    periods = pd.Series(panel.periods)
    facts = [
        ("units", f"{panel.n_units:,}"),
        ("rows", f"{panel.n_rows:,}"),
        ("periods", f"{_e(periods.min())} to {_e(periods.max())} ({periods.nunique()} distinct)"),
        ("rows per unit", f"min {per_unit.min()}, median {np.median(per_unit):g}, max "
                          f"{per_unit.max()}"),
        ("gaps", "none (every unit is observed in consecutive periods)"
                 if not panel.gap_after.any() else
                 f"{int(panel.gap_after.sum())} gap(s) between observed periods, in "
                 f"{gap_units} unit(s)"),
        ("states", _e(", ".join(panel.states))),
        ("rows used", _e(res.accounting.describe())),
    ]
    items = "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in facts)
    parts = ["<h2 id='data'>The data</h2>", f"<dl class='prov'>{items}</dl>"]
    shares = pd.crosstab(panel.periods, frame[panel.choice].to_numpy(), normalize="index")
    counts = pd.Series(panel.periods).value_counts().sort_index()
    rows = [[_e(p), int(counts.loc[p]), *(_Raw(_pct(float(shares.loc[p, c])))
                                         for c in shares.columns)] for p in shares.index]
    parts.append(f"<h3>Choice shares by period ({_e(panel.period)})</h3>")
    parts.append(_table([panel.period, "rows", *(str(c) for c in shares.columns)], rows))
    return "\n".join(parts)


def _first_stage_section(label: str, res: Results, fs: FoldStability | None) -> str:
    parts = [f"<h3 id='fs-{_e(label)}'>{_e(label)}</h3>"]
    facts = (f"Learner {res.learner} (continuation regressions: {res.regressor}), {res.folds} "
             f"folds, {res.splits} split(s), {res.scheme} cross-fitting, {res.moments} moments; "
             f"{res.n_learner_fits} learner fits. Solution: {describe_routes(res.solve_routes)}.")
    parts.append(f"<p>{_e(facts)}</p>")
    readings = []
    if res.diagnostics is not None:
        readings += res.diagnostics.readings()
    if res.interval_check is not None and res.interval_check.flagged:
        readings += res.interval_check.readings()
    if fs is not None:
        readings.append(fs.reading())
    if readings:
        parts.append("<ul>" + "".join(f"<li>{_e(r)}</li>" for r in readings) + "</ul>")
    d = res.diagnostics
    if d is not None:
        if not d.ccp_quality.empty:
            q = d.ccp_quality
            parts.append("<p>Out-of-fold quality of the CCP by fold (baseline: the choice "
                         "frequencies):</p>")
            parts.append(_table(["fold", "rows", "log-loss", "log-loss (frequencies)", "Brier",
                                 "Brier (frequencies)"],
                                [[int(r.fold), int(r.rows), r.log_loss, r.log_loss_baseline,
                                  r.brier, r.brier_baseline] for r in q.itertuples()]))
        if not d.continuation_quality.empty:
            parts.append("<p>Continuation regressions, out-of-fold R²:</p>")
            parts.append(_table(["choice", "target", "rows", "R²"],
                                [[str(r.choice), str(r.target), int(r.rows), r.r2]
                                 for r in d.continuation_quality.itertuples()], left=2))
        parts.append(_figure(lambda: figures.calibration_plot(res),
                             f"CCP calibration, out of fold ({label})"))
        parts.append(_figure(lambda: figures.overlap_plot(res),
                             f"Overlap of the fitted CCPs ({label})"))
    parts.append(_figure(lambda: figures.variance_plot(res),
                         f"Where the variance comes from ({label})"))
    if fs is not None:
        parts.append("<p>Fold stability (each fold's first stage refitted with another "
                     "seed):</p>")
        t = fs.to_frame().reset_index()
        parts.append(_table(["fold", "parameter", "estimate", "change", "change (s.e.)"],
                            [[str(r.fold), str(r.parameter), r.estimate, r.change, r.change_se]
                             for r in t.itertuples()], left=2))
    return "\n".join(parts)


def _sensitivity_section(sens: DiscountSensitivity) -> str:
    t = sens.to_frame()
    pct = f"{sens.level * 100:g}%"
    order = {name: k for k, name in enumerate(dict.fromkeys(t["parameter"]))}
    t = t.assign(_k=t["parameter"].map(order)).sort_values(["_k", "discount"], kind="stable")
    rows = [[str(r.parameter), _Raw(f"{r.discount:g}" + (" (assumed)" if math.isclose(
        r.discount, sens.assumed) else "")), r.estimate, r.std_error, r.lower, r.upper, r.plugin]
        for r in t.itertuples()]
    label = next(iter(sens.results.values())).learner
    return "\n".join([
        "<h2 id='discount'>Sensitivity to the discount factor</h2>",
        f"<p>The model assumes β = {sens.assumed:g}. The same estimate at other discount "
        f"factors, with the {_e(label)} first stage (fitted once; the moments, projections "
        f"and steps redone at each β):</p>",
        _figure(sens.plot, f"Estimates and {pct} intervals against the discount factor "
                           f"({label})"),
        _table(["parameter", "β", "debiased", "s.e.", f"{pct} lower", f"{pct} upper",
                "plug-in"], rows, left=2),
    ])


def _counterfactual_section(cf: Any) -> str:
    """The counterfactual's changes, its difference table, its record and what it includes."""
    pct = f"{cf.level * 100:g}%"
    t = cf.table
    rows = []
    for stat in dict.fromkeys(t.index.get_level_values("statistic")):
        b, c, d = (t.loc[(stat, s)] for s in ("baseline", "counterfactual", "difference"))
        rows.append([stat, b.estimate, c.estimate, d.estimate, d.std_error, d.ci_lower, d.ci_upper])
    changes = cf.describe_changes()
    return "\n".join([
        "<h2 id='counterfactual'>Counterfactual</h2>",
        f"<p>The estimated model ({_e(cf.learner)} first stage) re-solved at changed payoffs "
        f"on the data's own states: {_e(changes)}. Fitted value iteration with the "
        f"{_e(cf.averager.kind)} averager ({cf.iterations['baseline']} and "
        f"{cf.iterations['counterfactual']} steps). The intervals include {_e(cf.noise)}.</p>",
        _table(["statistic", "baseline", "counterfactual", "difference", "s.e.",
                f"{pct} lower", f"{pct} upper"], rows),
    ])


def _provenance_section(comparison: Comparison, provenance: Mapping[str, str] | None) -> str:
    base = next(iter(comparison.results.values()))
    info: dict[str, str] = {
        "data file": "not recorded (Python API)",
        "spec file": "not recorded (Python API)",
        "command": "orthoccp.write_report (Python API)",
    }
    info.update({k: str(v) for k, v in (provenance or {}).items()})
    info.setdefault("date", _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"))
    info["orthoccp version"] = base.version or __version__
    info["seed"] = f"{base.seed} (folds and every learner's random state)"
    info["first stages"] = ", ".join(comparison.results) + (
        f" (baseline {comparison.baseline})" if len(comparison.results) > 1 else "")
    model = base.model
    info["model"] = (f"{model['kind']} model, anchor {model['anchor']!r}, discount "
                     f"{model['discount']:g}")
    items = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in info.items())
    return f"<h2 id='provenance'>Provenance</h2><dl class='prov'>{items}</dl>"


def render_report(
    comparison: Comparison,
    *,
    title: str = "orthoccp estimation report",
    stability: Mapping[str, FoldStability] | None = None,
    truth: Mapping[str, float] | None = None,
    panel: Panel | None = None,
    sensitivity: DiscountSensitivity | None = None,
    provenance: Mapping[str, str] | None = None,
    level: float = 0.95,
    counterfactual: Any = None,
) -> str:
    """The report as an HTML string.

    Parameters
    ----------
    comparison : Comparison
        The estimates by first stage (:func:`~orthoccp.compare`).
    title : str
        The page title.
    stability : mapping, optional
        First-stage label -> :func:`~orthoccp.stability.fold_stability` result.
    truth : mapping, optional
        Parameter -> true value (simulated data only): adds the truth and coverage columns.
    panel : Panel, optional
        The data: adds their description (units, periods per unit, gaps, choice shares by
        period) and the fitted CCP against the main state (the panel's first state).
    sensitivity : DiscountSensitivity, optional
        :func:`~orthoccp.discount_sensitivity` result: adds its figure and table.
    provenance : mapping, optional
        Entries such as ``"data file"``, ``"spec file"``, ``"command"``, ``"date"``; the
        version, seed, first stages and model are added from the results.
    level : float, default=0.95
        Confidence level of the intervals.
    counterfactual : Counterfactual, optional
        :func:`~orthoccp.counterfactual` result: adds its changes and table.
    """
    if not comparison.results:
        raise InputError("the comparison holds no result; there is nothing to report.")
    stability = dict(stability or {})
    base = comparison.results.get(comparison.baseline) or next(iter(comparison.results.values()))
    date = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    provenance = {"date": date, **dict(provenance or {})}
    m = base.model
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        f"<p class='meta'>{_e(m['kind'])} model, anchor {_e(repr(m['anchor']))}, discount "
        f"{m['discount']:g}; {base.n_units:,} units; parameters "
        f"{_e(', '.join(map(str, comparison.parameters)))}. orthoccp {_e(base.version or __version__)}, "
        f"{_e(provenance['date'])}.</p>",
        "<h2 id='reading'>Which first stage the evidence favours</h2>",
        _reading(comparison, stability),
        _estimates_section(comparison, truth, level),
    ]
    if panel is not None:
        parts.append(_data_section(panel, base))
    parts.append("<h2 id='first-stages'>First stages</h2>")
    if any(r.diagnostics is not None and not r.diagnostics.ccp_by_state.empty
           for r in comparison.results.values()):
        parts.append(_figure(lambda: figures.ccp_state_plot(comparison),
                             "Fitted choice probabilities (out of fold, lines) and observed "
                             "shares (dots) against the main state"))
    for label, res in comparison.results.items():
        parts.append(_first_stage_section(label, res, stability.get(label)))
    if sensitivity is not None:
        parts.append(_sensitivity_section(sensitivity))
    if counterfactual is not None:
        parts.append(_counterfactual_section(counterfactual))
    parts.append(_provenance_section(comparison, provenance))
    parts.append("<h2 id='assumptions'>Assumptions</h2><p>The intervals and tests are valid "
                 "only under:</p><ul>")
    parts.extend(f"<li>{_e(a)}</li>" for a in ASSUMPTIONS)
    parts.append("</ul></body></html>")
    return "\n".join(parts)


def write_report(
    comparison: Comparison | Results,
    path: str | Path,
    *,
    title: str = "orthoccp estimation report",
    stability: Mapping[str, FoldStability] | None = None,
    truth: Mapping[str, float] | None = None,
    panel: Panel | None = None,
    sensitivity: DiscountSensitivity | None = None,
    provenance: Mapping[str, str] | None = None,
    counterfactual: Any = None,
) -> Path:
    """Write :func:`render_report` to ``path`` (a single results object is accepted too).

    ``path`` is checked before the report is drawn (not a folder, writable); an I/O error
    names it. The options are those of :func:`render_report`.
    """
    if isinstance(comparison, Results):
        comparison = Comparison(results={comparison.learner: comparison}, baseline=comparison.learner)
    if not isinstance(path, (str, os.PathLike)):
        raise InputError(f"path must be a file name such as 'report.html', got {path!r}.")
    p = check_output(path, option="path")
    text = render_report(comparison, title=title, stability=stability, truth=truth, panel=panel,
                         sensitivity=sensitivity, provenance=provenance,
                         counterfactual=counterfactual)
    with writing(p):
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")
    return p
