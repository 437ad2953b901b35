"""Benchmark: Library API lookups and the ``kaledger lookup`` command on the demo library.

1. 10,000 ``Library.pka`` lookups by name over the demo compounds, at four conditions (25 °C and
   37 °C, I = 0 and 0.15 mol/kg concentration constants), in shuffled order, on one open
   library: the first lookup of a compound reads its rows (cold, three queries), later ones
   reuse them (the file is read-only), so a warm lookup is the transfer arithmetic only.
   Combinations the library cannot answer (no ΔH° for a transfer) are left out and counted.
   Target: < 5 s in all.
2. ``kaledger lookup NAME --temperature 37C --ionic-strength 0.15`` run in-process through
   ``pipeline.cli.main`` (parse the arguments, find, transfer, print), 200 calls. The first call
   opens the file (``Library.shared``, about 20-60 ms for DuckDB's connect and first queries on
   this machine); later calls reuse it. Target: < 50 ms per call once the process is up.

The floor is a bare DuckDB point query on the same file (``SELECT pka FROM recommended WHERE
compound_id = ? AND step = ?``, parameter bound), measured in the same run.

Run: .venv/bin/python bench/bench_lookup.py [--db build/kaledger.duckdb] [n]
(without --db the demo raw/ is built into a temporary folder first)
"""

from __future__ import annotations

import contextlib
import io
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path

import duckdb

from pipeline.build import build
from pipeline.cli import main as cli_main
from pipeline.library import Library, LibraryLookupError

ROOT = Path(__file__).resolve().parents[1]
TARGET_API_S = 5.0
TARGET_CLI_MS = 50.0
CONDITIONS = [
    (298.15, 0.0, "thermodynamic"),
    (310.15, 0.0, "thermodynamic"),
    (298.15, 0.15, "concentration"),
    (310.15, 0.15, "concentration"),
]


def floor_query_s(db: Path, keys: list[tuple[str, int]], n: int = 2000) -> float:
    """Median time [s] of one bare DuckDB point query (parameter bound)."""
    con = duckdb.connect(str(db), read_only=True)
    try:
        times = []
        for k in range(n):
            cid, step = keys[k % len(keys)]
            start = time.perf_counter()
            con.execute("SELECT pka FROM recommended WHERE compound_id = ? AND step = ?",
                        [cid, step]).fetchall()
            times.append(time.perf_counter() - start)
    finally:
        con.close()
    return statistics.median(times)


def run(db: Path, n: int) -> int:
    con = duckdb.connect(str(db), read_only=True)
    rows = con.execute(
        "SELECT DISTINCT c.name, r.compound_id, r.step FROM recommended r "
        "JOIN compounds c USING (compound_id) WHERE c.name IS NOT NULL ORDER BY 1, 3"
    ).fetchall()
    con.close()
    keys = [(cid, step) for _, cid, step in rows]
    # keep the (compound, step, condition) combinations the library can answer (a transfer to
    # 37 °C needs a ΔH°); the refused ones are counted and reported
    combos, refused_combos = [], 0
    with Library.open(db) as probe:
        for row in rows:
            for cond in CONDITIONS:
                try:
                    probe.pka(row[0], step=row[2], temperature=cond[0], ionic_strength=cond[1],
                              constant_type=cond[2])
                    combos.append((row, cond))
                except (LibraryLookupError, ValueError):
                    refused_combos += 1
    rng = random.Random(20261202)
    jobs = [rng.choice(combos) for _ in range(n)]

    floor = floor_query_s(db, keys)

    # 1. API
    answered = refused = 0
    with Library.open(db) as lib:
        first: set[str] = set()
        cold_times: list[float] = []
        start = time.perf_counter()
        for (name, _cid, step), (t, i, ctype) in jobs:
            t0 = time.perf_counter()
            try:
                lib.pka(name, step=step, temperature=t, ionic_strength=i, constant_type=ctype)
                answered += 1
            except (LibraryLookupError, ValueError):
                refused += 1  # e.g. no ΔH° for a 37 °C transfer, ambiguous names
            if name not in first:
                first.add(name)
                cold_times.append(time.perf_counter() - t0)
        api_total = time.perf_counter() - start
    per_api = api_total / n

    # 2. CLI, in-process
    names = ["Tris", "HEPES", "acetic acid", "phosphoric acid"]
    cli_times = []
    sink = io.StringIO()
    for k in range(200):
        argv = ["lookup", names[k % len(names)], "--temperature", "37C", "--ionic-strength", "0.15",
                "--db", str(db)]
        if names[k % len(names)] == "phosphoric acid":
            argv += ["--step", "2"]
        t0 = time.perf_counter()
        with contextlib.redirect_stdout(sink), contextlib.redirect_stderr(sink):
            cli_main(argv)
        cli_times.append(time.perf_counter() - t0)
    cli_first = cli_times[0]  # opens the file (Library.shared)
    cli_median = statistics.median(cli_times[len(names):])  # once the process is up

    print(f"library: {db} ({len(rows)} compound/step pairs)")
    print(f"floor: bare DuckDB point query, median      : {floor * 1e6:8.1f} µs")
    print(f"API: {len(combos)} answerable compound/step/condition combinations "
          f"({refused_combos} refused with a clear error, left out)")
    print(f"API: {n:,} lookups ({answered:,} answered, {refused:,} refused)")
    print(f"API: total                                  : {api_total:8.3f} s")
    print(f"API: per lookup                             : {per_api * 1e6:8.1f} µs "
          f"({per_api / floor:.1f}x floor)")
    print(f"API: first lookup of a compound, median     : {statistics.median(cold_times) * 1e3:8.2f} ms "
          f"({statistics.median(cold_times) / floor:.1f}x floor)")
    print(f"CLI: first kaledger lookup (opens the file) : {cli_first * 1e3:8.2f} ms")
    print(f"CLI: kaledger lookup in-process, median     : {cli_median * 1e3:8.2f} ms "
          f"({cli_median / floor:.0f}x floor)")
    print(f"target API {n:,} lookups < {TARGET_API_S:.0f} s          : "
          f"{'met' if api_total < TARGET_API_S else 'MISSED'}")
    print(f"target CLI lookup < {TARGET_CLI_MS:.0f} ms               : "
          f"{'met' if cli_median * 1e3 < TARGET_CLI_MS else 'MISSED'}")
    return 0


def main(argv: list[str]) -> int:
    db: Path | None = None
    n = 10_000
    args = list(argv)
    if "--db" in args:
        k = args.index("--db")
        db = Path(args[k + 1])
        del args[k : k + 2]
    if args:
        n = int(args[0])
    if db is not None:
        return run(db, n)
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "kaledger.duckdb"
        build(ROOT / "raw", out)
        return run(out, n)


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
