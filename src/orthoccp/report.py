"""A self-contained HTML report a researcher can file with a paper's replication package.

One page holds: the estimates of every first stage with the difference tests against the
parametric baseline, the diagnostics with their readings, the fold stability of the first
stages it was computed for, the figures (embedded PNG), the row accounting and the model's
assumptions. With simulated data, ``truth`` adds whether each interval covers the true value.
"""

from __future__ import annotations

import base64
import html
import io
import os
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from . import figures
from ._errors import InputError
from ._outputs import check_output, writing
from ._version import __version__
from .compare import Comparison
from .results import ASSUMPTIONS, Results

if TYPE_CHECKING:
    from .stability import FoldStability

__all__ = ["render_report", "truth_table", "write_report"]


def _figure_tag(fig: Any, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=150, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f'<figure><img alt="{html.escape(alt)}" src="data:image/png;base64,{data}"><figcaption>{html.escape(alt)}</figcaption></figure>'


def _table(df: Any) -> str:
    return df.to_html(float_format=lambda v: f"{v:.4f}", border=0, classes="t")


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


def render_report(
    comparison: Comparison,
    *,
    title: str = "orthoccp estimation report",
    stability: Mapping[str, FoldStability] | None = None,
    truth: Mapping[str, float] | None = None,
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
        Parameter -> true value (simulated data only): adds a coverage table.
    """
    base = comparison.results.get(comparison.baseline) or next(iter(comparison.results.values()))
    parts = [
        "<!DOCTYPE html><html><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title>",
        "<style>body{font-family:Georgia,serif;max-width:60em;margin:2em auto;color:#111}"
        "table.t{border-collapse:collapse;font-size:0.9em}table.t td,table.t th{padding:2px 8px;"
        "border-bottom:1px solid #ccc;text-align:right}pre{background:#f6f6f6;padding:0.6em;"
        "font-size:0.8em;overflow-x:auto}figure{margin:1em 0}img{max-width:100%}</style>",
        "</head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p>orthoccp {__version__}. Model: {html.escape(str(base.model['kind']))}, anchor "
        f"{html.escape(repr(base.model['anchor']))}, discount {base.model['discount']}. "
        f"{html.escape(base.accounting.describe())} Units: {base.n_units}.</p>",
        "<h2>Estimates by first stage</h2>",
        _table(comparison.to_frame()),
        f"<pre>{html.escape(comparison.summary())}</pre>",
    ]
    for label, why in comparison.failed.items():
        parts.append(
            f"<h2>First stage: {html.escape(label)} (failed)</h2><p>This first stage gave no "
            f"estimate: {html.escape(why)}</p>"
        )
    if truth is not None:
        parts.append("<h2>Estimates against the truth (simulated data)</h2>")
        parts.append(_table(truth_table(comparison, truth)))
    try:
        parts.append(_figure_tag(figures.coefficient_plot(comparison), "Debiased estimates by first stage"))
    except Exception as exc:  # figures are optional: say why one is missing
        parts.append(f"<p>(coefficient plot not drawn: {html.escape(str(exc))})</p>")
    for label, res in comparison.results.items():
        parts.append(f"<h2>First stage: {html.escape(label)}</h2>")
        parts.append(f"<pre>{html.escape(res.summary())}</pre>")
        if res.diagnostics is not None:
            d = res.diagnostics
            parts.append("<ul>" + "".join(f"<li>{html.escape(r)}</li>" for r in d.readings()) + "</ul>")
            parts.append("<h3>First-stage quality by fold</h3>" + _table(d.ccp_quality))
            parts.append("<h3>Overlap</h3>" + _table(d.overlap))
            if not d.continuation_quality.empty:
                parts.append("<h3>Continuation regressions</h3>" + _table(d.continuation_quality))
        if stability and label in stability:
            fs = stability[label]
            parts.append(
                "<h3>Fold stability</h3>"
                f"<p>{html.escape(fs.reading())}</p>" + _table(fs.to_frame())
            )
        if res.diagnostics is not None:
            for fn, alt in (
                (figures.calibration_plot, f"CCP calibration ({label})"),
                (figures.overlap_plot, f"Overlap of fitted CCPs ({label})"),
                (figures.variance_plot, f"Variance decomposition ({label})"),
            ):
                try:
                    parts.append(_figure_tag(fn(res), alt))
                except Exception as exc:
                    parts.append(f"<p>({html.escape(alt)} not drawn: {html.escape(str(exc))})</p>")
    parts.append("<h2>Assumptions</h2><p>The intervals and tests are valid only under:</p><ul>")
    parts.extend(f"<li>{html.escape(a)}</li>" for a in ASSUMPTIONS)
    parts.append("</ul></body></html>")
    return "\n".join(parts)


def write_report(
    comparison: Comparison | Results,
    path: str | Path,
    *,
    title: str = "orthoccp estimation report",
    stability: Mapping[str, FoldStability] | None = None,
    truth: Mapping[str, float] | None = None,
) -> Path:
    """Write :func:`render_report` to ``path`` (a single results object is accepted too).

    ``path`` is checked before the report is drawn (not a folder, writable); an I/O error
    names it.
    """
    if isinstance(comparison, Results):
        comparison = Comparison(results={comparison.learner: comparison}, baseline=comparison.learner)
    if not isinstance(path, (str, os.PathLike)):
        raise InputError(f"path must be a file name such as 'report.html', got {path!r}.")
    p = check_output(path, option="path")
    text = render_report(comparison, title=title, stability=stability, truth=truth)
    with writing(p):
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")
    return p
