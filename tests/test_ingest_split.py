"""Ingest's line-by-line split equals reading the text as one ``csv`` stream.

``_read_delimited`` cuts plain rows (no quote, one cell per header column) with ``str.split``
and tokenizes only the other lines with the ``csv`` module; ``_read_delimited_stream`` reads
the whole text with the ``csv`` reader and numbers records by its line counter. Both must give
the same header, rows, row numbers and open quote for any text.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.ingest import _read_delimited, _read_delimited_stream, _Rows, _split_lines

PATH = Path("<test>")


def _records(rows: _Rows) -> list[list[str]]:
    """Every data row's cells in file order, wherever the reader kept them."""
    plain = iter(rows.plain_cells.tolist())
    other = iter(rows.other_records)
    return [next(plain) if is_plain else next(other) for is_plain in rows.plain]


def _assert_same_as_stream(text: str, delimiter: str, skip_rows: int) -> None:
    fast = _read_delimited(text, delimiter, skip_rows, PATH)
    stream = _read_delimited_stream(text, _split_lines(text), delimiter, skip_rows, PATH)
    assert fast.header == stream.header
    assert fast.starts.tolist() == stream.starts.tolist()
    assert fast.open_row == stream.open_row
    fast_records, stream_records = _records(fast), _records(stream)
    if stream.open_row is not None:  # the open cell runs to the end of the file; the stream
        # keeps a final line end inside it, the line split does not (the row is rejected)
        fast_records[-1][-1] = fast_records[-1][-1].rstrip("\r\n")
        stream_records[-1][-1] = stream_records[-1][-1].rstrip("\r\n")
    assert fast_records == stream_records
    assert len(fast.other_sizes) == len(fast.other_records)
    if len(fast.plain_cells):
        assert fast.plain_cells.shape[1] == len(fast.header)


def test_plain_quoted_ragged_blank_and_open_rows() -> None:
    text = (
        "title line\n"
        "\n"
        "Compound,Value,T\n"
        "acetic acid,4.76,25\n"
        ' , ,\t\n'
        '"formic, acid",3.75,25\n'
        "phenol,9.99\n"
        "water,15.7,25,,\n"
        'a"b,1,2\n'
        '"",,\n'
        '"open,1'
    )
    _assert_same_as_stream(text, ",", 1)
    rows = _read_delimited(text, ",", 1, PATH)
    assert rows.header == ["Compound", "Value", "T"]
    assert rows.starts.tolist() == [4, 6, 7, 8, 9, 11]  # blank lines 5 and 10 are no rows
    assert rows.plain.tolist() == [True, False, False, False, False, False]
    assert rows.plain_cells.tolist() == [["acetic acid", "4.76", "25"]]
    assert rows.other_records[0] == ["formic, acid", "3.75", "25"]
    assert rows.other_records[3] == ['a"b', "1", "2"]  # a quote inside a cell is text
    assert rows.open_row == 11


@settings(max_examples=400, deadline=None, derandomize=True)
@given(
    text=st.text(alphabet=st.sampled_from(list('ab,"\n\r \t4\ufffd\u3000')), max_size=120),
    header=st.sampled_from(["", "A,B\n", '"A","B"\n', "A\tB\n", "\n A , B \n"]),
    delimiter=st.sampled_from([",", "\t"]),
    skip_rows=st.integers(0, 2),
)
def test_line_split_equals_stream(text: str, header: str, delimiter: str, skip_rows: int) -> None:
    _assert_same_as_stream(header + text, delimiter, skip_rows)


def test_quoted_cell_spanning_lines_is_read_as_a_stream() -> None:
    text = 'A,B\n"two\nlines",1\nc,2\n'
    rows = _read_delimited(text, ",", 0, PATH)
    assert rows.starts.tolist() == [2, 4]
    assert _records(rows) == [["two\nlines", "1"], ["c", "2"]]
    assert not np.any(rows.plain)
