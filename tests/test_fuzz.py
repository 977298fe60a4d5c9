"""Property-based fuzz of table shapes (hypothesis): a scan never ends in an internal error.

The property, for any table drawn below: the scan finishes with no failed analysis (the command
would exit 0), or it refuses the input with an InputError whose message is one line (exit 2).
It never raises anything else and never records a failed analysis (exit 3).

Tables: 2-50 sites of 1-2,000 rows (scaled down to at most ``MAX_ROWS`` rows in all, so the
examples stay fast), with numeric, binary, categorical (up to 1,000 levels), datetime and
free-text columns, columns entirely missing at some sites, a feature present at one site only,
constant columns, identifiers, duplicate rows, unicode, markup and formula characters in column
names and labels, and extreme values (1e300, -0.0, inf written as text), laboratory-style
rounding, censored values (<5, >20) and missing-value codes (-99, 999). Every table is written
as CSV and read back by the library entry point (``scan_file``), then the report is written.

The scan is made light with :class:`~sitecheck.scan.ScanOptions` (documented there): the maps
are skipped (UMAP and t-SNE are the slowest analyses and see the same encoded matrix as the
probe), one process, 2 folds, 50 bootstrap resamples and 19 permutations, ComBat as the only
harmonisation method. Every other analysis runs in full.
"""
import json
import os
import string
import tempfile

import numpy as np
import pandas as pd
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from sitecheck.errors import InputError  # noqa: E402
from sitecheck.render import write_report  # noqa: E402
from sitecheck.scan import ScanOptions, scan_file  # noqa: E402

MAX_ROWS = 160
ANALYSES = ("probe", "leakage", "fingerprints", "harmonise", "outcome")

#: Awkward text for names and labels: unicode, markup, formula starters, CSV quoting, whitespace.
AWKWARD = ["naïve température", "<b>bold</b>", "<script>alert(1)</script>", "=SUM(A1:A9)", "+cmd", "-2", "@ref",
           "a,b", 'say "hi"', "日本語の列", "emoji 🧪", "tab\tin", "  padded  ", "Ω≈ç√", "NA_not", "0", "1.5",
           "é" * 40, "x" * 70]

KINDS = ("numeric", "rounded", "censored", "coded", "extreme", "binary", "categorical", "datetime", "text",
         "constant", "missing_at_sites", "one_site_only", "identifier", "decimal_comma")


