import os

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIXTURES = os.path.join(ROOT, "fixtures")


@pytest.fixture(scope="session")
def demo_small_path():
    return os.path.join(FIXTURES, "demo_small.csv")


@pytest.fixture(scope="session")
def demo_truth():
    import json

    with open(os.path.join(FIXTURES, "demo_truth.json"), encoding="utf-8") as fh:
        return json.load(fh)


@pytest.fixture(scope="session")
def demo_table(demo_small_path):
    """The small demo fixture with the demo's roles, validated."""
    from sitecheck.demo import DEMO_ROLES
    from sitecheck.reading.intake import read_table
    from sitecheck.table.roles import RoleSpec, assign_roles

    raw = read_table(demo_small_path, site=DEMO_ROLES["site"])
    spec = RoleSpec(site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"],
                    covariates=DEMO_ROLES["covariates"], identifiers=DEMO_ROLES["identifiers"])
    return assign_roles(raw, spec)


@pytest.fixture(scope="session")
def demo_prepared(demo_table):
    from sitecheck.table.prepare import prepare

    return prepare(demo_table, random_state=0)


def write(tmp_path, name, text, mode="w"):
    p = tmp_path / name
    if mode == "wb":
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return str(p)


#: Test files in decreasing order of their measured time (``--durations=0`` summed per file, two workers,
#: 2026-12-03: fuzz 260 s, corpus 89, report 87, harmonise 75, leakage 63, probe 45, maps 44, cli 40,
#: notebook 32, render 29, fingerprints 23, outcome 22, drift 20, scan 20, formats_and_order 13; every other
#: file under 10 s). With two workers (``-n 2 --dist loadfile --no-loadscope-reorder`` in ``setup.cfg``) the
#: files are handed out in this order, longest first, so that one worker starts the fuzz file at once and
#: the last files handed out are the short ones. pytest-xdist's own order (since 3.5: files with the most
#: tests first) handed out the fuzz file, a single test, last, and one worker ran it alone to the end:
#: 588 s on 2026-12-03, against 441 s in this order on the same machine (both workers done at 438-441 s).
LONG_FILES = ("test_fuzz.py", "test_corpus.py", "test_report.py", "test_harmonise.py", "test_leakage.py",
              "test_probe.py", "test_maps.py", "test_cli.py", "test_notebook.py", "test_render.py",
              "test_fingerprints.py", "test_outcome.py", "test_drift.py", "test_scan.py",
              "test_formats_and_order.py")


def pytest_collection_modifyitems(config, items):
    rank = {name: i for i, name in enumerate(LONG_FILES)}
    last = len(LONG_FILES)
    # a stable sort: tests keep their order within a file, the other files their collection order
    items.sort(key=lambda it: rank.get(os.path.basename(str(it.fspath)), last))
