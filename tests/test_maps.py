"""Maps and mixing: LISI against its published definition, embeddings, figures."""
import json
import math
import os
from types import SimpleNamespace

import numpy as np
import pytest
from scipy.optimize import brentq

from sitecheck.errors import InputError, ParameterError
from sitecheck.analyses.maps import compute_maps, embed, expected_random, kernel_weights, lisi, summarise_lisi


# ----------------------------------------------------------------- LISI, published definition

def test_lisi_hand_computed_three_points():
    # Korsunsky et al. (2019), Nature Methods 16:1289, Methods: for each row, Gaussian kernel weights
    # p_ij ~ exp(-beta_i d_ij^2) over its k nearest other rows, beta_i set so that the perplexity
    # exp(H(p_i)) equals the target; LISI_i = 1 / sum_b (sum_{j in b} p_ij)^2 (Simpson 1949, inverse).
    # Points on a line: x = 0 (site A), 1 (site B), 3 (site A); k = 2 (all other rows); perplexity 1.5.
    X = np.array([[0.0], [1.0], [3.0]])
    labels = np.array([0, 1, 0])
    got = lisi(X, labels, perplexity=1.5, n_neighbors=2)

    # With two neighbours the weights are (w, 1 - w); the perplexity condition is
    # -w log w - (1 - w) log(1 - w) = log 1.5, with w > 1/2 on the nearer neighbour.
    def h(w):
        return -w * math.log(w) - (1 - w) * math.log(1 - w) - math.log(1.5)

    w = brentq(h, 0.5 + 1e-12, 1 - 1e-12)  # about 0.8500 (solved here, not from memory)
    # Row 0: neighbours x=1 (B, nearer, weight w) and x=3 (A, weight 1-w): labels differ.
    lisi0 = 1.0 / (w ** 2 + (1 - w) ** 2)
    # Row 1: neighbours x=0 and x=3 are both A: one label holds all the weight -> exactly 1.
    lisi1 = 1.0
    # Row 2: neighbours x=1 (B, d=2, nearer) and x=0 (A, d=3): labels differ, same w.
    lisi2 = lisi0
    np.testing.assert_allclose(got, [lisi0, lisi1, lisi2], rtol=1e-4)
    # and the kernel is Gaussian in distance: w/(1-w) = exp(beta (d2^2 - d1^2)) gives one beta per row
    beta0 = math.log(w / (1 - w)) / (3 ** 2 - 1 ** 2)
    assert beta0 > 0


def test_lisi_uniform_limit_equals_number_of_labels():
    # Perplexity equal to k forces uniform weights (maximum entropy log k), so LISI is the inverse
    # Simpson's index of the neighbour label counts: two neighbours with different labels -> 2.
    # Row 0 (x=0): neighbours x=1 (B) and x=3 (A).
    X = np.array([[0.0], [1.0], [3.0]])
    got = lisi(X, [0, 1, 0], perplexity=2.0 - 1e-9, n_neighbors=2)
    assert got[0] == pytest.approx(2.0, rel=1e-3)
    assert got[1] == pytest.approx(1.0, abs=1e-12)


def test_lisi_equals_number_of_sites_when_shuffled():
    # Well-shuffled labels with equal site sizes: every neighbourhood mirrors the table, so LISI
    # approaches 1 / sum p^2 = 4 sites (Korsunsky et al. 2019). A finite kernel pulls it a little
    # lower: with labels drawn independently of position, E[sum_b W_b^2] = sum p^2 + (1 - sum p^2) *
    # sum_j p_ij^2 (variance of a weighted multinomial share; derivation here, not from a source).
    rng = np.random.default_rng(1)
    X = rng.normal(size=(2000, 5))
    labels = np.repeat(np.arange(4), 500)
    rng.shuffle(labels)
    assert expected_random([500] * 4) == pytest.approx(4.0)
    v = lisi(X, labels, perplexity=100)
    assert v.mean() == pytest.approx(4.0, rel=0.06)
    assert v.max() <= 4.0 + 1e-9
    # sharper: the finite-kernel expectation from the actual weights, row by row
    _, P = kernel_weights(X, perplexity=100)
    expect = 1.0 / (0.25 + 0.75 * (P ** 2).sum(axis=1))
    assert v.mean() == pytest.approx(expect.mean(), rel=0.02)
    v30 = lisi(X, labels, perplexity=30)
    _, P30 = kernel_weights(X, perplexity=30)
    assert v30.mean() == pytest.approx((1.0 / (0.25 + 0.75 * (P30 ** 2).sum(axis=1))).mean(), rel=0.03)


