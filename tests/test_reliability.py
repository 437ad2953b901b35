"""Reliability: the last good database survives kills, clashes and bad input; nothing is lost.

Kills are made deterministic with the build's test hook (``KALEDGER_TEST_PAUSE_AT=<stage>``
makes :func:`pipeline.build.build` print ``paused at <stage>`` and sleep there) and, inside
publish, by patching the child's ``published_ddl`` (temporary file open, being written) and
``os.replace`` (temporary file written and verified, not yet renamed). The child is killed with
SIGKILL, which no handler can intercept, so no clean-up code of ours runs.

The accounting invariant checked throughout is DESIGN.md invariant 1: per source, rows read =
rows in ``measurements`` + distinct rejected rows.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import duckdb
import pytest
from conftest import ROOT, write_source

from pipeline import publish
from pipeline.build import PAUSE_ENV, STAGES, build
from pipeline.cli import main
from pipeline.descriptor import DescriptorError
from pipeline.ingest import MAX_CELL_CHARS, IngestError
from pipeline.publish import PublishError, open_database

GOOD = "Compound,Value\nacetic acid,4.756\nformic acid,3.751\nbenzoic acid,4.204\n"


def _q(db: Path, sql: str) -> list[tuple]:
    con = open_database(db)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def _snapshot(db: Path) -> dict[str, list[tuple]]:
    """Every published table's rows (build_info included), for before/after comparisons."""
    return {t: _q(db, f"SELECT * FROM {t} ORDER BY ALL") for t in publish.TABLE_ORDER}


def assert_nothing_lost(db: Path) -> None:
    """DESIGN.md invariant 1: rows read = measurements + distinct rejected rows, per source."""
    rows = _q(
        db,
        """SELECT s.source_id, s.row_count,
                  (SELECT count(*) FROM measurements m WHERE m.source_id = s.source_id),
                  (SELECT count(DISTINCT source_row) FROM rejects r WHERE r.source_id = s.source_id)
           FROM sources s""",
    )
    assert rows
    for source_id, read, kept, rejected in rows:
        assert read == kept + rejected, source_id


@pytest.fixture
def good_db(raw_dir: Path, tmp_path: Path) -> Path:
    """A published database from one small good source (the 'last good file')."""
    write_source(raw_dir, "good", GOOD)
    out = tmp_path / "build" / "kaledger.duckdb"
    build(raw_dir, out)
    return out


# --------------------------------------------------------------------------------------------
# publish is atomic; consumers read only
# --------------------------------------------------------------------------------------------


