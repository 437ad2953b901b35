"""Publish: atomic replacement, verification, lock, read-only consumers."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import pytest

from pipeline import publish
from pipeline.publish import PublishError, build_lock, open_database


def _empty_tables() -> dict[str, pd.DataFrame]:
    """Every published table with its columns and no rows (columns read from the DDL)."""
    con = duckdb.connect()
    from pipeline.schemas import published_ddl

    con.execute(published_ddl())
    tables = {
        name: con.execute(f"SELECT * FROM {name}").df() for name in publish.TABLE_ORDER
    }
    con.close()
    return tables


def test_publish_writes_every_table(tmp_path: Path) -> None:
    tables = _empty_tables()
    tables["build_info"] = pd.DataFrame({"key": ["schema_version"], "value": ["1"]})
    out = publish.publish(tables, tmp_path / "db.duckdb")
    con = open_database(out)
    names = {r[0] for r in con.execute("SHOW TABLES").fetchall()}
    assert set(publish.TABLE_ORDER) <= names
    assert con.execute("SELECT value FROM build_info").fetchone() == ("1",)
    with pytest.raises(duckdb.Error):  # consumers open the file read-only
        con.execute("DELETE FROM build_info")
    con.close()
    assert [p.name for p in tmp_path.iterdir()] == ["db.duckdb"]  # no temporary left behind


@pytest.mark.parametrize(
    ("meminfo", "expected"),
    [
        ("MemTotal:       24000000 kB\nMemAvailable:    6291456 kB\n", 3 * 2**30),  # half of 6 GiB
        ("MemAvailable:     524288 kB\n", 512 * 2**20),  # half of 512 MiB, raised to the floor
        ("MemTotal:       24000000 kB\n", None),  # no MemAvailable line: DuckDB's default
    ],
)
def test_duckdb_memory_limit_is_half_of_what_is_available(
    tmp_path: Path, meminfo: str, expected: int | None
) -> None:
    path = tmp_path / "meminfo"
    path.write_text(meminfo)
    assert publish.duckdb_memory_limit(path) == expected
    assert publish.duckdb_memory_limit(tmp_path / "missing") is None


def test_failed_publish_keeps_last_good_file(tmp_path: Path) -> None:
    out = tmp_path / "db.duckdb"
    good = _empty_tables()
    good["build_info"] = pd.DataFrame({"key": ["release"], "value": ["good"]})
    publish.publish(good, out)
    bad = _empty_tables()
    bad["build_info"] = pd.DataFrame({"key": ["release", "release"], "value": ["a", "b"]})  # PK clash
    with pytest.raises(duckdb.ConstraintException):
        publish.publish(bad, out)
    con = open_database(out)
    assert con.execute("SELECT value FROM build_info").fetchall() == [("good",)]
    con.close()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["db.duckdb"]


def test_missing_table_is_refused(tmp_path: Path) -> None:
    tables = _empty_tables()
    del tables["lineage"]
    with pytest.raises(PublishError, match="table 'lineage' was not built"):
        publish.publish(tables, tmp_path / "db.duckdb")


def test_second_build_on_same_output_is_told_to_wait(tmp_path: Path) -> None:
    out = tmp_path / "db.duckdb"
    with build_lock(out):
        with pytest.raises(PublishError, match="another kaledger build is writing"):
            with build_lock(out):
                pass


def test_missing_database_message(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match="run 'kaledger build' first"):
        open_database(tmp_path / "none.duckdb")
