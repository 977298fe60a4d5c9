"""Maps and mixing: 2-D embeddings of the rows and a number for how well sites mix.

:func:`compute_maps` draws a site-stratified subsample, preprocesses the
features (median imputation with missing-value indicators and robust scaling
for numeric columns, one-hot encoding for categorical ones), embeds them with
PCA, t-SNE and UMAP, and scores how well the sites mix in the feature space
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

from sitecheck.errors import InputError
from sitecheck.table.prepare import Prepared, stratified_subsample

METHODS: Tuple[str, ...] = ("pca", "tsne", "umap")

#: Stream of :meth:`Prepared.rng` used by this module (keeps analyses independent).
_STREAM = 5
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
        raise InputError(f"lisi needs a 2-D matrix, got shape {X.shape}")
    n = X.shape[0]
    _, codes = np.unique(np.asarray(labels), return_inverse=True)
    codes = codes.ravel()
    if len(codes) != n:
        raise InputError(f"lisi: {len(codes)} labels for {n} rows")
    if n < 3:
        raise InputError("lisi needs at least 3 rows")
    if not perplexity > 1:
        raise InputError(f"perplexity must be greater than 1, got {perplexity!r}")
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
    rng = random_state if isinstance(random_state, np.random.Generator) else np.random.default_rng(random_state)
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
    rng = random_state if isinstance(random_state, np.random.Generator) else np.random.default_rng(random_state)
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


def embed(Z, *, methods: Sequence[str] = METHODS, random_state: int = 0, tsne_max_iter: int = 350,
          tsne_angle: float = 0.7, umap_n_epochs: int = 200, umap_n_neighbors: int = 15,
          perplexity: float = 30.0, tsne_threads: Optional[int] = None
          ) -> Tuple[Dict[str, np.ndarray], Dict[str, Dict[str, Any]]]:
    """2-D coordinates of the rows of ``Z`` by each method.

    Parameters
    ----------
    Z : ndarray of shape (n, d)
        Preprocessed design (:func:`preprocess`).
    methods : sequence of {"pca", "tsne", "umap"}
    random_state : int
    tsne_max_iter : int, default 350
        t-SNE iterations, the first 250 with early exaggeration (scikit-learn's
        default is 1000). Measured at 10,000 rows: 1000 iterations would take
        about 2 CPU minutes; 350 with angle 0.7 keeps all three maps within a
        minute on 2 cores. Enough for a 2-D overview whose mixing is scored,
        not for fine cluster detail.
    tsne_angle : float, default 0.7
        Barnes-Hut trade-off (scikit-learn's default 0.5; 0.7 measured about
        40% cheaper at 10,000 rows).
    umap_n_epochs : int, default 200
        UMAP's own default above 10,000 rows. UMAP runs seeded and therefore
        single-threaded, so that the same seed gives the same map.
    umap_n_neighbors : int, default 15
    perplexity : float, default 30
        t-SNE perplexity (capped at (n - 1) / 3).
    tsne_threads : int or None
        OpenMP threads for t-SNE (None: the library default, all cores).
        The result does not depend on it.

    Returns
    -------
    coords : dict {method: ndarray (n, 2)}
    settings : dict {method: dict}

    References
    ----------
    van der Maaten, L. & Hinton, G. (2008). Visualizing data using t-SNE.
    JMLR 9, 2579-2605.
    McInnes, L., Healy, J. & Melville, J. (2018). UMAP: Uniform Manifold
    Approximation and Projection for dimension reduction. arXiv:1802.03426.
    """
    Z = np.asarray(Z, dtype=np.float64)
    n, d = Z.shape
    unknown = [m for m in methods if m not in METHODS]
    if unknown:
        raise InputError(f"unknown map method(s) {unknown}; choose from {list(METHODS)}")
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
            from sklearn.manifold import TSNE
            from threadpoolctl import threadpool_limits

            perp = float(min(perplexity, max(2.0, (n - 1) / 3.0)))
            with threadpool_limits(limits=tsne_threads, user_api="openmp"):
                Y = TSNE(n_components=2, perplexity=perp, init="pca", learning_rate="auto",
                         max_iter=tsne_max_iter, angle=tsne_angle, random_state=seed).fit_transform(Z)
            coords[m] = Y
            settings[m] = {"perplexity": perp, "max_iter": int(tsne_max_iter), "angle": float(tsne_angle),
                           "init": "pca", "method": "barnes_hut",
                           "axes": "t-SNE coordinates have no units; distances between clusters and cluster "
                                   "sizes are not metric"}
        elif m == "umap":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                import umap  # imported lazily: numba compilation on first use

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
        OpenMP threads for t-SNE. One thread was measured far faster than two
        on a busy 2-core machine (threads spin while waiting) and at most about
        1.5x slower on an idle one; the result does not depend on it.
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
        raise InputError(f"map_rows must be an integer of at least 50, got {max_rows!r}")
    seed = prep.seed if random_state is None else int(random_state)
    rng = np.random.default_rng([seed, _STREAM])
    idx = stratified_subsample(prep.site, int(max_rows), rng)
    site = prep.site[idx]
    Z = preprocess(prep.X[idx], prep.features.categorical)
    if Z.shape[1] == 0:
        raise InputError("no feature column is usable for the maps")
    coords, settings = embed(Z, methods=methods, random_state=seed, tsne_max_iter=tsne_max_iter,
                             umap_n_epochs=umap_n_epochs, perplexity=perplexity, tsne_threads=tsne_threads)
    n = len(idx)
    perp = float(min(perplexity, max(1.5, (n - 1) / 3.0)))
    spaces = {"features": Z, **coords} if score_design else dict(coords)
    mixing: Dict[str, MixingSummary] = {}
    sil: Dict[str, Dict[str, Any]] = {}
    for space, M in spaces.items():
        # one generator per space, so that maps computed apart and merged give the same numbers
        space_rng = np.random.default_rng([seed, _STREAM, _SPACES.index(space)])
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
    InputError
        When the two were drawn from different rows or share a map.
    """
    if not np.array_equal(first.rows, second.rows) or first.cap != second.cap:
        raise InputError("maps computed on different rows cannot be merged")
    if set(first.methods) & set(second.methods):
        raise InputError(f"both results hold the map(s) {sorted(set(first.methods) & set(second.methods))}")

    def ordered(a: Dict[str, Any], b: Dict[str, Any]) -> Dict[str, Any]:
        both = {**a, **b}
        return {k: both[k] for k in _SPACES if k in both}

    coords = ordered(first.coords, second.coords)
    return replace(first, methods=tuple(coords), coords=coords, settings=ordered(first.settings, second.settings),
                   mixing=ordered(first.mixing, second.mixing), silhouette=ordered(first.silhouette, second.silhouette))
