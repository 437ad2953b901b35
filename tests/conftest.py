"""Shared fixtures: small hand-made sources written into a temporary raw/ folder."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO_RAW = ROOT / "raw"

BASIC_TOML = """\
[source]
id = "{id}"
title = "Test table"
citation = "Test citation"
license = "CC0-1.0"
kind = "compilation"

[table]
file = "data.csv"
format = "csv"

[columns]
name = "Compound"
value = "Value"
{extra_columns}

[defaults]
quantity = "{quantity}"
temperature = "25 °C"
ionic_strength = "0"
"""


def write_source(
    raw: Path,
    source_id: str,
    csv_text: str,
    *,
    quantity: str = "pKa",
    extra_columns: str = "",
    toml: str | None = None,
) -> Path:
    """Write raw/<source_id>/source.toml and data.csv; return the folder."""
    folder = raw / source_id
    folder.mkdir(parents=True)
    text = toml if toml is not None else BASIC_TOML.format(
        id=source_id, quantity=quantity, extra_columns=extra_columns
    )
    (folder / "source.toml").write_text(text, encoding="utf-8")
    (folder / "data.csv").write_text(csv_text, encoding="utf-8")
    return folder


@pytest.fixture
def raw_dir(tmp_path: Path) -> Path:
    raw = tmp_path / "raw"
    raw.mkdir()
    return raw


@pytest.fixture(scope="session")
def demo_db(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo raw/ built once per test session; tests only read it."""
    from pipeline.build import build

    out = tmp_path_factory.mktemp("demo-build") / "kaledger.duckdb"
    build(DEMO_RAW, out)
    return out


def query(db: Path, sql: str, *params: object) -> list[tuple]:
    """Rows of a read-only query on a published database (parameters, never string-built)."""
    import duckdb

    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute(sql, list(params)).fetchall()
    finally:
        con.close()
