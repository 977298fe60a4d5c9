import os

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
# One native thread per process for the whole suite (and for the command lines it starts): the test
# tables are small, where OpenMP's fork-join and spinning threads cost more than they gain, and CI runs
# the suite on 2 shared cores. Measured on this machine under load: two tests with plain scikit-learn
# boosters took 75.6 CPU s with the default threads and 44.4 with one. A scan's numbers do not depend on it
# (a scan already runs tables of up to 200,000 rows on one thread per analysis); reference fits in the tests
# are compared within stated tolerances.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

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


@pytest.fixture(scope="session", autouse=True)
def _one_native_thread():
    """Limit the thread pools of native libraries already loaded at collection (see the top)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        yield
