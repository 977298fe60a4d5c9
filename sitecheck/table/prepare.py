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
#: "other" code (HistGradientBoosting accepts at most 255 categories).
MAX_LEVELS = 250


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

    @property
    def n_features(self) -> int:
        return self.X.shape[1]


def encode_columns(frame: pd.DataFrame, names: Sequence[str], kinds: Sequence[str],
                   *, dtype=np.float64) -> Encoded:
    """Encode ``names`` of ``frame`` into one matrix (see :class:`Encoded`)."""
    n = len(frame)
    X = np.empty((n, len(names)), dtype=dtype)
    cat = np.zeros(len(names), dtype=bool)
    levels: Dict[str, Tuple[str, ...]] = {}
    lumped: Dict[str, int] = {}
    for j, (name, kind) in enumerate(zip(names, kinds)):
        col = frame[name]
        if kind == "categorical":
            s = col.astype(object).where(col.notna(), None)
            vc = pd.Series(s.dropna().astype(str)).value_counts()
            order = sorted(vc.index.tolist(), key=lambda v: (-int(vc[v]), v))
            if len(order) > MAX_LEVELS:
                keep = sorted(order[: MAX_LEVELS - 1])
                lumped[name] = len(order) - len(keep)
                keep_t = tuple(keep) + ("(other)",)
            else:
                keep_t = tuple(sorted(order))
            code = {v: i for i, v in enumerate(keep_t)}
            other = code.get("(other)")
            vals = np.array([np.nan if v is None else code.get(str(v), other if other is not None else np.nan)
                             for v in s.to_numpy(dtype=object)], dtype=float)
            X[:, j] = vals
            cat[j] = True
            levels[name] = keep_t
        elif kind == "datetime":
            t = pd.to_datetime(col)
            base = t.min()
            X[:, j] = ((t - base).dt.total_seconds() / 86400.0).to_numpy(dtype=float, na_value=np.nan)
        else:
            X[:, j] = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    return Encoded(X=X, names=tuple(names), kinds=tuple(kinds), categorical=cat, levels=levels, lumped=lumped)


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

    def rng(self, stream: int = 0) -> np.random.Generator:
        """A fresh generator for one analysis; ``stream`` keeps analyses independent."""
        return np.random.default_rng([self.seed, stream])


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
    enc = encode_columns(sub, feats, [table.kind(f) for f in feats])
    cov = None
    if table.covariates:
        cov = encode_columns(sub, table.covariates, [table.kind(c) for c in table.covariates])
    labels = tuple(table.site_labels)
    code = {lab: i for i, lab in enumerate(labels)}
    site = np.array([code[v] for v in sub[table.site].to_numpy(dtype=object)], dtype=np.int64)
    outcome = None
    if table.outcome:
        outcome = sub[table.outcome].to_numpy(dtype=float)
    groups = {g: sub[g].astype(object).where(sub[g].notna(), None).to_numpy(dtype=object) for g in table.groups}
    min_count = int(np.bincount(site).min())
    k = int(max(2, min(n_splits, min_count)))
    skf = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed)
    folds = tuple((tr, te) for tr, te in skf.split(np.zeros(len(site)), site))
    return Prepared(
        table=table, rows=rows, features=enc, covariates=cov, site=site, site_labels=labels,
        outcome=outcome, groups=groups, folds=folds, n_splits=k, seed=seed,
        n_total=int(len(table.frame)), max_rows=int(max_rows),
    )
