"""Named random streams and the thread policy (sitecheck._runtime)."""
import doctest

import numpy as np
import pytest

from sitecheck import _runtime
from sitecheck._runtime import KEYS_SHARED, STREAMS, derived_seed, generator, native_threads, stream, stream_key
from sitecheck.errors import InputError, ParameterError


def test_every_stream_has_its_own_key():
    # apart from the declared pairs, which draw the very numbers they drew before the streams were named
    owners = {}
    for name, key in STREAMS.items():
        owners.setdefault(key, []).append(name)
    shared = {tuple(sorted(names)) for names in owners.values() if len(names) > 1}
    assert shared == {tuple(sorted(pair)) for pair in KEYS_SHARED.items()}
    for name, other in KEYS_SHARED.items():
        assert STREAMS[name] == STREAMS[other]


def test_stream_key_is_the_entropy_of_the_stream():
    # numpy: default_rng(seq) seeds a SeedSequence with seq, so the key and the generator agree
    key = stream_key(5, "harmonise", 3, 1, offset=2)
    assert key == [5, 13, 3, 1]
    assert np.array_equal(stream(5, "harmonise", 3, 1, offset=2).random(3), np.random.default_rng(key).random(3))
    with pytest.raises(ValueError, match="unknown random stream 'maps.x'"):
        stream_key(0, "maps.x")


def test_generator_takes_a_seed_a_key_or_a_generator_and_never_none():
    g = np.random.default_rng(1)
    assert generator(g) is g
    assert np.array_equal(generator(7).random(2), np.random.default_rng(7).random(2))
    assert np.array_equal(generator([7, 5]).random(2), stream(7, "maps").random(2))
    for bad in (None, True):
        with pytest.raises(ParameterError, match=f"random_state must be .* got {bad!r}") as info:
            generator(bad)
        assert not isinstance(info.value, InputError)


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
    assert result.attempted >= 8 and result.failed == 0
