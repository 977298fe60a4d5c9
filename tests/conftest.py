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