def test_publish_renames_a_verified_temporary_in_the_same_folder(
    good_db: Path, raw_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[tuple[Path, Path]] = []
    real = os.replace

    def spy(src: str | os.PathLike[str], dst: str | os.PathLike[str]) -> None:
        src, dst = Path(src), Path(dst)
        if dst == good_db:
            calls.append((src, dst))
            # the temporary is complete and readable before it is renamed
            con = duckdb.connect(str(src), read_only=True)
            assert con.execute("SELECT count(*) FROM measurements").fetchone()[0] == 4
            con.close()
        real(src, dst)

    monkeypatch.setattr(publish.os, "replace", spy)
    write_source(raw_dir, "second", "Compound,Value\nacetic acid,4.76\n")
    build(raw_dir, good_db)
    assert len(calls) == 1
    src, dst = calls[0]
    assert src.parent == dst.parent and src.name.startswith(f".{dst.name}.tmp-")


def test_verification_failure_keeps_last_good_file(
    good_db: Path, raw_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    before = _snapshot(good_db)
    real_connect = duckdb.connect

    class ShortCount:
        """A read-only connection whose row counts come back one short (a corrupt write)."""

        def __init__(self, con: duckdb.DuckDBPyConnection) -> None:
            self.con = con

        def execute(self, sql: str, *args: object) -> object:
            result = self.con.execute(sql, *args)
            if sql.startswith("SELECT count(*)"):
                (n,) = result.fetchone()
                return self.con.execute("SELECT ?", [n - 1])
            return result

        def close(self) -> None:
            self.con.close()

    def connect(database: str = ":memory:", read_only: bool = False, **kwargs: object) -> object:
        con = real_connect(database, read_only=read_only, **kwargs)
        return ShortCount(con) if read_only and ".tmp-" in str(database) else con

    monkeypatch.setattr(publish.duckdb, "connect", connect)
    write_source(raw_dir, "second", "Compound,Value\nacetic acid,4.76\n")
    with pytest.raises(PublishError, match="verification failed: table sources holds"):
        build(raw_dir, good_db)
    monkeypatch.undo()
    assert _snapshot(good_db) == before
    assert not list(good_db.parent.glob(".*.tmp-*"))


def test_consumers_open_read_only(good_db: Path) -> None:
    con = open_database(good_db)
    try:
        with pytest.raises(duckdb.InvalidInputException, match="read-only"):
            con.execute("DELETE FROM measurements")
    finally:
        con.close()


# --------------------------------------------------------------------------------------------
# a build killed at any point leaves the previous database intact and readable
# --------------------------------------------------------------------------------------------

CHILD = textwrap.dedent(
    """
    import os, sys, time
    import pipeline.publish as pub

    point = os.environ.get("PAUSE_IN_PUBLISH")

    def pause():
        print("kaledger: paused at publish-" + point, file=sys.stderr, flush=True)
        time.sleep(60)

    if point == "writing":  # the temporary file exists and is being written
        real_ddl = pub.published_ddl
        def slow_ddl():
            pause()
            return real_ddl()
        pub.published_ddl = slow_ddl
    elif point == "replace":  # the temporary is written and verified, not yet renamed
        import os as real_os
        class SlowOs:
            def __getattr__(self, name):
                return getattr(real_os, name)
            def replace(self, src, dst):
                pause()
                real_os.replace(src, dst)
        pub.os = SlowOs()

    from pipeline.build import build
    build(sys.argv[1], sys.argv[2])
    """
)

KILL_POINTS = (*STAGES, "publish-writing", "publish-replace")


def _start_paused(raw: Path, out: Path, point: str) -> subprocess.Popen[str]:
    """Start a build in a child process and return once it is paused at ``point``."""
    env = dict(os.environ)
    if point.startswith("publish-"):
        env["PAUSE_IN_PUBLISH"] = point.removeprefix("publish-")
    else:
        env[PAUSE_ENV] = point
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(raw), str(out)],
        cwd=ROOT, env=env, stderr=subprocess.PIPE, stdout=subprocess.DEVNULL, text=True,
    )
    assert child.stderr is not None
    seen = []
    for line in child.stderr:
        seen.append(line)
        if f"paused at {point}" in line:
            return child
    child.wait()
    raise AssertionError(f"child never paused at {point}: {''.join(seen)[-2000:]}")


def _kill(child: subprocess.Popen[str]) -> None:
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL


@pytest.mark.parametrize("point", KILL_POINTS)
def test_killed_build_leaves_previous_database(
    good_db: Path, raw_dir: Path, point: str
) -> None:
    before = _snapshot(good_db)
    # a changed input, so the killed build has real work to do (it is not up to date)
    write_source(raw_dir, "second", "Compound,Value\nacetic acid,4.76\nphenol,9.99\n")
    child = _start_paused(raw_dir, good_db, point)
    if point == "publish-writing":
        assert list(good_db.parent.glob(f".{good_db.name}.tmp-*"))  # killed mid-write
    _kill(child)
    assert _snapshot(good_db) == before  # intact, readable, unchanged
    assert_nothing_lost(good_db)


def test_build_after_a_kill_recovers_and_matches_a_clean_build(
    good_db: Path, raw_dir: Path, tmp_path: Path
) -> None:
    write_source(raw_dir, "second", "Compound,Value\nacetic acid,4.76\nphenol,9.99\n")
    _kill(_start_paused(raw_dir, good_db, "publish-writing"))
    assert list(good_db.parent.glob(f".{good_db.name}.tmp-*"))
    spill = good_db.parent / f".{good_db.name}.tmp-1.spill"  # DuckDB's spill folder, as a kill leaves it
    spill.mkdir()
    (spill / "duckdb_temp_block-0.block").write_bytes(b"\0" * 4096)
    summary = build(raw_dir, good_db)  # kept stage output of the killed build may be reused
    assert summary.rows_read == 5
    assert not list(good_db.parent.glob(f".{good_db.name}.tmp-*"))  # stale temporary removed
    clean = build(raw_dir, tmp_path / "clean" / "kaledger.duckdb", use_cache=False)
    a, b = _snapshot(good_db), _snapshot(clean.out_path)
    a.pop("build_info"), b.pop("build_info")
    assert a == b


