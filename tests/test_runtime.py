"""Named random streams and the thread policy (sitecheck._runtime)."""
import doctest

import numpy as np
import pytest

from sitecheck import _runtime
from sitecheck._runtime import STREAMS, derived_seed, native_threads, stream


def test_every_stream_has_its_own_key():
    keys = list(STREAMS.values())
    assert len(keys) == len(set(keys))


def test_streams_are_reproducible_and_distinct():
    a = stream(3, "maps", 1).random(5)
    assert np.array_equal(a, stream(3, "maps", 1).random(5))
    assert not np.array_equal(a, stream(3, "maps", 2).random(5))
    assert not np.array_equal(a, stream(4, "maps", 1).random(5))
    # the stream is numpy's SeedSequence of [seed, key, *sub], as the analyses always drew it
    assert np.array_equal(stream(3, "leakage.permutations").random(4),
                          np.random.default_rng([3, 4242]).random(4))


def test_unknown_names_are_programming_errors():
    with pytest.raises(ValueError, match="unknown random stream 'nope'"):
        stream(0, "nope")
    with pytest.raises(ValueError, match="unknown seed rule"):
        derived_seed(0, "nope")


def test_thread_policy_has_one_threshold():
    assert native_threads(_runtime.SINGLE_THREAD_BELOW - 1) == 1
    assert native_threads(_runtime.SINGLE_THREAD_BELOW) is None


def test_doctests_run():
    result = doctest.testmod(_runtime)
    assert result.attempted >= 4 and result.failed == 0