def test_lisi_equals_one_on_separated_clusters():
    # Three far-apart clusters of 120 rows each (more than k = 90 rows per cluster): every
    # neighbourhood holds one site only -> LISI = 1 exactly (by the definition).
    rng = np.random.default_rng(2)
    centres = np.array([[0, 0], [100, 0], [0, 100]])
    X = np.vstack([c + rng.normal(size=(120, 2)) for c in centres])
    labels = np.repeat([0, 1, 2], 120)
    v = lisi(X, labels, perplexity=30)
    np.testing.assert_allclose(v, 1.0, atol=1e-9)
    s = summarise_lisi(v, labels, ("a", "b", "c"), n_boot=50, random_state=0)
    assert s.normalised == pytest.approx(1 / 3)
    assert s.per_site["b"]["n"] == 120


def test_expected_random_unequal_sites():
    # inverse Simpson's index of proportions (Simpson 1949): p = (.5, .3, .2) -> 1/(.25+.09+.04)
    assert expected_random([50, 30, 20]) == pytest.approx(1 / 0.38)


def _parameter_error(call, text):
    """A wrong parameter is a programming error (exit 3), not an InputError (exit 2), and says which."""
    with pytest.raises(ParameterError) as info:
        call()
    assert not isinstance(info.value, InputError) and text in str(info.value), str(info.value)


def test_lisi_rejects_bad_parameters():
    _parameter_error(lambda: lisi(np.zeros((5, 2)), [0, 1], perplexity=3), "2 labels for 5 rows")
    _parameter_error(lambda: lisi(np.zeros((5, 2)), [0, 1, 0, 1, 0], perplexity=1),
                     "perplexity must be greater than 1, got 1")
    _parameter_error(lambda: lisi(np.zeros(5), [0, 1, 0, 1, 0], perplexity=3), "X must be a 2-D matrix, got shape (5,)")
    _parameter_error(lambda: lisi(np.zeros((2, 2)), [0, 1], perplexity=3), "X must have at least 3 rows, got 2")


def test_embed_and_tsne_reject_bad_parameters():
    from sitecheck.analyses.maps import tsne_map

    Z = np.random.default_rng(0).normal(size=(30, 3))
    _parameter_error(lambda: embed(Z, methods=("pca", "mds")), "methods must be some of ['pca', 'tsne', 'umap'], "
                                                               "got unknown ['mds']")
    _parameter_error(lambda: tsne_map(Z, gradient="exact"), "gradient must be 'fft' or 'bh', got 'exact'")
    _parameter_error(lambda: tsne_map(Z, max_iter=100), "max_iter must be at least the 250 early-exaggeration "
                                                         "iterations, got 100")
    with pytest.raises(InputError, match="at least 5 rows, got 4"):  # too small a table: the user's data
        embed(Z[:4], methods=("pca",))


# ----------------------------------------------------------------- embeddings and the analysis

@pytest.fixture(scope="module")
def maps_demo(demo_prepared):
    # 240 rows of the demo (site-stratified), cheap settings
    return compute_maps(demo_prepared, max_rows=240, n_boot=50, tsne_max_iter=250, umap_n_epochs=50)


def test_embeddings_same_seed_identical():
    rng = np.random.default_rng(3)
    Z = rng.normal(size=(150, 6))
    a, _ = embed(Z, random_state=4, tsne_max_iter=250, umap_n_epochs=30)
    b, _ = embed(Z, random_state=4, tsne_max_iter=250, umap_n_epochs=30)
    for m in ("pca", "tsne", "umap"):
        assert a[m].shape == (150, 2)
        np.testing.assert_array_equal(a[m], b[m])


