"""Figures of the drift analysis: a site x month heatmap of the top features and per-site time series
with the change points marked.

Drawn from the :class:`~sitecheck.analyses.drift.DriftResult` only (no statistics computed here). Periods with
fewer than ``min_cell`` values are not drawn (a median of a handful of rows is nearly a row). File
names are our own; data text appears only as matplotlib text, never in paths.
"""
from __future__ import annotations

from typing import Dict, List, Optional

import numpy as np

from .figures import FONT, _save, style
from .safety import suppress_count

#: Colour limits of the heatmap, in robust SD units of the site's own values.
HEAT_LIMIT = 0.5
MAX_PANELS = 6


def _month(date: str) -> int:
    return int(date[:4]) * 12 + int(date[5:7]) - 1


def _figure(n_rows: int, width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height * n_rows + 0.9), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(n_rows, 1, squeeze=False)[:, 0]
    return fig, axes


def _site_months(s, feature: str, key: str, min_cell: int):
    """(first month, values per month) of one site's series, spread over its months; None where small."""
    months = {"month": 1, "quarter": 3, "half-year": 6, "year": 12}[s.unit]
    fd = s.features.get(feature) or {}
    vals = fd.get(key) or []
    ns = fd.get("n") or []
    out = {}
    for start, v, n in zip(s.starts, vals, ns):
        if v is None or n < min_cell:
            continue
        m0 = _month(start)
        for k in range(months):
            out[m0 + k] = v
    return out


def heatmap(result, out_dir: str, *, min_cell: int = 10) -> List[str]:
    """One row of cells per site and one column per calendar month for each top feature: the period's
    median minus the site's median, in the site's robust SD; change points marked."""
    sites = [s for s in result.sites if s.assessed]
    feats = [f for f in result.top_features if any(f in s.features for s in sites)][:MAX_PANELS]
    if not sites or not feats:
        return []
    lo = min(_month(s.starts[0]) for s in sites)
    hi = max(_month(s.starts[-1]) + {"month": 1, "quarter": 3, "half-year": 6, "year": 12}[s.unit] for s in sites)
    width = min(14.0, max(7.0, 0.28 * (hi - lo) + 3))
    panel = 0.3 * len(sites) + 0.85
    fig, axes = _figure(len(feats), width, panel)
    total = panel * len(feats) + 0.9
    fig.subplots_adjust(top=1 - 0.75 / total, bottom=0.35 / total, hspace=0.75, right=0.86)
    cmap = "RdBu_r"
    im = None
    for ax, f in zip(axes, feats):
        H = np.full((len(sites), hi - lo), np.nan)
        for i, s in enumerate(sites):
            for m, v in _site_months(s, f, "level_sd", min_cell).items():
                H[i, m - lo] = v
        masked = np.ma.masked_invalid(H)
        im = ax.imshow(masked, aspect="auto", cmap=cmap, vmin=-HEAT_LIMIT, vmax=HEAT_LIMIT,
                       interpolation="nearest", extent=(lo - 0.5, hi - 0.5, len(sites) - 0.5, -0.5))
        ax.set_facecolor("#9e9e9e")
        ax.set_yticks(range(len(sites)))
        ax.set_yticklabels([s.site for s in sites], fontsize=FONT["tick"])
        for c in result.change_points:
            if c.feature != f or (not c.finding and c.scope != "network"):
                continue
            i = [s.site for s in sites].index(c.site) if c.site in [s.site for s in sites] else None
            if i is None:
                continue
            x = _month(c.date) - 0.5
            ax.plot([x, x], [i - 0.48, i + 0.48], color="black" if c.finding else "#555555", linewidth=2.2,
                    linestyle="-" if c.finding else ":")
        ticks = [m for m in range(lo, hi) if m % 3 == 0]
        ax.set_xticks(ticks)
        ax.set_xticklabels([f"{m // 12}-{m % 12 + 1:02d}" for m in ticks], fontsize=FONT["tick"], rotation=0)
        ax.set_title(f, fontsize=FONT["title"], loc="left")
    fig.suptitle("Median per period minus the site's median, in the site's robust SD (grey: no data or fewer "
                 f"than {min_cell} values)\nblack bar: a change found at that site; dotted bar: a network-wide "
                 "change", fontsize=FONT["note"], y=1 - 0.12 / total)
    cax = fig.add_axes((0.88, 0.35 / total, 0.015, 1 - 1.1 / total))
    cb = fig.colorbar(im, cax=cax, extend="both")
    cb.set_label("SD from the site's median", fontsize=FONT["label"])
    cb.ax.tick_params(labelsize=FONT["tick"])
    return _save(fig, out_dir, "drift_heatmap")


