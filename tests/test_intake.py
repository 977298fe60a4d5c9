import gzip

import numpy as np
import pandas as pd
import pytest

from sitecheck.errors import InputError
from sitecheck.reading.intake import read_table

from .conftest import write


def test_missing_codes_and_coercion(tmp_path):
    text = "site,x,y\nA,1.5,.\nB,NA,2\nA,-,3\nB,N/A,4\nA,null,5\nB,NaN,\n"
    raw = read_table(write(tmp_path, "t.csv", text))
    x = raw.frame["x"]
    assert x.dtype == np.float64
    assert x.isna().sum() == 5
    info = raw.column("x")
    assert info.missing_codes == {"NA": 1, "-": 1, "N/A": 1, "null": 1, "NaN": 1}
    y = raw.column("y")
    assert y.storage == "numeric" and y.missing_codes == {".": 1, "": 1}
    assert raw.frame["y"].tolist()[1:5] == [2.0, 3.0, 4.0, 5.0]


def test_coercion_reports_unparsed_values(tmp_path):
    rows = [f"{'A' if i % 2 else 'B'},{i}" for i in range(40)] + ["A,see note", "B,haemolysed"]
    raw = read_table(write(tmp_path, "t.csv", "site,crp\n" + "\n".join(rows) + "\n"))
    info = raw.column("crp")
    assert info.storage == "numeric" and info.coerced
    assert info.unparsed_count == 2
    assert set(info.unparsed_examples) == {"see note", "haemolysed"}
    assert raw.frame["crp"].isna().sum() == 2


# -- lab-export idioms (issue 17): each written as laboratories export them --------------------

@pytest.mark.parametrize("cell,value,side", [
    ("<5", 5.0, -1), ("< 5", 5.0, -1), ("<=0.1", 0.1, -1), (">20", 20.0, 1), (">=1000", 1000.0, 1),
    ("\u22645", 5.0, -1), ("\u2265 7.5", 7.5, 1), ("=<3", 3.0, -1),
])
def test_censored_cells_keep_their_limit_and_a_flag(tmp_path, cell, value, side):
    rows = [f"A,{i % 40 + 0.5}" for i in range(60)] + [f"B,{cell}"] * 5 + [f"B,{i % 30 + 1}" for i in range(55)]
    raw = read_table(write(tmp_path, "t.csv", "site,crp\n" + "\n".join(rows) + "\n"), site="site")
    x = raw.frame["crp"].to_numpy()
    notes = raw.cells["crp"]
    flagged = np.flatnonzero(notes.censor != 0)
    assert len(flagged) == 5 and np.all(x[flagged] == value) and np.all(notes.censor[flagged] == side)
    assert raw.column("crp").unparsed_count == 0 and not np.isnan(x).any()   # never turned into missing
    key = "censored_below" if side < 0 else "censored_above"
    assert raw.column("crp").idioms == {key: 5}


def test_decimal_comma_read_per_site_and_reported(tmp_path):
    # site B writes potassium with a decimal comma; A and C with a point
    rows = ([f"A,{4 + (i % 9) / 10:.1f}" for i in range(50)] + [f"B,\"{4 + (i % 9) / 10:.1f}\"".replace(".", ",")
                                                                for i in range(50)]
            + [f"C,{3.6 + (i % 7) / 10:.1f}" for i in range(50)])
    raw = read_table(write(tmp_path, "t.csv", "site,potassium\n" + "\n".join(rows) + "\n"), site="site")
    x = raw.frame["potassium"]
    assert raw.column("potassium").storage == "numeric" and x.notna().all()
    assert x[50:100].tolist() == [4 + (i % 9) / 10 for i in range(50)]
    assert raw.column("potassium").idioms == {"decimal_comma": 50}     # "4,0" ... "4,8": every cell at B
    from sitecheck.table.roles import RoleSpec, assign_roles

    t = assign_roles(raw, RoleSpec(site="site"))
    assert t.column("potassium").idioms == {"B": {"decimal_comma": 50}}
    assert t.column("potassium").kind == "numeric"