def test_compute_maps_contract_and_determinism(maps_demo, demo_prepared):
    d = maps_demo.to_dict()
    assert d["n_used"] == maps_demo.coords["pca"].shape[0]
    assert 200 <= d["n_used"] <= 240
    assert d["methods"] == ["pca", "tsne", "umap"]
    assert set(d["mixing"]) == {"features", "pca", "tsne", "umap"}
    for space, m in d["mixing"].items():
        o = m["overall"]
        assert 1.0 <= o["lisi_mean"] <= o["expected_random"] + 1e-9
        assert o["lisi_ci"][0] <= o["lisi_mean"] <= o["lisi_ci"][1]
        assert set(m["per_site"]) == set(demo_prepared.site_labels)
        assert d["silhouette"][space]["n"] == d["n_used"]
    # the demo injects strong site effects (a unit error, an offset, a site never measuring albumin):
    # the feature space is far from random mixing
    assert d["mixing"]["features"]["overall"]["normalised"] < 0.8
    # sklearn's silhouette_score on the same design and labels gives the same mean (reference library)
    from sklearn.metrics import silhouette_score
    from sitecheck.analyses.maps import preprocess

    idx = np.searchsorted(demo_prepared.rows, maps_demo.rows)
    Z = preprocess(demo_prepared.X[idx], demo_prepared.features.categorical)
    assert d["silhouette"]["features"]["value"] == pytest.approx(silhouette_score(Z, maps_demo.site), abs=1e-6)
    again = compute_maps(demo_prepared, max_rows=240, n_boot=50, tsne_max_iter=250, umap_n_epochs=50)
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(d, sort_keys=True)
    assert "coords" not in d


def test_compute_maps_validates_cap(demo_prepared):
    # the library names its own parameter (the scan's option map_rows is checked by ScanOptions)
    _parameter_error(lambda: compute_maps(demo_prepared, max_rows=3), "max_rows must be an integer of at least 50, got 3")
    _parameter_error(lambda: compute_maps(demo_prepared, max_rows=2.5e3), "got 2500.0")


# ----------------------------------------------------------------- figures and section

def _fake_result(maps):
    return SimpleNamespace(objects={"maps": maps})


@pytest.mark.parametrize("shareable", [False, True])
def test_figures_written_and_non_empty(maps_demo, tmp_path, shareable, monkeypatch):
    import matplotlib.axes

    from sitecheck.render.figures import write_figures

    drawn, scatter = [], matplotlib.axes.Axes.scatter
    per_call = []

    def spy(self, x, y, *a, **k):  # count the points each panel draws one by one
        per_call.append(len(x))
        return scatter(self, x, y, *a, **k)

    monkeypatch.setattr(matplotlib.axes.Axes, "scatter", spy)
    real_panel = __import__("sitecheck.render.figures", fromlist=["_panel"])._panel

    def panel(*a, **k):
        start = len(per_call)
        res = real_panel(*a, **k)
        if len(per_call) > start:
            drawn.append(sum(per_call[start:]))
        return res

    monkeypatch.setattr("sitecheck.render.figures._panel", panel)
    out = write_figures(_fake_result(maps_demo), str(tmp_path), min_cell=10, shareable=shareable)
    rels = out["embedding"]
    # site and outcome colourings, each PNG + SVG
    assert len(rels) == 4
    assert any(r.endswith(".svg") for r in rels) and any(r.endswith(".png") for r in rels)
    for rel in rels:
        assert rel.startswith("figures/")
        path = tmp_path / rel
        assert path.stat().st_size > 2000
    png = (tmp_path / rels[0]).read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    svg = (tmp_path / [r for r in rels if r.endswith(".svg")][0]).read_text()
    assert "<svg" in svg
    # Individual points: the point mode draws each mapped row with Axes.scatter (rasterised, so the SVG holds one
    # <image> per panel); the density mode must never call scatter and draws filled contours instead.
    n_rows = maps_demo.coords["pca"].shape[0]
    for rel in (r for r in rels if r.endswith(".svg")):
        text = (tmp_path / rel).read_text()
        if shareable:
            assert "density" in rel and "<image" not in text and text.count('<g id="QuadContourSet') >= 3, rel
        else:
            assert text.count("<image") == 3 and "QuadContourSet" not in text, rel
    assert drawn == ([] if shareable else [n_rows] * 6), drawn  # 3 panels x 2 colourings, every row once


