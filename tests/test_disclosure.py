"""End-to-end disclosure control: with ``--shareable --min-cell 10`` no count below 10 reaches any
output file (HTML, JSON, Markdown, CSV, the figures' SVG text), warnings, details and free text
included. The table is shaped like a real laboratory extract: sodium as integers, urea to one
decimal with two "haemolysed" cells that do not parse, a triage colour with a level seen 4 times
at one site, and a site of 3 rows that the scan leaves out (below --min-site-rows 20)."""
import json
import os
import re

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from sitecheck.cli import main
from sitecheck.render.safety import shareable_document, suppress_text

SMALL = (2, 3, 4)  # 2 unparsed cells, a 3-row site, a 4-row level
# A small count written next to what it counts, in any of the forms the outputs use.
_NOUN = r"(?:rows?|values?|value\(s\)|times|cells?|patients?)"
LEAK = re.compile(
    rf"(?<![\w.,-])[234]\s+{_NOUN}(?!\w)"                      # 3 rows, 2 value(s), appears 4 times
    r"|\bn\s*=\s*[234]\b"                                       # n = 3
    r"|\ball [234]\b"                                           # all 3 rows
    r"|\"(?:n|count|rows|rows_used|n_missing|unparsed_count|Tiny|violet)\":\s*[234]\b"  # JSON counts
    r"|\b(?:Tiny|violet)\W{1,4}[234]\b"                         # a label followed by its count
)


def _table() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    site = np.repeat(["Larkspur", "Mossbank", "Quillfield"], 60)
    n = len(site)
    d = pd.DataFrame({"ward": site,
                      "sodium": (rng.normal(140, 3, n) + 3 * (site == "Mossbank")).round(0).astype(int),
                      "urea": rng.normal(6, 1.5, n).round(1).astype(object),
                      "triage": rng.choice(["green", "amber"], n).astype(object)})
    d.loc[np.flatnonzero(site == "Quillfield")[:4], "triage"] = "violet"
    d.loc[[5, 70], "urea"] = "haemolysed"
    tiny = pd.DataFrame({"ward": ["Tiny"] * 3, "sodium": [139, 141, 140], "urea": [5.1, 6.2, 7.0],
                         "triage": ["green"] * 3})
    return pd.concat([d, tiny], ignore_index=True)


@pytest.fixture(scope="module")
def shared_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("disclosure")
    data = root / "wards.csv"
    _table().to_csv(data, index=False)
    out = root / "out"
    import matplotlib

    # SVG text written as <text> elements (not glyph paths), so that the figures' words can be searched
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        r = CliRunner().invoke(main, ["scan", str(data), "--site", "ward", "--shareable", "--min-cell", "10",
                                      "--out", str(out), "-q"], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    return data, out


def test_the_leak_detector_sees_the_raw_counts(shared_run):
    # The check below is only worth something if it sees the counts as the library writes them.
    from sitecheck.reading.intake import read_table
    from sitecheck.table.roles import RoleSpec, assign_roles

    data, _ = shared_run
    table = assign_roles(read_table(str(data)), RoleSpec(site="ward"))
    raw = "\n".join(table.warnings)
    assert "site 'Tiny' has 3 rows" in raw and "2 value(s) did not parse" in raw
    assert len(LEAK.findall(raw)) == 2
    raw_doc = json.dumps({"dropped_sites": dict(table.dropped_sites)})
    assert LEAK.search(raw_doc)  # "Tiny": 3


def test_no_small_count_in_any_output_file(shared_run):
    _, out = shared_run
    texts = {}
    for dirpath, _, files in os.walk(out):
        for f in files:
            if f.endswith((".html", ".json", ".md", ".csv", ".svg")):
                path = os.path.join(dirpath, f)
                with open(path, encoding="utf-8") as fh:
                    texts[os.path.relpath(path, out)] = fh.read()
    assert {"report.html", "report.json", "findings.md"} <= set(texts)
    svg = [t for k, t in texts.items() if k.endswith(".svg")]
    assert svg and any("Mossbank (n = 60)" in t for t in svg)  # the legends' text is searchable
    for name, text in texts.items():
        hits = LEAK.findall(text)
        assert not hits, f"{name}: small count(s) shown: {hits[:5]}"
    doc = json.loads(texts["report.json"])
    # the counts are there, suppressed, rather than dropped
    assert doc["input"]["dropped_sites"] == {"Tiny": "<10"}
    assert any("'Tiny' has <10 rows" in w for w in doc["warnings"])
    assert any("<10 value(s) did not parse" in w for w in doc["warnings"])
    urea = next(c for c in doc["columns"] if c["name"] == "urea")
    assert urea["unparsed"]["count"] == "<10" and urea["n_missing"] == "<10"
    assert doc["shareable"]["min_cell"] == 10
    html = texts["report.html"]
    import html as html_lib

    assert "site 'Tiny' has <10 rows" in html_lib.unescape(html)


def test_free_text_suppression_leaves_names_and_large_counts():
    assert suppress_text("site 'Ward 3' has 3 rows, below the minimum of 5", 10) == \
        "site 'Ward 3' has <10 rows, below the minimum of 5"
    assert suppress_text("the value -99 appears 4 times (3.2% of recorded values)", 10) == \
        "the value -99 appears <10 times (3.2% of recorded values)"
    assert suppress_text("never recorded at this site (all 7 rows missing)", 10) == \
        "never recorded at this site (all <10 rows missing)"
    assert suppress_text("12 value(s) did not parse; 4.5 rows; n = 10", 10) == "12 value(s) did not parse; 4.5 rows; n = 10"
    assert suppress_text("n = 3, 3 of 4 sites, 5 folds", 10) == "n = <10, 3 of 4 sites, 5 folds"
    doc = {"warnings": ["2 rows have no value in site column 'ward'"],
           "columns": [{"name": "9 rows", "reason": "near-unique per row (100.0% of 6 values are distinct)"}]}
    s = shareable_document(doc, min_cell=10)
    assert s["warnings"] == ["<10 rows have no value in site column 'ward'"]
    assert s["columns"][0] == {"name": "9 rows", "reason": "near-unique per row (100.0% of <10 values are distinct)"}