def test_ambiguous_comma_is_decided_by_the_site_or_left_unparsed():
    import pyarrow as pa

    from sitecheck.reading.intake import parse_idioms

    # site 0 writes 4,2 (a comma cannot group one digit): its 1,250 reads 1.25
    # site 1 writes points: its 1,250 is a thousands group; site 2 gives no evidence: unparsed
    cells = ["4,2", "1,250", "4.1", "1,250", "1,250"]
    v, idiom, censor, unit, levels = parse_idioms(pa.array(cells), np.array([0, 0, 1, 1, 2]))
    assert v[:4].tolist() == [4.2, 1.25, 4.1, 1250.0] and np.isnan(v[4])
    assert idiom.tolist() == [4, 4, 0, 16, 64]
    # a column with comma thousands grouping anywhere: no comma is a decimal separator
    v, idiom, *_ = parse_idioms(pa.array(["4,2", "1,234,567", "12,5"]), np.array([0, 1, 0]))
    assert np.isnan(v[0]) and v[1] == 1234567.0 and np.isnan(v[2])
    # spaces, no-break spaces and apostrophes between thousands; dot grouping with a decimal comma
    v, idiom, *_ = parse_idioms(pa.array(["1 234", "12\u00a0345,5", "1'000", "1.234,5"]))
    assert v.tolist() == [1234.0, 12345.5, 1000.0, 1234.5]
    assert idiom.tolist() == [16, 20, 16, 20]


def test_unit_suffix_kept_per_site_and_codes_stay_text(tmp_path):
    rows = ([f"A,{60 + i % 50} umol/L" for i in range(40)] + [f"B,{0.7 + (i % 9) / 10:.1f}mg/dL" for i in range(40)])
    raw = read_table(write(tmp_path, "t.csv", "site,creat\n" + "\n".join(rows) + "\n"), site="site")
    assert raw.frame["creat"].iloc[0] == 60.0 and raw.frame["creat"].iloc[40] == 0.7
    from sitecheck.table.roles import RoleSpec, assign_roles

    t = assign_roles(raw, RoleSpec(site="site"))
    assert t.column("creat").units == {"A": {"umol/L": 40}, "B": {"mg/dL": 40}}
    assert t.column("creat").idioms == {"A": {"unit_suffix": 40}, "B": {"unit_suffix": 40}}
    # ward codes such as 12A are not a number with a unit
    codes = "\n".join(f"{'A' if i % 2 else 'B'},{10 + i % 5}{'ABC'[i % 3]}" for i in range(40))
    raw = read_table(write(tmp_path, "c.csv", "site,ward\n" + codes + "\n"), site="site")
    assert raw.column("ward").storage == "text"


def test_numeric_rule_applies_after_the_idioms(tmp_path):
    # 10% censored + 85% plain + 5% notes: 95% read as numbers, so numeric; without the idiom rules
    # the column would have been 85% numeric and read as text
    rows = [f"A,<3"] * 10 + [f"A,{i}" for i in range(85)] + ["B,clotted"] * 5
    raw = read_table(write(tmp_path, "t.csv", "site,trop\n" + "\n".join(rows) + "\n"), site="site")
    assert raw.column("trop").storage == "numeric" and raw.column("trop").unparsed_count == 5
    rows = [f"A,<3"] * 10 + [f"A,{i}" for i in range(84)] + ["B,clotted"] * 6
    raw = read_table(write(tmp_path, "u.csv", "site,trop\n" + "\n".join(rows) + "\n"), site="site")
    assert raw.column("trop").storage == "text"


def test_parquet_and_frames_read_the_same_idioms(tmp_path):
    df = pd.DataFrame({"site": ["A"] * 30 + ["B"] * 30,
                       "k": [f"{4 + i % 5 / 10:.1f}" for i in range(30)] + [f"{4 + i % 5 / 10:.1f}".replace(".", ",")
                                                                             for i in range(30)]})
    p = tmp_path / "t.parquet"
    df.to_parquet(p)
    a = read_table(str(p), site="site")
    from sitecheck.reading.intake import frame_to_raw

    b = frame_to_raw(df, site="site")
    for raw in (a, b):
        assert raw.frame["k"].tolist() == [4 + i % 5 / 10 for i in range(30)] * 2
        assert raw.column("k").idioms == {"decimal_comma": 30}


def test_text_column_below_share_stays_text(tmp_path):
    rows = [f"A,{i}" for i in range(10)] + [f"B,x{i}" for i in range(10)]
    raw = read_table(write(tmp_path, "t.csv", "site,v\n" + "\n".join(rows) + "\n"))
    assert raw.column("v").storage == "text"