def test_site_labels_never_become_paths(maps_demo, tmp_path):
    import dataclasses

    from sitecheck.render.figures import write_figures

    evil = dataclasses.replace(maps_demo, site_labels=("../x", "/etc/y", "<b>z</b>", "w"))
    rels = write_figures(_fake_result(evil), str(tmp_path), min_cell=10, shareable=False)["embedding"]
    for rel in rels:
        assert ".." not in rel and "etc" not in rel
        assert os.path.realpath(tmp_path / rel).startswith(os.path.realpath(tmp_path))
    assert not (tmp_path.parent / "x").exists()


def test_section_renders_escaped(maps_demo, tmp_path):
    from sitecheck.render.figures import write_figures
    from sitecheck.render.sections import maps as section

    d = maps_demo.to_dict()
    d["figures"] = write_figures(_fake_result(maps_demo), str(tmp_path), min_cell=10, shareable=False)["embedding"]
    key = next(iter(d["mixing"]["features"]["per_site"]))
    for m in d["mixing"].values():
        m["per_site"]["<script>x</script>"] = dict(m["per_site"][key], n=3)
    doc = {"embedding": d, "_out_dir": str(tmp_path)}
    page = section.html(doc, 10)
    assert "<script>x" not in page and "&lt;script&gt;" in page
    assert "data:image/png;base64," in page
    assert "withheld" in page  # the 3-row site's statistics are withheld at min_cell 10
    md = section.markdown(doc, 10)
    assert "LISI" in md and "<10" in md.replace("\\<", "<")


def test_group_colouring_and_pca_only(demo_prepared, tmp_path):
    import dataclasses

    from sitecheck.render.figures import write_figures

    rng = np.random.default_rng(5)
    groups = {"band": np.array([float(v) for v in rng.integers(0, 3, demo_prepared.n_used)], dtype=object)}
    prep = dataclasses.replace(demo_prepared, groups=groups)
    r = compute_maps(prep, max_rows=200, methods=("pca",), n_boot=20)
    assert r.methods == ("pca",) and set(r.to_dict()["mixing"]) == {"features", "pca"}
    column, labels = r.colourings["group_1"]
    assert column == "band" and set(labels) <= {"0", "1", "2"}
    rels = write_figures(_fake_result(r), str(tmp_path), min_cell=10, shareable=False)["embedding"]
    assert "figures/embedding_group_1.png" in rels and (tmp_path / "figures/embedding_group_1.svg").stat().st_size > 2000


def test_palette_fallback_distinct_pairs():
    # Okabe-Ito colours (8) x 10 markers: distinct (colour, marker) pairs for up to 80 sites
    from sitecheck.render.figures import OKABE_ITO, style

    assert len(set(OKABE_ITO)) == 8
    assert len({style(i) for i in range(80)}) == 80
    assert len({style(i)[0] for i in range(8)}) == 8


def test_maps_computed_apart_and_merged_equal_maps_computed_together(demo_prepared):
    # Consistency: the scan computes t-SNE apart from PCA and UMAP (two processes) and merges.
    from sitecheck.analyses.maps import compute_maps, merge_maps

    kw = dict(max_rows=600, n_boot=50, tsne_max_iter=250, umap_n_epochs=50, random_state=3)
    together = compute_maps(demo_prepared, **kw)
    merged = merge_maps(compute_maps(demo_prepared, methods=("pca", "umap"), **kw),
                        compute_maps(demo_prepared, methods=("tsne",), score_design=False, **kw))
    assert json.dumps(merged.to_dict(), sort_keys=False) == json.dumps(together.to_dict(), sort_keys=False)
    for m in ("pca", "tsne", "umap"):
        assert np.array_equal(merged.coords[m], together.coords[m])
    _parameter_error(lambda: merge_maps(together, together),  # the same map twice
                     "first and second must hold different maps; both hold ['pca', 'tsne', 'umap']")


# ----------------------------------------------------------------- t-SNE: FFT interpolation against today's map

