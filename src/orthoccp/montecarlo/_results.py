"""Monte Carlo results: replication records, their summary, JSON, CSV, text and the plot."""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .._errors import InputError
from .._outputs import writing
from .._version import __version__
from ._settings import (
    ESTIMATOR_LABELS,
    ESTIMATORS,
    REPLICATION_COLUMNS,
    SUMMARY_COLUMNS,
    MonteCarloSettings,
)


def _replications_frame(records: Iterable[Mapping[str, Any]]) -> pd.DataFrame:
    frame = pd.DataFrame(list(records), columns=list(REPLICATION_COLUMNS))
    for col in ("estimate", "std_error", "ci_lower", "ci_upper", "ci_length", "truth", "seconds",
                "linearity_gap", "correction_shift", "effective_units", "unseen_variance"):
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    for col in ("rep", "sim_seed", "est_seed", "warnings"):
        frame[col] = frame[col].astype(np.int64)
    frame["covers"] = frame["covers"].astype("boolean")
    frame["failed"] = frame["failed"].astype(bool)
    frame["flagged"] = frame["flagged"].fillna(False).astype(bool)
    for col in ("estimator", "parameter", "moments", "error", "solution"):
        frame[col] = frame[col].fillna("").astype(str)
    rank = {e: i for i, e in enumerate(ESTIMATORS)}
    # Parameters keep the order in which they were recorded (the scenario's).
    frame = frame.sort_values(
        ["rep", "estimator"],
        key=lambda s: s.map(rank) if s.name == "estimator" else s,
        kind="stable",
    )
    return frame.reset_index(drop=True)


def _summarise(
    replications: pd.DataFrame,
    *,
    estimators: Sequence[str],
    parameters: Sequence[str],
    level: float,
) -> pd.DataFrame:
    rows = []
    nan = float("nan")
    for name in estimators:
        sub = replications[replications["estimator"] == name]
        for param in parameters:
            cell = sub[sub["parameter"] == param]
            ok = cell[~cell["failed"]]
            n = len(cell)
            k = len(ok)
            truth = float(cell["truth"].iloc[0]) if n else nan
            est = ok["estimate"].to_numpy(dtype=float)
            se = ok["std_error"].to_numpy(dtype=float)
            covers = ok["covers"].to_numpy(dtype=float)
            sd = float(np.std(est, ddof=1)) if k >= 2 else nan
            mean_se = float(se.mean()) if k else nan
            cov = float(covers.mean()) if k else nan
            used = sorted({m for m in ok["moments"] if m})
            fell_back = ok["solution"].str.contains("root|one_step", regex=True).to_numpy()
            flagged = ok["flagged"].to_numpy(dtype=bool)
            rows.append(
                {
                    "estimator": name,
                    "parameter": param,
                    "truth": truth,
                    "reps": n,
                    "n_ok": k,
                    "failures": n - k,
                    "mean_estimate": float(est.mean()) if k else nan,
                    "bias": float(est.mean() - truth) if k else nan,
                    "bias_mcse": sd / math.sqrt(k) if k >= 2 else nan,
                    "sd": sd,
                    "mean_se": mean_se,
                    "sd_over_se": sd / mean_se if k >= 2 and mean_se > 0 else nan,
                    "rmse": float(np.sqrt(np.mean((est - truth) ** 2))) if k else nan,
                    "coverage": cov,
                    "coverage_mcse": math.sqrt(cov * (1 - cov) / k) if k else nan,
                    "mean_ci_length": float(ok["ci_length"].mean()) if k else nan,
                    "median_seconds": float(cell["seconds"].median()) if n else nan,
                    "warned": int((cell["warnings"] > 0).sum()),
                    "moments": "+".join(used),
                    "level": float(level),
                    "fallbacks": int(fell_back.sum()),
                    "fallback_coverage": (float(covers[fell_back].mean()) if fell_back.any()
                                          else nan),
                    "flagged": int(flagged.sum()),
                    "unflagged_coverage": (float(covers[~flagged].mean()) if (~flagged).any()
                                           else nan),
                }
            )
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))


