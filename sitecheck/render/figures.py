"""Figures of a scan (matplotlib, Agg backend, no global pyplot state).

:func:`write_figures` is the hook called by :func:`sitecheck.render.write.write_report`.
It draws from the result objects only (never computes statistics) and writes
PNG and SVG files inside ``out_dir/figures`` with :func:`atomic_write`. File
names are built from our own names and indices, never from data text.

One function per figure family; add a family by writing ``_<family>_figures``
and calling it from :func:`write_figures`.

Palette: the Okabe-Ito colour-blind-safe palette (eight colours), each site
also with its own marker. With more than eight sites the colours repeat in
the same order while the marker keeps changing (ten shapes), so every
(colour, marker) pair is distinct up to 80 sites; beyond that pairs repeat
and the legend says so.
"""
from __future__ import annotations

import io
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

from .safety import atomic_write, suppress_count

#: Okabe, M. & Ito, K. (2008) "Color Universal Design" palette (hex values as commonly published),
#: ordered so that the first four sites get the four most distinct hues (orange, blue, bluish
#: green, reddish purple; the two blues and the two oranges are four places apart) and yellow,
#: weakest on white, comes last.
OKABE_ITO = ("#E69F00", "#0072B2", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#000000", "#F0E442")
#: text sizes in points at the figure's own (printed) size: never below 9
FONT = {"tick": 9.5, "label": 10, "title": 11, "legend": 10, "note": 9}
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "*")
METHOD_TITLES = {"pca": "PCA", "tsne": "t-SNE", "umap": "UMAP"}
AXIS_NOTES = {
    "pca": "Axes: principal components (linear projection); not the original units.",
    "tsne": "Axes have no units; distances and cluster sizes are not metric.",
    "umap": "Axes have no units; distances and cluster sizes are not metric.",
}
MAX_LEVELS = 12  # levels of an outcome/group colouring drawn individually; the rest pooled as "other"