def _thirty_site_prepared(n_per_site=40, seed=11):
    """An invented 30-site table shaped like a pooled laboratory extract: values rounded as analysers
    report them, a coded categorical column, a few cells missing, one test never measured at one
    site, and a site-specific offset on two features."""
    import pandas as pd

    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.prepare import prepare
    from sitecheck.table.roles import RoleSpec, assign_roles

    rng = np.random.default_rng(seed)
    sites = np.repeat([f"Clinic-{k:02d}" for k in range(30)], n_per_site)
    code = np.repeat(np.arange(30), n_per_site)
    shift = rng.normal(size=(30, 2))
    n = len(sites)
    frame = pd.DataFrame({
        "ward": sites,
        "sodium": np.round(140 + 3 * rng.normal(size=n) + 1.5 * shift[code, 0]),          # mmol/L, whole numbers
        "potassium": np.round(4.2 + 0.4 * rng.normal(size=n) + 0.2 * shift[code, 1], 1),  # one decimal
        "creatinine": np.round(np.exp(4.4 + 0.3 * rng.normal(size=n))),                   # umol/L, skewed
        "heart_rate": np.round(80 + 12 * rng.normal(size=n)),
        "temp_c": np.round(36.9 + 0.5 * rng.normal(size=n), 1),
        "triage": rng.choice(["T1", "T2", "T3", "T4"], size=n, p=[0.1, 0.3, 0.4, 0.2]),
    })
    frame.loc[rng.random(n) < 0.04, "heart_rate"] = np.nan
    frame.loc[frame["ward"] == "Clinic-07", "creatinine"] = np.nan  # never measured at one site
    table = assign_roles(frame_to_raw(frame), RoleSpec(site="ward"))
    return prepare(table, random_state=0)


def _today_tsne(Z, perplexity, seed):
    # The map before this change: scikit-learn's Barnes-Hut t-SNE, 350 iterations (250 with early
    # exaggeration 12), angle 0.7, PCA start, learning rate "auto".
    from sklearn.manifold import TSNE
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):  # one thread, as in a scan (OpenMP threads spin on a busy machine)
        return TSNE(n_components=2, perplexity=perplexity, init="pca", learning_rate="auto", max_iter=350,
                    angle=0.7, random_state=seed).fit_transform(Z)


@pytest.mark.parametrize("table", ["demo", "thirty_sites"])
def test_fft_tsne_same_mixing_and_trustworthiness_as_todays_map(table, demo_prepared):
    # Same conclusions: the normalised LISI of the new map within 0.03 of today's (scikit-learn's t-SNE,
    # the reference library) and scikit-learn's trustworthiness (Venna & Kaski 2001) no lower by more
    # than 0.01, on the 1,200-row demo fixture (4 sites) and an invented 30-site table.
    from sklearn.manifold import trustworthiness

    from sitecheck.analyses.maps import preprocess, tsne_map

    prep = demo_prepared if table == "demo" else _thirty_site_prepared()
    Z = preprocess(prep.X, prep.features.categorical)
    site = prep.site
    exp = expected_random(np.bincount(site))
    new, settings = tsne_map(Z, perplexity=30.0, random_state=0)
    assert settings["method"] == "fft_interpolation" and settings["max_iter"] == 350
    old = _today_tsne(Z, 30.0, 0)
    lisi_new, lisi_old = lisi(new, site).mean() / exp, lisi(old, site).mean() / exp
    assert abs(lisi_new - lisi_old) <= 0.03, (lisi_new, lisi_old)
    t_new, t_old = trustworthiness(Z, new, n_neighbors=5), trustworthiness(Z, old, n_neighbors=5)
    assert t_new >= t_old - 0.01, (t_new, t_old)
    # and a map, not noise: trustworthiness of random coordinates is about 0.5 (Venna & Kaski 2001)
    assert t_new > 0.8


_KERNEL_CHILD = r'''
import hashlib, json
import numpy as np
from sitecheck.analyses import maps
Z = np.random.default_rng(2).normal(size=(150, 4)).round(1)
coords, _ = maps.embed(Z, methods=("tsne", "umap"), random_state=1, umap_n_epochs=30)
from umap import layouts
stats = layouts._nb_optimize_layout_euclidean_single_epoch.stats
print(json.dumps({"sha": {m: hashlib.sha256(np.ascontiguousarray(c).tobytes()).hexdigest() for m, c in coords.items()},
                  "hits": sum(stats.cache_hits.values()), "misses": sum(stats.cache_misses.values()),
                  "path": stats.cache_path}))
'''


