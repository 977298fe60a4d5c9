"""One place for randomness and one for native threads.

Random streams
--------------
Every random draw of a scan comes from a *named stream* derived from the scan's seed:
``stream(seed, "leakage.permutations")`` is ``numpy.random.default_rng([seed, 4242])``. Each
analysis has streams of its own, so adding, removing or re-ordering analyses (or running them in
another process) never changes another analysis's numbers. Where a scikit-learn estimator wants an
integer ``random_state``, :func:`derived_seed` gives ``seed + offset + stride * index`` from a named
rule. The numbers in :data:`STREAMS` and :data:`SEED_RULES` are the ones the analyses always used,
so naming them changed no number in ``report.json``.

Threads
-------
Below :data:`SINGLE_THREAD_BELOW` rows, native thread pools (OpenMP, BLAS) run single-threaded:
OpenMP start-up and spin-waiting cost more than they save on small inputs on a 2-core machine
(measured: boosting on 1,000 rows x 20 features, 4 classes: 1.5 s with 2 threads, 0.16 s with 1), and
HistGradientBoosting's sums are not bit-identical across thread counts, so a scan's numbers do not
depend on how many processes it uses. The same threshold decides whether a scan may use a second
process (a larger table would be copied into it).
"""
from __future__ import annotations

from contextlib import contextmanager
from typing import Iterator, List, Optional

import numpy as np

#: Named random streams: name -> the stream key mixed with the scan's seed.
STREAMS = {
    "prepare.subsample": 9001,          # site-stratified modelling subsample
    "probe.small_sites": 77,            # probe: per-site AUCs of small sites
    "probe": 3000,                      # probe: + 0 boosting, 1 linear, 2 case mix, 10 + v outcome class v,
                                        # 100 + g group column g (the offset argument of stream)
    "maps": 5,                          # maps: subsample, then one sub-stream per mapped space
    "outcome": 7,                       # outcome: bootstrap; sub-streams 1 (drivers), 2-3 (equalized odds)
    "harmonise": 11,                    # harmonisation check: re-probe subsample; sub-streams (method index,
                                        # fold, part) for the fits and applications of each method
    "harmonise.outcome_ci": 78,         # harmonisation check: outcome AUC interval
    "harmonise.reprobe": 77,            # harmonisation check: re-probe interval and permutations (the same key
                                        # as probe.small_sites, as it always had: see KEYS_SHARED)
    "harmonise.fit": 1,                 # the harmonise command (not a scan): fitting the parameters
    "harmonise.apply": 2,               # the harmonise command: applying them
    "leakage.permutations": 4242,       # leak ranking: permutation repeats
    "leakage.cluster_rows": 4243,       # leak ranking: rows for the Spearman clusters
    "residual.bootstrap": 1717,         # repair loop: paired bootstrap of the probe before and after repair
    "drift.probe": 19,                  # drift: period probe subsample and halves, one sub-stream per site
}

#: Streams that share a key with another: the numbers were drawn so before the streams were named, and a
#: new key would change them. They belong to different analyses, whose results are not combined.
KEYS_SHARED = {"harmonise.reprobe": "probe.small_sites"}

#: Integer seeds for estimators: name -> (offset, stride); seed + offset + stride * index.
SEED_RULES = {
    "probe.fold_model": (0, 1000),       # the probe's model of fold f
    "leakage.fold_repeats": (0, 1),      # permutation repeats of fold f
    "probe.covariates_only": (1, 0),     # case-mix increment: covariates alone
    "probe.features_and_covariates": (2, 0),
    "probe.group": (100, 1),             # probe of group column g
    "outcome.pooled": (1, 0),            # outcome model: pooled and leave-one-site-out fits
    "outcome.site_ci": (2, 1),           # outcome AUC interval of held-out site i
    "outcome.site_only_ci": (0, 0),      # outcome: interval of the site-only ceiling (the seed itself)
    "maps.embedding": (0, 0),            # maps: PCA, t-SNE and UMAP (the seed itself)
}

