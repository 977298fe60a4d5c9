"""The one atomic write (sitecheck._files): whole files or none, inside the output folder only."""
import doctest
import os
import stat

import pytest

from sitecheck import _files
from sitecheck._files import atomic_write, atomic_write_path, publish


def test_text_and_bytes_are_written_whole_and_replace_the_old_file(tmp_path):
    p = atomic_write(str(tmp_path), "sub/report.json", "{\"a\": 1}\r\n")
    assert p == str(tmp_path / "sub" / "report.json")
    assert open(p, "rb").read() == b"{\"a\": 1}\r\n"  # UTF-8, newlines as given
    atomic_write(str(tmp_path), "sub/report.json", b"\x89PNG")
    assert open(p, "rb").read() == b"\x89PNG" and os.listdir(tmp_path / "sub") == ["report.json"]
    assert stat.S_IMODE(os.stat(p).st_mode) == 0o600  # private until published


def test_a_failed_write_leaves_the_old_file_and_no_temporary_file(tmp_path):
    atomic_write(str(tmp_path), "t.txt", "old")
    with pytest.raises(TypeError):
        atomic_write(str(tmp_path), "t.txt", 12)  # neither text nor bytes: fails while writing
    assert (tmp_path / "t.txt").read_text() == "old" and os.listdir(tmp_path) == ["t.txt"]


def test_nothing_is_written_outside_the_folder(tmp_path):
    for rel in ("../escape.txt", "/tmp/escape.txt", "a/../../escape.txt"):
        with pytest.raises(ValueError, match="refusing to write outside the output directory"):
            atomic_write(str(tmp_path / "out"), rel, "x")
    assert not (tmp_path / "escape.txt").exists()


def test_a_path_and_publishing(tmp_path):
    p = publish(atomic_write_path(str(tmp_path / "table.csv"), "a,b\n1,2\n"))
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(os.stat(p).st_mode) == 0o666 & ~umask


def test_doctests_run():
    result = doctest.testmod(_files)
    assert result.attempted >= 2 and result.failed == 0