def test_umap_kernels_cached_between_processes_and_maps_bit_identical(tmp_path):
    # UMAP's numba kernels are compiled once and loaded from the user's cache directory by the next
    # process (numba's dispatcher statistics count cache hits and misses); a map drawn with loaded kernels
    # is bit-for-bit the map drawn with freshly compiled ones, and so is the t-SNE map of a fresh process.
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    runs = []
    for _ in range(2):
        out = subprocess.run([sys.executable, "-c", _KERNEL_CHILD], env=env, capture_output=True, text=True,
                             timeout=600)
        assert out.returncode == 0, out.stderr[-2000:]
        runs.append(json.loads(out.stdout.strip().splitlines()[-1]))
    first, second = runs
    assert first["path"].startswith(os.path.join(str(tmp_path), "sitecheck", "numba"))
    assert first["misses"] >= 1 and first["hits"] == 0  # compiled, then written to the cache
    assert second["hits"] >= 1 and second["misses"] == 0  # loaded, not compiled
    assert any(p.suffix == ".nbc" for p in tmp_path.rglob("*"))
    assert first["sha"] == second["sha"]


def test_second_process_queue_follows_measured_stage_costs():
    # The queue order (longest first) comes from estimates fitted to measured stage seconds
    # (run.py and the demo on an idle machine, 2026-12-02; the table in estimated_seconds):
    # harmonisation 5.2 s in all, PCA/UMAP 4.2 s and t-SNE 2.9 s on the 6,000-row demo; harmonisation
    # 8.8 s (30-class boosters), the maps 5.9 s and 4.1 s on 9,000 x 20 x 30; at 100,000 x 50 x 4
    # harmonisation 23.9 s, the residual probe 18.1 s, then the maps.
    from sitecheck.analyses.registry import REGISTRY, estimated_seconds

    def shape(n, p, sites, outcome):
        return SimpleNamespace(n_used=n, features=SimpleNamespace(kinds=["numeric"] * p, n_features=p),
                               site_labels=[f"s{k}" for k in range(sites)], outcome=np.zeros(n) if outcome else None)

    def order(prep, names=("maps", "maps_tsne", "harmonise", "harmonise_rest")):
        queued = [a for a in REGISTRY if a.name in set(names)]
        return [a.name for a in sorted(queued, key=lambda a: -a.cost(prep))]

    # harmonisation runs as two halves of two methods each (harmonise_parts), so that a half can fill
    # the other process's gap: each half is estimated at half the whole
    assert order(shape(6000, 19, 4, True)) == ["maps", "maps_tsne", "harmonise", "harmonise_rest"]
    assert order(shape(9000, 20, 30, False)) == ["maps", "harmonise", "harmonise_rest", "maps_tsne"]
    assert order(shape(100_000, 50, 4, False), ("maps", "maps_tsne", "harmonise", "harmonise_rest",
                                                 "residual_probe")) == [
        "residual_probe", "harmonise", "harmonise_rest", "maps", "maps_tsne"]

    def est(name, prep):
        if name == "harmonise":  # the whole check, both halves
            return estimated_seconds("harmonise", prep) + estimated_seconds("harmonise_rest", prep)
        return estimated_seconds(name, prep)

    # each estimate within 30% of the measured seconds it was fitted to
    for (n, p, k, o), name, measured in [((6000, 19, 4, True), "harmonise", 5.2), ((6000, 19, 4, True), "maps", 4.2),
                                          ((6000, 19, 4, True), "maps_tsne", 2.9), ((9000, 20, 30, False), "harmonise", 8.8),
                                          ((9000, 20, 30, False), "maps", 5.9), ((100_000, 50, 4, False), "harmonise", 23.9),
                                          ((100_000, 50, 4, False), "residual_probe", 18.1)]:
        assert abs(est(name, shape(n, p, k, o)) - measured) <= 0.3 * measured, (name, n)