#: Rows below which native thread pools are limited to one thread (and a scan may use a second process).
SINGLE_THREAD_BELOW = 200_000


def stream_key(seed: int, name: str, *sub: int, offset: int = 0) -> List[int]:
    """The entropy of the named stream: ``[seed, key + offset, *sub]``.

    For functions that take a seed sequence rather than a generator (the harmoniser's within-cell
    draws hash it with the row's values, see :func:`sitecheck.harmonise.methods.within_cell_uniforms`).
    Parameters as in :func:`stream`.

    Examples
    --------
    >>> from sitecheck._runtime import stream_key
    >>> stream_key(4, "harmonise", 2, 0)
    [4, 11, 2, 0]
    """
    try:
        key = STREAMS[name]
    except KeyError:
        raise ValueError(f"unknown random stream {name!r}; known: {', '.join(sorted(STREAMS))}") from None
    return [int(seed), key + int(offset), *[int(s) for s in sub]]


def stream(seed: int, name: str, *sub: int, offset: int = 0) -> np.random.Generator:
    """The generator of the named stream ``name`` (and optional sub-streams) for ``seed``.

    Parameters
    ----------
    seed : int
        The scan's seed.
    name : str
        A key of :data:`STREAMS`.
    *sub : int
        Sub-stream indices (for instance one per mapped space).
    offset : int, default 0
        Added to the stream's key (the probe numbers its parts this way).

    Returns
    -------
    numpy.random.Generator

    Examples
    --------
    >>> from sitecheck._runtime import stream
    >>> a = stream(0, "maps", 1).integers(1000, size=3)
    >>> b = stream(0, "maps", 1).integers(1000, size=3)
    >>> bool((a == b).all())
    True
    """
    return np.random.default_rng(stream_key(seed, name, *sub, offset=offset))


def generator(random_state) -> np.random.Generator:
    """The generator a library function draws from: ``random_state`` itself when it is a
    :class:`numpy.random.Generator`, else ``numpy.random.default_rng(random_state)`` for an integer
    seed or a sequence of them (a stream key, :func:`stream_key`).

    Raises
    ------
    ParameterError
        For ``None`` or a boolean: a library function's randomness is always seeded explicitly.

    Examples
    --------
    >>> from sitecheck._runtime import generator, stream
    >>> g = stream(0, "maps")
    >>> generator(g) is g, float(generator(3).random()) == float(generator([3]).random())
    (True, True)
    """
    if isinstance(random_state, np.random.Generator):
        return random_state
    if random_state is None or isinstance(random_state, (bool, np.bool_)):
        from sitecheck.errors import ParameterError

        raise ParameterError(f"random_state must be an integer seed, a sequence of them or a numpy Generator, "
                             f"got {random_state!r}")
    return np.random.default_rng(random_state)


def derived_seed(seed: int, name: str, index: int = 0) -> int:
    """An integer ``random_state`` for an estimator: ``seed + offset + stride * index`` of rule ``name``.

    Examples
    --------
    >>> from sitecheck._runtime import derived_seed
    >>> derived_seed(5, "probe.fold_model", 2)
    2005
    """
    try:
        offset, stride = SEED_RULES[name]
    except KeyError:
        raise ValueError(f"unknown seed rule {name!r}; known: {', '.join(sorted(SEED_RULES))}") from None
    return int(seed) + offset + stride * int(index)


def native_threads(n_rows: int) -> Optional[int]:
    """Thread limit for native pools on ``n_rows`` rows: 1 below :data:`SINGLE_THREAD_BELOW`, else None (all)."""
    return 1 if int(n_rows) < SINGLE_THREAD_BELOW else None


@contextmanager
def thread_limit(limit: Optional[int], user_api: Optional[str] = None) -> Iterator[None]:
    """Limit native thread pools (threadpoolctl) inside the block; ``None`` leaves them as they are."""
    if limit is None:
        yield
        return
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=int(limit), user_api=user_api):
        yield
