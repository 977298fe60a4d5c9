"""Report section: do the sites mix in a 2-D map (LISI and silhouette by site, with the figures)."""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import embed_image, esc, num, table_html
from ..markdown import md_escape, md_table
from ..safety import suppress_count

SPACE_NAMES = {"features": "feature space", "pca": "PCA", "tsne": "t-SNE", "umap": "UMAP"}


def _num(v, d=2):
    return num(v, d)


def _ci(pair, d=2):
    if not pair or pair[0] is None:
        return "–"
    return f"{pair[0]:.{d}f} to {pair[1]:.{d}f}"


def _overall_rows(emb: Dict[str, Any]) -> List[List[Any]]:
    rows = []
    sil = emb.get("silhouette") or {}
    for space, m in (emb.get("mixing") or {}).items():
        o = m.get("overall") or {}
        s = sil.get(space) or {}
        rows.append([SPACE_NAMES.get(space, space), _num(o.get("lisi_mean")), _ci(o.get("lisi_ci")),
                     _num(o.get("expected_random")), _num(o.get("normalised")), _ci(o.get("normalised_ci")),
                     _num(s.get("value")), _ci(s.get("ci")), o.get("n")])
    return rows


_OVERALL_HEAD = ["space", "LISI (mean)", "95% CI", "expected if random", "normalised", "95% CI",
                 "silhouette by site", "95% CI", "rows"]


def _site_rows(emb: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    mixing = emb.get("mixing") or {}
    spaces = list(mixing)
    sites: List[str] = []
    for m in mixing.values():
        for s in (m.get("per_site") or {}):
            if s not in sites:
                sites.append(s)
    rows = []
    for s in sites:
        entries = [(mixing[sp].get("per_site") or {}).get(s) for sp in spaces]
        first = next((e for e in entries if isinstance(e, dict)), None)
        n = first.get("n") if first else None
        # withheld upstream (shareable document), suppressed count, or too few mapped rows
        small = first is None or not isinstance(n, int) or 0 < n < min_cell
        row = [s, "withheld" if first is None else suppress_count(n, min_cell)]
        for e in entries:
            ok = isinstance(e, dict) and not small
            row.append(f"{_num(e.get('normalised'))} ({_ci(e.get('lisi_ci'))})" if ok else "withheld")
        rows.append(row)
    return rows


def _site_head(emb) -> List[str]:
    return ["site", "mapped rows"] + [f"{SPACE_NAMES.get(sp, sp)}: normalised LISI (mean LISI 95% CI)"
                                      for sp in (emb.get("mixing") or {})]


def _intro(emb: Dict[str, Any]) -> str:
    mm = emb.get("mixing_method") or {}
    return (f"{emb.get('n_used')} rows mapped (site-stratified subsample of {emb.get('n_available')}, cap "
            f"{emb.get('cap')}). Mixing score: the local inverse Simpson's index (LISI, Korsunsky et al. 2019) of the "
            f"site labels over each row's {mm.get('k')} nearest neighbours with a Gaussian kernel of perplexity "
            f"{_num(mm.get('perplexity'), 0)}: the effective number of sites around a row, from 1 (only its own site) "
            f"to {_num(mm.get('expected_random'))} (what random mixing gives with these site proportions). "
            "Normalised = mean LISI / that expected value, so 1 means the sites mix as if at random. Intervals: "
            "bootstrap over rows (neighbouring rows are not independent, so they are narrower than a new sample "
            "would give). Silhouette by site: near 0 or below, the sites overlap; towards 1, they form separate "
            "clusters. t-SNE and UMAP axes have no units and their distances are not metric; compare scores, not "
            "the look of clusters.")


def html(doc: Dict[str, Any], min_cell: int) -> str:
    emb = doc.get("embedding")
    if not emb:
        return ""
    parts = ["<h2>Do the sites mix? Maps and mixing scores</h2>", f"<p>{esc(_intro(emb))}</p>",
             table_html(_OVERALL_HEAD, _overall_rows(emb), numeric=(1, 3, 4, 6, 8)),
             "<h3>By site</h3>",
             table_html(_site_head(emb), _site_rows(emb, min_cell), numeric=(1,))]
    parts.append(f"<p class='muted'>Preprocessing: {esc(emb.get('preprocessing'))}.</p>")
    out_dir = doc.get("_out_dir")
    for rel in emb.get("figures") or []:
        if str(rel).endswith(".png"):
            img = embed_image(out_dir, rel, alt=f"2-D map {rel}")
            if img:
                parts.append(f"<figure>{img}<figcaption class='muted'>{esc(rel)} (SVG alongside)</figcaption></figure>")
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    emb = doc.get("embedding")
    if not emb:
        return ""
    parts = ["## Do the sites mix? Maps and mixing scores", "", md_escape(_intro(emb)), "",
             md_table(_OVERALL_HEAD, _overall_rows(emb)), "", "By site:", "",
             md_table(_site_head(emb), _site_rows(emb, min_cell)), ""]
    figs = [f for f in emb.get("figures") or [] if str(f).endswith(".png")]
    if figs:
        parts += ["Figures: " + ", ".join(f"`{f}`" for f in figs), ""]
    return "\n".join(parts).rstrip() + "\n"
