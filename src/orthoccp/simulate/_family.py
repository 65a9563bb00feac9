"""A seeded family of random designs, each solved exactly.

:func:`family_design` turns a seed (or a design id such as ``"F07"``, which is seed 7) into a
:class:`~orthoccp.simulate._design.FamilyDesign`: a renewal or terminal model with 2--4
choices, a discretised main state, 5--50 time-invariant covariates of which a few move the main
state non-linearly (the rest are noise), utility regressors that interact the main state with a
persistent covariate, a covariate-dependent scrap value (terminal designs), and zero to two
exogenous covariates that follow small Markov chains independent of the choices. Its anchor
constant is calibrated to a target anchor share (see :mod:`orthoccp.simulate._design`), and
:meth:`FamilyDesign.simulate` draws a panel with the exact CCPs, values and continuation terms
at every row, like the built-in scenarios.
"""

from __future__ import annotations

import numbers
import re
from collections.abc import Mapping
from dataclasses import replace
from functools import lru_cache
from types import MappingProxyType
from typing import Any

import numpy as np

from .._errors import InputError
from ._design import (
    _FORMS,
    _RENEWAL_CHOICES,
    _TERMINAL_CHOICES,
    MAX_SOLVED_STATES,
    FamilyDesign,
    Term,
)

__all__ = ["family_design", "family_id", "is_family_id"]

_ID = re.compile(r"^F(\d+)$")


# --------------------------------------------------------------------------- ids
def family_id(seed: int) -> str:
    """The id of the family design drawn from ``seed``, e.g. ``family_id(7) == "F07"``.

    Parameters
    ----------
    seed : int
        Design seed (``>= 0``).

    Returns
    -------
    str
    """
    return f"F{int(seed):02d}"


def is_family_id(name: object) -> bool:
    """Whether ``name`` is a family design id (``"F"`` followed by digits).

    Parameters
    ----------
    name : object

    Returns
    -------
    bool
    """
    return isinstance(name, str) and _ID.match(name) is not None


def _design_seed(design: int | str) -> int:
    if isinstance(design, str):
        match = _ID.match(design)
        if match is None:
            raise InputError(
                f"design {design!r} is not a family design id; give 'F' followed by the design "
                f"seed, e.g. 'F07', or the seed as an integer."
            )
        return int(match.group(1))
    if isinstance(design, bool) or not isinstance(design, numbers.Integral) or design < 0:
        raise InputError(f"design seed must be an integer >= 0 or an id like 'F07'; got {design!r}")
    return int(design)


