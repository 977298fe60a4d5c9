"""Report section: do the sites mix in a 2-D map (LISI and silhouette by site, with the figures)."""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..fmt import DASH, ci, count, num, pct
from ..safety import suppress_count
from ..templating import Col, Table, figures_of, section_html, section_md

ID = "maps"
TITLE = "Do the sites mix? Maps and mixing scores"
SPACE_NAMES = {"features": "feature space", "pca": "PCA", "tsne": "t-SNE", "umap": "UMAP"}


def _overall(emb: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    sil = emb.get("silhouette") or {}
    for space, m in (emb.get("mixing") or {}).items():
        o = m.get("overall") or {}
        s = sil.get(space) or {}
        rows.append([SPACE_NAMES.get(space, space), num(o.get("lisi_mean"), 2), ci(o.get("lisi_ci"), 2),
                     num(o.get("expected_random"), 2), num(o.get("normalised"), 2), ci(o.get("normalised_ci"), 2),
                     num(s.get("value"), 2), ci(s.get("ci"), 2), count(suppress_count(o.get("n"), min_cell))])
    return Table([Col("space"), Col("LISI", "mean over rows", True), Col("95% CI", "bootstrap over rows", True),
                  Col("if random", "LISI expected", True), Col("normalised", "LISI ÷ expected", True),
                  Col("95% CI", "bootstrap over rows", True), Col("silhouette", "by site", True),
                  Col("95% CI", "bootstrap", True), Col("rows", numeric=True)], rows)


def _by_site(emb: Dict[str, Any], min_cell: int) -> Table:
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
        small = first is None or not isinstance(n, int) or 0 < n < min_cell
        row = [s, "withheld" if first is None else count(suppress_count(n, min_cell))]
        for e in entries:
            ok = isinstance(e, dict) and not small
            row.append(f"{num(e.get('normalised'), 2)} ({ci(e.get('lisi_ci'), 2)})" if ok else "withheld")
        rows.append(row)
    cols = [Col("site"), Col("mapped rows", numeric=True)] + [
        Col(SPACE_NAMES.get(sp, sp), "normalised LISI (mean LISI 95% CI)", True) for sp in spaces]
    return Table(cols, rows)


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    emb = doc.get("embedding")
    if not emb:
        return None
    mm = emb.get("mixing_method") or {}
    evr = ((emb.get("method_settings") or {}).get("pca") or {}).get("explained_variance_ratio") or []
    return {"id": ID, "title": TITLE, "n_used": count(suppress_count(emb.get("n_used"), min_cell)),
            "n_available": count(suppress_count(emb.get("n_available"), min_cell)), "cap": count(emb.get("cap")),
            "k": mm.get("k"), "perplexity": num(mm.get("perplexity"), 0),
            "expected": num(mm.get("expected_random"), 2),
            "pca_variance": ", ".join(pct(v, 1) for v in evr[:2]) if evr else "",
            "overall": _overall(emb, min_cell), "by_site": _by_site(emb, min_cell),
            "preprocessing": emb.get("preprocessing") or DASH, "figures": [_captioned(f) for f in figures_of(doc, "embedding")]}


def _captioned(fig):
    """A map figure with its caption in words (the file name says which colouring)."""
    import dataclasses
    import re

    m = re.search(r"embedding_(.+?)(?:_density)?\.png", fig.png) if not fig.caption else None
    what = m.group(1) if m else ""
    if not what:
        return fig
    colour = "site" if what == "site" else ("the outcome" if what == "outcome" else "a group column")
    return dataclasses.replace(fig, id=f"fig-maps-{what.replace('_', '-')}",
                               caption=f"2-D maps of the same rows (PCA, t-SNE, UMAP), coloured by {colour}. "
                                       "PCA axes show the share of variance they explain; t-SNE and UMAP axes have "
                                       "no units.")


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("maps", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("maps", model(doc, min_cell))
