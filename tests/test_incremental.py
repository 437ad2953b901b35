"""Incremental builds: kept stage output of unchanged sources gives exactly a clean build.

DESIGN.md invariant 3 (same input, same output) extended to the stage cache: a rebuild that
reuses kept per-source output must publish the same tables as a clean build of the same
input, and a source is read again only when its descriptor, data file, the synonyms file or
the stage code changed.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pytest
from conftest import DEMO_RAW

from pipeline import ingest, publish
from pipeline.build import build
from pipeline.descriptor import SourceDescriptor, TableSpec
from pipeline.publish import open_database


def _tables(db: Path) -> dict[str, list[tuple]]:
    con = open_database(db)
    try:
        return {
            t: con.execute(f"SELECT * FROM {t} ORDER BY ALL").fetchall()
            for t in publish.TABLE_ORDER
            if t != "build_info"  # holds the build time
        }
    finally:
        con.close()


@pytest.fixture
def demo_raw(tmp_path: Path) -> Path:
    raw = tmp_path / "raw"
    shutil.copytree(DEMO_RAW, raw)
    return raw


def _count_reads(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    reads: list[str] = []
    real = ingest.read_table

    def counting(source: SourceDescriptor, table: TableSpec) -> tuple[pd.DataFrame, dict]:
        reads.append(source.id)
        return real(source, table)

    monkeypatch.setattr(ingest, "read_table", counting)
    return reads


def test_rebuild_after_one_source_changed_equals_clean_build(
    demo_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "inc" / "kaledger.duckdb"
    build(demo_raw, out)
    data = demo_raw / "fernhollow-titrations" / "titrations.csv"
    data.write_bytes(data.read_bytes().replace(b",4.757,", b",4.758,", 1))  # one cell edited
    reads = _count_reads(monkeypatch)
    build(demo_raw, out)
    assert reads == ["fernhollow-titrations"]  # the three others came from the stage cache
    monkeypatch.undo()
    clean = build(demo_raw, tmp_path / "clean" / "kaledger.duckdb", use_cache=False)
    assert _tables(out) == _tables(clean.out_path)
    con = open_database(out)
    edited = con.execute(
        "SELECT value_reported FROM measurements WHERE source_id = 'fernhollow-titrations' AND source_row = 2"
    ).fetchone()
    assert edited == ("4.758",)
    con.close()


def test_unchanged_rebuild_leaves_the_published_file_alone(
    demo_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "b" / "kaledger.duckdb"
    first = build(demo_raw, out)
    stamp = out.stat().st_mtime_ns
    reads = _count_reads(monkeypatch)
    again = build(demo_raw, out)
    assert again.up_to_date and not first.up_to_date
    assert reads == [] and out.stat().st_mtime_ns == stamp
    assert again.per_source.to_dict("records") == first.per_source.to_dict("records")
    assert (again.accepted, again.rejected_rows, again.compounds, again.recommended) == (
        first.accepted, first.rejected_rows, first.compounds, first.recommended
    )
    assert "up to date" in "\n".join(again.lines())
    forced = build(demo_raw, out, force=True)  # republished from kept stage output only
    assert not forced.up_to_date and reads == []
    assert out.stat().st_mtime_ns != stamp


def test_synonyms_change_rereads_every_source(
    demo_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "c" / "kaledger.duckdb"
    build(demo_raw, out)
    with (demo_raw / "synonyms.csv").open("a", encoding="utf-8") as fh:
        fh.write("\n# a comment changes the file hash, so identity may have changed\n")
    reads = _count_reads(monkeypatch)
    build(demo_raw, out)
    assert sorted(reads) == sorted(p.parent.name for p in demo_raw.glob("*/source.toml"))


def test_damaged_cache_entry_is_ignored(demo_raw: Path, tmp_path: Path) -> None:
    out = tmp_path / "d" / "kaledger.duckdb"
    build(demo_raw, out)
    for parquet in (out.parent / "cache" / "sources").glob("*/measurements.parquet"):
        parquet.write_bytes(b"not parquet")
    build(demo_raw, out, force=True)
    clean = build(demo_raw, tmp_path / "clean" / "kaledger.duckdb", use_cache=False)
    assert _tables(out) == _tables(clean.out_path)


def test_kept_entry_reads_back_equal_with_repeated_texts_shared(tmp_path: Path) -> None:
    from pipeline.stage_cache import _read_frame, _write_frame

    n = 5000
    frame = pd.DataFrame({
        "value_id": pd.array([f"kv-{i:08d}" for i in range(n)], dtype="str"),
        "source_id": pd.array(["oaac-tables"] * n, dtype="str"),
        "method": pd.array([None if i % 7 == 0 else ("potentiometry", "spectrophotometry")[i % 2]
                            for i in range(n)], dtype="str"),
        "note": pd.Series([None if i % 3 == 0 else "from the table footnote" for i in range(n)], dtype=object),
        "pka": [4.756 + i * 1e-6 for i in range(n)],
    })
    import duckdb

    with duckdb.connect() as con:
        dtypes = _write_frame(con, frame, tmp_path / "part.parquet")
        back = _read_frame(con, tmp_path / "part.parquet", dtypes)
    pd.testing.assert_frame_equal(back, frame)
    assert back["note"].iloc[0] is None  # object columns keep None, not NaN
    # one string object per distinct text, as normalize makes them (common practice: memory)
    assert len({id(v) for v in back["source_id"].to_numpy()}) == 1
    assert len({id(v) for v in back["method"].dropna().to_numpy()}) == 2
