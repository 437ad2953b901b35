"""Smoke tests of the build benchmark's floors (bench/bench_build.py), on the demo.

The benchmark is run by hand, not in CI; these tests only keep its floor cases working and
honest: (a) reads every data row, (w) writes every published row again.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

from conftest import query

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

import bench_build  # noqa: E402
from generate_sources import generate  # noqa: E402


def test_output_floor_writes_every_published_row(demo_db: Path, tmp_path: Path) -> None:
    copy = tmp_path / "kaledger.duckdb"
    shutil.copy(demo_db, copy)
    tables = [r[0] for r in query(copy, "SELECT table_name FROM duckdb_tables()")]
    published = sum(query(copy, f"SELECT count(*) FROM {t}")[0][0] for t in tables)
    assert bench_build._output_floor(copy) == published
    assert not (tmp_path / "output-floor.duckdb").exists()  # the copy is removed


def test_input_floor_reads_every_generated_row(tmp_path: Path) -> None:
    raw = tmp_path / "raw"
    generate(2_000, raw)  # 8 synthetic sources, bad rows among them
    assert len(bench_build._data_files(raw)) == 8
    assert bench_build._floor(raw) == 2_000