def test_formats_tsv_gzip_parquet(tmp_path):
    df = pd.DataFrame({"site": ["A", "B"] * 5, "x": np.arange(10.0)})
    p_tsv = tmp_path / "t.tsv"
    df.to_csv(p_tsv, sep="\t", index=False)
    p_gz = tmp_path / "t.csv.gz"
    with gzip.open(p_gz, "wt") as fh:
        df.to_csv(fh, index=False)
    p_pq = tmp_path / "t.parquet"
    df.to_parquet(p_pq)
    for p in (p_tsv, p_gz, p_pq):
        raw = read_table(str(p))
        assert raw.frame["x"].tolist() == list(np.arange(10.0)), p
        assert raw.frame["site"].tolist() == df["site"].tolist()


def test_sep_override(tmp_path):
    raw = read_table(write(tmp_path, "t.csv", "site;x\nA;1\nB;2\n"), sep=";")
    assert list(raw.frame.columns) == ["site", "x"]


def test_non_utf8_names_offset_and_suggests_encoding(tmp_path):
    data = "site,name\nA,ok\nB,caf".encode() + b"\xe9\n"
    path = write(tmp_path, "t.csv", data, mode="wb")
    # "site,name\n" (10 bytes) + "A,ok\n" (5) + "B,caf" (5): the bad byte is at offset 20
    with pytest.raises(InputError, match=r"offset 20 .*give the file's encoding") as info:
        read_table(path)
    assert info.value.option == "encoding"  # the command line names its --encoding flag
    raw = read_table(path, encoding="latin-1")
    assert raw.frame["name"].tolist() == ["ok", "café"]


def test_missing_empty_unreadable_duplicate(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_table(str(tmp_path / "nope.csv"))
    with pytest.raises(InputError, match="empty"):
        read_table(write(tmp_path, "e.csv", ""))
    with pytest.raises(InputError, match="no data rows"):
        read_table(write(tmp_path, "h.csv", "site,x\n"))
    with pytest.raises(InputError, match="duplicate column name 'x'"):
        read_table(write(tmp_path, "d.csv", "site,x,x\nA,1,2\n"))
    with pytest.raises(InputError, match="unknown file extension"):
        read_table(write(tmp_path, "t.xlsx", "a"))
    with pytest.raises(InputError, match="cannot be read as Parquet"):
        read_table(write(tmp_path, "bad.parquet", "not parquet"))


def test_input_file_unchanged(tmp_path, demo_small_path):
    import hashlib
    import shutil

    p = tmp_path / "demo.csv"
    shutil.copy(demo_small_path, p)
    before = hashlib.sha256(p.read_bytes()).hexdigest()
    raw = read_table(str(p))
    assert raw.sha256 == before
    assert hashlib.sha256(p.read_bytes()).hexdigest() == before


def test_infinite_and_overflowing_numbers_are_read_as_missing_and_listed(tmp_path):
    # "inf" written as text, 1e300 (its square overflows float64, IEEE 754 double: max about 1.8e308)
    # and -0.0: the first two are not measurements, -0.0 is zero.
    import numpy as np

    from sitecheck.reading.intake import frame_to_raw, read_table

    rows = ["site,a,b", "A,1.5,inf", "B,1e300,2", "A,-0.0,4"] + [f"B,{i},{i}.5" for i in range(3, 25)]
    p = tmp_path / "x.csv"
    p.write_text("\n".join(rows) + "\n", encoding="utf-8")
    raw = read_table(str(p))
    a, b = raw.frame["a"].to_numpy(), raw.frame["b"].to_numpy()
    assert a.dtype == float and b.dtype == float
    assert np.isnan(a[1]) and a[2] == 0.0 and np.isnan(b[0]) and b[1] == 2.0 and np.isfinite(b[1:]).all()
    assert raw.column("a").missing_codes == {"beyond +/-1e+150": 1}
    assert raw.column("b").unparsed_count == 1 and raw.column("b").unparsed_examples == ("inf",)
    fr = frame_to_raw(__import__("pandas").DataFrame({"x": [1.0, np.inf, -1e300, 2.0]}))
    assert fr.column("x").missing_codes == {"inf": 1, "beyond +/-1e+150": 1} and fr.column("x").n_missing == 2