def _series_key(c) -> Optional[str]:
    if c.aspect in ("level", "spread"):
        return "median"
    if c.aspect == "missing":
        return "missing"
    return "artefact"


def time_series(result, out_dir: str, *, min_cell: int = 10) -> List[str]:
    """One panel per finding (or, without findings, per top feature): each site's period medians (the
    finding's site in colour with its interquartile band, the others in grey) or shares, with the change
    point as a vertical line."""
    import matplotlib.dates as mdates
    import pandas as pd

    panels = [c for c in result.change_points if c.finding][:MAX_PANELS]
    sites = [s for s in result.sites if s.assessed]
    if not sites:
        return []
    if not panels:
        panels = [None]
        feats = list(result.top_features[:1])
        if not feats:
            return []
    fig, axes = _figure(len(panels), 9.0, 2.6)
    order = {s.site: i for i, s in enumerate(result.sites)}
    for ax, c in zip(axes, panels):
        feature = c.feature if c is not None else feats[0]
        key = _series_key(c) if c is not None else "median"
        for s in sites:
            fd = s.features.get(feature)
            if not fd:
                continue
            if key == "median":
                vals = fd.get("median") or []
            elif key == "missing":
                vals = fd.get("missing") or []
            else:
                vals = (fd.get("artefacts") or {}).get(c.artefact) or []
            ns = fd.get("n") or [0] * len(vals)
            x, y, q1, q3 = [], [], [], []
            for i, (start, v, n) in enumerate(zip(s.starts, vals, ns)):
                if v is None or (key != "missing" and n < min_cell):
                    continue
                x.append(pd.Timestamp(start))
                y.append(v)
                q1.append((fd.get("q1") or [None] * len(vals))[i])
                q3.append((fd.get("q3") or [None] * len(vals))[i])
            if not x:
                continue
            mine = c is None or s.site == c.site
            colour, marker = style(order[s.site])
            if mine:
                ax.plot(x, y, color=colour, marker=marker, markersize=4, linewidth=1.6, label=s.site, zorder=3)
                if key == "median" and all(v is not None for v in q1 + q3):
                    ax.fill_between(x, q1, q3, color=colour, alpha=0.08, linewidth=0, step=None)
            else:
                ax.plot(x, y, color="#9a9a9a", linewidth=0.9, zorder=2, label=s.site if c is None else None)
        if c is not None:
            ax.axvline(pd.Timestamp(c.date), color="black", linestyle="--", linewidth=1.2)
            # the segments' medians either side (values from the change point itself)
            if key == "median" and c.before.get("median") is not None and c.after.get("median") is not None:
                left, right = ax.get_xlim()
                d = mdates.date2num(pd.Timestamp(c.date))
                ax.hlines([c.before["median"]], left, d, colors="black", linewidth=1.0, alpha=0.7)
                ax.hlines([c.after["median"]], d, right, colors="black", linewidth=1.0, alpha=0.7)
                ax.set_xlim(left, right)
            n_before = suppress_count(c.before.get("n"), min_cell)
            n_after = suppress_count(c.after.get("n"), min_cell)
            ax.set_title(f"{c.feature} at {c.site}: {c.detail}  (values before {n_before}, after {n_after})",
                         fontsize=FONT["note"], loc="left")
        else:
            ax.set_title(f"{feature}: median per period at each site (no change found)", fontsize=FONT["title"], loc="left")
        ylabel = {"median": "median (IQR band)", "missing": "missing share"}.get(key, "share of values")
        ax.set_ylabel(ylabel, fontsize=FONT["label"])
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m"))
        ax.tick_params(labelsize=FONT["tick"])
        ax.grid(alpha=0.25)
        ax.legend(fontsize=FONT["legend"], loc="upper left", frameon=False, ncol=4)
    fig.suptitle("Per-site series with change points (dashed); other sites in grey", fontsize=FONT["title"], y=0.995)
    fig.tight_layout(rect=(0, 0, 1, 0.97))
    return _save(fig, out_dir, "drift_series")


def drift_figures(result, out_dir: str, *, min_cell: int = 10, shareable: bool = False) -> List[str]:
    """Both drift figures; returns their relative paths (PNG and SVG)."""
    rels: List[str] = []
    rels += heatmap(result, out_dir, min_cell=min_cell)
    rels += time_series(result, out_dir, min_cell=min_cell)
    return rels
