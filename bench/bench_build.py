"""Benchmark the whole build against a bare DuckDB load of the same files, in one run.

Steps, each in its own child process (so its peak memory is its own):

(a)  floor: DuckDB ``read_csv`` (all columns as text) of every data file into a table;
(w)  output floor: copy every table of the published file (b) into a new file with the same
     DDL, in DuckDB alone: the bare cost of writing what the build publishes, no computing;
(b0) cold full build: no ``build/cache`` at all (RDKit standardizes every structure);
(b)  full build with a warm identity cache only (kept per-source stage output deleted):
     what a steward's first build after adding every source anew costs on a used machine;
(c)  rebuild with nothing changed (the published file is found up to date);
(c') forced rebuild with nothing changed (``force=True``: every source comes from the kept
     stage output, the whole-set stages and publish run again);
(d)  rebuild after one cell of one source changed.

Prints seconds, the ratios (b)/(a), (w)/(a), (b)/(a+w), (b0)/(a), (c)/(b), (c')/(b), (d)/(b), rows per second and
each step's peak resident memory (``ru_maxrss`` of the child and of its own children, e.g.
RDKit workers). Targets (issue 10; printed, not asserted): (b)/(a) <= 10 at 1M rows,
(c)/(b) <= 0.1, peak memory < 4 GiB at 1M rows.

Usage (generates the sources into /tmp/bench-raw-1M first when missing)::

    .venv/bin/python bench/bench_build.py --rows 1M

``--profile FILE`` also writes a cProfile of step (b) (read it with ``python -m pstats``).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from generate_sources import generate, parse_rows  # noqa: E402

STEPS = ("floor", "cold", "full", "output_floor", "unchanged", "forced", "one_changed")


def _data_files(raw: Path) -> list[Path]:
    return sorted(p for p in raw.glob("*/table.*") if p.suffix in (".csv", ".tsv"))


def _floor(raw: Path) -> int:
    import duckdb

    con = duckdb.connect()
    rows = 0
    for i, path in enumerate(_data_files(raw)):
        delim = "\t" if path.suffix == ".tsv" else ","
        # strict_mode off / null_padding: the bad rows (ragged, ~0.1 %) load padded, not refused
        con.execute(
            f"CREATE TABLE t{i} AS SELECT * FROM read_csv(?, all_varchar = true, header = true, "
            "delim = ?, quote = '\"', strict_mode = false, null_padding = true)",
            [str(path), delim],
        )
        rows += con.execute(f"SELECT count(*) FROM t{i}").fetchone()[0]
    con.close()
    return rows


def _output_floor(out: Path) -> int:
    """Write the tables of the published file ``out`` into a new file with the published DDL."""
    import duckdb
    from pipeline.schemas import published_ddl

    copy = out.with_name("output-floor.duckdb")
    copy.unlink(missing_ok=True)
    con = duckdb.connect(str(copy))
    con.execute(published_ddl())
    con.execute("ATTACH ? AS published (READ_ONLY)", [str(out)])
    tables = [r[0] for r in con.execute(
        "SELECT table_name FROM duckdb_tables() WHERE database_name = 'published'").fetchall()]
    rows = 0
    for table in tables:
        con.execute(f"INSERT INTO {table} SELECT * FROM published.{table}")
        rows += con.execute(f"SELECT count(*) FROM {table}").fetchone()[0]
    con.execute("CHECKPOINT")
    con.close()
    copy.unlink()
    return rows


def _child(step: str, raw: Path, out: Path, profile: str | None) -> None:
    """Run one step in this process; print a JSON line with its seconds and peak memory."""
    import logging
    import re

    from pipeline.build import build

    stage_seconds: dict[str, float] = {}

    class StageTimes(logging.Handler):  # the build logs "<stage> done in <s> s"
        def emit(self, record: logging.LogRecord) -> None:
            m = re.match(r"(\w+) done in ([0-9.]+) s", record.getMessage())
            if m:
                stage_seconds[m.group(1)] = float(m.group(2))
            m = re.match(r"read \d+ sources in ([0-9.]+) s", record.getMessage())
            if m:  # reading happens source by source within normalize
                stage_seconds["read, within normalize"] = float(m.group(1))

    logger = logging.getLogger("pipeline")
    logger.setLevel(logging.INFO)
    logger.addHandler(StageTimes())
    start = time.perf_counter()
    detail: dict = {"stages": stage_seconds}
    if step == "floor":
        detail["rows"] = _floor(raw)
    elif step == "output_floor":
        detail["rows"] = _output_floor(out)
    else:
        kwargs = {"force": True} if step == "forced" else {}
        if profile and step == "full":
            import cProfile

            prof = cProfile.Profile()
            summary = prof.runcall(build, raw, out, **kwargs)
            prof.dump_stats(profile)
        else:
            summary = build(raw, out, **kwargs)
        detail.update(rows=summary.rows_read, accepted=summary.accepted,
                      rejected=summary.rejected_rows, up_to_date=summary.up_to_date)
    seconds = time.perf_counter() - start
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    print(json.dumps({"step": step, "seconds": seconds, "maxrss_kib": max(own, kids), **detail}))


def _run(step: str, raw: Path, out: Path, profile: str | None = None) -> dict:
    cmd = [sys.executable, __file__, "--child", step, "--raw", str(raw), "--out", str(out)]
    if profile:
        cmd += ["--profile", profile]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise SystemExit(f"step {step} failed:\n{done.stderr[-4000:]}")
    result = json.loads(done.stdout.strip().splitlines()[-1])
    print(f"  {step}: {result['seconds']:.2f} s", file=sys.stderr, flush=True)
    return result


def _change_one_cell(raw: Path) -> tuple[Path, bytes]:
    """Edit one value of the first source (a pKa a little higher); return (file, old bytes)."""
    path = _data_files(raw)[0]
    old = path.read_bytes()
    lines = old.decode("utf-8").split("\n")
    cells = lines[1].split(",")
    cells[3] = f"{float(cells[3]) + 0.01:.3f}" if cells[3] else "4.000"  # layout 0: pKa column
    lines[1] = ",".join(cells)
    path.write_bytes("\n".join(lines).encode("utf-8"))
    return path, old


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=parse_rows, default=parse_rows("1M"))
    p.add_argument("--raw", type=Path, help="sources folder (default /tmp/bench-raw-<rows>)")
    p.add_argument("--out", type=Path, help="database path (default /tmp/bench-build-<rows>/kaledger.duckdb)")
    p.add_argument("--regenerate", action="store_true", help="write the sources again")
    p.add_argument("--profile", help="write a cProfile of step (b) to this file")
    p.add_argument("--child", choices=STEPS, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    raw = args.raw or Path(f"/tmp/bench-raw-{args.rows}")
    out = args.out or Path(f"/tmp/bench-build-{args.rows}/kaledger.duckdb")
    if args.child:
        _child(args.child, raw, out, args.profile)
        return 0

    marker = raw / ".bench-rows"
    if args.regenerate or not marker.is_file() or marker.read_text() != str(args.rows):
        t = time.perf_counter()
        generate(args.rows, raw)
        marker.write_text(str(args.rows))
        print(f"generated {args.rows} rows into {raw} in {time.perf_counter() - t:.1f} s")
    size = sum(f.stat().st_size for f in _data_files(raw))
    cache = out.parent / "cache"
    shutil.rmtree(out.parent, ignore_errors=True)

    r: dict[str, dict] = {}
    r["floor"] = _run("floor", raw, out)
    r["cold"] = _run("cold", raw, out)  # nothing kept: RDKit on every distinct structure
    shutil.rmtree(cache / "sources", ignore_errors=True)
    out.unlink()
    r["full"] = _run("full", raw, out, args.profile)  # identity cache warm, no kept stages
    r["output_floor"] = _run("output_floor", raw, out)
    r["unchanged"] = _run("unchanged", raw, out)
    r["forced"] = _run("forced", raw, out)
    path, old = _change_one_cell(raw)
    try:
        r["one_changed"] = _run("one_changed", raw, out)
    finally:
        path.write_bytes(old)

    rows = r["full"]["rows"]
    a, b = r["floor"]["seconds"], r["full"]["seconds"]
    print()
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"{os.sysconf('SC_PAGE_SIZE') * os.sysconf('SC_PHYS_PAGES') / 2**30:.0f} GiB, "
          f"Python {platform.python_version()}")
    print(f"input: {rows:,} rows in {len(_data_files(raw))} sources, {size / 2**20:.0f} MiB; "
          f"accepted {r['full']['accepted']:,}, rejected {r['full']['rejected']:,}")
    labels = {
        "floor": "(a)  DuckDB read_csv floor",
        "cold": "(b0) full build, cold caches",
        "full": "(b)  full build, warm identity cache",
        "output_floor": "(w)  DuckDB copy of published tables",
        "unchanged": "(c)  rebuild, nothing changed",
        "forced": "(c') forced rebuild, all kept",
        "one_changed": "(d)  rebuild, one source changed",
    }
    for step, label in labels.items():
        x = r[step]
        stages = ", ".join(f"{k} {v:.1f}" for k, v in x.get("stages", {}).items())
        print(f"{label:38} {x['seconds']:8.2f} s   peak {x['maxrss_kib'] / 2**20:5.2f} GiB"
              + (f"   [{stages}]" if stages else ""))
    print()
    print(f"(b)/(a)  = {b / a:6.2f}   target <= 10 at 1M rows")
    w = r["output_floor"]["seconds"]
    print(f"(w)/(a)  = {w / a:6.2f}   writing the output alone ({r['output_floor']['rows']:,} rows in all tables)")
    print(f"(b)/(a+w) = {b / (a + w):5.2f}   the build against reading the input plus writing the output")
    print(f"(b0)/(a) = {r['cold']['seconds'] / a:6.2f}")
    print(f"(c)/(b)  = {r['unchanged']['seconds'] / b:6.3f}   target <= 0.1")
    print(f"(c')/(b) = {r['forced']['seconds'] / b:6.3f}")
    print(f"(d)/(b)  = {r['one_changed']['seconds'] / b:6.3f}")
    print(f"rows/s: full {rows / b:,.0f}, cold {rows / r['cold']['seconds']:,.0f}")
    peak = max(x["maxrss_kib"] for x in r.values()) / 2**20
    print(f"peak memory {peak:.2f} GiB   target < 4 GiB at 1M rows")
    if not r["unchanged"]["up_to_date"]:
        print("note: (c) did not find the published file up to date")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
