"""Named random streams (``orthoccp._random``): one seed, an independent generator per use."""

from __future__ import annotations

import numpy as np
import pytest

from orthoccp._random import STREAMS, stream


@pytest.mark.parametrize("name", STREAMS)
@pytest.mark.parametrize("split", [0, 2])
def test_a_stream_is_numpys_spawned_child(name: str, split: int) -> None:
    """Reference: NumPy's ``SeedSequence.spawn``. Stream ``name`` of split ``s`` is the
    ``s``-th child of the ``index(name)``-th child of ``SeedSequence(seed)``."""
    seed = 20261205
    child = np.random.SeedSequence(seed).spawn(len(STREAMS))[STREAMS.index(name)]
    grandchild = child.spawn(split + 1)[split]
    want = np.random.default_rng(grandchild).integers(0, 2**31 - 1, size=8)
    np.testing.assert_array_equal(stream(seed, name, split=split).integers(0, 2**31 - 1, size=8),
                                  want)


def test_streams_are_reproducible_and_distinct() -> None:
    draws = {(n, s): stream(5, n, split=s).random(4) for n in STREAMS for s in range(3)}
    again = {(n, s): stream(5, n, split=s).random(4) for n in STREAMS for s in range(3)}
    for key, value in draws.items():
        np.testing.assert_array_equal(value, again[key])
    flat = np.concatenate(list(draws.values()))
    assert np.unique(flat).size == flat.size  # no two streams (or splits) share a draw
    assert not np.array_equal(stream(5, "folds").random(4), stream(6, "folds").random(4))


@pytest.mark.parametrize(("name", "split", "message"), [
    ("learners", 0, r"unknown random stream 'learners'; the streams are 'folds'"),
    ("folds", -1, "split must be a non-negative integer, got -1"),
    ("folds", 1.5, "split must be a non-negative integer, got 1.5"),
    ("folds", True, "split must be a non-negative integer, got True"),
])
def test_bad_stream_requests_raise(name: str, split: object, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        stream(1, name, split=split)  # type: ignore[arg-type]
