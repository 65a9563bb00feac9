"""Diagnostics attached to every result: overlap, first-stage quality, influential units.

Each table comes with a plain-language reading (:meth:`Diagnostics.readings`) so that a user
sees at once whether the first stage is good enough to trust the interval.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ._labels import plain_label, show_label
from .model import BoundModel
from .anchor import AnchorCheck, check_anchor_probability
from .nuisance import Nuisances

__all__ = ["Diagnostics", "compute_diagnostics"]

_BINS = 10


@dataclass(frozen=True, eq=False)
class Diagnostics:
    """First-stage and overlap diagnostics of one estimation.

    Attributes
    ----------
    overlap : pandas.DataFrame
        Per choice: quantiles of the fitted CCP at the moment rows' next states (where
        :math:`1/P_R` enters the correction) and at the rows themselves, and the share of rows
        within ten times the clip bound.
    ccp_quality : pandas.DataFrame
        Per fold: out-of-fold log-loss and Brier score of the CCP learner, next to those of the
        choice frequencies (the no-information baseline).
    calibration : pandas.DataFrame
        Per choice and bin of predicted probability (deciles): mean predicted, observed share
        and count, pooled over folds (out-of-fold predictions).
    continuation_quality : pandas.DataFrame
        Per choice and target: out-of-fold :math:`R^2` of the continuation regressions.
    influential_units : pandas.DataFrame
        The units with the largest share of each parameter's variance.
    anchor : AnchorCheck or None
        The estimated anchor probability where the CCP correction divides by it (the states
        right after a renewal; every next state in a terminal model), with a warning when it
        is too small for the correction to be reliable.
    ccp_by_state : pandas.DataFrame
        The fitted CCP against the main state (the panel's first state, when numeric): per
        bin of that state (each value when it takes at most 20, else 20 quantile bins) and
        choice, the state's mean, the mean out-of-fold CCP, the observed share and the rows.
    """

    overlap: pd.DataFrame
    ccp_quality: pd.DataFrame
    calibration: pd.DataFrame
    continuation_quality: pd.DataFrame
    influential_units: pd.DataFrame = field(default_factory=pd.DataFrame)
    anchor: AnchorCheck | None = None
    ccp_by_state: pd.DataFrame = field(default_factory=pd.DataFrame)

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python view for JSON: the readings and every table as a list of records
        (NaN and infinities become ``None``)."""
        tables = {
            "overlap": self.overlap.reset_index(),
            "ccp_quality": self.ccp_quality.reset_index(drop=True),
            "calibration": self.calibration.reset_index(drop=True),
            "continuation_quality": self.continuation_quality.reset_index(drop=True),
            "influential_units": self.influential_units.reset_index(drop=True),
            "ccp_by_state": self.ccp_by_state.reset_index(drop=True),
        }
        return {"readings": self.readings(),
                **{name: _records(frame) for name, frame in tables.items()}}

    def readings(self) -> list[str]:
        """One plain-language sentence per diagnostic."""
        out = []
        if not self.ccp_quality.empty:
            q = self.ccp_quality
            gain = 1.0 - q["log_loss"].mean() / q["log_loss_baseline"].mean()
            out.append(
                f"CCP learner: out-of-fold log-loss {q['log_loss'].mean():.4f} against "
                f"{q['log_loss_baseline'].mean():.4f} for the choice frequencies "
                f"({gain:.0%} better); fold-to-fold range {q['log_loss'].min():.4f}-"
                f"{q['log_loss'].max():.4f}."
            )
        if not self.calibration.empty:
            c = self.calibration
            gap = (c["observed"] - c["predicted"]).abs()
            worst = c.loc[(gap * np.sqrt(c["rows"])).idxmax()]
            out.append(
                f"Calibration: the largest gap is in choice {show_label(worst['choice'])}, predicted "
                f"{worst['predicted']:.3f} vs observed {worst['observed']:.3f} "
                f"({int(worst['rows'])} rows)."
            )
        if not self.overlap.empty and "share_near_bound" in self.overlap:
            o = self.overlap
            worst = o["share_near_bound"].idxmax()
            out.append(
                f"Overlap: {o.loc[worst, 'share_near_bound']:.1%} of rows have a probability "
                f"of {worst!r} within ten times the clip bound; the 1% quantile at next "
                f"states is {o.loc[worst, 'q01_next']:.2g}."
            )
        if not self.continuation_quality.empty:
            r2 = self.continuation_quality["r2"]
            out.append(
                f"Continuation regressions: out-of-fold R^2 from {r2.min():.2f} to {r2.max():.2f}."
            )
        if not self.influential_units.empty:
            top = self.influential_units.sort_values("variance_share", ascending=False).iloc[0]
            out.append(
                f"Influence: unit {plain_label(top['unit'])} carries {top['variance_share']:.1%} of "
                f"the variance of {top['parameter']!r}"
                + " (see .diagnostics.influential_units; on its own a large share is no "
                "warning sign, the interval checks above say when to distrust an interval)."
            )
        if self.anchor is not None:
            out.extend(self.anchor.readings())
        return out


def _log_loss(P: np.ndarray, codes: np.ndarray) -> float:
    return float(-np.mean(np.log(P[np.arange(codes.size), codes])))


def _brier(P: np.ndarray, codes: np.ndarray) -> float:
    Y = np.zeros_like(P)
    Y[np.arange(codes.size), codes] = 1.0
    return float(np.mean(((P - Y) ** 2).sum(axis=1)))


def compute_diagnostics(
    bound: BoundModel,
    nuisances: Nuisances,
    rows: np.ndarray,
    *,
    clip: float,
    influence: np.ndarray | None = None,
    influence_units: np.ndarray | None = None,
    top: int = 5,
) -> Diagnostics:
    """Diagnostics from the out-of-fold nuisances of one split.

    Parameters
    ----------
    bound : BoundModel
        Model bound to the panel.
    nuisances : Nuisances
        Out-of-fold CCPs and continuation expectations (``folds`` set when cross-fitted).
    rows : numpy.ndarray
        Moment rows.
    clip : float
        The clip bound used.
    influence, influence_units : numpy.ndarray, optional
        Per-unit influence terms and their labels, for the influential-unit table.
    """
    panel = bound.panel
    P = nuisances.ccp
    codes = panel.choice_codes
    choices = panel.choices
    J = len(choices)
    nxt = panel.next_row[rows]
    at_next = P[nxt[nxt >= 0]]
    overlap_rows = []
    for j in range(J):
        p_here = P[rows, j]
        p_next = at_next[:, j] if at_next.size else np.array([np.nan])
        overlap_rows.append(
            {
                "choice": choices[j],
                "q01": float(np.quantile(p_here, 0.01)),
                "median": float(np.median(p_here)),
                "q99": float(np.quantile(p_here, 0.99)),
                "q01_next": float(np.nanquantile(p_next, 0.01)),
                "min_next": float(np.nanmin(p_next)),
                "share_near_bound": float(
                    np.mean((p_here < 10 * clip) | (p_here > 1 - 10 * clip))
                ),
            }
        )
    overlap = pd.DataFrame(overlap_rows).set_index("choice")

    quality_rows = []
    calibration_rows = []
    if nuisances.folds is not None:
        folds = nuisances.folds
        freq = np.bincount(codes, minlength=J) / codes.size
        for k in range(int(folds.max()) + 1):
            sel = folds == k
            base = np.broadcast_to(freq, (int(sel.sum()), J))
            quality_rows.append(
                {
                    "fold": k,
                    "rows": int(sel.sum()),
                    "log_loss": _log_loss(P[sel], codes[sel]),
                    "log_loss_baseline": _log_loss(base, codes[sel]),
                    "brier": _brier(P[sel], codes[sel]),
                    "brier_baseline": _brier(base, codes[sel]),
                }
            )
        for j in range(J):
            p = P[:, j]
            edges = np.unique(np.quantile(p, np.linspace(0, 1, _BINS + 1)))
            bins = np.clip(np.searchsorted(edges, p, side="right") - 1, 0, max(edges.size - 2, 0))
            for b in np.unique(bins):
                sel = bins == b
                calibration_rows.append(
                    {
                        "choice": choices[j],
                        "bin": int(b),
                        "predicted": float(p[sel].mean()),
                        "observed": float((codes[sel] == j).mean()),
                        "rows": int(sel.sum()),
                    }
                )
    ccp_quality = pd.DataFrame(quality_rows)
    calibration = pd.DataFrame(calibration_rows)

    cont_rows = []
    if bound.has_next_stage:
        nxt_all = panel.next_row
        linked = nxt_all >= 0
        R = bound.anchor_index
        targets = np.concatenate(
            [bound.next_targets_data(), np.log(P[:, R])[:, None]], axis=1
        )
        names = [bound.parameters[k] for k in bound.zR_params] + [f"ln P({choices[R]})"]
        for j in bound.continuation_choices():
            sel = linked & (codes == j)
            if sel.sum() < 2:
                continue
            y = targets[nxt_all[sel]]
            yhat = nuisances.mu[sel, j, :]
            for c, name in enumerate(names):
                sst = float(((y[:, c] - y[:, c].mean()) ** 2).sum())
                sse = float(((y[:, c] - yhat[:, c]) ** 2).sum())
                cont_rows.append(
                    {
                        "choice": choices[j],
                        "target": name,
                        "rows": int(sel.sum()),
                        "r2": 1.0 - sse / sst if sst > 0 else float("nan"),
                    }
                )
    continuation_quality = pd.DataFrame(cont_rows)

    infl_rows = []
    if influence is not None and influence_units is not None and influence.size:
        total = (influence**2).sum(axis=0)
        for k, name in enumerate(bound.parameters):
            share = influence[:, k] ** 2 / total[k] if total[k] > 0 else np.zeros(influence.shape[0])
            for i in np.argsort(-share)[:top]:
                infl_rows.append(
                    {"parameter": name, "unit": plain_label(influence_units[i]), "variance_share": float(share[i])}
                )
    anchor = None
    if bound.has_next_stage:
        anchor = check_anchor_probability(
            panel, P, anchor=choices[bound.anchor_index], kind=bound.model.kind  # type: ignore[arg-type]
        )
    return Diagnostics(
        ccp_by_state=_ccp_by_state(panel, P),
        overlap=overlap,
        ccp_quality=ccp_quality,
        calibration=calibration,
        continuation_quality=continuation_quality,
        influential_units=pd.DataFrame(infl_rows),
        anchor=anchor,
    )


def _ccp_by_state(panel: Any, P: np.ndarray, *, bins: int = 20) -> pd.DataFrame:
    """Fitted and observed choice shares by bin of the panel's first state (if numeric)."""
    state = panel.states[0]
    x = pd.to_numeric(panel.frame[state], errors="coerce").to_numpy(dtype=float)
    if not np.all(np.isfinite(x)):
        return pd.DataFrame()
    values = np.unique(x)
    if values.size <= bins:
        which = np.searchsorted(values, x)
    else:
        edges = np.unique(np.quantile(x, np.linspace(0, 1, bins + 1)))
        which = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, edges.size - 2)
    codes = panel.choice_codes
    out = []
    for b in np.unique(which):
        sel = which == b
        for j, choice in enumerate(panel.choices):
            out.append({"state": state, "value": float(x[sel].mean()), "choice": choice,
                        "fitted": float(P[sel, j].mean()),
                        "observed": float((codes[sel] == j).mean()), "rows": int(sel.sum())})
    return pd.DataFrame(out)


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows of ``frame`` as JSON-safe dicts: NumPy scalars to Python, non-finite to None."""
    out = []
    for row in frame.to_dict(orient="records"):
        rec: dict[str, Any] = {}
        for key, value in row.items():
            value = value.item() if isinstance(value, np.generic) else value
            if isinstance(value, float) and not np.isfinite(value):
                value = None
            elif not isinstance(value, (str, int, float, bool, type(None))):
                value = str(value)
            rec[str(key)] = value
        out.append(rec)
    return out
