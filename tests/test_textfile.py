"""Reading corpora and evaluation sets (packer/textfile.py): formats, line endings, errors that name the line.

External references: CSV quoting follows RFC 4180 (a quoted field may hold the delimiter, a newline and a
doubled quote; a quote that opens must close), and well-formed files are written with Python's own
`csv.writer` (stdlib) so the reader is checked against an independent writer. UTF-8 validity is the
Unicode standard's, as `bytes.decode("utf-8")` applies it; b"\\xff" can never occur in UTF-8.
"""

from __future__ import annotations

import csv
import io
import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from danpack.textfile import TextFileError, iter_records


def read(tmp_path, name: str, data: bytes, field: str = "text") -> list[dict]:
    path = tmp_path / name
    path.write_bytes(data)
    return list(iter_records(path, field))


def error_of(tmp_path, name: str, data: bytes, field: str = "text") -> str:
    with pytest.raises(TextFileError) as e:
        read(tmp_path, name, data, field)
    return str(e.value)


# --- well-formed files ---------------------------------------------------------------------------

def test_plain_lines_with_lf_crlf_and_a_byte_order_mark(tmp_path):
    data = b"\xef\xbb\xbfslow charger\r\nfast one\n\nno newline at the end"
    assert [r["text"] for r in read(tmp_path, "c.txt", data)] == ["slow charger", "fast one", "", "no newline at the end"]


def test_jsonl_skips_blank_lines_and_keeps_other_fields(tmp_path):
    data = b'\xef\xbb\xbf{"text": "a", "id": 1}\r\n\n  \n{"text": "b \xc3\xa9"}\n'
    assert read(tmp_path, "c.jsonl", data) == [{"text": "a", "id": 1}, {"text": "b é"}]


def test_csv_quoted_fields_may_hold_commas_newlines_and_doubled_quotes(tmp_path):
    data = b'id,text\r\n1,"fine, fast"\r\n2,"two\r\nlines"\r\n\r\n3,"said ""ok"""\r\n4,the 5" screen\r\n'
    rows = read(tmp_path, "c.csv", data)
    assert [r["text"] for r in rows] == ["fine, fast", "two\r\nlines", 'said "ok"', 'the 5" screen']
    assert [r["id"] for r in rows] == ["1", "2", "3", "4"]  # the blank line is no row


def test_tsv_and_a_chosen_column(tmp_path):
    rows = read(tmp_path, "c.tsv", b"station\tcomment\nS1\tslow\n", field="comment")
    assert rows == [{"station": "S1", "comment": "slow"}]


# No lone CR: csv.writer leaves it unquoted unless it is part of the line terminator, and the stdlib's
# own reader then drops it (Python 3.11, seen here), so such a file does not hold the row it was given.
cells = st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00\r"), max_size=12)


@settings(max_examples=200, deadline=None)
@given(rows=st.lists(st.tuples(cells, cells), max_size=8), crlf=st.booleans())
def test_csv_written_by_the_stdlib_writer_reads_back_unchanged(tmp_path_factory, rows, crlf):
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\r\n" if crlf else "\n")  # QUOTE_MINIMAL, RFC 4180 style
    writer.writerow(["text", "label"])
    writer.writerows(rows)
    path = tmp_path_factory.mktemp("csv") / "c.csv"
    path.write_bytes(buffer.getvalue().encode("utf-8"))
    assert [(r["text"], r["label"]) for r in iter_records(path)] == rows


# --- malformed files: the error names the file, the line and the fix -------------------------------

@pytest.mark.parametrize("name,data,column", [
    ("c.txt", b"ok\nfine\nbad \xff byte\n", 5),
    ("c.jsonl", b'{"text": "ok"}\n{"text": "fine"}\n{"text": "bad \xff"}\n', 15),
    ("c.csv", b"text\nok\nbad \xff\n", 5),
])
def test_bytes_that_are_not_utf8_are_reported_with_their_line(tmp_path, name, data, column):
    message = error_of(tmp_path, name, data)
    assert f"{name}:3: is not valid UTF-8" in message and "save the file as UTF-8" in message
    assert f"at byte {column} of the line" in message  # 1-based, counted in bytes


def test_a_utf8_sequence_cut_by_the_line_end_is_reported(tmp_path):
    assert "c.txt:1: is not valid UTF-8" in error_of(tmp_path, "c.txt", b"caf\xc3\nnext\n")


def test_an_unterminated_quote_is_refused_not_read_as_one_long_text(tmp_path):
    data = b'text,label\nok,1\n"never closed,2\nnext,3\nlast,4\n'
    message = error_of(tmp_path, "c.csv", data)
    assert "c.csv:3: malformed CSV" in message and "must close it" in message


def test_text_after_a_closing_quote_is_refused(tmp_path):
    assert "c.csv:2: malformed CSV" in error_of(tmp_path, "c.csv", b'text,label\n"quoted"tail,1\n')


def test_a_short_row_after_a_multiline_field_names_its_own_line(tmp_path):
    data = b'text,label\n"two\nlines",1\nshort\n'
    assert "c.csv:4: has 1 columns where the header has 2" in error_of(tmp_path, "c.csv", data)


@pytest.mark.parametrize("data,needle", [
    (b"", "c.csv: is empty; a CSV file starts with a header line"),
    (b"comment,label\nx,1\n", "has no column 'text'"),
])
def test_header_problems(tmp_path, data, needle):
    assert needle in error_of(tmp_path, "c.csv", data)


@pytest.mark.parametrize("data,needle", [
    (b'{"text": "a"}\n{"text": \n', "c.jsonl:2: not valid JSON"),
    (b'["a"]\n', "c.jsonl:1: expected a JSON object, found list"),
    (json.dumps({"body": "a"}).encode() + b"\n", "field 'text' is missing or not a string"),
])
def test_jsonl_problems(tmp_path, data, needle):
    assert needle in error_of(tmp_path, "c.jsonl", data)


def test_missing_file_and_unknown_format(tmp_path):
    with pytest.raises(TextFileError, match="no such file"):
        list(iter_records(tmp_path / "absent.txt"))
    (tmp_path / "c.txt").write_text("a\n")
    with pytest.raises(TextFileError, match="unknown format 'xml'"):
        list(iter_records(tmp_path / "c.txt", fmt="xml"))
