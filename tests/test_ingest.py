"""Ingest: every cell kept as text, rows numbered as in the file, encodings and formats."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from conftest import write_source

from pipeline.descriptor import load_descriptor
from pipeline.ingest import IngestError, ingest


def _ingest(folder: Path):
    return ingest([load_descriptor(folder / "source.toml")])


def test_rows_numbered_as_in_file_and_hash(raw_dir: Path) -> None:
    text = "Compound,Value\nacetic acid,4.756\n\nformic acid,3.752\n"
    folder = write_source(raw_dir, "t1", text)
    result = _ingest(folder)
    cells = result.raw_cells
    # header is row 1; the blank line 3 is not a data row (common practice for CSV tables)
    assert cells["source_row"].tolist() == [2, 4]
    assert cells["value"].tolist() == ["4.756", "3.752"]
    assert result.source_files["file_sha256"].iloc[0] == hashlib.sha256(text.encode()).hexdigest()
    assert result.source_files["row_count"].iloc[0] == 2


def test_quoted_multiline_cell_keeps_its_start_row(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", 'Compound,Value\n"acetic\nacid",4.756\nformic acid,3.752\n')
    assert _ingest(folder).raw_cells["source_row"].tolist() == [2, 4]


def test_windows_1252_and_bom(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "")
    (folder / "data.csv").write_bytes("Compound,Value\ncafé acid,4.5\n".encode("cp1252"))
    assert _ingest(folder).raw_cells["name"].tolist() == ["café acid"]
    folder2 = write_source(raw_dir, "t2", "")
    (folder2 / "data.csv").write_bytes(b"\xef\xbb\xbf" + b"Compound,Value\nacetic acid,4.756\n")
    assert _ingest(folder2).raw_cells["value"].tolist() == ["4.756"]


def test_ragged_row_is_kept_with_reason(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "Compound,Value\nacetic acid,4.756,extra\nformic acid\n")
    cells = _ingest(folder).raw_cells
    assert cells["row_error"].tolist() == [
        "row has 3 cells but the header has 2",
        "row has 1 cells but the header has 2",
    ]


def test_missing_header_column_is_named(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "Name,Value\nacetic acid,4.756\n")
    with pytest.raises(IngestError, match="column 'Compound' named in \\[columns\\] is not in the header"):
        _ingest(folder)


def test_binary_garbage_is_refused(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "")
    (folder / "data.csv").write_bytes(b"\x00\x01\x02garbage\x00" * 50)
    with pytest.raises(IngestError, match="binary data"):
        _ingest(folder)


def test_xlsx(raw_dir: Path) -> None:
    from openpyxl import Workbook

    toml = (Path(write_source(raw_dir, "tmp", "Compound,Value\n")) / "source.toml").read_text()
    folder = raw_dir / "t1"
    folder.mkdir()
    (folder / "source.toml").write_text(
        toml.replace('id = "tmp"', 'id = "t1"').replace('file = "data.csv"', 'file = "data.xlsx"')
        .replace('format = "csv"', 'format = "xlsx"\nskip_rows = 1'),
        encoding="utf-8",
    )
    book = Workbook()
    sheet = book.active
    sheet.append(["Table 3. Constants at 25 °C"])  # a title row above the header
    sheet.append(["Compound", "Value"])
    sheet.append(["acetic acid", 4.756])
    sheet.append(["formic acid", "3.752"])
    book.save(folder / "data.xlsx")
    cells = _ingest(folder).raw_cells
    assert cells["source_row"].tolist() == [3, 4]
    assert cells["value"].tolist() == ["4.756", "3.752"]


def test_not_a_workbook(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "")
    toml = (folder / "source.toml").read_text().replace('file = "data.csv"', 'file = "data.xlsx"').replace(
        'format = "csv"', 'format = "xlsx"'
    )
    (folder / "source.toml").write_text(toml)
    (folder / "data.xlsx").write_bytes(b"this is not a zip file")
    with pytest.raises(IngestError, match="is not a readable XLSX workbook"):
        _ingest(folder)