# --------------------------------------------------------------------------------------------
# two builds at once are serialized by the lock
# --------------------------------------------------------------------------------------------


def test_second_build_across_processes_is_refused_with_a_clear_message(
    good_db: Path, raw_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    before = _snapshot(good_db)
    write_source(raw_dir, "second", "Compound,Value\nacetic acid,4.76\n")
    child = _start_paused(raw_dir, good_db, "validate")  # holds the lock
    try:
        with pytest.raises(PublishError, match="another kaledger build is writing .* wait for it"):
            build(raw_dir, good_db)
        assert main(["build", "--raw", str(raw_dir), "--out", str(good_db), "--quiet"]) == 2
        assert "another kaledger build is writing" in capsys.readouterr().err
    finally:
        _kill(child)
    assert _snapshot(good_db) == before
    build(raw_dir, good_db)  # the lock died with its holder
    assert _q(good_db, "SELECT count(*) FROM sources") == [(2,)]


# --------------------------------------------------------------------------------------------
# bad input: a clear message, the last good file kept, nothing lost
# --------------------------------------------------------------------------------------------


def _refused(good_db: Path, raw_dir: Path, error: type[Exception], match: str) -> None:
    before = _snapshot(good_db)
    with pytest.raises(error, match=match):
        build(raw_dir, good_db)
    assert _snapshot(good_db) == before


def test_ragged_rows_are_rejected_with_reason(good_db: Path, raw_dir: Path) -> None:
    write_source(raw_dir, "ragged", "Compound,Value\nacetic acid,4.76,extra\nformic acid\nphenol,9.99,\n")
    build(raw_dir, good_db)
    reasons = dict(_q(good_db, "SELECT source_row, reason FROM rejects WHERE source_id = 'ragged' AND field = 'row'"))
    assert reasons == {
        2: "row has 3 cells but the header has 2",
        3: "row has 1 cells but the header has 2",
    }  # row 4's trailing empty cell is harmless
    assert_nothing_lost(good_db)


def test_unterminated_quote_is_one_rejected_row_naming_the_line(good_db: Path, raw_dir: Path) -> None:
    write_source(raw_dir, "quote", 'Compound,Value\nacetic acid,4.76\n"formic acid,3.75\nphenol,9.99\n')
    build(raw_dir, good_db)
    (reason,) = _q(good_db, "SELECT reason FROM rejects WHERE source_id = 'quote'")[0]
    assert reason.startswith("a quoted cell opened on line 3 is never closed")
    assert "line 4" in reason
    assert _q(good_db, "SELECT row_count, accepted, rejected FROM sources WHERE source_id = 'quote'") == [(2, 1, 1)]
    assert_nothing_lost(good_db)


def test_binary_garbage_is_refused(good_db: Path, raw_dir: Path) -> None:
    folder = write_source(raw_dir, "garbage", "")
    (folder / "data.csv").write_bytes(bytes(range(256)) * 64)
    _refused(good_db, raw_dir, IngestError, "holds binary data")


def test_nul_byte_after_the_first_block_is_refused(good_db: Path, raw_dir: Path) -> None:
    folder = write_source(raw_dir, "latenul", "")
    # 4 lines of GOOD, 2000 filler lines, then the NUL on line 2005 (past the first 4 KiB)
    (folder / "data.csv").write_bytes(GOOD.encode() + b"x,1\n" * 2000 + b"bad\x00row,1\n")
    _refused(good_db, raw_dir, IngestError, "data.csv: holds a NUL character on line 2005 \\(binary data\\)")


def test_a_100_mb_field_is_rejected_not_fatal(good_db: Path, raw_dir: Path) -> None:
    folder = write_source(raw_dir, "huge", "")
    with (folder / "data.csv").open("w", encoding="utf-8") as fh:
        fh.write("Compound,Value\nacetic acid,4.76\nformic acid,")
        fh.write("9" * (100 * 2**20))  # one 100 MiB cell
        fh.write("\nphenol,9.99\n")
    build(raw_dir, good_db)
    rows = _q(good_db, "SELECT source_row, reason FROM rejects WHERE source_id = 'huge' AND field = 'row'")
    assert rows == [(3, f"a cell is longer than {MAX_CELL_CHARS} characters")]
    # the cell text kept for the other reasons is cut to the limit, never 100 MiB
    assert _q(good_db, "SELECT max(length(raw_text)) FROM rejects")[0][0] <= MAX_CELL_CHARS
    assert _q(good_db, "SELECT max(length(value_reported)) FROM measurements")[0][0] < 100
    assert_nothing_lost(good_db)


def test_xlsx_that_is_not_a_workbook(good_db: Path, raw_dir: Path) -> None:
    folder = write_source(raw_dir, "notxlsx", "")
    toml = (folder / "source.toml").read_text().replace('"data.csv"', '"data.xlsx"').replace(
        'format = "csv"', 'format = "xlsx"'
    )
    (folder / "source.toml").write_text(toml)
    (folder / "data.xlsx").write_bytes(b"PK\x03\x04 this is not really a zip archive")
    _refused(good_db, raw_dir, IngestError, "data.xlsx: is not a readable XLSX workbook")


@pytest.mark.parametrize("file", ["../good/data.csv", "/etc/hostname", "link.csv"])
def test_descriptor_file_outside_its_folder_is_refused(
    good_db: Path, raw_dir: Path, file: str
) -> None:
    folder = write_source(raw_dir, "escape", GOOD)
    (folder / "link.csv").symlink_to(raw_dir / "good" / "data.csv")  # a link that leaves
    toml = (folder / "source.toml").read_text().replace('"data.csv"', f'"{file}"')
    (folder / "source.toml").write_text(toml)
    _refused(good_db, raw_dir, DescriptorError, "points outside the source folder")


@pytest.mark.parametrize(
    ("old", "new", "match"),
    [
        ('title = "Test table"', "title = 5", "key 'title' in \\[source\\] must be text, got int 5"),
        ('format = "csv"', 'format = "csv"\nskip_rows = "1"', "skip_rows in \\[table\\] must be a whole number >= 0, got '1'"),
        ('value = "Value"', "value = true", "field 'value' in \\[columns\\] must be text, got True"),
        ("[defaults]", '[defaults]\nmedium = ["water"]', "field 'medium' in \\[defaults\\] must be text"),
        ('format = "csv"', 'format = "csv"\ndecimal = 1', "decimal in \\[table\\] must be '.' or ',', got 1"),
    ],
)
def test_descriptor_keys_of_the_wrong_type(
    good_db: Path, raw_dir: Path, old: str, new: str, match: str
) -> None:
    folder = write_source(raw_dir, "wrongtype", GOOD)
    toml = (folder / "source.toml").read_text()
    assert old in toml
    (folder / "source.toml").write_text(toml.replace(old, new, 1))
    _refused(good_db, raw_dir, DescriptorError, match)


def test_duplicate_source_id_is_refused(good_db: Path, raw_dir: Path) -> None:
    # ids must equal the folder name, so a second folder claiming id "good" is the clash
    folder = write_source(raw_dir, "good-copy", GOOD)
    toml = (folder / "source.toml").read_text().replace('id = "good-copy"', 'id = "good"')
    (folder / "source.toml").write_text(toml)
    _refused(good_db, raw_dir, DescriptorError, "id 'good' must equal the folder name 'good-copy'")


def test_empty_table_is_read_as_no_rows(good_db: Path, raw_dir: Path) -> None:
    write_source(raw_dir, "headeronly", "Compound,Value\n")
    build(raw_dir, good_db)
    assert _q(good_db, "SELECT row_count, accepted, rejected FROM sources WHERE source_id = 'headeronly'") == [(0, 0, 0)]
    assert_nothing_lost(good_db)


def test_empty_file_is_refused_with_the_expected_header(good_db: Path, raw_dir: Path) -> None:
    write_source(raw_dir, "zerobytes", "")
    _refused(good_db, raw_dir, IngestError, "data.csv: is empty; no header row found .*'Compound', 'Value'")


def test_cli_reports_bad_input_without_a_traceback(
    good_db: Path, raw_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    write_source(raw_dir, "zerobytes", "")
    assert main(["build", "--raw", str(raw_dir), "--out", str(good_db), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("kaledger: ") and "Traceback" not in err
