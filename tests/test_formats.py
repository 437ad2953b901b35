"""Reading real tables end to end: several tables in one source, XLSX, encodings, comma decimals."""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.descriptor import load_descriptor
from pipeline.ingest import ingest
from pipeline.normalize import normalize

TWO_TABLES = """\
[source]
id = "multi"
title = "Two tables"
citation = "Test citation"
license = "CC0-1.0"

[columns]
name = "Compound"
value = "Value"

[defaults]
temperature = "25 °C"
ionic_strength = "0"

[[table]]
file = "acids.csv"
format = "csv"
defaults = { quantity = "pKa" }

[[table]]
file = "bases.tsv"
format = "tsv"
decimal = ","
defaults = { quantity = "pKb" }
"""


def _normalize(folder: Path):
    read = ingest([load_descriptor(folder / "source.toml")])
    return read, normalize(read.raw_cells, read.tables)


def test_several_tables_in_one_source(tmp_path: Path) -> None:
    folder = tmp_path / "multi"
    folder.mkdir()
    (folder / "source.toml").write_text(TWO_TABLES, encoding="utf-8")
    (folder / "acids.csv").write_text("Compound,Value\nacetic acid,4.756\n", encoding="utf-8")
    (folder / "bases.tsv").write_text("Compound\tValue\nammonia\t4,75\n", encoding="utf-8")
    read, out = _normalize(folder)
    m = out.measurements.set_index("name_reported")
    assert m.loc["acetic acid", "pka"] == pytest.approx(4.756)
    # pKb 4,75 (comma decimal) -> pKa 13.994 - 4.75 (pKw: IAPWS R11-24 via iapws at 25 °C)
    assert m.loc["ammonia", "pka"] == pytest.approx(9.244, abs=1e-3)
    assert read.source_files["row_count"].iloc[0] == 2
    assert set(out.lineage["target_id"]) == set(out.measurements["value_id"])


def test_xlsx_source_builds_with_right_values(tmp_path: Path) -> None:
    from openpyxl import Workbook

    folder = tmp_path / "book"
    folder.mkdir()
    (folder / "source.toml").write_text(
        TWO_TABLES.split("[[table]]")[0].replace('id = "multi"', 'id = "book"')
        + '[table]\nfile = "constants.xlsx"\nformat = "xlsx"\nsheet = "pKa"\nskip_rows = 2\n'
        + '[table.defaults]\nquantity = "Ka"\n',
        encoding="utf-8",
    )
    book = Workbook()
    sheet = book.active
    sheet.title = "pKa"
    sheet.append(["Acid constants of the demo workbook"])  # title rows above the header
    sheet.append(["(values at 25 °C)"])
    sheet.append(["Compound", "Value"])
    sheet.append(["acetic acid", 1.75e-5])  # a numeric cell
    sheet.append(["formic acid", "1.8 × 10⁻⁴"])  # a text cell
    book.save(folder / "constants.xlsx")
    _, out = _normalize(folder)
    # -log10(1.75e-5) = 4.75696, -log10(1.8e-4) = 3.74473 (arithmetic)
    assert out.measurements["pka"].round(5).tolist() == [4.75696, 3.74473]
    assert out.measurements["source_row"].tolist() == [4, 5]


def test_windows_1252_detected_without_encoding_key(tmp_path: Path) -> None:
    folder = tmp_path / "legacy"
    folder.mkdir()
    (folder / "source.toml").write_text(
        TWO_TABLES.split("[[table]]")[0].replace('id = "multi"', 'id = "legacy"')
        + '[table]\nfile = "t.csv"\nformat = "csv"\n[table.defaults]\nquantity = "pKa"\n',
        encoding="utf-8",
    )
    text = "Compound,Value,Note\n" + "".join(
        f"acetic acid,4.75{i % 10},measured at 25 °C ± 0.1 – réf. Brønsted\n" for i in range(20)
    )
    (folder / "t.csv").write_bytes(text.encode("cp1252"))
    read, out = _normalize(folder)
    assert len(out.measurements) == 20 and out.rejects.empty
    assert read.source_files["encoding"].iloc[0] != "utf-8"


def test_manifest_hashes_each_table_of_a_multi_table_source(tmp_path: Path) -> None:
    import hashlib
    import json

    from conftest import query

    from pipeline.build import build

    folder = tmp_path / "raw" / "multi"
    folder.mkdir(parents=True)
    (folder / "source.toml").write_text(TWO_TABLES, encoding="utf-8")
    (folder / "acids.csv").write_text("Compound,Value\nacetic acid,4.756\n", encoding="utf-8")
    (folder / "bases.tsv").write_text("Compound\tValue\nammonia\t4,75\n", encoding="utf-8")
    out = tmp_path / "db.duckdb"
    build(tmp_path / "raw", out)
    (text,) = query(out, "SELECT value FROM build_info WHERE key = 'input_sha256'")[0]
    hashes = json.loads(text)
    for name in ("acids.csv", "bases.tsv"):  # sha256 (FIPS 180-4) of each file as read
        assert hashes[f"multi/{name}"] == hashlib.sha256((folder / name).read_bytes()).hexdigest()