def style(i: int) -> Tuple[str, str]:
    """(colour, marker) of the i-th level."""
    # marker advances by one extra step every full colour cycle, so (colour, marker) pairs
    # stay distinct for 8 x 10 = 80 levels (9 is invertible mod 10)
    return OKABE_ITO[i % len(OKABE_ITO)], MARKERS[(i + i // len(OKABE_ITO)) % len(MARKERS)]


def _new_figure(n_panels: int):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(3.6 * n_panels, 4.6), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n_panels, squeeze=False)[0]
    return fig, axes


def _save(fig, out_dir: str, stem: str) -> List[str]:
    """PNG and SVG, both cropped to the figure's tight bounding box, computed once (``bbox_inches="tight"``
    draws the whole figure once more for every file to find it)."""
    import matplotlib

    bbox = fig.get_tightbbox(fig.canvas.get_renderer()).padded(matplotlib.rcParams["savefig.pad_inches"])
    rels = []
    for ext, meta in (("png", {"Software": None}), ("svg", {"Date": None, "Creator": None})):
        buf = io.BytesIO()
        fig.savefig(buf, format=ext, metadata=meta, bbox_inches=bbox)
        rel = f"figures/{stem}.{ext}"
        atomic_write(out_dir, rel, buf.getvalue())
        rels.append(rel)
    return rels


def _levels(labels: np.ndarray) -> Tuple[List[str], np.ndarray]:
    """Level names (most frequent first, at most MAX_LEVELS, then "other") and codes."""
    labels = np.asarray([str(v) for v in labels], dtype=object)
    uniq, counts = np.unique(labels, return_counts=True)
    order = sorted(range(len(uniq)), key=lambda i: (-counts[i], uniq[i]))
    keep = [uniq[i] for i in order[:MAX_LEVELS]]
    names = list(keep) + (["other"] if len(uniq) > MAX_LEVELS else [])
    pos = {v: i for i, v in enumerate(keep)}
    codes = np.array([pos.get(v, len(keep)) for v in labels], dtype=np.int64)
    return names, codes


def _density_levels(H: np.ndarray, fractions=(0.5, 0.9)) -> List[float]:
    """Density thresholds enclosing the given fractions of the mass (highest first)."""
    flat = np.sort(H.ravel())[::-1]
    cum = np.cumsum(flat)
    if cum[-1] <= 0:
        return []
    out = []
    for f in sorted(fractions, reverse=True):
        j = int(np.searchsorted(cum, f * cum[-1]))
        out.append(float(flat[min(j, len(flat) - 1)]))
    levels = sorted(set(v for v in out if v > 0))
    return levels


def _panel(ax, Y: np.ndarray, codes: np.ndarray, names: Sequence[str], *, min_cell: int, shareable: bool,
           method: str, axis_names: Sequence[str] = ()) -> List[Tuple[str, int, bool]]:
    """Draw one embedding panel; returns (name, count, drawn) per level for the legend."""
    from scipy.ndimage import gaussian_filter

    out = []
    lo, hi = Y.min(axis=0), Y.max(axis=0)
    pad = 0.05 * np.maximum(hi - lo, 1e-9)
    lo, hi = lo - pad, hi + pad
    # draw larger levels first so small ones stay visible on top
    order = sorted(range(len(names)), key=lambda k: -int((codes == k).sum()))
    bins = 60
    xe = np.linspace(lo[0], hi[0], bins + 1)
    ye = np.linspace(lo[1], hi[1], bins + 1)
    for k in order:
        colour, marker = style(k)
        pts = Y[codes == k]
        n = len(pts)
        if n == 0:
            continue
        if shareable:
            if n < max(min_cell, 3):
                out.append((names[k], n, False))  # withheld: too few rows to draw a density
                continue
            H, _, _ = np.histogram2d(pts[:, 0], pts[:, 1], bins=[xe, ye])
            H = gaussian_filter(H, sigma=1.5)
            lv = _density_levels(H)
            if lv:
                xc, yc = (xe[:-1] + xe[1:]) / 2, (ye[:-1] + ye[1:]) / 2
                ax.contourf(xc, yc, H.T, levels=lv + [H.max() + 1e-12], colors=[colour], alpha=0.18)
                ax.contour(xc, yc, H.T, levels=lv, colors=[colour], linewidths=[1.0, 1.8][:len(lv)])
            out.append((names[k], n, True))
        else:
            ax.scatter(pts[:, 0], pts[:, 1], s=9, c=colour, marker=marker, alpha=0.5, linewidths=0,
                       rasterized=True)
            out.append((names[k], n, True))
    ax.set_xlim(lo[0], hi[0])
    ax.set_ylim(lo[1], hi[1])
    ax.set_title(METHOD_TITLES.get(method, method), fontsize=FONT["title"])
    ax.set_xticks([])
    ax.set_yticks([])
    xl, yl = (list(axis_names) + [f"{METHOD_TITLES.get(method, method)} 1", f"{METHOD_TITLES.get(method, method)} 2"])[:2] \
        if len(axis_names) == 2 else (f"{METHOD_TITLES.get(method, method)} 1", f"{METHOD_TITLES.get(method, method)} 2")
    ax.set_xlabel(xl, fontsize=FONT["label"])
    ax.set_ylabel(yl, fontsize=FONT["label"])
    return out


def _one_colouring(maps, out_dir: str, stem: str, title: str, names: Sequence[str], codes: np.ndarray, *,
                   min_cell: int, shareable: bool) -> List[str]:
    methods = [m for m in maps.methods if m in maps.coords]
    if not methods:
        return []
    fig, axes = _new_figure(len(methods))
    entries = []
    evr = ((getattr(maps, "settings", {}) or {}).get("pca") or {}).get("explained_variance_ratio") or []
    for ax, m in zip(axes, methods):
        names_ax = [f"PC{i + 1} ({100 * v:.1f}% of variance)" for i, v in enumerate(evr[:2])] if m == "pca" else []
        entries = _panel(ax, maps.coords[m], codes, names, min_cell=min_cell, shareable=shareable, method=m,
                         axis_names=names_ax)
    # legend in level order, counts from the mapped rows
    from matplotlib.lines import Line2D

    drawn = {name: ok for name, _, ok in entries}
    handles, texts = [], []
    for k, name in enumerate(names):
        n = int((codes == k).sum())
        if n == 0:
            continue
        colour, marker = style(k)
        label = f"{name} (n = {suppress_count(n, min_cell)})" + ("" if drawn.get(name, True) else ", not drawn")
        handles.append(Line2D([], [], color=colour, marker=("s" if shareable else marker), linestyle="",
                              markersize=9))
        texts.append(label)
    if len(names) > len(OKABE_ITO) * len(MARKERS):
        title += " (colour-marker pairs repeat)"
    mode = "density contours (50% and 90% of each level's rows), no individual points" if shareable else \
        "one point per row"
    n_rows_legend = -(-len(texts) // 4)
    top = 0.84 - 0.05 * n_rows_legend
    fig.suptitle(f"{title}: {maps.n_used} mapped rows, {mode}", fontsize=FONT["title"], y=0.99)
    fig.legend(handles, texts, loc="upper center", ncol=min(4, max(1, len(texts))), fontsize=FONT["legend"],
               frameon=False, bbox_to_anchor=(0.5, 0.95))
    fig.text(0.5, 0.01, "PCA: linear projection of the scaled features. t-SNE and UMAP: axes have no units; "
             "distances and cluster sizes are not metric.", ha="center", fontsize=FONT["note"], color="#444444")
    fig.subplots_adjust(top=top, bottom=0.1, wspace=0.12)
    return _save(fig, out_dir, stem)


def _embedding_figures(maps, out_dir: str, *, min_cell: int, shareable: bool) -> List[str]:
    """One multi-panel figure (PCA, t-SNE, UMAP) per colouring: by site, by outcome, by each group."""
    rels: List[str] = []
    suffix = "_density" if shareable else ""
    site_names = [str(s) for s in maps.site_labels]
    rels += _one_colouring(maps, out_dir, f"embedding_site{suffix}", "Coloured by site", site_names,
                           np.asarray(maps.site, dtype=np.int64), min_cell=min_cell, shareable=shareable)
    for key, (column, labels) in maps.colourings.items():
        names, codes = _levels(labels)
        names = [level_words(column, v) for v in names]
        stem = "embedding_outcome" if key == "outcome" else f"embedding_{key}"
        rels += _one_colouring(maps, out_dir, stem + suffix, f"Coloured by {column}", names, codes,
                               min_cell=min_cell, shareable=shareable)
    return rels


def level_words(column: str, level: str) -> str:
    """A legend entry in words: a 0/1 (or false/true) level reads "column: no" / "column: yes"."""
    v = str(level).strip().lower()
    if v in ("0", "0.0", "false"):
        return f"{column}: no"
    if v in ("1", "1.0", "true"):
        return f"{column}: yes"
    return str(level)


# ------------------------------------------------------------------ evidence figures
# Each draws numbers the analyses produced (the report document) or, for per-site
# distributions, the raw values of the table the scan holds; none computes a statistic.

from .words import DISTRIBUTION, MECHANICAL, artefact  # noqa: E402

#: at most this many per-site distribution figures (mechanical findings first, then top leakers,
#: then the largest location or spread gap of each site)
MAX_DISTRIBUTIONS = 24
TOP_LEAKERS = 6
BINS = 60


def _fig(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _save_png(fig, out_dir: str, stem: str) -> Dict[str, str]:
    """PNG only, at the figure's own size (no tight bounding box: the layout is fixed), to stay cheap."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    rel = f"figures/{stem}.png"
    atomic_write(out_dir, rel, buf.getvalue())
    return {"png": rel}


def _site_styles(sites: Sequence[str]) -> Dict[str, Tuple[str, str]]:
    return {s: style(i) for i, s in enumerate(sites)}


def _small(n, min_cell: int) -> bool:
    return not isinstance(n, int) or 0 < n < min_cell


def _tight(fig) -> None:
    """Tight layout where it fits; very long labels (data text) keep the default margins, without a warning."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        fig.tight_layout()


def _forest(doc: dict, out_dir: str, sites: Sequence[str], *, min_cell: int) -> List[dict]:
    probe = doc.get("probe") or {}
    per = probe.get("per_site") or {}
    rows = [(s, e) for s, e in per.items() if isinstance(e, dict) and e.get("auc") is not None
            and not _small(e.get("n"), min_cell)]
    if not rows or probe.get("auc") is None:
        return []
    st = _site_styles(sites)
    fig = _fig(5.2, 0.5 * (len(rows) + 1) + 1.3)
    ax = fig.add_subplot(1, 1, 1)
    labels = []
    for i, (s, e) in enumerate(rows):
        colour, marker = st.get(s, ("#333333", "o"))
        lo, hi = e.get("auc_ci") or [e["auc"], e["auc"]]
        ax.plot([lo, hi], [i, i], color=colour, lw=2.2)
        ax.plot([e["auc"]], [i], marker=marker, color=colour, markersize=9, linestyle="")
        labels.append(f"{s} (n = {suppress_count(e.get('n'), min_cell)})")
    j = len(rows)
    lo, hi = probe.get("auc_ci") or [probe["auc"], probe["auc"]]
    ax.plot([lo, hi], [j, j], color="#222222", lw=2.6)
    ax.plot([probe["auc"]], [j], marker="D", color="#222222", markersize=9, linestyle="")
    labels.append("all sites (macro)")
    ax.set_yticks(range(len(labels)))
    ax.set_yticklabels(labels, fontsize=FONT["tick"])
    ax.invert_yaxis()
    lows = [r[1]["auc_ci"][0] for r in rows if r[1].get("auc_ci")] + [lo]
    left = min(lows) - 0.02
    if left < 0.7:
        ax.axvline(0.5, color="#888888", lw=1, ls="--")
        left = min(0.45, left)
        note = "dashed: chance (0.5)"
    else:
        note = "chance (0.5) lies off the left edge"
    ax.set_xlim(left, 1.005)
    ax.tick_params(axis="x", labelsize=FONT["tick"])
    ax.set_xlabel(f"AUC against the rest (95% CI)", fontsize=FONT["label"])
    ax.text(0.0, 1.02, note, transform=ax.transAxes, fontsize=FONT["note"], color="#444444")
    _tight(fig)
    item = _save_png(fig, out_dir, "probe_forest")
    item.update(id="fig-probe-forest", caption="Site probe AUC of each site against the rest, with 95% intervals; "
                "the bottom row is the macro AUC over all sites. 0.5 is chance.")
    return [item]


def _leak_chart(doc: dict, out_dir: str) -> List[dict]:
    leak = [e for e in doc.get("leakage") or [] if isinstance(e.get("score_ci"), list) and e["score_ci"][0] is not None]
    if not leak:
        return []
    shown = [e for e in leak if e["score_ci"][0] > 0][:20]
    flagged = {f.get("feature"): f.get("kind") for f in doc.get("fingerprints") or []}
    rec = {r.get("feature") for r in ((doc.get("reconciliation") or {}).get("entries") or [])}
    extra = [e for e in leak if e not in shown and e["feature"] in rec][:5]
    rows = shown + extra
    if not rows:
        return []
    fig = _fig(6.4, 0.36 * len(rows) + 1.5)
    ax = fig.add_subplot(1, 1, 1)
    for i, e in enumerate(rows):
        lo, hi = e["score_ci"]
        fp = e["feature"] in flagged
        colour = "#D55E00" if fp else "#0072B2"
        ax.plot([lo, hi], [i, i], color=colour, lw=2.2)
        ax.plot([e["score"]], [i], marker="s" if fp else "o", color=colour, markersize=8, linestyle="")
    ax.axvline(0, color="#888888", lw=1)
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([e["feature"] + ("  *" if e["feature"] in flagged else "") for e in rows],
                       fontsize=FONT["tick"])
    ax.invert_yaxis()
    ax.tick_params(axis="x", labelsize=FONT["tick"])
    ax.set_xlabel("drop in the site probe's held-out AUC when shuffled (95% CI)", fontsize=FONT["label"])
    from matplotlib.lines import Line2D

    ax.legend([Line2D([], [], color="#D55E00", marker="s", lw=2), Line2D([], [], color="#0072B2", marker="o", lw=2)],
              ["* has a fingerprint (a recorded artefact or gap)", "no fingerprint"], fontsize=FONT["legend"],
              loc="lower right", frameon=False)
    _tight(fig)
    item = _save_png(fig, out_dir, "leak_ranking")
    n_near = len(extra)
    item.update(id="fig-leak-ranking", caption="Leak ranking: features whose shuffling lowers the site probe's AUC, "
                "with 95% intervals over folds" + (f"; the last {n_near} are fingerprinted features near 0 "
                                                   "(another feature already separates their site)" if n_near else "") + ".")
    return [item]


def _missing_heatmap(doc: dict, out_dir: str, sites: Sequence[str]) -> List[dict]:
    leak = doc.get("leakage") or []
    feats, rates = [], []
    for e in leak:
        r = (e.get("missing_by_site") or {}).get("rate") or {}
        vals = [r.get(s) for s in sites]
        if any(isinstance(v, (int, float)) and v > 0 for v in vals):
            feats.append(e["feature"])
            rates.append([v if isinstance(v, (int, float)) else np.nan for v in vals])
    if not feats:
        return []
    feats, rates = feats[:40], np.array(rates[:40], dtype=float).T  # sites x features
    fig = _fig(min(11.0, 1.6 + 0.55 * len(feats)), 0.5 * len(sites) + 2.2)
    ax = fig.add_subplot(1, 1, 1)
    im = ax.imshow(rates * 100, cmap="cividis", vmin=0, vmax=100, aspect="auto")
    ax.set_xticks(range(len(feats)))
    ax.set_xticklabels(feats, rotation=45, ha="right", fontsize=FONT["tick"])
    ax.set_yticks(range(len(sites)))
    ax.set_yticklabels(list(sites), fontsize=FONT["tick"])
    numbers = len(feats) <= 20 and rates.size <= 200  # hundreds of cell labels cost seconds and are unreadable
    if numbers:
        for i in range(rates.shape[0]):
            for j in range(rates.shape[1]):
                v = rates[i, j]
                if np.isfinite(v):
                    ax.text(j, i, f"{100 * v:.0f}", ha="center", va="center", fontsize=FONT["note"],
                            color="white" if v < 0.6 else "black")
    cb = fig.colorbar(im, ax=ax, fraction=0.04, pad=0.02)
    cb.set_label("% of the site's rows missing", fontsize=FONT["label"])
    cb.ax.tick_params(labelsize=FONT["tick"])
    _tight(fig)
    item = _save_png(fig, out_dir, "missing_by_site")
    item.update(id="fig-missing", caption="Share of each site's rows missing, for the features with any missing "
                "value" + (" (numbers in %)." if numbers else " (colour scale in %)."))
    return [item]


def _distribution_features(doc: dict) -> List[str]:
    fps = doc.get("fingerprints") or []
    order: List[str] = []

    def add(f):
        if f and f not in order:
            order.append(f)

    for f in fps:
        if f.get("kind") in MECHANICAL:
            add(f.get("feature"))
    for e in (doc.get("leakage") or [])[:TOP_LEAKERS]:
        if isinstance(e.get("score_ci"), list) and (e["score_ci"][0] or 0) > 0:
            add(e["feature"])
    best: Dict[str, Tuple[float, str]] = {}
    for f in fps:
        if f.get("kind") in DISTRIBUTION:
            ev = f.get("evidence") or {}
            size = abs(ev.get("smd") or 0) if f.get("kind") == "shift" else 0.0
            if f.get("site") not in best or size > best[f["site"]][0]:
                best[f["site"]] = (size, f.get("feature"))
    for _, feat in sorted(best.values(), key=lambda t: -t[0]):
        add(feat)
    return order[:MAX_DISTRIBUTIONS]


def _mark(ax, f: dict, colour: str) -> str:
    """Draw the artefact of one finding on its site's panel; return a short label in words."""
    ev = f.get("evidence") or {}
    kind = f.get("kind")
    kw = dict(color="#000000", lw=1.6)
    if kind == "missing_code" and isinstance(ev.get("value"), (int, float)):
        ax.axvline(ev["value"], ls="--", **kw)
        return f"{artefact(kind)} {ev['value']:g}"
    if kind in ("floor", "ceiling") and isinstance(ev.get("limit"), (int, float)):
        ax.axvline(ev["limit"], ls="--", **kw)
        return f"{artefact(kind)} {ev['limit']:g}"
    if kind == "precision" and ev.get("grid"):
        return f"{artefact(kind)}: steps of {ev.get('step_site', ev.get('grid')):g}"
    if kind == "unit_ratio":
        if isinstance(ev.get("median_site"), (int, float)):
            ax.axvline(ev["median_site"], ls="--", **kw)
        return f"{artefact(kind)}: ×{ev.get('ratio', 0):.3g} (median {ev.get('median_site', 0):g})"
    if kind == "shift" and isinstance(ev.get("mean_site"), (int, float)):
        ax.axvline(ev["mean_site"], ls="-", **kw)
        if isinstance(ev.get("mean_reference"), (int, float)):
            ax.axvline(ev["mean_reference"], ls=":", **kw)
        return f"{artefact(kind)}: mean {ev['mean_site']:.4g} (dotted: {ev.get('mean_reference', 0):.4g} elsewhere)"
    if kind == "scale" and isinstance(ev.get("sd_ratio"), (int, float)):
        return f"{artefact(kind)}: SD ×{ev['sd_ratio']:.2f}"
    return artefact(kind)


def _edges(v: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Histogram edges aligned to the values' recording resolution (so a grid shows as the
    data's, not as an artefact of the bins): the coarsest of 1, 0.5, 0.1, 0.05, 0.01, 0.001
    that every value is a multiple of, widened to at most BINS bins."""
    if hi <= lo:
        return np.array([lo - 0.5, hi + 0.5])
    sample = v[:: max(1, len(v) // 5000)]
    for d in (1.0, 0.5, 0.1, 0.05, 0.01, 0.001):
        if np.all(np.abs(sample / d - np.round(sample / d)) < 1e-6):
            width = d * max(1.0, np.ceil((hi - lo) / d / BINS))
            start = np.floor(lo / d) * d - width / 2
            return np.arange(start, hi + width, width)
    return np.linspace(lo, hi, BINS + 1)


def _drawn_range(v, ok, site, sites, edges, min_cell) -> Tuple[float, float]:
    """The range of the bins that hold at least ``min_cell`` rows at some site (the bins drawn)."""
    lo, hi = np.inf, -np.inf
    for s in sites:
        h, _ = np.histogram(v[ok & (site == s)], bins=edges)
        nz = np.nonzero(h >= min_cell)[0]
        if len(nz):
            lo, hi = min(lo, edges[nz[0]]), max(hi, edges[nz[-1] + 1])
    return float(lo), float(hi)


def numeric_hint(col) -> bool:
    return np.issubdtype(np.asarray(col).dtype, np.number)


class _Band:
    """One site's band of a distribution figure: :func:`_mark` draws its vertical lines inside it."""

    def __init__(self, ax, y0: float, n_bands: int):
        self.ax, self.lo, self.hi = ax, y0 / n_bands, (y0 + 1) / n_bands

    def axvline(self, x, **kw):
        return self.ax.axvline(x, ymin=self.lo + 0.02 / 3, ymax=self.hi - 0.02 / 3, **kw)


def _one_distribution(frame, site_col: str, sites: Sequence[str], feature: str, findings: List[dict],
                      out_dir: str, index: int, *, min_cell: int) -> Optional[dict]:
    """One feature's distribution at every site: one band per site (top to bottom in site order) on
    shared axes, each site's histogram scaled to its band, the finding's artefact marked in the band
    and named above it. One Axes for all sites keeps a 30-site figure as cheap as a 4-site one."""
    import pandas as pd
    from matplotlib.transforms import blended_transform_factory

    col = frame[feature]
    values = pd.to_numeric(col, errors="coerce") if col.dtype == object or str(col.dtype) in ("str", "string") \
        else col
    site = frame[site_col].astype(str).to_numpy()
    numeric = np.issubdtype(np.asarray(values).dtype, np.number) and np.isfinite(
        np.asarray(values, dtype=float)).sum() > 0.5 * col.notna().sum()
    st = _site_styles(sites)
    by_site = {f.get("site"): f for f in findings}
    unit = any(f.get("kind") == "unit_ratio" for f in findings)
    n_bands = len(sites)
    band_in = 0.95 if n_bands <= 8 else 0.55
    fig = _fig(6.4, band_in * n_bands + (1.4 if not numeric_hint(col) else 1.1))
    ax = fig.add_subplot(1, 1, 1)
    text_at = blended_transform_factory(ax.transAxes, ax.transData)
    if numeric:
        v = np.asarray(values, dtype=float)
        ok = np.isfinite(v) & ((v > 0) if unit else True)
        if not ok.any():
            return None
        lo, hi = np.nanmin(v[ok]), np.nanmax(v[ok])
        edges = (np.geomspace(lo, hi, BINS + 1) if unit and lo > 0 and hi > lo else _edges(v[ok], lo, hi))
        if not unit:  # a long tail of sparse bins (not drawn) would squeeze the rest: bin the drawn range
            x0, x1 = _drawn_range(v, ok, site, sites, edges, min_cell)
            if x1 > x0 and (x1 - x0) < 0.5 * (hi - lo):
                lines = [ev for f in findings for ev in ((f.get("evidence") or {}).get(k) for k in
                                                          ("value", "limit")) if isinstance(ev, (int, float))]
                x0, x1 = min([x0] + lines), max([x1] + lines)
                edges = _edges(v[ok & (v >= x0) & (v <= x1)], x0, x1)
        drawn: List[float] = []
        if unit:
            ax.set_xscale("log")
    else:
        levels = [str(x) for x in col.dropna().astype(str).value_counts().index[:12]]
    for b, s in enumerate(sites):
        y0 = float(n_bands - 1 - b)  # first site on top
        colour, _ = st[s]
        mask = site == s
        n_site = int(mask.sum())
        f = by_site.get(s)
        label = ""
        if numeric:
            x = v[mask & ok]
            if len(x) >= min_cell:
                h, _ = np.histogram(x[(x >= edges[0]) & (x <= edges[-1])], bins=edges)
                h = np.where(h < min_cell, 0, h)  # small cells are not drawn
                nz = np.nonzero(h)[0]
                if len(nz):
                    drawn += [edges[nz[0]], edges[nz[-1] + 1]]
                    ax.stairs(y0 + 0.8 * h / h.max(), edges, baseline=y0, fill=True, color=colour, alpha=0.85)
            if f is not None:
                label = _mark(_Band(ax, y0, n_bands), f, colour)
        else:
            x = col[mask].dropna().astype(str)
            counts = x.value_counts()
            share = np.array([counts.get(lv, 0) / max(1, len(x)) if counts.get(lv, 0) >= min_cell else 0
                              for lv in levels], dtype=float)
            if share.max() > 0:
                ax.bar(range(len(levels)), 0.8 * share / share.max(), bottom=y0, color=colour, alpha=0.85)
            if f is not None:
                label = artefact(f.get("kind"))
        miss = int(pd.isna(values[mask]).sum()) if numeric else int(col[mask].isna().sum())
        if f is not None and f.get("kind") == "site_missing":
            label = f"{artefact('site_missing')}: every row missing"
        elif n_site and miss == n_site:
            label = label or "no values"
        ax.axhline(y0, color="#BBBBBB", lw=0.6, zorder=0)
        if label:  # at the top of the site's band, right-aligned, so it never hides a bar
            ax.text(1.0, y0 + 0.83, label, transform=text_at, ha="right", va="bottom", fontsize=FONT["note"] + 0.5,
                    fontweight="bold", color="#000000", clip_on=False)
    ax.set_ylim(0, n_bands)
    ax.set_yticks(np.arange(n_bands) + 0.4)
    ax.set_yticklabels(list(reversed([str(s) for s in sites])), fontsize=FONT["tick"], color="#222222")
    ax.tick_params(axis="y", length=0)
    for sp in ("top", "right", "left"):
        ax.spines[sp].set_visible(False)
    ax.tick_params(axis="x", labelsize=FONT["tick"])
    if numeric and drawn:
        lines = [ln.get_xdata()[0] for ln in ax.get_lines() if ln.get_xdata()[0] == ln.get_xdata()[-1]
                 and len(set(np.atleast_1d(ln.get_ydata()))) > 1]
        x0, x1 = min(drawn + lines), max(drawn + lines)
        pad = 0.03 * (x1 - x0) if not unit else 0.0
        ax.set_xlim(x0 - pad, x1 + pad)
    if not numeric:
        ax.set_xticks(range(len(levels)))
        ax.set_xticklabels(levels, rotation=30, ha="right", fontsize=FONT["tick"])
    ax.set_xlabel(feature + (" (log scale)" if unit else "") + "; bars: share of the site's values",
                  fontsize=FONT["label"])
    fig.suptitle(feature, fontsize=FONT["title"], fontweight="bold", x=0.02, ha="left")
    height = fig.get_figheight()
    fig.subplots_adjust(left=0.2, right=0.96, top=1 - 0.55 / height, bottom=(0.95 if not numeric else 0.62) / height)
    item = _save_png(fig, out_dir, f"distribution_{index:02d}")
    words = "; ".join(f"{f.get('site')}: {artefact(f.get('kind'))}" for f in findings) or "a top leaking feature"
    item.update(id=f"fig-dist-{index:02d}", feature=feature,
                caption=f"{feature} by site ({words}). Each site's tallest bar fills its band. Bins holding "
                        f"fewer than {min_cell} rows are not drawn.")
    return item


def _distributions(result, doc: dict, out_dir: str, sites: Sequence[str], *, min_cell: int) -> List[dict]:
    table = (getattr(result, "objects", {}) or {}).get("table")
    frame = getattr(table, "frame", None)
    site_col = getattr(table, "site", None)
    if frame is None or site_col is None:
        return []
    out = []
    for i, feat in enumerate(_distribution_features(doc)):
        if feat not in frame.columns:
            continue
        findings = [f for f in doc.get("fingerprints") or [] if f.get("feature") == feat]
        item = _one_distribution(frame, site_col, sites, feat, findings, out_dir, i, min_cell=min_cell)
        if item:
            out.append(item)
    return out


def write_figures(result, out_dir: str, *, min_cell: int = 10, shareable: bool = False) -> Dict[str, List[str]]:
    """Write every figure family of ``result`` (a ScanResult); return {section: [relative paths]}."""
    out: Dict[str, list] = {}
    objects = getattr(result, "objects", {}) or {}
    maps = objects.get("maps")
    if maps is not None and getattr(maps, "coords", None):
        out["embedding"] = _embedding_figures(maps, out_dir, min_cell=min_cell, shareable=shareable)
    doc = result.to_dict() if hasattr(result, "to_dict") else {}
    sites = [str(s) for s in ((doc.get("input") or {}).get("sites") or {})]
    small = {s for s, n in ((doc.get("input") or {}).get("sites") or {}).items() if _small(n, min_cell)}
    sites_drawn = [s for s in sites if s not in small]
    for key, items in (("probe", _forest(doc, out_dir, sites, min_cell=min_cell)),
                       ("leakage", _leak_chart(doc, out_dir)),
                       ("missingness", _missing_heatmap(doc, out_dir, sites_drawn)),
                       ("distributions", _distributions(result, doc, out_dir, sites_drawn, min_cell=min_cell))):
        if items:
            out[key] = items
    drift = objects.get("drift")
    if drift is not None and getattr(drift, "sites", None):
        from .figures_drift import drift_figures

        out["drift"] = drift_figures(drift, out_dir, min_cell=min_cell, shareable=shareable)
    return out
