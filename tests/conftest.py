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


#: Test files that take minutes on one core (measured with ``--durations``: the fuzz file 115-231 s, the
#: rest at most 85 s). They are collected first, so that with two workers (``-n 2 --dist loadfile``) one
#: worker starts them at once while the other works through the remaining files, instead of one worker
#: receiving them last and finishing alone.
LONG_FILES = ("test_fuzz.py",)


def pytest_collection_modifyitems(config, items):
    first = [it for it in items if os.path.basename(str(it.fspath)) in LONG_FILES]
    if first:
        rest = [it for it in items if os.path.basename(str(it.fspath)) not in LONG_FILES]
        items[:] = first + rest