# --------------------------------------------------------------------------- JSON helpers
def _plain(value: Any) -> Any:
    """JSON values: numpy scalars unwrapped, NaN and infinities as ``None``."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if value is pd.NA or value is None:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    out = frame.astype(object).where(frame.notna(), None).to_dict(orient="records")
    return [_plain(r) for r in out]


# --------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class MonteCarloResults:
    """The replications of a Monte Carlo run and their summary.

    Attributes
    ----------
    settings : MonteCarloSettings
        What was simulated and estimated.
    truth : dict
        True parameter values of the scenario.
    replications : pandas.DataFrame
        One row per replication, estimator and parameter, columns
        :data:`REPLICATION_COLUMNS`. ``covers`` is a nullable boolean (missing for a failed
        estimate); ``seconds`` is the wall time of the estimator's call.
    jobs : int
        Worker processes used (the numbers do not depend on it).
    wall_seconds : float
        Wall time of the run (summed over the parts of a concatenated run).
    version : str
        orthoccp version that produced the numbers.
    """

    settings: MonteCarloSettings
    truth: dict[str, float]
    replications: pd.DataFrame = field(repr=False)
    jobs: int = 1
    wall_seconds: float = float("nan")
    version: str = __version__

    def __repr__(self) -> str:
        s = self.settings
        return (
            f"MonteCarloResults(scenario={s.scenario!r}, reps={self.reps}, units={s.units}, "
            f"periods={s.periods}, learner={s.learner!r}, estimators={s.estimators!r}, "
            f"failures={self.failures})"
        )

    @property
    def reps(self) -> int:
        """Number of replications."""
        return int(self.replications["rep"].nunique())

    @property
    def failures(self) -> dict[str, int]:
        """Failed replications per estimator."""
        rep = self.replications
        failed = rep[rep["failed"]].groupby("estimator")["rep"].nunique()
        return {e: int(failed.get(e, 0)) for e in self.settings.estimators}

    @cached_property
    def summary(self) -> pd.DataFrame:
        """One row per estimator and parameter, columns :data:`SUMMARY_COLUMNS`.

        Notes
        -----
        Over the ``n_ok`` replications in which the estimator succeeded, with estimates
        :math:`\\hat\\theta_r`, standard errors :math:`s_r` and truth :math:`\\theta`:
        ``bias`` :math:`= \\bar{\\hat\\theta} - \\theta` with Monte Carlo standard error
        ``bias_mcse`` :math:`= \\mathrm{sd}/\\sqrt{n}`; ``sd`` (``ddof=1``); ``mean_se``
        :math:`=\\bar s`; ``sd_over_se`` = sd / mean_se (about 1 when the standard errors
        are right); ``rmse``; ``coverage`` = share of intervals containing :math:`\\theta`
        with ``coverage_mcse`` :math:`= \\sqrt{c(1-c)/n}`; ``mean_ci_length``.
        ``median_seconds`` is over all attempts, failed ones included; ``failures`` counts
        replications whose estimate failed and ``warned`` those with an orthoccp warning;
        ``fallbacks`` counts estimates from a fallback solve (the root-finder or the one-step
        estimator, see :func:`orthoccp.solver.solve_orthogonal`) and ``fallback_coverage`` is
        their coverage alone (NaN when there are none); ``flagged`` counts estimates whose
        interval check (:mod:`orthoccp.interval_checks`) flagged the parameter and
        ``unflagged_coverage`` is the coverage of the others.
        """
        return _summarise(
            self.replications,
            estimators=self.settings.estimators,
            parameters=list(self.truth),
            level=self.settings.level,
        )

    # ----------------------------------------------------------------- views
    def to_dict(self, *, replications: bool = True) -> dict[str, Any]:
        """The results as plain JSON values (NaN written as ``None``).

        Parameters
        ----------
        replications : bool, default=True
            Include the per-replication records (needed by :meth:`from_dict`).

        Returns
        -------
        dict
            ``settings``, ``truth``, ``reps``, ``failures``, ``jobs``, ``wall_seconds``,
            ``version``, ``summary`` (records) and ``replications`` (records).
        """
        doc: dict[str, Any] = {
            "settings": self.settings.to_dict(),
            "truth": dict(self.truth),
            "reps": self.reps,
            "failures": self.failures,
            "jobs": int(self.jobs),
            "wall_seconds": self.wall_seconds,
            "version": self.version,
            "summary": _records(self.summary),
        }
        if replications:
            doc["replications"] = _records(self.replications)
        return _plain(doc)

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> MonteCarloResults:
        """Rebuild results from :meth:`to_dict` (with its replications).

        Parameters
        ----------
        doc : mapping
            As written by :meth:`to_dict` or :meth:`to_json`.

        Returns
        -------
        MonteCarloResults
        """
        if "replications" not in doc:
            raise InputError("the document has no 'replications'; write it with replications=True.")
        wall = doc.get("wall_seconds")
        return cls(
            settings=MonteCarloSettings.from_dict(doc["settings"]),
            truth={str(k): float(v) for k, v in doc["truth"].items()},
            replications=_replications_frame(doc["replications"]),
            jobs=int(doc.get("jobs", 1)),
            wall_seconds=float("nan") if wall is None else float(wall),
            version=str(doc.get("version", "")),
        )

    def to_json(self, path: str | os.PathLike[str], *, replications: bool = True) -> Path:
        """Write :meth:`to_dict` as JSON.

        Parameters
        ----------
        path : path-like
            Output file; its folder is created.
        replications : bool, default=True
            Include the per-replication records.

        Returns
        -------
        pathlib.Path
        """
        p = Path(path)
        text = json.dumps(self.to_dict(replications=replications), indent=1, allow_nan=False)
        with writing(p):
            p.parent.mkdir(parents=True, exist_ok=True)
            p.write_text(text + "\n", encoding="utf-8")
        return p

    @classmethod
    def read_json(cls, path: str | os.PathLike[str]) -> MonteCarloResults:
        """Read results written by :meth:`to_json`.

        Parameters
        ----------
        path : path-like

        Returns
        -------
        MonteCarloResults
        """
        return cls.from_dict(json.loads(Path(path).read_text(encoding="utf-8")))

    def to_csv(self, path: str | os.PathLike[str], *, which: str = "summary") -> Path:
        """Write the summary (one row per estimator and parameter) or the replications as CSV.

        Parameters
        ----------
        path : path-like
            Output file; its folder is created.
        which : {"summary", "replications"}, default="summary"

        Returns
        -------
        pathlib.Path
        """
        if which not in ("summary", "replications"):
            raise InputError(f"which must be 'summary' or 'replications', got {which!r}.")
        frame = self.summary if which == "summary" else self.replications
        p = Path(path)
        with writing(p):
            p.parent.mkdir(parents=True, exist_ok=True)
            frame.to_csv(p, index=False)
        return p

    def table(self) -> str:
        """A plain-text table of the summary for the terminal.

        Returns
        -------
        str
        """
        s = self.settings
        head = (
            f"{'estimator':<10}{'parameter':<12}{'truth':>8}{'bias':>9}{'sd':>8}{'mean se':>9}"
            f"{'sd/se':>7}{'rmse':>8}{'cover':>7}{'(mcse)':>8}{'ci len':>8}{'sec':>7}{'fail':>6}"
        )
        level = f"{100 * s.level:g}%"
        lines = [
            f"Monte Carlo: {s.scenario!r}, {self.reps} replications of {s.units} units x "
            f"{s.periods} periods; learner {s.learner}, {s.folds} folds, seed {s.seed}; "
            f"coverage of the {level} interval",
            head,
            "-" * len(head),
        ]
        for r in self.summary.itertuples(index=False):
            lines.append(
                f"{r.estimator:<10}{r.parameter:<12}{r.truth:>8.3f}{r.bias:>9.4f}{r.sd:>8.4f}"
                f"{r.mean_se:>9.4f}{r.sd_over_se:>7.2f}{r.rmse:>8.4f}{r.coverage:>7.3f}"
                f"{'(' + format(r.coverage_mcse, '.3f') + ')':>8}{r.mean_ci_length:>8.3f}"
                f"{r.median_seconds:>7.2f}{r.failures:>6d}"
            )
        lines.append("-" * len(head))
        moments = {r.estimator: r.moments for r in self.summary.itertuples(index=False)}
        lines.append("moments used: " + ", ".join(f"{e} {m or '-'}" for e, m in moments.items()))
        return "\n".join(lines)

    def plot(self, path: str | os.PathLike[str], *, dpi: int = 200) -> Path:
        """Coverage with Monte Carlo error bars, and mean interval length, as a PNG.

        Left panel: coverage per parameter and estimator with a 95 % Monte Carlo interval
        (Wilson score interval for a share of ``n_ok`` replications, which stays informative
        when the coverage is 0 or 1, unlike ±1.96 ``coverage_mcse``) and the nominal level
        dashed. Right panel: mean interval length (log scale when the lengths differ by more
        than a factor of 20).

        Parameters
        ----------
        path : path-like
            Output file (PNG); its folder is created.
        dpi : int, default=200

        Returns
        -------
        pathlib.Path

        Raises
        ------
        ImportError
            When matplotlib, a dependency, fails to import (a broken environment).
        """
        from ..figures import matplotlib_figure_class

        Figure = matplotlib_figure_class()
        s = self.settings
        summary = self.summary
        params = list(self.truth)
        est = [e for e in s.estimators]
        width = 0.8 / max(len(est), 1)
        colors = {
            "naive": "#d95f02",
            "debiased": "#1b9e77",
            "oracle": "#7570b3",
            "oracle_debiased": "#e7298a",
        }
        z = float(stats.norm.ppf(0.975))
        fig = Figure(figsize=(9.0, 4.2), layout="constrained")
        ax_cov, ax_len = fig.subplots(1, 2)
        x = np.arange(len(params), dtype=float)
        lows, lengths = [], []
        for i, name in enumerate(est):
            sub = summary[summary["estimator"] == name].set_index("parameter").loc[params]
            pos = x - 0.4 + width * (i + 0.5)
            cov = sub["coverage"].to_numpy(dtype=float)
            lo, hi = _wilson(cov, sub["n_ok"].to_numpy(dtype=float), z)
            label = ESTIMATOR_LABELS.get(name, name)
            color = colors.get(name)
            # Rounding can put a bound a hair inside the share when it is 0 or 1.
            yerr = np.clip(np.vstack([cov - lo, hi - cov]), 0.0, None)
            ax_cov.errorbar(pos, cov, yerr=yerr, fmt="o", color=color, capsize=3, label=label)
            lows.extend(lo[np.isfinite(lo)].tolist())
            length = sub["mean_ci_length"].to_numpy(dtype=float)
            ax_len.bar(pos, length, width=width * 0.9, color=color, label=label)
            lengths.extend(length[np.isfinite(length) & (length > 0)].tolist())
        ax_cov.axhline(
            s.level, color="black", linestyle="--", linewidth=1, label=f"nominal {100 * s.level:g}%"
        )
        low = min([s.level, *lows]) if lows else s.level
        ax_cov.set_ylim(max(0.0, low - 0.05), 1.01)
        ax_cov.set_ylabel(f"coverage of the {100 * s.level:g}% interval")
        ax_cov.set_title("coverage (bars: 95% Monte Carlo interval)", fontsize=10)
        ax_len.set_ylabel("mean interval length")
        ax_len.set_title("mean interval length", fontsize=10)
        if lengths and max(lengths) / min(lengths) > 20:
            ax_len.set_yscale("log")
        for ax in (ax_cov, ax_len):
            ax.set_xticks(x, params)
            ax.set_xlim(-0.6, len(params) - 0.4)
        handles, labels = ax_cov.get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=len(labels), fontsize=8)
        fails = ", ".join(f"{k} {v}" for k, v in self.failures.items() if v)
        fig.suptitle(
            f"{s.scenario}: {self.reps} replications, {s.units} units x {s.periods} periods, "
            f"learner {s.learner}, {s.folds} folds" + (f"; failures: {fails}" if fails else ""),
            fontsize=10,
        )
        p = Path(path)
        with writing(p):
            p.parent.mkdir(parents=True, exist_ok=True)
            fig.savefig(p, dpi=dpi, format="png")
        return p

    # ----------------------------------------------------------------- combining
    @classmethod
    def concat(cls, parts: Sequence[MonteCarloResults]) -> MonteCarloResults:
        """Join runs of the same settings over different replications (e.g. a resumed run).

        Parameters
        ----------
        parts : sequence of MonteCarloResults
            Same :class:`MonteCarloSettings`, disjoint replication indices.

        Returns
        -------
        MonteCarloResults
        """
        if not parts:
            raise InputError("concat needs at least one MonteCarloResults.")
        first = parts[0]
        for other in parts[1:]:
            if other.settings != first.settings:
                raise InputError(
                    f"cannot join runs with different settings: {first.settings} and "
                    f"{other.settings}."
                )
        frames = [p.replications for p in parts]
        seen: set[int] = set()
        for f in frames:
            reps = set(f["rep"].tolist())
            if reps & seen:
                raise InputError(f"replications {sorted(reps & seen)[:5]} appear in two parts.")
            seen |= reps
        joined = _replications_frame(pd.concat(frames, ignore_index=True).to_dict("records"))
        return cls(
            settings=first.settings,
            truth=dict(first.truth),
            replications=joined,
            jobs=max(p.jobs for p in parts),
            wall_seconds=float(sum(p.wall_seconds for p in parts)),
            version=first.version,
        )


def _wilson(share: np.ndarray, n: np.ndarray, z: float) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial share (NaN where ``n`` is 0)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        denom = 1 + z**2 / n
        centre = (share + z**2 / (2 * n)) / denom
        half = z * np.sqrt(share * (1 - share) / n + z**2 / (4 * n**2)) / denom
    return np.clip(centre - half, 0, 1), np.clip(centre + half, 0, 1)
