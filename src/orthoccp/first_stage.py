r"""The cross-fitted first stage as data, for a second stage of one's own.

:func:`first_stage` runs exactly the first stage of :func:`orthoccp.estimate` (the same
folds, learners, seeds and clipping, through the one cross-fitting engine of
:mod:`orthoccp.nuisance`) and stops: nothing is solved. The result holds the out-of-fold
conditional choice probabilities and continuation expectations per row, as arrays and as a
table on the user's own rows, and can be handed back to ``estimate(..., nuisances=...)``.

Per row :math:`t` of unit :math:`i` in fold :math:`k(i)` (METHOD §2–§5):

* ``ccp.<a>`` is :math:`\hat P^{(-k)}_a(x_t)`, the probability of choice :math:`a` from the
  classifier fitted on the other folds, clipped to :math:`[c, 1 - c]` (``clip``);
* ``mu.<a>.log_p_<R>`` is :math:`\hat\mu^{(-k)}_a(x_t) = \hat E[\ln P_R(x_{t+1}) \mid x_t,
  a_t = a]`, the regression of the next row's log anchor probability on the rows that chose
  :math:`a` (scheme ``"nested"``: its target comes from a CCP fitted outside both folds);
* ``mu.<a>.<param>`` is :math:`\hat E[z_{R,\mathrm{param}}(x_{t+1}) \mid x_t, a_t = a]` for
  every parameter whose anchor utility reads a data column (its next-period value is a
  continuation target, METHOD §2);
* ``fold`` is :math:`k(i)`, ``clipped`` says whether any probability of the row was clipped.

References
----------
Hotz & Miller (1993) Review of Economic Studies 60; Arcidiacono & Miller (2011) Econometrica
79; Chernozhukov et al. (2018) Econometrics Journal 21 (cross-fitting).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ._errors import InputError
from ._options import check_options
from .backends import resolve_backend
from .data import Panel
from .estimate import _check_scheme, _choose_moments, _cross_fitted
from .instruments import persistent_feature_columns
from .learners import resolve_learners
from .model import Model
from .nuisance import Nuisances

__all__ = ["FirstStage", "first_stage"]


@dataclass(frozen=True, eq=False)
class FirstStage:
    """Out-of-fold CCPs and continuation expectations of a panel, without a second stage.

    Attributes
    ----------
    panel : Panel
        The data the first stage was fitted on.
    model : Model
        The model whose anchor and utility columns define the continuation targets.
    nuisances : Nuisances
        The arrays: ``ccp`` (n_rows, J) in ``panel.choices`` order, ``mu`` (n_rows, J, d) with
        components named by :attr:`components`, ``folds`` (n_rows,). Rows are in the panel's
        order (``panel.frame``); pass it to ``estimate(panel, model, nuisances=...)``.
    components : tuple of str
        Names of the d continuation components: the parameters whose anchor utility column
        is a continuation target, then ``log_p_<anchor>``.
    learner : str
        The first stage's name.
    folds, seed : int
        Number of folds and the seed that drew them and seeded the learners.
    scheme : str
        ``"nested"`` or ``"plain"`` (how the ln P_R target is built).
    moments : str
        The moments these nuisances were fitted for (``"renewal_robust"`` fits the anchor's
        continuation regression on the persistent states only).
    """

    panel: Panel
    model: Model
    nuisances: Nuisances
    components: tuple[str, ...]
    learner: str
    folds: int
    seed: int
    scheme: str
    moments: str

    def to_frame(self) -> pd.DataFrame:
        """One row per input row, indexed by the input's own index labels.

        Columns: the unit and period, ``fold``, ``ccp.<choice>`` per choice,
        ``mu.<choice>.<component>`` per choice and component (NaN where the model needs no
        continuation value, e.g. after a terminal choice), ``clipped``. Rows dropped by
        ``Panel(missing="drop")`` are not in it.
        """
        panel, nu = self.panel, self.nuisances
        names = [str(c) for c in panel.choices]
        cols: dict[str, Any] = {
            panel.unit: panel.frame[panel.unit].to_numpy(),
            panel.period: panel.frame[panel.period].to_numpy(),
            "fold": nu.folds if nu.folds is not None else np.full(panel.n_rows, -1),
        }
        for j, name in enumerate(names):
            cols[f"ccp.{name}"] = nu.ccp[:, j]
        for j, name in enumerate(names):
            for c, comp in enumerate(self.components):
                cols[f"mu.{name}.{comp}"] = nu.mu[:, j, c]
        clipped = nu.clipped_rows if nu.clipped_rows is not None else np.zeros(panel.n_rows, bool)
        cols["clipped"] = np.asarray(clipped, dtype=bool)
        return pd.DataFrame(cols, index=panel.source_index.copy())


def first_stage(
    panel: Panel,
    model: Model,
    *,
    learner: Any = "lightgbm",
    regressor: Any = None,
    folds: int = 5,
    seed: int = 0,
    scheme: str = "nested",
    clip: float = 1e-4,
    moments: str | None = None,
    backend: Any = None,
    n_jobs: int | None = None,
) -> FirstStage:
    r"""Cross-fit the first stage of a CCP model by unit and return it, solving nothing.

    The same folds, learners, seeds and clipping as :func:`orthoccp.estimate` with the same
    options (its first split): ``estimate(panel, model, nuisances=fs.nuisances, ...)`` then
    solves on these values.

    Parameters
    ----------
    panel : Panel
        The data.
    model : Model
        Choices, anchor, discount factor and flow utilities; it defines which continuation
        expectations are needed.
    learner, regressor : str or estimator, optional
        As in :func:`orthoccp.estimate` (a registry name, or scikit-learn-style objects).
    folds : int, default=5
        Folds of units (all rows of a unit in one fold).
    seed : int, default=0
        Draws the fold split and seeds every learner.
    scheme : {"nested", "plain"}, default="nested"
        How the :math:`\ln P_R` target of the continuation regressions is built.
    clip : float, default=1e-4
        Probabilities are clipped to [clip, 1 - clip].
    moments : {"standard", "renewal_robust"}, optional
        The moments the nuisances are for; by default :func:`orthoccp.estimate`'s choice for a
        debiased estimate (renewal-robust for a renewal model with persistent states).
    backend, n_jobs : optional
        Where the fits run (:func:`orthoccp.estimate`); the numbers do not depend on it.

    Returns
    -------
    FirstStage
        Arrays (``.nuisances``) and a table on the input rows (``.to_frame()``).

    Notes
    -----
    Row :math:`t` of a unit in fold :math:`k` gets :math:`\hat P^{(-k)}(x_t)` and
    :math:`\hat\mu^{(-k)}_a(x_t) = \hat E[q(x_{t+1}) \mid x_t, a_t = a]`,
    :math:`q = (z_R\text{ data columns}, \ln P_R)`, from learners fitted on the other folds
    (METHOD §2, §5). Plugging them into a second stage gives the plug-in estimator; the
    debiased estimator also needs the corrections of METHOD §4, which ``estimate`` adds.

    References
    ----------
    Hotz & Miller (1993) Review of Economic Studies 60; Chernozhukov et al. (2018)
    Econometrics Journal 21.

    Examples
    --------
    >>> import orthoccp as oc
    >>> from orthoccp.simulate import simulate
    >>> sim = simulate("ebike", units=120, periods=5, seed=1)
    >>> panel = oc.Panel(sim.data, unit=sim.unit, period=sim.period, choice=sim.choice,
    ...                  states=list(sim.states))
    >>> model = oc.Model(anchor=sim.anchor, kind=sim.kind, discount=sim.discount,
    ...                  utility=sim.utility)
    >>> fs = oc.first_stage(panel, model, learner="logit", folds=3, moments="standard")
    >>> list(fs.to_frame().columns)[:5]
    ['unit', 'period', 'fold', 'ccp.keep', 'ccp.swap']
    """
    if not isinstance(panel, Panel):
        raise InputError(
            f"panel must be an orthoccp.Panel, got {type(panel).__name__}; wrap the DataFrame "
            f"with Panel(df, unit=..., period=..., choice=..., states=[...])."
        )
    if not isinstance(model, Model):
        raise InputError(f"model must be an orthoccp.Model, got {type(model).__name__}.")
    check_options(folds=folds, clip=clip, seed=seed)
    _check_scheme(scheme, folds)
    runner = resolve_backend(backend, n_jobs)
    bound = model.bind(panel)
    moments = _choose_moments(bound, moments, True)
    fcols = persistent_feature_columns(bound) if moments == "renewal_robust" else None
    pair = resolve_learners(learner, regressor)
    nuis = _cross_fitted(bound, pair, int(folds), int(seed), split=0, scheme=scheme, clip=float(clip),
                         anchor_features=fcols, backend=runner)
    params = bound.parameters
    components = tuple(params[i] for i in bound.zR_params) + (
        f"log_p_{panel.choices[bound.anchor_index]}",)
    return FirstStage(panel=panel, model=model, nuisances=nuis, components=components,
                      learner=pair.name, folds=int(folds), seed=int(seed), scheme=scheme,
                      moments=moments)
