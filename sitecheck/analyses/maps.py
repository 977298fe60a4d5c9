"""Maps and mixing: 2-D embeddings of the rows and a number for how well sites mix.

:func:`compute_maps` draws a site-stratified subsample, preprocesses the
features (median imputation with missing-value indicators and robust scaling
for numeric columns, one-hot encoding for categorical ones), embeds them with
PCA, t-SNE (FFT-accelerated, :func:`tsne_map`) and UMAP (compiled kernels cached between
runs, :func:`kernel_cache_dir`), and scores how well the sites mix in the feature space
and in each embedding with the local inverse Simpson's index (LISI) and the
silhouette by site.

:func:`lisi` is the published per-row score, implemented from its definition;
:func:`summarise_lisi` turns per-row scores into an overall and per-site
summary with bootstrap intervals, normalised by the value expected under
random mixing given the site proportions.

No plotting here: the coordinates are kept on the result (not serialised) for
:mod:`sitecheck.render.figures`.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from typing import Any, Dict, Optional, Sequence, Tuple

import numpy as np
from sklearn.decomposition import PCA
from sklearn.metrics import silhouette_samples
from sklearn.neighbors import NearestNeighbors

from sitecheck._runtime import derived_seed, generator, stream
from sitecheck.errors import InputError, ParameterError
from sitecheck.table.prepare import Prepared, stratified_subsample

METHODS: Tuple[str, ...] = ("pca", "tsne", "umap")

#: Spaces whose mixing is scored, in report order: the preprocessed design, then each map.
_SPACES: Tuple[str, ...] = ("features",) + METHODS

PREPROCESSING = ("numeric columns: median imputation with a missing-value indicator for every column that has "
                 "missing values, then robust scaling (median removed, divided by the interquartile range); "
                 "categorical columns: one-hot encoding with missing as its own level and levels seen fewer than "
                 "5 times pooled; the same design feeds the feature-space scores, PCA, t-SNE and UMAP")


# --------------------------------------------------------------------------- LISI

def _calibrate(D: np.ndarray, perplexity: float, *, tol: float = 1e-5, max_iter: int = 50) -> np.ndarray:
    """Gaussian kernel weights over each row's neighbours, with the precision
    ``beta`` of each row found by bisection so that ``exp(entropy) = perplexity``.

    ``D`` holds squared distances (rows x neighbours). The search follows the
    t-SNE calibration: start at beta = 1, double (or halve) until the target
    is bracketed, then bisect, stopping when |H - log(perplexity)| < tol.
    """
    n = D.shape[0]
    D = D - D.min(axis=1, keepdims=True)  # a constant shift per row leaves the weights unchanged
    target = np.log(perplexity)
    beta = np.ones(n)
    lo = np.full(n, -np.inf)
    hi = np.full(n, np.inf)
    active = np.ones(n, dtype=bool)
    P = np.exp(-D * beta[:, None])
    for _ in range(max_iter):
        Pa = np.exp(-D[active] * beta[active, None])
        s = Pa.sum(axis=1)
        H = np.log(s) + beta[active] * (D[active] * Pa).sum(axis=1) / s
        P[active] = Pa
        diff = H - target
        done = np.abs(diff) < tol
        idx = np.flatnonzero(active)
        up = (diff > 0) & ~done  # entropy too high: narrow the kernel
        down = (diff <= 0) & ~done
        iu, idn = idx[up], idx[down]
        lo[iu] = beta[iu]
        beta[iu] = np.where(np.isinf(hi[iu]), beta[iu] * 2.0, (beta[iu] + hi[iu]) / 2.0)
        hi[idn] = beta[idn]
        beta[idn] = np.where(np.isinf(lo[idn]), beta[idn] / 2.0, (beta[idn] + lo[idn]) / 2.0)
        active[idx[done]] = False
        if not active.any():
            break
    return P / P.sum(axis=1, keepdims=True)


def kernel_weights(X, *, perplexity: float = 30.0, n_neighbors: Optional[int] = None
                   ) -> Tuple[np.ndarray, np.ndarray]:
    """Neighbour indices and perplexity-calibrated Gaussian weights of every row
    (the kernel of :func:`lisi`); each row of the weights sums to 1."""
    X = np.asarray(X, dtype=float)
    n = X.shape[0]
    k = int(n_neighbors) if n_neighbors is not None else int(round(3 * perplexity))
    k = max(1, min(k, n - 1))
    nn = NearestNeighbors(n_neighbors=k).fit(X)
    dist, idx = nn.kneighbors()  # without X: each row is not its own neighbour
    return idx, _calibrate(dist ** 2, float(perplexity))


def lisi(X, labels, *, perplexity: float = 30.0, n_neighbors: Optional[int] = None) -> np.ndarray:
    """Local inverse Simpson's index of ``labels`` around every row of ``X``.

    For row i, the k nearest other rows (Euclidean) receive Gaussian kernel
    weights ``p_ij ~ exp(-beta_i * d_ij**2)``, with ``beta_i`` chosen so that
    the perplexity of the weights equals ``perplexity``. With
    ``w_ib = sum_{j: label_j = b} p_ij`` the weight of label b, the score is
    ``1 / sum_b w_ib**2``: the effective number of labels in the neighbourhood,
    from 1 (all neighbours share one label) to the number of labels.

    Parameters
    ----------
    X : array-like of shape (n, d)
    labels : array-like of shape (n,)
        Integer codes (or any hashable labels).
    perplexity : float, default 30
        Effective neighbourhood size of the kernel.
    n_neighbors : int or None
        Neighbours searched; default ``3 * perplexity`` (as in the reference
        description), capped at ``n - 1``.

    Returns
    -------
    ndarray of shape (n,)

    References
    ----------
    Korsunsky, I., Millard, N., Fan, J. et al. (2019). Fast, sensitive and
    accurate integration of single-cell data with Harmony. Nature Methods 16,
    1289-1296 (Methods: local inverse Simpson's index).
    Simpson, E. H. (1949). Measurement of diversity. Nature 163, 688.
    """
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ParameterError(f"X must be a 2-D matrix, got shape {X.shape}")
    n = X.shape[0]
    _, codes = np.unique(np.asarray(labels), return_inverse=True)
    codes = codes.ravel()
    if len(codes) != n:
        raise ParameterError(f"labels must have one entry per row of X: {len(codes)} labels for {n} rows")
    if n < 3:
        raise ParameterError(f"X must have at least 3 rows, got {n}")
    if not perplexity > 1:
        raise ParameterError(f"perplexity must be greater than 1, got {perplexity!r}")
    idx, P = kernel_weights(X, perplexity=perplexity, n_neighbors=n_neighbors)
    L = int(codes.max()) + 1
    flat = (np.arange(n)[:, None] * L + codes[idx]).ravel()
    W = np.bincount(flat, weights=P.ravel(), minlength=n * L).reshape(n, L)
    return 1.0 / (W ** 2).sum(axis=1)


def expected_random(proportions) -> float:
    """Inverse Simpson's index of the site proportions, ``1 / sum p_i**2``: the
    LISI expected when every neighbourhood mirrors the whole table (random mixing)."""
    p = np.asarray(proportions, dtype=float)
    p = p / p.sum()
    return float(1.0 / np.sum(p ** 2))


def _boot_means(values: np.ndarray, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    n = len(values)
    out = np.empty(n_boot)
    for b0 in range(0, n_boot, 64):
        b1 = min(n_boot, b0 + 64)
        idx = rng.integers(0, n, size=(b1 - b0, n))
        out[b0:b1] = values[idx].mean(axis=1)
    return out


def _r(v, d=6):
    return None if v is None or not np.isfinite(v) else round(float(v), d)


@dataclass(frozen=True)
class MixingSummary:
    """LISI of one space: overall and by site.

    ``normalised`` is the mean LISI divided by its value under random mixing
    (1 = as mixed as random labels, ``1 / expected`` = fully separated).
    Intervals are percentile bootstrap intervals over rows (the per-row scores
    held fixed; neighbouring rows are not independent, so they are optimistic).
    """

    n: int
    mean: float
    ci: Tuple[float, float]
    median: float
    expected_random: float
    normalised: float
    normalised_ci: Tuple[float, float]
    per_site: Dict[str, Dict[str, Any]]

    def to_dict(self) -> Dict[str, Any]:
        return {
            "overall": {"n": self.n, "lisi_mean": _r(self.mean), "lisi_ci": [_r(c) for c in self.ci],
                        "lisi_median": _r(self.median), "expected_random": _r(self.expected_random),
                        "normalised": _r(self.normalised), "normalised_ci": [_r(c) for c in self.normalised_ci]},
            "per_site": self.per_site,
        }


def summarise_lisi(values, site, site_labels: Sequence[str], *, n_boot: int = 200, alpha: float = 0.05,
                   random_state=0) -> MixingSummary:
    """Overall and per-site summary of per-row LISI values.

    Parameters
    ----------
    values : array-like of shape (n,)
        Per-row LISI (from :func:`lisi`).
    site : array-like of int, shape (n,)
        Site codes indexing ``site_labels``.
    site_labels : sequence of str
    n_boot : int, default 200
        Bootstrap resamples of rows for the intervals.
    alpha : float, default 0.05
    random_state : int or Generator

    Returns
    -------
    MixingSummary
    """
    values = np.asarray(values, dtype=float)
    site = np.asarray(site, dtype=np.int64)
    rng = generator(random_state)
    counts = np.bincount(site, minlength=len(site_labels))
    exp = expected_random(counts[counts > 0])
    q = [100 * alpha / 2, 100 * (1 - alpha / 2)]
    boots = _boot_means(values, n_boot, rng)
    lo, hi = np.percentile(boots, q)
    per_site: Dict[str, Dict[str, Any]] = {}
    for s, label in enumerate(site_labels):
        v = values[site == s]
        if len(v) == 0:
            continue
        b = _boot_means(v, n_boot, rng)
        slo, shi = np.percentile(b, q)
        per_site[str(label)] = {"n": int(len(v)), "lisi_mean": _r(v.mean()), "lisi_ci": [_r(slo), _r(shi)],
                                "normalised": _r(v.mean() / exp)}
    m = float(values.mean())
    return MixingSummary(n=int(len(values)), mean=m, ci=(float(lo), float(hi)), median=float(np.median(values)),
                         expected_random=exp, normalised=m / exp, normalised_ci=(lo / exp, hi / exp),
                         per_site=per_site)


def silhouette_by_site(X, site, site_labels: Sequence[str], *, max_rows: int = 3000, n_boot: int = 200,
                       alpha: float = 0.05, random_state=0) -> Dict[str, Any]:
    """Mean silhouette width of the site labels (scikit-learn ``silhouette_samples``)
    on a site-stratified subsample of at most ``max_rows`` rows, with a bootstrap
    interval over rows and the mean by site. Near 0 or below: sites overlap;
    near 1: sites form separate, compact clusters."""
    site = np.asarray(site, dtype=np.int64)
    rng = generator(random_state)
    if len(np.unique(site)) < 2:
        return {"value": None, "ci": [None, None], "n": int(len(site)), "per_site": {}}
    idx = stratified_subsample(site, int(max_rows), rng)
    s = silhouette_samples(np.asarray(X, dtype=float)[idx], site[idx])
    b = _boot_means(s, n_boot, rng)
    lo, hi = np.percentile(b, [100 * alpha / 2, 100 * (1 - alpha / 2)])
    sub = site[idx]
    per = {str(site_labels[k]): {"n": int((sub == k).sum()), "value": _r(s[sub == k].mean())}
           for k in range(len(site_labels)) if (sub == k).any()}
    return {"value": _r(s.mean()), "ci": [_r(lo), _r(hi)], "n": int(len(idx)), "per_site": per}


# --------------------------------------------------------------------------- embeddings

def preprocess(X, categorical) -> np.ndarray:
    """The map design: see :data:`PREPROCESSING` (uses
    :func:`sitecheck.analyses.models.linear_preprocessor` with robust scaling)."""
    from sitecheck.analyses.models import linear_preprocessor

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        Z = linear_preprocessor(categorical, robust=True).fit_transform(np.asarray(X, dtype=float))
    return np.ascontiguousarray(Z, dtype=np.float64)


#: Modules of umap-learn whose numba kernels :func:`kernel_cache_dir` caches (most are declared
#: without ``cache=True`` and would otherwise be compiled again in every process, about 6 CPU seconds).
_UMAP_KERNEL_MODULES = ("umap.umap_", "umap.layouts", "umap.utils", "umap.spectral", "umap.distances",
                        "umap.sparse")


def kernel_cache_dir() -> Optional[str]:
    """The directory in which UMAP's compiled kernels are kept between runs, or None when it cannot be
    created (caching is then skipped).

    ``$NUMBA_CACHE_DIR`` when the user set it; otherwise
    ``$XDG_CACHE_HOME/sitecheck/numba/<versions>`` (``~/.cache`` without ``XDG_CACHE_HOME``), one
    folder per combination of Python, numba, umap-learn and pynndescent versions, so that an upgrade
    never loads kernels compiled against another version. The cache holds machine code only, no data.
    """
    import importlib.metadata as md
    import os
    import platform

    user = os.environ.get("NUMBA_CACHE_DIR")
    if user:
        return user
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    parts = [f"py{platform.python_version()}"]
    for pkg in ("numba", "umap-learn", "pynndescent"):
        try:
            parts.append(f"{pkg}{md.version(pkg)}")
        except md.PackageNotFoundError:  # pragma: no cover
            parts.append(f"{pkg}-none")
    path = os.path.join(base, "sitecheck", "numba", "-".join(parts))
    try:
        os.makedirs(path, exist_ok=True)
    except OSError:
        return None
    return path if os.access(path, os.W_OK) else None


def _umap_with_cached_kernels():
    """Import umap-learn with its numba kernels cached on disk (:func:`kernel_cache_dir`).

    umap-learn declares most kernels without ``cache=True``, so every process compiled them again
    (about 6 of the 9 CPU seconds of a 6,000-row map, measured). Setting ``NUMBA_CACHE_DIR`` alone caches
    only the kernels declared with ``cache=True`` (pynndescent's and one of umap's): measured, the second
    process still spent the same time on UMAP. Here each umap dispatcher not yet cached gets numba's
    on-disk cache (``Dispatcher.enable_caching``, what ``cache=True`` does at decoration), located
    in :func:`kernel_cache_dir`; numba's global configuration is left as it was. Compiled code loaded
    from the cache is the code compiled before: the coordinates are the same bit for bit
    (``tests/test_maps.py``). Anything unexpected in numba's internals leaves the kernels uncached.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import importlib

        import umap

        try:
            from numba.core import config
            from numba.core.caching import NullCache
            from numba.core.dispatcher import Dispatcher

            path = kernel_cache_dir()
            if path is None:
                return umap
            saved = config.CACHE_DIR
            config.CACHE_DIR = path  # read once, when each cache is created below
            try:
                for name in _UMAP_KERNEL_MODULES:
                    module = importlib.import_module(name)
                    for obj in vars(module).values():
                        if isinstance(obj, Dispatcher) and isinstance(getattr(obj, "_cache", None), NullCache):
                            obj.enable_caching()
            finally:
                config.CACHE_DIR = saved
        except Exception:  # pragma: no cover - numba internals moved: run uncached
            pass
    return umap


#: The t-SNE optimisation schedule (iterations, exaggeration, momentum); see :func:`tsne_map`.
TSNE_EARLY_EXAGGERATION = 12.0
TSNE_EARLY_ITER = 250
TSNE_MOMENTUM = 0.8
#: Floor of the learning rate ``rows / exaggeration`` (the classic default 200; scikit-learn's ``"auto"``
#: has the same floor, written 50 on its gradient scale, which is a quarter of the usual one).
TSNE_MIN_LEARNING_RATE = 200.0


def tsne_map(Z, *, perplexity: float = 30.0, max_iter: int = 350, random_state: int = 0,
             threads: Optional[int] = 1, gradient: str = "fft", min_intervals: int = 10,
             theta: float = 0.5) -> Tuple[np.ndarray, Dict[str, Any]]:
    """2-D t-SNE map of the rows of ``Z`` with FFT-accelerated interpolation of the repulsive forces.

    Affinities: exact Euclidean neighbours from scikit-learn (``k = min(n - 1, 3 * perplexity)``),
    Gaussian kernels calibrated to the perplexity and symmetrised (openTSNE
    ``PerplexityBasedNN``). Start: the first two principal components scaled to a standard deviation of
    1e-4 (openTSNE's ``pca`` initialisation, seeded). Schedule: ``TSNE_EARLY_ITER`` (250) iterations
    with early exaggeration 12, then ``max_iter - 250`` iterations without exaggeration, momentum 0.8
    throughout, learning rate ``max(n / exaggeration, 200)`` in each phase (Belkina et al. 2019; without
    the floor, a few hundred rows barely move during early exaggeration). The repulsive
    forces are interpolated on a grid and convolved by FFT (Linderman et al. 2019): 3 interpolation
    points per interval, one interval per unit of the map and at least ``min_intervals`` intervals.

    Parameters
    ----------
    Z : ndarray of shape (n, d)
    perplexity : float, default 30
        Capped at ``(n - 1) / 3`` (at least 2).
    max_iter : int, default 350
        Iterations in all (at least 250). Measured on 2 busy cores, 350 iterations: 4.3 CPU seconds at
        6,000 rows against 14.5 for Barnes-Hut (openTSNE, theta 0.5) and 17.8 for scikit-learn's
        (angle 0.7, the map this one replaced), with a map at least as trustworthy
        (``tests/benchmarks/bench_maps.py``).
    random_state : int
        Seeds the PCA start and its jitter; the optimisation itself draws no random numbers.
    threads : int or None, default 1
        Threads of openTSNE's own loops (None: 1). One thread keeps repeated runs bit-identical.
    gradient : {"fft", "bh"}, default "fft"
        Repulsive forces by FFT-accelerated interpolation, or by Barnes-Hut (``theta``).
    min_intervals : int, default 10
        Fewest interpolation intervals per axis. openTSNE's default, 50, sets a fixed cost of about
        5 CPU seconds per 350 iterations however few the rows (measured: 5.2 s at 600 rows, when
        Barnes-Hut takes 0.9 s); with 10 it is 1.4 s, and 4.3 s instead of 7.6 s at 6,000 rows, with
        the same LISI and trustworthiness (``bench_maps.py``). The intervals are never wider than one
        unit of the map, the library's default resolution, which is what a spread-out map uses anyway
        (its span grows past 10 units within the first iterations after early exaggeration).
    theta : float, default 0.5
        Barnes-Hut opening angle (``gradient="bh"`` only).

    Returns
    -------
    coords : ndarray of shape (n, 2)
    settings : dict
        The settings as reported in ``report.json`` (``embedding.method_settings.tsne``).

    References
    ----------
    van der Maaten, L. & Hinton, G. (2008). Visualizing data using t-SNE. JMLR 9, 2579-2605.
    Linderman, G. C., Rachh, M., Hoskins, J. G., Steinerberger, S. & Kluger, Y. (2019). Fast
    interpolation-based t-SNE for improved visualization of single-cell RNA-seq data. Nature Methods
    16, 243-245.
    Policar, P. G., Strazar, M. & Zupan, B. (2024). openTSNE: a modular Python library for t-SNE
    dimensionality reduction and embedding. Journal of Statistical Software 109(3).
    Belkina, A. C. et al. (2019). Automated optimized parameters for t-distributed stochastic neighbor
    embedding improve visualization and analysis of large datasets. Nature Communications 10, 5415.
    """
    import openTSNE
    from openTSNE import initialization
    from openTSNE.affinity import PerplexityBasedNN
    from openTSNE.nearest_neighbors import PrecomputedNeighbors

    Z = np.asarray(Z, dtype=np.float64)
    n, d = Z.shape
    if n < 5:
        raise InputError(f"maps need at least 5 rows, got {n}")
    max_iter = int(max_iter)
    if gradient not in ("fft", "bh"):
        raise ParameterError(f"gradient must be 'fft' or 'bh', got {gradient!r}")
    if max_iter < TSNE_EARLY_ITER:
        raise ParameterError(f"max_iter must be at least the {TSNE_EARLY_ITER} early-exaggeration iterations, "
                         f"got {max_iter}")
    seed = int(random_state)
    jobs = 1 if threads is None else max(1, int(threads))
    perp = float(min(perplexity, max(2.0, (n - 1) / 3.0)))
    k = int(min(n - 1, int(3 * perp)))
    dist, idx = NearestNeighbors(n_neighbors=k).fit(Z).kneighbors()  # without Z: no row is its own neighbour
    affinities = PerplexityBasedNN(perplexity=perp, knn_index=PrecomputedNeighbors(idx, dist), n_jobs=jobs)
    if d >= 2:
        start = initialization.pca(Z, n_components=2, random_state=seed)
    else:  # one design column: its values on the first axis, the second axis from the jitter only
        first = np.column_stack([Z[:, 0] - Z[:, 0].mean(), np.zeros(n)])
        start = initialization.jitter(initialization.rescale(first), random_state=seed)
    tsne = openTSNE.TSNE(n_components=2, perplexity=perp, negative_gradient_method=gradient, theta=theta,
                         n_interpolation_points=3, min_num_intervals=int(min_intervals), ints_in_interval=1,
                         n_jobs=jobs, random_state=seed, verbose=False)
    embedding = tsne.prepare_initial(affinities=affinities, initialization=start)
    for n_iter, exaggeration in ((TSNE_EARLY_ITER, TSNE_EARLY_EXAGGERATION), (max_iter - TSNE_EARLY_ITER, 1.0)):
        if n_iter > 0:
            embedding = embedding.optimize(n_iter=n_iter, exaggeration=exaggeration, momentum=TSNE_MOMENTUM,
                                           learning_rate=max(n / exaggeration, TSNE_MIN_LEARNING_RATE),
                                           inplace=True)
    Y = np.array(embedding, dtype=np.float64)
    fft = gradient == "fft"
    settings = {"perplexity": perp, "max_iter": max_iter, "angle": None if fft else float(theta), "init": "pca",
                "method": "fft_interpolation" if fft else "barnes_hut",
                "interpolation": (f"3 points per interval, one interval per unit of the map, at least "
                                  f"{int(min_intervals)} per axis") if fft else None,
                "schedule": f"{TSNE_EARLY_ITER} iterations with early exaggeration {TSNE_EARLY_EXAGGERATION:g}, "
                            f"then {max_iter - TSNE_EARLY_ITER} without; momentum {TSNE_MOMENTUM:g}; learning rate "
                            f"max(rows / exaggeration, {TSNE_MIN_LEARNING_RATE:g})",
                "early_exaggeration": TSNE_EARLY_EXAGGERATION, "early_exaggeration_iter": TSNE_EARLY_ITER,
                "neighbours": f"exact (scikit-learn), Euclidean, k = {k}",
                "library": "openTSNE",
                "axes": "t-SNE coordinates have no units; distances between clusters and cluster "
                        "sizes are not metric"}
    return Y, settings


def embed(Z, *, methods: Sequence[str] = METHODS, random_state: int = 0, tsne_max_iter: int = 350,
          umap_n_epochs: int = 200, umap_n_neighbors: int = 15,
          perplexity: float = 30.0, tsne_threads: Optional[int] = 1
          ) -> Tuple[Dict[str, np.ndarray], Dict[str, Dict[str, Any]]]:
    """2-D coordinates of the rows of ``Z`` by each method.

    Parameters
    ----------
    Z : ndarray of shape (n, d)
        Preprocessed design (:func:`preprocess`).
    methods : sequence of {"pca", "tsne", "umap"}
    random_state : int
    tsne_max_iter : int, default 350
        t-SNE iterations, the first 250 with early exaggeration (:func:`tsne_map`). Enough for a
        2-D overview whose mixing is scored, not for fine cluster detail.
    umap_n_epochs : int, default 200
        UMAP's own default above 10,000 rows. UMAP runs seeded and therefore
        single-threaded, so that the same seed gives the same map. Its compiled kernels are
        cached between runs (:func:`kernel_cache_dir`).
    umap_n_neighbors : int, default 15
    perplexity : float, default 30
        t-SNE perplexity (capped at (n - 1) / 3).
    tsne_threads : int or None, default 1
        Threads of the t-SNE optimisation (:func:`tsne_map`).

    Returns
    -------
    coords : dict {method: ndarray (n, 2)}
    settings : dict {method: dict}

    References
    ----------
    van der Maaten, L. & Hinton, G. (2008). Visualizing data using t-SNE.
    JMLR 9, 2579-2605.
    Linderman, G. C. et al. (2019). Fast interpolation-based t-SNE for improved
    visualization of single-cell RNA-seq data. Nature Methods 16, 243-245.
    McInnes, L., Healy, J. & Melville, J. (2018). UMAP: Uniform Manifold
    Approximation and Projection for dimension reduction. arXiv:1802.03426.
    """
    Z = np.asarray(Z, dtype=np.float64)
    n, d = Z.shape
    unknown = [m for m in methods if m not in METHODS]
    if unknown:
        raise ParameterError(f"methods must be some of {list(METHODS)}, got unknown {unknown}")
    if n < 5:
        raise InputError(f"maps need at least 5 rows, got {n}")
    seed = int(random_state)
    coords: Dict[str, np.ndarray] = {}
    settings: Dict[str, Dict[str, Any]] = {}
    for m in methods:
        if m == "pca":
            k = min(2, d)
            pca = PCA(n_components=k, random_state=seed)
            Y = pca.fit_transform(Z)
            if k < 2:
                Y = np.column_stack([Y, np.zeros(n)])
            coords[m] = Y
            settings[m] = {"n_components": 2, "explained_variance_ratio": [_r(v) for v in pca.explained_variance_ratio_],
                           "axes": "first two principal components of the scaled design (linear; distances are "
                                   "Euclidean in the projection)"}
        elif m == "tsne":
            coords[m], settings[m] = tsne_map(Z, perplexity=perplexity, max_iter=tsne_max_iter,
                                              random_state=seed, threads=tsne_threads)
        elif m == "umap":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                umap = _umap_with_cached_kernels()

                nn = int(min(umap_n_neighbors, n - 1))
                # exact neighbours from scikit-learn (self first, as UMAP expects): skips the approximate
                # search and its numba compilation, which dominate the run time at 10,000 rows
                dist, idx = NearestNeighbors(n_neighbors=nn - 1).fit(Z).kneighbors()
                knn_i = np.column_stack([np.arange(n), idx]).astype(np.int64)
                knn_d = np.column_stack([np.zeros(n), dist]).astype(np.float32)
                Y = umap.UMAP(n_neighbors=nn, n_components=2, min_dist=0.1, n_epochs=int(umap_n_epochs),
                              random_state=seed, n_jobs=1, precomputed_knn=(knn_i, knn_d, None)).fit_transform(Z)
            coords[m] = np.asarray(Y, dtype=np.float64)
            settings[m] = {"n_neighbors": nn, "min_dist": 0.1, "n_epochs": int(umap_n_epochs), "seeded": True,
                           "threads": 1, "neighbours": "exact (scikit-learn), Euclidean",
                           "axes": "UMAP coordinates have no units; distances between clusters and cluster "
                                   "sizes are not metric"}
    return coords, settings


# --------------------------------------------------------------------------- the analysis

def _label(x) -> str:
    """Display text of a group value (:func:`sitecheck.table.roles.value_label`; missing as "missing")."""
    from sitecheck.table.roles import value_label

    lab = value_label(x)
    return "missing" if lab is None else lab


@dataclass(frozen=True, eq=False)
class MapsResult:
    """Embeddings and mixing scores of a site-stratified subsample.

    ``to_dict()`` gives the ``report.json`` ``embedding`` section. The
    coordinates and the labels of the mapped rows (for figures) are kept on
    attributes that are not serialised.
    """

    n_used: int
    n_available: int
    cap: int
    methods: Tuple[str, ...]
    settings: Dict[str, Dict[str, Any]]
    n_design_columns: int
    mixing: Dict[str, MixingSummary]
    mixing_method: Dict[str, Any]
    silhouette: Dict[str, Dict[str, Any]]
    site_labels: Tuple[str, ...]
    coords: Dict[str, np.ndarray] = field(repr=False)
    site: np.ndarray = field(repr=False)
    colourings: Dict[str, Tuple[str, np.ndarray]] = field(repr=False)
    rows: np.ndarray = field(repr=False)

    @property
    def spaces(self) -> Tuple[str, ...]:
        return tuple(self.mixing)

    def to_dict(self) -> Dict[str, Any]:
        return {
            "n_used": self.n_used,
            "n_available": self.n_available,
            "cap": self.cap,
            "methods": list(self.methods),
            "method_settings": self.settings,
            "preprocessing": PREPROCESSING,
            "n_design_columns": self.n_design_columns,
            "mixing": {space: s.to_dict() for space, s in self.mixing.items()},
            "mixing_method": self.mixing_method,
            "silhouette": self.silhouette,
            "figures": [],
        }


def compute_maps(prep: Prepared, *, max_rows: int = 10_000, methods: Sequence[str] = METHODS,
                 perplexity: float = 30.0, n_boot: int = 200, tsne_max_iter: int = 350,
                 umap_n_epochs: int = 200, tsne_threads: Optional[int] = 1, score_design: bool = True,
                 random_state: Optional[int] = None) -> MapsResult:
    """Embed a site-stratified subsample and score how well the sites mix.

    Parameters
    ----------
    prep : Prepared
    max_rows : int, default 10000
        Cap on the mapped rows (site-stratified; every site keeps at least
        ``min(its rows, 20)``).
    methods : sequence of {"pca", "tsne", "umap"}
    perplexity : float, default 30
        LISI kernel perplexity (and t-SNE perplexity); neighbours searched:
        ``3 * perplexity``.
    n_boot : int, default 200
        Bootstrap resamples for the intervals.
    tsne_max_iter, umap_n_epochs : int
        See :func:`embed`.
    tsne_threads : int or None, default 1
        Threads of the t-SNE optimisation. One thread keeps repeated runs
        bit-identical (checked in ``tests/test_maps.py``); a scan runs the t-SNE
        map beside other analyses, one core each.
    score_design : bool, default True
        Also score the mixing in the preprocessed design itself (space ``"features"``).
        A part computed to be merged into another (:func:`merge_maps`) leaves it out.
    random_state : int or None
        Default: ``prep.seed``.

    Returns
    -------
    MapsResult

    References
    ----------
    Korsunsky, I. et al. (2019). Nature Methods 16, 1289-1296 (LISI).
    Rousseeuw, P. J. (1987). Silhouettes: a graphical aid to the interpretation
    and validation of cluster analysis. J. Comput. Appl. Math. 20, 53-65.
    """
    if not isinstance(max_rows, (int, np.integer)) or max_rows < 50:
        raise ParameterError(f"max_rows must be an integer of at least 50, got {max_rows!r}")
    seed = prep.seed if random_state is None else int(random_state)
    idx = stratified_subsample(prep.site, int(max_rows), stream(seed, "maps"))
    site = prep.site[idx]
    Z = preprocess(prep.X[idx], prep.features.categorical)
    if Z.shape[1] == 0:
        raise InputError("no feature column is usable for the maps")
    coords, settings = embed(Z, methods=methods, random_state=derived_seed(seed, "maps.embedding"), tsne_max_iter=tsne_max_iter,
                             umap_n_epochs=umap_n_epochs, perplexity=perplexity, tsne_threads=tsne_threads)
    n = len(idx)
    perp = float(min(perplexity, max(1.5, (n - 1) / 3.0)))
    spaces = {"features": Z, **coords} if score_design else dict(coords)
    mixing: Dict[str, MixingSummary] = {}
    sil: Dict[str, Dict[str, Any]] = {}
    for space, M in spaces.items():
        # one generator per space, so that maps computed apart and merged give the same numbers
        space_rng = stream(seed, "maps", _SPACES.index(space))
        values = lisi(M, site, perplexity=perp)
        mixing[space] = summarise_lisi(values, site, prep.site_labels, n_boot=n_boot, random_state=space_rng)
        sil[space] = silhouette_by_site(M, site, prep.site_labels, n_boot=n_boot, random_state=space_rng)
    colourings: Dict[str, Tuple[str, np.ndarray]] = {}
    if prep.outcome is not None:
        y = prep.outcome[idx]
        lab = np.where(np.isnan(y), "missing", np.where(y > 0.5, "1", "0")).astype(object)
        colourings["outcome"] = (prep.table.outcome or "outcome", lab)
    for j, (g, values) in enumerate(prep.groups.items()):
        v = np.asarray(values, dtype=object)[idx]
        colourings[f"group_{j + 1}"] = (str(g), np.array([_label(x) for x in v], dtype=object))
    counts = np.bincount(site, minlength=len(prep.site_labels))
    return MapsResult(
        n_used=int(n), n_available=int(prep.n_used), cap=int(max_rows), methods=tuple(coords),
        settings=settings, n_design_columns=int(Z.shape[1]), mixing=mixing,
        mixing_method={"score": "LISI (local inverse Simpson's index of the site labels)",
                       "perplexity": perp, "k": int(min(round(3 * perp), n - 1)), "distance": "Euclidean",
                       "expected_random": _r(expected_random(counts[counts > 0])),
                       "n_sites": int((counts > 0).sum()),
                       "normalised": "mean LISI / expected_random (1 = random mixing)",
                       "intervals": f"95% percentile bootstrap over rows, {int(n_boot)} resamples",
                       "silhouette": "mean silhouette width of the site labels on at most 3000 site-stratified rows"},
        silhouette=sil, site_labels=tuple(prep.site_labels), coords=coords, site=site,
        colourings=colourings, rows=prep.rows[idx],
    )


def merge_maps(first: MapsResult, second: MapsResult) -> MapsResult:
    """One result from maps of the same rows computed apart (for instance t-SNE in one
    process, PCA and UMAP in another): equal to computing them together.

    Raises
    ------
    ParameterError
        When the two were drawn from different rows or share a map.
    """
    if not np.array_equal(first.rows, second.rows) or first.cap != second.cap:
        raise ParameterError("first and second must be maps of the same rows (and cap) to be merged")
    if set(first.methods) & set(second.methods):
        raise ParameterError(f"first and second must hold different maps; both hold "
                             f"{sorted(set(first.methods) & set(second.methods))}")

    def ordered(a: Dict[str, Any], b: Dict[str, Any]) -> Dict[str, Any]:
        both = {**a, **b}
        return {k: both[k] for k in _SPACES if k in both}

    coords = ordered(first.coords, second.coords)
    return replace(first, methods=tuple(coords), coords=coords, settings=ordered(first.settings, second.settings),
                   mixing=ordered(first.mixing, second.mixing), silhouette=ordered(first.silhouette, second.silhouette))
