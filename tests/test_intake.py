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
    rows = [f"{'A' if i % 2 else 'B'},{i}" for i in range(40)] + ["A,<5", "B,>100"]
    raw = read_table(write(tmp_path, "t.csv", "site,crp\n" + "\n".join(rows) + "\n"))
    info = raw.column("crp")
    assert info.storage == "numeric" and info.coerced
    assert info.unparsed_count == 2
    assert set(info.unparsed_examples) == {"<5", ">100"}
    assert raw.frame["crp"].isna().sum() == 2


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
