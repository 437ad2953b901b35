"""Stage 5, publish: write the database atomically, so the last good file always survives.

The tables go into a temporary file in the output's own folder; it is closed, reopened
read-only and its row counts compared with what was meant to be written; only then is it
renamed over the old file (``os.replace`` is atomic on one file system). A lock file beside the
output serializes two builds aimed at the same file. This is the only stage that writes files.
"""

from __future__ import annotations

import fcntl
import logging
import os
import shutil
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from time import perf_counter

import duckdb
import pandas as pd

from pipeline import lineage
from pipeline.schemas import published_ddl

log = logging.getLogger(__name__)

TABLE_ORDER = (
    "sources",
    "compounds",
    "measurements",
    "rejects",
    "findings",
    "recommended",
    "lineage",
    "build_info",
)


class PublishError(RuntimeError):
    """The database could not be written; the previous file, if any, is untouched."""


@contextmanager
def build_lock(out_path: Path) -> Iterator[None]:
    """Hold an exclusive lock on ``<out>.lock`` for the duration of a build."""
    out_path.parent.mkdir(parents=True, exist_ok=True)
    lock_path = out_path.with_name(out_path.name + ".lock")
    with open(lock_path, "a+") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise PublishError(
                f"another kaledger build is writing {out_path} (lock {lock_path} is held); "
                "wait for it to finish"
            ) from None
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def duckdb_memory_limit(meminfo: Path = Path("/proc/meminfo")) -> int | None:
    """Bytes DuckDB may use while publishing: half the memory available now, at least 512 MiB.

    DuckDB's own default is 80 % of the machine's RAM, which ignores the pandas frames the
    build already holds; at 10M rows those are most of it. Past the limit DuckDB spills to a
    temporary folder instead. ``None`` where the kernel does not report ``MemAvailable``
    (not Linux): DuckDB's default then applies. Example: with 6 GiB available, 3 GiB.
    """
    try:
        text = meminfo.read_text()
    except OSError:
        return None
    for line in text.splitlines():
        if line.startswith("MemAvailable:"):
            available = int(line.split()[1]) * 1024  # reported in kB
            return max(512 * 2**20, available // 2)
    return None


def publish(
    tables: Mapping[str, pd.DataFrame], out_path: Path | str, cell_facts: pd.DataFrame | None = None
) -> Path:
    """Write ``tables`` to the DuckDB file ``out_path`` atomically; return its path.

    ``tables`` must hold every table of the published DDL (``schemas/kaledger.sql``); columns
    are matched by name. With ``cell_facts`` (normalize's, one row per measurement), the
    measurements' own lineage steps are expanded from them inside the file
    (:func:`pipeline.lineage.cell_steps_sql`) and written before ``tables["lineage"]`` (then the
    later steps only, e.g. consolidate's). Each of the two runs is ordered by target and step,
    so a trace query reads one stretch of each.
    """
    out_path = Path(out_path)
    missing = [t for t in TABLE_ORDER if t not in tables]
    if missing:
        raise PublishError(f"cannot publish: table {missing[0]!r} was not built")
    expected = {name: len(frame) for name, frame in tables.items()}
    out_path.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_path.with_name(f".{out_path.name}.tmp-{os.getpid()}")
    spill = tmp.with_name(tmp.name + ".spill")
    tmp.unlink(missing_ok=True)
    try:
        con = duckdb.connect(str(tmp))
        try:
            limit = duckdb_memory_limit()
            if limit is not None:
                con.execute(f"SET memory_limit = '{limit // 2**20}MiB'")
            con.execute("SET temp_directory = ?", [str(spill)])
            con.execute(published_ddl())
            for name in TABLE_ORDER:
                con.register("incoming", tables[name])
                columns = [r[0] for r in con.execute(f"DESCRIBE {name}").fetchall()]
                select = ", ".join(f'"{c}"' for c in columns)
                rows = f"SELECT {select} FROM incoming"
                started = perf_counter()
                if name == "lineage":
                    if cell_facts is not None:  # the cell steps first, already in target order
                        con.register("cell_facts", cell_facts)
                        (steps,) = con.execute(
                            f"SELECT coalesce(sum(steps), 0) FROM ({lineage.step_counts_sql('cell_facts', 'measurements')})"
                        ).fetchone()
                        expected["lineage"] += int(steps)
                        cells = lineage.cell_steps_sql("cell_facts", "measurements")
                        con.execute(f"INSERT INTO lineage ({select}) SELECT {select} FROM ({cells})")
                    rows += " ORDER BY target_id, step_no"
                con.execute(f"INSERT INTO {name} ({select}) {rows}")
                con.unregister("incoming")
                log.debug("publish: %s written in %.2f s", name, perf_counter() - started)
            con.execute("CHECKPOINT")
        finally:
            con.close()
        check = duckdb.connect(str(tmp), read_only=True)
        try:
            for name in TABLE_ORDER:
                (count,) = check.execute(f"SELECT count(*) FROM {name}").fetchone()
                if count != expected[name]:
                    raise PublishError(
                        f"verification failed: table {name} holds {count} rows, expected {expected[name]}"
                    )
        finally:
            check.close()
        os.replace(tmp, out_path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        Path(str(tmp) + ".wal").unlink(missing_ok=True)
        raise
    finally:
        shutil.rmtree(spill, ignore_errors=True)
    return out_path


def open_database(path: Path | str) -> duckdb.DuckDBPyConnection:
    """Open a published database read-only, with a clear error when it is missing."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"{path}: no kaledger database here; run 'kaledger build' first")
    return duckdb.connect(str(path), read_only=True)
