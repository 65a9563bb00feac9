"""Figures for papers and reports (matplotlib; PNG or SVG by the file's extension).

Each function draws one figure from a :class:`~orthoccp.Results` or a
:class:`~orthoccp.Comparison` and returns the matplotlib ``Figure``; pass ``path`` to save it.
The style is meant for print: black-and-grey lines, readable fonts, no chart junk.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

from ._errors import InputError
from ._outputs import writing
from .compare import Comparison
from .results import Results

__all__ = [
    "calibration_plot", "ccp_state_plot", "overlap_plot", "coefficient_plot", "discount_plot",
    "variance_plot",
]


_STYLE = {"font.size": 9, "axes.spines.top": False, "axes.spines.right": False}


def matplotlib_figure_class() -> Any:
    """matplotlib's ``Figure`` class, or an error that says how to repair the install.

    matplotlib is a dependency of orthoccp, so this fails only in a broken environment.
    The figures are drawn on the non-interactive Agg canvas: the user's pyplot backend and
    open windows are left alone.
    """
    try:
        from matplotlib.figure import Figure
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(
            f"the figures need matplotlib, a dependency of orthoccp that failed to import "
            f"({exc}); repair the environment with pip install 'matplotlib>=3.7'."
        ) from exc
    return Figure


def _subplots(nrows: int = 1, ncols: int = 1, *, figsize: tuple[float, float],
              squeeze: bool = True) -> tuple[Any, Any]:
    """A new figure on the Agg canvas and its axes (the library never uses pyplot's state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = matplotlib_figure_class()(figsize=figsize)
    FigureCanvasAgg(fig)
    return fig, fig.subplots(nrows, ncols, squeeze=squeeze)


_F = TypeVar("_F", bound=Callable[..., Any])


def _styled(draw: _F) -> _F:
    """Draw under the figures' style without changing the user's matplotlib settings."""

    @functools.wraps(draw)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        import matplotlib

        with matplotlib.rc_context(_STYLE):
            return draw(*args, **kwargs)

    return wrapper  # type: ignore[return-value]


def _save(fig: Any, path: str | Path | None) -> Any:
    if path is not None:
        p = Path(path)
        if p.suffix.lower() not in (".png", ".svg", ".pdf"):
            raise InputError(f"figure path {str(p)!r} must end in .png, .svg or .pdf.")
        with writing(p):
            fig.savefig(p, dpi=200, bbox_inches="tight")
    return fig


def _diagnostics(res: Results) -> Any:
    if res.diagnostics is None:
        raise InputError("this result has no diagnostics (static model or supplied nuisances).")
    return res.diagnostics


@_styled
def calibration_plot(res: Results, *, path: str | Path | None = None) -> Any:
    """Out-of-fold predicted vs observed choice shares by decile, one panel per choice."""
    cal = _diagnostics(res).calibration
    choices = list(dict.fromkeys(cal["choice"]))
    fig, axes = _subplots(1, len(choices), figsize=(3.2 * len(choices), 3.0), squeeze=False)
    for ax, c in zip(axes[0], choices):
        d = cal[cal["choice"] == c]
        se = np.sqrt(np.clip(d["observed"] * (1 - d["observed"]), 1e-12, None) / d["rows"])
        ax.errorbar(d["predicted"], d["observed"], yerr=1.96 * se, fmt="o", color="black", ms=3, lw=0.8)
        hi = float(max(d["predicted"].max(), d["observed"].max())) * 1.05
        ax.plot([0, hi], [0, hi], color="grey", lw=0.8, ls="--")
        ax.set_title(f"choice {c}")
        ax.set_xlabel("mean predicted probability")
        ax.set_ylabel("observed share")
    fig.suptitle(f"CCP calibration ({res.learner}, out of fold)")
    fig.tight_layout()
    return _save(fig, path)


@_styled
def ccp_state_plot(comparison: Comparison, *, path: str | Path | None = None) -> Any:
    """Fitted CCPs against the main state, one line per first stage, one panel per choice.

    Uses each result's ``diagnostics.ccp_by_state`` (the panel's first state, binned): the
    mean out-of-fold CCP per bin (lines) and the observed share (dots, area by rows). With
    two choices only the rarer one is drawn (the other is its complement).
    """
    tables = {label: res.diagnostics.ccp_by_state for label, res in comparison.results.items()
              if res.diagnostics is not None and not res.diagnostics.ccp_by_state.empty}
    if not tables:
        raise InputError("no result has the fitted CCP by state (no numeric first state).")
    first = next(iter(tables.values()))
    choices = list(dict.fromkeys(first["choice"]))
    if len(choices) == 2:
        share = first.groupby("choice", sort=False)["observed"].mean()
        choices = [share.idxmin()]
    fig, axes = _subplots(1, len(choices), figsize=(4.2 * len(choices), 3.2), squeeze=False)
    styles = ["-", "--", ":", "-."]
    for ax, c in zip(axes[0], choices):
        d0 = first[first["choice"] == c]
        ax.scatter(d0["value"], d0["observed"], s=8 + 60 * d0["rows"] / d0["rows"].max(),
                   color="0.6", zorder=1, label="observed share")
        for i, (label, t) in enumerate(tables.items()):
            d = t[t["choice"] == c]
            ax.plot(d["value"], d["fitted"], styles[i % 4], color="black" if i < 4 else "0.4",
                    lw=1.3, label=label, zorder=2)
        ax.set_title(f"choice {c}")
        ax.set_xlabel(str(first["state"].iloc[0]))
        ax.set_ylabel("probability")
    axes[0][0].legend(frameon=False, fontsize=8)
    fig.suptitle("Fitted CCP against the main state (out of fold)")
    fig.tight_layout()
    return _save(fig, path)


@_styled
def overlap_plot(res: Results, ccp: np.ndarray | None = None, *, path: str | Path | None = None) -> Any:
    """Quantiles of the fitted CCPs per choice on a log scale, with the clip bound."""
    ov = _diagnostics(res).overlap
    fig, ax = _subplots(figsize=(4.5, 0.6 + 0.5 * len(ov)))
    for i, (c, r) in enumerate(ov.iterrows()):
        ax.plot([r["q01"], r["q99"]], [i, i], color="black", lw=2)
        ax.plot([r["min_next"]], [i], marker="|", color="grey", ms=10)
        ax.plot([r["median"]], [i], marker="o", color="black", ms=4)
    ax.axvline(res.clip, color="grey", ls="--", lw=0.8)
    ax.set_xscale("log")
    ax.set_yticks(range(len(ov)), [str(c) for c in ov.index])
    ax.set_xlabel("fitted probability (1%-99% range, median; | = minimum at next states)")
    ax.set_title("Overlap of fitted CCPs (dashed: clip bound)")
    fig.tight_layout()
    return _save(fig, path)


@_styled
def coefficient_plot(comparison: Comparison, *, level: float = 0.95, path: str | Path | None = None) -> Any:
    """Estimates with intervals across first stages, one row per parameter."""
    labels = list(comparison.results)
    params = list(comparison.results[labels[0]].params.index)
    fig, axes = _subplots(1, len(params), figsize=(3.0 * len(params), 0.6 + 0.45 * len(labels)), squeeze=False)
    for ax, p in zip(axes[0], params):
        for i, lab in enumerate(labels):
            r = comparison.results[lab]
            ci = r.conf_int(level).loc[p]
            ax.plot([ci["lower"], ci["upper"]], [i, i], color="black", lw=1.2)
            ax.plot([r.params[p]], [i], "o", color="black", ms=4)
        ax.set_yticks(range(len(labels)), labels)
        ax.set_title(p)
        ax.invert_yaxis()
    fig.suptitle(f"Debiased estimates by first stage ({int(level * 100)}% intervals)")
    fig.tight_layout()
    return _save(fig, path)


@_styled
def discount_plot(sensitivity: Any, *, path: str | Path | None = None) -> Any:
    """Each parameter's estimate and interval against the discount factor, one panel each.

    ``sensitivity`` is a :class:`~orthoccp.sensitivity.DiscountSensitivity`; the dotted line
    is the model's assumed discount factor, the grey line the plug-in estimate.
    """
    t = sensitivity.to_frame()
    params = list(dict.fromkeys(t["parameter"]))
    cols = min(len(params), 3)
    rows = -(-len(params) // cols)
    fig, axes = _subplots(rows, cols, figsize=(3.3 * cols, 2.7 * rows), squeeze=False)
    for ax, p in zip(axes.flat, params):
        d = t[t["parameter"] == p]
        ax.fill_between(d["discount"], d["lower"], d["upper"], color="0.85", lw=0)
        debiased = next(iter(sensitivity.results.values())).debiased
        ax.plot(d["discount"], d["estimate"], "o-", color="black", ms=3.5, lw=1.2,
                label="debiased" if debiased else "plug-in")
        if debiased:
            ax.plot(d["discount"], d["plugin"], "s--", color="0.45", ms=2.5, lw=0.8,
                    label="plug-in")
        ax.axvline(sensitivity.assumed, color="0.3", ls=":", lw=0.9)
        ax.set_title(p)
        ax.set_xlabel("discount factor β")
    for ax in list(axes.flat)[len(params):]:
        ax.set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, frameon=False, fontsize=8, ncol=2, loc="lower center",
               bbox_to_anchor=(0.5, -0.02))
    pct = f"{sensitivity.level * 100:g}%"
    fig.suptitle(f"Estimates against the discount factor\n(shaded: {pct} interval; "
                 f"dotted: the assumed β = {sensitivity.assumed:g})")
    fig.tight_layout(rect=(0, 0.06, 1, 1))
    return _save(fig, path)


@_styled
def demand_plot(curve: Any, *, path: str | Path | None = None) -> Any:
    """A choice's predicted share against the utils added to its payoff, with its interval.

    ``curve`` is a :class:`~orthoccp.counterfactual.DemandCurve`; the shaded band is the
    interval (estimation noise and sampling of units, not the transition averager's noise).
    """
    t = curve.table
    fig, ax = _subplots(figsize=(4.2, 3.0))
    ax.fill_between(t["amount"], t["ci_lower"], t["ci_upper"], color="0.85", lw=0)
    ax.plot(t["amount"], t["share"], "o-", color="black", ms=3.5, lw=1.2)
    ax.axvline(0.0, color="0.3", ls=":", lw=0.9)
    ax.set_xlabel(f"utils added to the payoff of {curve.choice!r}")
    ax.set_ylabel(f"predicted share of {curve.choice!r}")
    pct = f"{curve.level * 100:g}%"
    ax.set_title(f"Demand for {curve.choice!r}\n(shaded: {pct} interval; dotted: today)")
    fig.tight_layout()
    return _save(fig, path)


@_styled
def variance_plot(res: Results, *, path: str | Path | None = None) -> Any:
    """Shares of each parameter's variance by moment component, Cov(part, psi)/Var(psi).

    The shares add up to one; a negative share (a part that offsets the others) is drawn to
    the left of zero.
    """
    dec = res.decomposition
    fig, ax = _subplots(figsize=(4.5, 1.4 + 0.45 * len(dec)))
    greys = ["0.15", "0.45", "0.7"]
    y = np.arange(len(dec))
    right, left = np.zeros(len(dec)), np.zeros(len(dec))
    for k, col in enumerate(dec.columns):
        vals = dec[col].to_numpy(dtype=float)
        start = np.where(vals < 0, left, right)  # positive shares stack right, negative left
        ax.barh(y, vals, left=start, color=greys[k % len(greys)], edgecolor="black", lw=0.5,
                hatch="" if k < len(greys) else "///", label=col)
        right += np.where(vals > 0, vals, 0.0)
        left += np.where(vals < 0, vals, 0.0)
    ax.axvline(1.0, color="grey", ls="--", lw=0.8)
    ax.axvline(0.0, color="black", lw=0.6)
    ax.set_yticks(y, [str(i) for i in dec.index])
    ax.set_xlabel("share of variance, Cov(part, ψ)/Var(ψ); the parts add up to 1\n"
                  "(dashed line), a negative part is drawn left of 0")
    ax.legend(frameon=False, fontsize=8, ncol=4, loc="lower center", bbox_to_anchor=(0.5, 1.02))
    fig.suptitle("Where the variance comes from")
    fig.tight_layout()
    return _save(fig, path)
