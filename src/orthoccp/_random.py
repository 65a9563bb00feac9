"""Named random streams: one ``seed``, an independent generator per use.

Every random draw of an estimator comes from one of the streams below, built from the user's
``seed`` with :class:`numpy.random.SeedSequence` and a spawn key ``(stream, split)``. The
streams are statistically independent (NumPy's ``SeedSequence`` guarantees distinct keys give
independent entropy), and a stream's draws depend on the seed, its name and the split only,
not on how many draws another stream made before it. So adding a learner, a projection or a
model-implied step changes no other draw, and a helper that needs "the folds ``estimate``
draws" asks for that stream instead of replaying the estimator's order of draws.

=============== ================================================================
stream          what it draws
=============== ================================================================
``folds``       the unit-to-fold assignment (:func:`orthoccp.folds.unit_folds`)
``first_stage`` the ``random_state`` of every first-stage learner (CCPs, continuation
                regressions, user nuisances)
``projections`` the renewal-robust moment's projection learners
``ccp_steps``   the refits of the model-implied CCP steps
``riesz``       the learner-based Riesz representers of user moments
``refit``       the second set of learner seeds of :func:`orthoccp.fold_stability`
=============== ================================================================

Reference: NumPy, "Parallel random number generation" (``SeedSequence.spawn``), which the
spawn keys here reproduce without holding a parent sequence.
"""

from __future__ import annotations

from typing import Final

import numpy as np

__all__ = ["STREAMS", "stream"]

#: The stream names, in the order of their spawn-key index (append only: the index is part
#: of every stream's key, so reordering would change every draw).
STREAMS: Final[tuple[str, ...]] = (
    "folds", "first_stage", "projections", "ccp_steps", "riesz", "refit", "types",
    "bootstrap",
)
_INDEX: Final[dict[str, int]] = {name: i for i, name in enumerate(STREAMS)}


def stream(seed: int, name: str, *, split: int = 0) -> np.random.Generator:
    """The generator of stream ``name`` for ``split`` under ``seed``.

    Parameters
    ----------
    seed : int
        The estimator's ``seed`` (a non-negative integer).
    name : str
        One of :data:`STREAMS`.
    split : int, default=0
        The sample split (``splits > 1`` draws fresh folds and learners per split).

    Returns
    -------
    numpy.random.Generator
        ``default_rng(SeedSequence(seed, spawn_key=(index(name), split)))``.

    Examples
    --------
    >>> a = stream(7, "folds").integers(0, 100, size=3)
    >>> b = stream(7, "folds").integers(0, 100, size=3)
    >>> bool((a == b).all())
    True
    """
    try:
        index = _INDEX[name]
    except KeyError:
        raise ValueError(
            f"unknown random stream {name!r}; the streams are {', '.join(map(repr, STREAMS))}."
        ) from None
    if isinstance(split, bool) or int(split) != split or split < 0:
        raise ValueError(f"split must be a non-negative integer, got {split!r}.")
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(index, int(split))))
