"""Everything the analyses share, computed once.

:func:`prepare` encodes the feature (and covariate) columns of a
:class:`~sitecheck.table.roles.Table` into numeric matrices, draws the
site-stratified subsample used for modelling, and fixes the stratified folds.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from sklearn.model_selection import StratifiedKFold

from sitecheck._runtime import stream
from sitecheck.errors import InputError
from sitecheck.table.roles import Table

#: Categorical levels kept per column before rarer ones are lumped into one
#: "other" code (HistGradientBoosting accepts at most 255 categories). With more
#: sites than :data:`sitecheck.analyses.models.MANY_CLASSES` the probe has fewer bins and
#: :func:`prepare` keeps fewer (:func:`level_limit`).
MAX_LEVELS = 250

#: The label of the pooled level.
OTHER = "(other)"


def level_limit(n_sites: int) -> int:
    """Categorical levels kept per column for a probe of ``n_sites`` sites: the most
    frequent ``limit - 1`` and one pooled level, so that every model the scan fits on the
    encoded matrix (the site probe, its sub-probes with fewer sites, the outcome and
    harmonisation models with two classes) accepts every column."""
    from sitecheck.analyses.models import booster_max_bins

    return int(min(MAX_LEVELS, booster_max_bins(max(int(n_sites), 2))))


def level_maps_for(X: np.ndarray, categorical: np.ndarray, max_levels: int):
    """Pool rare categorical codes: (maps, pooled).

    For each categorical column of ``X`` (integer codes, NaN missing) with more than
    ``max_levels`` distinct codes, the ``max_levels - 1`` most frequent (ties: the lower
    code) are kept, renumbered ``0..max_levels-2`` in code order, and every other code
    becomes ``max_levels - 1``. ``maps`` holds one look-up array per such column
    (old code -> new code), ``pooled`` the number of levels pooled per column.
    Vectorised (``bincount``); no per-row Python.
    """
    maps: Dict[int, np.ndarray] = {}
    pooled: Dict[int, int] = {}
    limit = int(max_levels)
    if limit < 2:
        raise ValueError(f"max_levels must be at least 2, got {max_levels!r}")
    for j in np.flatnonzero(np.asarray(categorical, dtype=bool)):
        v = X[:, j]
        codes = v[~np.isnan(v)].astype(np.int64)
        if not len(codes) or codes.min() < 0:
            continue
        counts = np.bincount(codes)
        present = np.flatnonzero(counts)
        if len(present) <= limit:
            continue
        order = present[np.lexsort((present, -counts[present]))]
        keep = np.sort(order[: limit - 1])
        lut = np.full(len(counts), float(limit - 1))
        lut[keep] = np.arange(len(keep), dtype=float)
        maps[int(j)] = lut
        pooled[int(j)] = int(len(present) - len(keep))
    return maps, pooled


def apply_level_maps(X: np.ndarray, maps: Dict[int, np.ndarray]) -> np.ndarray:
    """``X`` with each mapped column's codes replaced (codes beyond a map, unseen when it
    was made, go to the pooled level); ``X`` itself when ``maps`` is empty."""
    if not maps:
        return X
    out = np.array(X, dtype=float, copy=True)
    for j, lut in maps.items():
        v = out[:, j]
        ok = ~np.isnan(v)
        c = v[ok].astype(np.int64)
        other = float(lut.max()) if len(lut) else 0.0
        inside = (c >= 0) & (c < len(lut))
        new = np.full(len(c), other)
        new[inside] = lut[c[inside]]
        v[ok] = new
        out[:, j] = v
    return out


@dataclass(frozen=True, eq=False)
class Encoded:
    """Columns of a table encoded as one numeric matrix.

    Numeric and binary columns are floats; categorical columns are integer
    codes stored as floats (missing = NaN), flagged in ``categorical``.
    Datetime columns become days since the column's earliest value.
    """

    X: np.ndarray
    names: Tuple[str, ...]
    kinds: Tuple[str, ...]
    categorical: np.ndarray
    levels: Dict[str, Tuple[str, ...]]
    lumped: Dict[str, int]
    #: Levels kept per categorical column (the pooled level included).
    max_levels: int = MAX_LEVELS

    @property
    def n_features(self) -> int:
        return self.X.shape[1]


def encode_columns(frame: pd.DataFrame, names: Sequence[str], kinds: Sequence[str],
                   *, dtype=np.float64, max_levels: int = MAX_LEVELS) -> Encoded:
    """Encode ``names`` of ``frame`` into one matrix (see :class:`Encoded`).

    A categorical column with more than ``max_levels`` levels keeps its
    ``max_levels - 1`` most frequent (ties by label) and pools the rest into the level
    :data:`OTHER`; ``Encoded.lumped`` records how many were pooled per column.
    """
    n = len(frame)
    X = np.empty((n, len(names)), dtype=dtype)
    cat = np.zeros(len(names), dtype=bool)
    levels: Dict[str, Tuple[str, ...]] = {}
    lumped: Dict[str, int] = {}
    for j, (name, kind) in enumerate(zip(names, kinds)):
        col = frame[name]
        if kind == "categorical":
            present = col.notna().to_numpy()
            text = pd.Series(col.to_numpy(dtype=object)[present], dtype=object).astype(str)
            vc = text.value_counts()
            order = sorted(vc.index.tolist(), key=lambda v: (-int(vc[v]), v))
            if len(order) > max_levels:
                keep = sorted(order[: max_levels - 1])
                lumped[name] = len(order) - len(keep)
                keep_t = tuple(keep) + (OTHER,)
            else:
                keep_t = tuple(sorted(order))
            code = {v: i for i, v in enumerate(keep_t)}
            other = code.get(OTHER) if name in lumped else None
            mapped = np.array(text.map(code).to_numpy(dtype=float, na_value=np.nan), dtype=float, copy=True)
            if other is not None:
                mapped[np.isnan(mapped)] = other
            vals = np.full(n, np.nan)
            vals[present] = mapped
            X[:, j] = vals
            cat[j] = True
            levels[name] = keep_t
        elif kind == "datetime":
            t = pd.to_datetime(col)
            base = t.min()
            X[:, j] = ((t - base).dt.total_seconds() / 86400.0).to_numpy(dtype=float, na_value=np.nan)
        else:
            X[:, j] = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    return Encoded(X=X, names=tuple(names), kinds=tuple(kinds), categorical=cat, levels=levels, lumped=lumped,
                   max_levels=int(max_levels))


@dataclass(frozen=True, eq=False)
class Prepared:
    """Shared inputs of every analysis.

    Attributes
    ----------
    table : Table
    rows : ndarray of int
        Row indices into ``table.frame`` used for modelling (the subsample).
    features : Encoded
        Feature matrix over ``rows``.
    covariates : Encoded or None
        Covariate matrix over ``rows``, when covariates were given.
    site : ndarray of int
        Site codes over ``rows``, indexing ``site_labels``.
    site_labels : tuple of str
    outcome : ndarray of float or None
        0/1 outcome over ``rows`` (NaN where missing).
    groups : dict
        Group column -> object array of labels over ``rows``.
    folds : tuple of (train, test) index arrays into ``rows``
    n_splits : int
    seed : int
    n_total : int
        Rows of the validated table before subsampling.
    max_rows : int
    """

    table: Table
    rows: np.ndarray
    features: Encoded
    covariates: Optional[Encoded]
    site: np.ndarray
    site_labels: Tuple[str, ...]
    outcome: Optional[np.ndarray]
    groups: Dict[str, np.ndarray]
    folds: Tuple[Tuple[np.ndarray, np.ndarray], ...]
    n_splits: int
    seed: int
    n_total: int
    max_rows: int

    @property
    def n_used(self) -> int:
        return int(len(self.rows))

    @property
    def X(self) -> np.ndarray:
        return self.features.X

    def rng(self, name: str, *sub: int) -> np.random.Generator:
        """A fresh generator of the named stream ``name`` for this table's seed
        (:func:`sitecheck._runtime.stream`); each analysis has streams of its own."""
        return stream(self.seed, name, *sub)


def stratified_subsample(labels: np.ndarray, cap: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of a subsample of at most ``cap`` rows, proportional by label.

    Every label keeps at least ``min(its rows, 20)`` rows. Returned sorted.
    """
    n = len(labels)
    if n <= cap:
        return np.arange(n)
    uniq, inv, counts = np.unique(labels, return_inverse=True, return_counts=True)
    want = np.maximum(np.minimum(counts, 20), np.floor(counts * cap / n).astype(int))
    picked = []
    for k in range(len(uniq)):
        idx = np.flatnonzero(inv == k)
        picked.append(rng.choice(idx, size=int(min(want[k], len(idx))), replace=False))
    return np.sort(np.concatenate(picked))