# --------------------------------------------------------------------------- the generator
def _draw(seed: int, *, kind: str | None, n_choices: int | None, n_states: int | None,
          n_covariates: int | None, n_exogenous: int | None, units: int | None,
          periods: int | None, discount: float | None) -> tuple[FamilyDesign, float]:
    """The random structure of design ``seed`` (before calibration) and its anchor target."""
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,)))
    # Every draw is made whether or not a target overrides it, so a target changes only its
    # own characteristic.
    draw_kind = "renewal" if rng.random() < 0.5 else "terminal"
    draw_J = int(rng.choice([2, 2, 3, 3, 4]))
    draw_p = int(np.round(np.exp(rng.uniform(np.log(5), np.log(50)))))
    draw_exo = int(rng.choice([0, 1, 1, 2]))
    draw_N = int(np.round(np.exp(rng.uniform(np.log(500), np.log(4000))) / 50) * 50)
    draw_T = int(rng.integers(6, 21))
    draw_beta = float(np.round(rng.uniform(0.90, 0.98), 3))
    draw_share = float(np.exp(rng.uniform(np.log(0.02), np.log(0.25))))
    draw_S = int(rng.integers(8, 21))
    exo_sizes = tuple(int(v) for v in rng.choice([2, 3], size=2))
    exo_stay = tuple(float(v) for v in rng.uniform(0.6, 0.9, size=2))
    exo_effect = float(rng.choice([-1, 1]) * rng.uniform(0.3, 0.8))
    kind = draw_kind if kind is None else kind
    J = draw_J if n_choices is None else n_choices
    p = draw_p if n_covariates is None else n_covariates
    n_exo = draw_exo if n_exogenous is None else n_exogenous
    exo_levels = exo_sizes[:n_exo]
    M = int(np.prod(exo_levels)) if exo_levels else 1
    S = draw_S if n_states is None else n_states
    if n_states is None:
        S = min(S, MAX_SOLVED_STATES // M)
    elif S * M > MAX_SOLVED_STATES:
        raise InputError(
            f"n_states={n_states} with {n_exo} exogenous covariates ({M} levels) gives {S * M} "
            f"solved states; at most {MAX_SOLVED_STATES} keep the exact solution fast. Use "
            f"n_states <= {MAX_SOLVED_STATES // M} or fewer exogenous covariates."
        )
    # Transition index: 3-5 non-linear terms on 3-5 relevant covariates; the rest is noise.
    n_rel = int(rng.integers(3, min(5, p) + 1))
    relevant = rng.choice(p, size=n_rel, replace=False)
    terms = []
    for i in range(int(rng.integers(3, 6))):
        form = str(rng.choice(_FORMS))
        a = int(relevant[i % n_rel])
        b = int(rng.choice(relevant[relevant != a]))
        coef = float(rng.choice([-1, 1]) * rng.uniform(0.5, 1.2))
        terms.append(Term(form=form, a=a, b=b, coef=coef, cut=float(rng.uniform(-0.5, 0.8))))
    interact = int(rng.integers(p))
    resale_from_exo = bool(rng.random() < 0.5) and n_exo > 0
    resale_source = "e0" if resale_from_exo else f"x{int(rng.integers(p))}"
    slope = float(-rng.uniform(0.6, 1.3))
    inter = float(rng.choice([-1, 1]) * rng.uniform(0.3, 0.7))
    market = float(rng.uniform(0.3, 0.8))
    costs = {"service": float(-rng.uniform(1.2, 2.5)), "repair": float(-rng.uniform(2.0, 4.0)),
             "invest": float(-rng.uniform(0.8, 2.0)), "shrink": float(rng.uniform(0.2, 0.8))}
    scrap = float(rng.uniform(0.5, 1.5))
    market_in = bool(rng.random() < 0.6) and n_exo > 0

    choices = (_RENEWAL_CHOICES if kind == "renewal" else _TERMINAL_CHOICES)[J]
    state = "wear" if kind == "renewal" else "demand"
    scaled, inter_col = f"{state}_scaled", f"{state}_x{interact}"
    utility: dict[str, dict[str, str]] = {}
    truth: dict[str, float] = {}
    if kind == "renewal":
        keep = {"wear_cost": scaled, "wear_cost_x": inter_col}
        truth.update(wear_cost=slope, wear_cost_x=inter * abs(slope))
        if market_in:
            keep["market"] = "e0"
            truth["market"] = market
        utility["keep"] = keep
        for label in choices[1:-1]:
            utility[label] = {f"{label}_cost": "1"}
            truth[f"{label}_cost"] = costs[label]
        utility["replace"] = {"replace_cost": "1"}
        truth["replace_cost"] = -5.0
    else:
        base = {"fixed_cost": "1", "profit": scaled, "profit_x": inter_col}
        truth.update(fixed_cost=-2.0, profit=-slope, profit_x=inter * abs(slope))
        if market_in:
            base["market"] = "e0"
            truth["market"] = market
        for label in choices[:-1]:
            spec = dict(base)
            if label != "stay":
                name = f"{label}_cost" if label == "invest" else f"{label}_gain"
                spec[name] = "1"
                truth[name] = costs[label]
            utility[label] = spec
        utility["exit"] = {"scrap": "resale"}
        truth["scrap"] = scrap
    design = FamilyDesign(
        id=family_id(seed),
        seed=seed,
        kind=kind,
        choices=choices,
        units=draw_N if units is None else units,
        periods=draw_T if periods is None else periods,
        n_levels=S,
        n_covariates=p,
        discount=draw_beta if discount is None else discount,
        terms=tuple(terms),
        exo_levels=exo_levels,
        exo_stay=exo_stay[:n_exo],
        exo_effect=exo_effect if n_exo else 0.0,
        interact=interact,
        resale_source=resale_source,
        truth=MappingProxyType(truth),
        utility=MappingProxyType({k: MappingProxyType(v) for k, v in utility.items()}),
    )
    return design, draw_share


def _option(name: str, value: Any, low: float, high: float, *, integer: bool) -> Any:
    if value is None:
        return None
    kind = numbers.Integral if integer else numbers.Real
    number = float(value) if isinstance(value, kind) and not isinstance(value, bool) else None
    if number is None or not low <= number <= high:
        what = "an integer" if integer else "a number"
        raise InputError(f"{name} must be {what} in [{low:g}, {high:g}]; got {value!r}")
    return int(number) if integer else number


def family_design(
    design: int | str,
    *,
    kind: str | None = None,
    n_choices: int | None = None,
    units: int | None = None,
    periods: int | None = None,
    n_states: int | None = None,
    n_covariates: int | None = None,
    n_exogenous: int | None = None,
    discount: float | None = None,
    anchor_share: float | None = None,
    anchor_after_renewal: float | None = None,
    choice_shares: Mapping[str, float] | None = None,
) -> FamilyDesign:
    """A design of the family, drawn from its seed and calibrated.

    Without targets the design is the family's draw for that seed: kind, number of choices,
    units (500--4,000), periods (6--20), main-state levels (8--20, at most 60 solved states
    with the exogenous levels), covariates (5--50, log-uniform), exogenous Markov covariates
    (0--2), discount (0.90--0.98) and a target anchor share (0.02--0.25, log-uniform), to which
    the anchor constant is calibrated. Targets replace single characteristics; the other
    draws stay the same, so a synthetic twin of a user's panel is
    ``family_design(seed, kind=..., units=..., periods=..., anchor_share=...)``.

    Parameters
    ----------
    design : int or str
        Design seed, or id ``"F<seed>"`` (``"F07"`` is seed 7).
    kind : {"renewal", "terminal"}, optional
    n_choices : int, optional
        2 to 4.
    units, periods : int, optional
        Default panel size of :meth:`FamilyDesign.simulate` (units >= 1, periods >= 1).
    n_states : int, optional
        Main-state levels, 4 to 60 (times the exogenous levels at most 60).
    n_covariates : int, optional
        5 to 50.
    n_exogenous : int, optional
        Exogenous Markov covariates, 0 to 2.
    discount : float, optional
        In [0, 0.99].
    anchor_share : float, optional
        Target expected share of anchor rows.
    anchor_after_renewal : float, optional
        Target mean anchor probability just after a renewal (renewal designs; replaces the
        share target).
    choice_shares : mapping, optional
        Target expected share of every choice (label -> share, summing to one); replaces the
        share target (:meth:`FamilyDesign.calibrate_shares`).

    Returns
    -------
    FamilyDesign
        With ``id`` ``"F07"`` for the plain draw and ``"F07*"`` when a target changed it.

    Raises
    ------
    orthoccp.InputError
        For a bad seed or id, or a target out of range (the message names it).

    Examples
    --------
    >>> d = family_design("F03")
    >>> d.id, d.kind in ("renewal", "terminal"), 2 <= len(d.choices) <= 4
    ('F03', True, True)
    """
    seed = _design_seed(design)
    targets = {
        "kind": kind, "n_choices": n_choices, "units": units, "periods": periods,
        "n_states": n_states, "n_covariates": n_covariates, "n_exogenous": n_exogenous,
        "discount": discount, "anchor_share": anchor_share,
        "anchor_after_renewal": anchor_after_renewal, "choice_shares": choice_shares,
    }
    if kind is not None and kind not in ("renewal", "terminal"):
        raise InputError(f"kind must be 'renewal' or 'terminal'; got {kind!r}")
    checked = dict(
        n_choices=_option("n_choices", n_choices, 2, 4, integer=True),
        units=_option("units", units, 1, 10**8, integer=True),
        periods=_option("periods", periods, 1, 10**4, integer=True),
        n_states=_option("n_states", n_states, 4, MAX_SOLVED_STATES, integer=True),
        n_covariates=_option("n_covariates", n_covariates, 5, 50, integer=True),
        n_exogenous=_option("n_exogenous", n_exogenous, 0, 2, integer=True),
        discount=_option("discount", discount, 0.0, 0.99, integer=False),
    )
    given = [n for n, v in (("anchor_share", anchor_share),
                            ("anchor_after_renewal", anchor_after_renewal),
                            ("choice_shares", choice_shares)) if v is not None]
    if len(given) > 1:
        raise InputError(f"give one share target, not {' and '.join(given)}.")
    if choice_shares is not None and not isinstance(choice_shares, Mapping):
        raise InputError(
            f"choice_shares must map each choice label to a share; got {choice_shares!r}."
        )
    frozen_shares = None if choice_shares is None else tuple(sorted(
        (str(k), v) for k, v in dict(choice_shares).items()
    ))
    tuned = any(v is not None for v in targets.values())
    return _cached_design(seed, kind, tuple(sorted(checked.items())), anchor_share,
                          anchor_after_renewal, frozen_shares, tuned)


@lru_cache(maxsize=64)
def _cached_design(seed: int, kind: str | None, checked: tuple[tuple[str, Any], ...],
                   anchor_share: float | None, anchor_after_renewal: float | None,
                   choice_shares: tuple[tuple[str, Any], ...] | None,
                   tuned: bool) -> FamilyDesign:
    base, drawn_share = _draw(seed, kind=kind, **dict(checked))
    if tuned:
        base = replace(base, id=base.id + "*")
    if anchor_after_renewal is not None:
        return base.calibrate(target="anchor_after_renewal", value=anchor_after_renewal)
    if choice_shares is not None:
        return base.calibrate_shares(dict(choice_shares))
    return base.calibrate(
        target="anchor_share", value=drawn_share if anchor_share is None else anchor_share
    )
