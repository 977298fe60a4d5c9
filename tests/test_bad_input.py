"""Bad input on the command line: one line on stderr naming the problem, exit code 2, no traceback, nothing
written, the input untouched. And input shaped like a real extract that is not an error (blank site cells,
"inf" typed as text, a column never filled) read as the report says."""
import hashlib

import numpy as np
import pytest
from click.testing import CliRunner

from sitecheck.cli import main
from sitecheck.reading.intake import read_table
from sitecheck.table.roles import RoleSpec, assign_roles

from .conftest import write


def _table_text():
    rng = np.random.default_rng(0)
    rows = ["hospital,sodium,urea,bicarbonate"]
    for i in range(120):
        site = ("Kestrel", "Marlow", "Yarrow")[i % 3]
        sodium = str(int(round(rng.normal(140, 3))))
        urea = f"{rng.normal(6, 1):.1f}"
        if i == 7:
            sodium = "inf"           # typed as text by a person or an export
        if i == 8:
            urea = "-Infinity"
        if i in (10, 11):
            site = ""                # a blank site cell
        rows.append(f"{site},{sodium},{urea},")  # bicarbonate never measured
    return "\n".join(rows) + "\n"


def _one_line_exit_2(args, text):
    r = CliRunner().invoke(main, args)
    assert r.exit_code == 2, r.output
    lines = [l for l in r.output.splitlines() if l.strip()]
    assert len(lines) == 1, r.output
    assert text in lines[0] and "Traceback" not in r.output, lines[0]
    return lines[0]


def test_out_naming_an_existing_file_or_the_input(tmp_path):
    data = write(tmp_path, "d.csv", _table_text())
    before = hashlib.sha256(open(data, "rb").read()).hexdigest()
    other = write(tmp_path, "notes.txt", "keep me\n")
    _one_line_exit_2(["scan", data, "--site", "hospital", "--out", other, "-q"], "is a file")
    _one_line_exit_2(["scan", data, "--site", "hospital", "--out", data, "-q"], "is a file")
    assert hashlib.sha256(open(data, "rb").read()).hexdigest() == before
    assert open(other).read() == "keep me\n"


def test_ragged_rows_unknown_encoding_bad_bytes_and_separator(tmp_path):
    ragged = write(tmp_path, "r.csv", "hospital,sodium\nKestrel,140\nMarlow,139,12\nKestrel,141\n")
    _one_line_exit_2(["scan", ragged, "--site", "hospital", "--out", str(tmp_path / "o"), "-q"],
                     "Expected 2 columns, got 3")
    data = write(tmp_path, "d.csv", _table_text())
    _one_line_exit_2(["scan", data, "--site", "hospital", "--encoding", "klingon-8", "--out", str(tmp_path / "o")],
                     "--encoding 'klingon-8': not a known text encoding")
    _one_line_exit_2(["scan", data, "--site", "hospital", "--sep", ";;", "--out", str(tmp_path / "o")],
                     "--sep ';;': must be a single character")
    latin = write(tmp_path, "l.csv", "hospital,ward\nKestrel,ok\nMarlow,caf".encode() + b"\xe9\n", mode="wb")
    line = _one_line_exit_2(["scan", latin, "--site", "hospital", "--out", str(tmp_path / "o"), "-q"],
                            "not valid utf-8")
    assert line.endswith("(option --encoding)")  # the library names the setting, the CLI its flag
    assert not (tmp_path / "o").exists()


def test_too_few_sites_names_the_flag(tmp_path):
    data = write(tmp_path, "d.csv", _table_text())
    line = _one_line_exit_2(["scan", data, "--site", "hospital", "--min-site-rows", "100", "--out",
                             str(tmp_path / "o"), "-q"], "only 0 site(s) have at least 100 rows")
    assert line.endswith("(option --min-site-rows)")
    _one_line_exit_2(["scan", data, "--out", str(tmp_path / "o"), "-q"], "no site column given")
    _one_line_exit_2(["scan", data, "--site", "hospital", "--folds", "1"], "--folds")
    assert not (tmp_path / "o").exists()


def test_blank_sites_inf_text_and_an_empty_column_are_read_as_reported(tmp_path):
    raw = read_table(write(tmp_path, "d.csv", _table_text()))
    col = {c.name: c for c in raw.columns}
    # "inf" and "-Infinity" are not laboratory values: unparsed, set to missing, and named
    assert (col["sodium"].unparsed_count, col["sodium"].unparsed_examples) == (1, ("inf",))
    assert (col["urea"].unparsed_count, col["urea"].unparsed_examples) == (1, ("-Infinity",))
    assert np.isfinite(raw.frame["sodium"].dropna()).all() and raw.frame["sodium"].isna().sum() == 1
    assert col["bicarbonate"].missing_codes == {"": 120} and col["hospital"].missing_codes == {"": 2}
    table = assign_roles(raw, RoleSpec(site="hospital"))
    assert len(table.frame) == 118 and table.site_counts() == {"Kestrel": 40, "Marlow": 39, "Yarrow": 39}
    assert table.warnings[0] == "2 rows have no value in site column 'hospital' and were left out"
    assert table.column("bicarbonate").role == "excluded" and table.column("bicarbonate").reason == "entirely missing"
    assert [(f.column, f.kind) for f in table.findings] == [("bicarbonate", "constant")]