def prepare(table: Table, *, n_splits: int = 5, max_rows: int = 100_000, random_state: int = 0) -> Prepared:
    """Encode, subsample and fold a validated table.

    Parameters
    ----------
    table : Table
    n_splits : int, default 5
        Stratified folds (by site). Reduced to the smallest site's row count
        when that is smaller, never below 2.
    max_rows : int, default 100000
        Above this many rows a site-stratified subsample is used for modelling.
    random_state : int, default 0

    Returns
    -------
    Prepared
    """
    if not isinstance(n_splits, (int, np.integer)) or n_splits < 2:
        raise InputError(f"folds must be an integer of at least 2, got {n_splits!r}")
    if not isinstance(max_rows, (int, np.integer)) or max_rows < 100:
        raise InputError(f"max_rows must be an integer of at least 100, got {max_rows!r}")
    seed = int(random_state)
    rng = stream(seed, "prepare.subsample")
    site_all = table.frame[table.site].to_numpy(dtype=object)
    rows = stratified_subsample(site_all, int(max_rows), rng)
    sub = table.frame.iloc[rows]
    feats = table.features
    limit = level_limit(len(table.site_labels))
    enc = encode_columns(sub, feats, [table.kind(f) for f in feats], max_levels=limit)
    cov = None
    if table.covariates:
        cov = encode_columns(sub, table.covariates, [table.kind(c) for c in table.covariates], max_levels=limit)
    labels = tuple(table.site_labels)
    code = {lab: i for i, lab in enumerate(labels)}
    site = np.array([code[v] for v in sub[table.site].to_numpy(dtype=object)], dtype=np.int64)
    outcome = None
    if table.outcome:
        outcome = sub[table.outcome].to_numpy(dtype=float)
    groups = {g: sub[g].astype(object).where(sub[g].notna(), None).to_numpy(dtype=object) for g in table.groups}
    counts = np.bincount(site, minlength=len(labels))
    min_count = int(counts.min())
    if min_count < 2:
        lab = labels[int(np.argmin(counts))]
        raise InputError(f"site {lab!r} has {min_count} row{'s' if min_count != 1 else ''} to model; cross-validated "
                         "probing needs at least 2 rows per site (raise min_site_rows to leave it out)",
                         option="min_site_rows")
    k = int(max(2, min(n_splits, min_count)))
    skf = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed)
    folds = tuple((tr, te) for tr, te in skf.split(np.zeros(len(site)), site))
    return Prepared(
        table=table, rows=rows, features=enc, covariates=cov, site=site, site_labels=labels,
        outcome=outcome, groups=groups, folds=folds, n_splits=k, seed=seed,
        n_total=int(len(table.frame)), max_rows=int(max_rows),
    )