def _column(kind, rng, site_idx, n_sites, labels):
    n = len(site_idx)
    if kind == "numeric":
        v = rng.normal(50, 10, n) + 3 * site_idx
        v[rng.random(n) < 0.1] = np.nan
        return v
    if kind == "rounded":  # laboratories round: integers at some sites, one decimal at others
        v = rng.normal(4.5, 1.2, n)
        return np.where(site_idx % 2 == 0, np.round(v), np.round(v, 1))
    if kind == "censored":  # a detection limit written as text
        v = np.round(rng.lognormal(1.5, 0.8, n), 1).astype(object)
        v[v.astype(float) < 5] = "<5"
        v[(v != "<5") & (rng.random(n) < 0.05)] = ">20"
        return v
    if kind == "coded":  # a missing-value code at one site
        v = np.round(rng.normal(7, 2, n), 1)
        v[(site_idx == 0) & (rng.random(n) < 0.3)] = rng.choice([-99, 999])
        return v
    if kind == "extreme":
        pool = np.array(["1e300", "-1e300", "-0.0", "0.0", "inf", "-inf", "1e-300", "nan", "3.5"], dtype=object)
        v = np.round(rng.normal(size=n), 2).astype(object)
        pick = rng.random(n) < 0.4
        v[pick] = rng.choice(pool, int(pick.sum()))
        return v
    if kind == "binary":
        a, b = rng.choice(labels, 2, replace=False) if len(labels) >= 2 else ("yes", "no")
        return np.where(rng.random(n) < 0.4, a, b).astype(object)
    if kind == "categorical":
        k = int(rng.integers(2, 1001))
        levels = np.array([f"{rng.choice(labels)}-{i}" for i in range(k)], dtype=object)
        p = 1.0 / np.arange(1, k + 1)
        v = rng.choice(levels, n, p=p / p.sum())
        v[rng.random(n) < 0.05] = None
        return v
    if kind == "datetime":
        base = np.datetime64("2024-01-01")
        d = (base + rng.integers(0, 900, n).astype("timedelta64[D]")).astype(str).astype(object)
        d[rng.random(n) < 0.1] = None
        return d
    if kind == "text":
        words = ["patient", "seen", "in", "clinic", "with", "<i>mild</i>", "fever", "=cmd", "résumé", "🧪"]
        return np.array([" ".join(rng.choice(words, int(rng.integers(8, 16)))) + f" #{i}" for i in range(n)],
                        dtype=object)
    if kind == "constant":
        return np.full(n, 7.0)
    if kind == "missing_at_sites":  # entirely missing at some sites
        v = np.round(rng.normal(140, 4, n))
        gone = rng.choice(n_sites, max(1, n_sites // 2), replace=False)
        v[np.isin(site_idx, gone)] = np.nan
        return v
    if kind == "one_site_only":
        v = np.round(rng.normal(12, 3, n), 1)
        v[site_idx != int(rng.integers(0, n_sites))] = np.nan
        return v
    if kind == "identifier":
        return np.array([f"P{s:02d}-{i:05d}" for i, s in enumerate(site_idx)], dtype=object)
    if kind == "decimal_comma":
        v = np.round(rng.normal(3.2, 0.6, n), 1).astype(str).astype(object)
        return np.where(site_idx % 3 == 1, [x.replace(".", ",") for x in v], v).astype(object)
    raise AssertionError(kind)


@st.composite
def tables(draw):
    # half the examples have 2-8 sites, half 9-50 (the many-site probe); the labels are drawn freely
    # (a suffix keeps most of them apart; two that differ only by padding merge into one site)
    n_sites = draw(st.integers(2, 8) | st.integers(9, 50))
    sizes = np.array(draw(st.lists(st.integers(1, 2000), min_size=n_sites, max_size=n_sites)))
    if sizes.sum() > MAX_ROWS:  # keep the shape (which sites are small, which large), scaled down
        sizes = np.maximum(1, sizes * MAX_ROWS // sizes.sum())
    stems = draw(st.lists(st.sampled_from(AWKWARD) | st.text(min_size=1, max_size=8), min_size=n_sites,
                          max_size=n_sites))
    site_labels = [f"{stem}{i}" for i, stem in enumerate(stems)]
    kinds = draw(st.lists(st.sampled_from(KINDS), min_size=1, max_size=6))
    stems = draw(st.lists(st.sampled_from(AWKWARD) | st.text(string.ascii_letters + "_ é<>=+-@\"", min_size=1,
                                                                     max_size=8),
                          min_size=len(kinds), max_size=len(kinds)))
    names = [f"{stem}{i}" for i, stem in enumerate(stems)]
    seed = draw(st.integers(0, 2**32 - 1))
    with_outcome = draw(st.booleans())
    duplicate = draw(st.booleans())
    min_site_rows = draw(st.sampled_from([1, 2, 5, 20]))
    rng = np.random.default_rng(seed)
    site_idx = np.repeat(np.arange(n_sites), sizes)
    frame = pd.DataFrame({"site": np.array(site_labels, dtype=object)[site_idx]})
    for name, kind in zip(names, kinds):
        if name.strip().lower() in ("site", "outcome"):
            name = f"{name}_x"
        frame[name] = _column(kind, rng, site_idx, n_sites, site_labels)
    if with_outcome:
        frame["outcome"] = (rng.random(len(frame)) < 0.3).astype(int)
    if duplicate and len(frame) > 1:
        frame = pd.concat([frame, frame.sample(max(1, len(frame) // 5), random_state=seed % 2**31)],
                          ignore_index=True)
    return frame, ("outcome" if with_outcome else None), min_site_rows, list(zip(names, kinds))


def _check_one(frame, outcome, min_site_rows):
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "pooled.csv")
        frame.to_csv(path, index=False)
        opts = ScanOptions(n_jobs=1, analyses=ANALYSES, folds=2, n_boot=50, n_permutations=19,
                           harmonise_methods=("combat",), min_site_rows=min_site_rows)
        try:
            result = scan_file(path, site="site", outcome=outcome, options=opts)
        except InputError as exc:  # exit 2: refused, with one line naming the problem
            msg = str(exc)
            assert msg.strip() and "\n" not in msg and "Traceback" not in msg
            hypothesis.event("refused (exit 2)")
            return None
        assert result.failures == (), [(f["analysis"], f["error"], f["message"]) for f in result.failures]  # never 3
        hypothesis.event(f"scanned (exit 0): {len(result.sections)} sections")
        out = os.path.join(tmp, "report")
        write_report(result, out, min_cell=10)
        with open(os.path.join(out, "report.json"), encoding="utf-8") as fh:
            doc = json.load(fh)
        assert doc["failed_analyses"] == []
        # identifiers, dates and free text are never used as features
        for col in doc["columns"]:
            if col["kind"] in ("datetime", "text"):
                assert col["role"] != "feature", col
        assert all(c["role"] != "feature" for c in doc["columns"] if c["role"] == "identifier")
        used = set(result.objects["prepared"].features.names)
        assert not used & {c["name"] for c in doc["columns"] if c["role"] != "feature"}
        return doc


#: FUZZ_PHASES=generate skips shrinking when exploring by hand (a failing example is printed as drawn).
_PHASES = ((hypothesis.Phase.explicit, hypothesis.Phase.generate) if os.environ.get("FUZZ_PHASES") == "generate"
           else tuple(hypothesis.Phase))


@settings(max_examples=int(os.environ.get("FUZZ_EXAMPLES", 200)), deadline=None, derandomize=True, database=None,
          phases=_PHASES, print_blob=False,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(tables())
def test_any_table_shape_finishes_or_is_refused_in_one_line(case):
    frame, outcome, min_site_rows, _ = case
    _check_one(frame, outcome, min_site_rows)
