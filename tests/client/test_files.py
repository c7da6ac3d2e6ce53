"""The client's local CSV checks (service/client/_files.py): good files pass, each bad one names its problem."""

from __future__ import annotations

import gzip

import pytest

from segscore.client import BadFile
from service.client._files import check_csv_file, csv_chunks, open_text

GOOD = "id,country,spend\n1,FR,10.5\n2,\"Bonn, DE\",\n3,IT,7\n"


@pytest.mark.parametrize("body", [
    GOOD,
    GOOD.replace("\n", "\r\n"),                           # Windows line ends
    "\ufeff" + GOOD,                                      # a byte-order mark (spreadsheet exports)
    GOOD + "\n\n",                                        # blank lines at the end
    "id,spend\nA-1,3\n17,4\nX,\n",                        # a text id column with some numeric ids, skipped
], ids=["plain", "crlf", "bom", "blank-lines", "id-column"])
def test_good_files_pass(tmp_path, body):
    path = tmp_path / "good.csv"
    path.write_bytes(body.encode("utf-8"))
    names = check_csv_file(path, skip=["id"])
    assert names[-1] == "spend" and names[0] == "id"


def test_a_text_column_is_not_a_mixed_column(tmp_path):
    path = tmp_path / "text.csv"
    path.write_text("id,code,spend\n1,A7,1\n2,B9,2\n3,12,3\n")       # mostly text, one number: a text column
    assert check_csv_file(path) == ["id", "code", "spend"]


def test_a_mixed_column_names_line_and_column_and_no_value(tmp_path):
    path = tmp_path / "mixed.csv"
    path.write_text("id,spend\n1,1\n2,2\n3,secret-value\n4,4\n")
    with pytest.raises(BadFile) as caught:
        check_csv_file(path)
    error = caught.value
    assert (error.problem, error.line, error.column) == ("column", 4, "spend")
    assert "secret-value" not in str(error)
    # Restricted to other columns (a fit's --features), the same file passes.
    assert check_csv_file(path, columns=["id"]) == ["id", "spend"]


def test_gzip_is_read_transparently_and_streamed_decompressed(tmp_path):
    path = tmp_path / "data.csv.gz"
    path.write_bytes(gzip.compress(GOOD.encode()))
    assert check_csv_file(path, skip=["id"]) == ["id", "country", "spend"]
    with open_text(path) as handle:
        assert handle.read() == GOOD
    seen = []
    assert b"".join(csv_chunks(path, lambda done, total: seen.append((done, total)), chunk_bytes=16)) == GOOD.encode()
    assert seen[-1] == (path.stat().st_size, path.stat().st_size)


def test_gzip_magic_bytes_without_the_suffix_are_gzip(tmp_path):
    path = tmp_path / "data.csv"
    path.write_bytes(gzip.compress(GOOD.encode())[:-8])              # truncated: the CRC and size are cut
    with pytest.raises(BadFile) as caught:
        check_csv_file(path)
    assert caught.value.problem == "gzip"


def test_repeated_header_name_is_a_header_problem(tmp_path):
    path = tmp_path / "twice.csv"
    path.write_text("id,spend,spend\n1,2,3\n")
    with pytest.raises(BadFile) as caught:
        check_csv_file(path)
    assert (caught.value.problem, caught.value.line, caught.value.column) == ("header", 1, "spend")
