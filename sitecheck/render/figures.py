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
from typing import Dict, List, Sequence, Tuple

import numpy as np

from .safety import atomic_write, suppress_count

#: Okabe, M. & Ito, K. (2008) "Color Universal Design" palette (hex values as commonly published),
#: with yellow (weakest on white) moved last.
OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#000000", "#F0E442")
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

    fig = Figure(figsize=(4.6 * n_panels, 4.9), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n_panels, squeeze=False)[0]
    return fig, axes


def _save(fig, out_dir: str, stem: str) -> List[str]:
    rels = []
    for ext, meta in (("png", {"Software": None}), ("svg", {"Date": None, "Creator": None})):
        buf = io.BytesIO()
        fig.savefig(buf, format=ext, metadata=meta, bbox_inches="tight")
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
           method: str) -> List[Tuple[str, int, bool]]:
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
            ax.scatter(pts[:, 0], pts[:, 1], s=7, c=colour, marker=marker, alpha=0.55, linewidths=0,
                       rasterized=True)
            out.append((names[k], n, True))
    ax.set_xlim(lo[0], hi[0])
    ax.set_ylim(lo[1], hi[1])
    ax.set_title(METHOD_TITLES.get(method, method))
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_xlabel(f"{METHOD_TITLES.get(method, method)} 1", fontsize=8)
    ax.set_ylabel(f"{METHOD_TITLES.get(method, method)} 2", fontsize=8)
    ax.text(0.0, -0.1, AXIS_NOTES.get(method, ""), transform=ax.transAxes, fontsize=7, va="top", color="#444444")
    return out


def _one_colouring(maps, out_dir: str, stem: str, title: str, names: Sequence[str], codes: np.ndarray, *,
                   min_cell: int, shareable: bool) -> List[str]:
    methods = [m for m in maps.methods if m in maps.coords]
    if not methods:
        return []
    fig, axes = _new_figure(len(methods))
    entries = []
    for ax, m in zip(axes, methods):
        entries = _panel(ax, maps.coords[m], codes, names, min_cell=min_cell, shareable=shareable, method=m)
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
                              markersize=8))
        texts.append(label)
    if len(names) > len(OKABE_ITO) * len(MARKERS):
        title += " (colour-marker pairs repeat)"
    mode = "density contours (50% and 90% of each level's rows), no individual points" if shareable else \
        "one point per row"
    n_rows_legend = -(-len(texts) // 4)
    top = 0.86 - 0.045 * n_rows_legend
    fig.suptitle(f"{title}: {maps.n_used} mapped rows, {mode}", fontsize=10, y=0.99)
    fig.legend(handles, texts, loc="upper center", ncol=min(4, max(1, len(texts))), fontsize=8,
               frameon=False, bbox_to_anchor=(0.5, 0.955))
    fig.subplots_adjust(top=top, bottom=0.12, wspace=0.12)
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
        stem = "embedding_outcome" if key == "outcome" else f"embedding_{key}"
        rels += _one_colouring(maps, out_dir, stem + suffix, f"Coloured by {column}", names, codes,
                               min_cell=min_cell, shareable=shareable)
    return rels


def write_figures(result, out_dir: str, *, min_cell: int = 10, shareable: bool = False) -> Dict[str, List[str]]:
    """Write every figure family of ``result`` (a ScanResult); return {section: [relative paths]}."""
    out: Dict[str, List[str]] = {}
    objects = getattr(result, "objects", {}) or {}
    maps = objects.get("maps")
    if maps is not None and getattr(maps, "coords", None):
        out["embedding"] = _embedding_figures(maps, out_dir, min_cell=min_cell, shareable=shareable)
    drift = objects.get("drift")
    if drift is not None and getattr(drift, "sites", None):
        from .figures_drift import drift_figures

        out["drift"] = drift_figures(drift, out_dir, min_cell=min_cell, shareable=shareable)
    return out
