"""Command line: ``kaledger build | check | trace``; a thin layer over functions tests call."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from pipeline.build import DEFAULT_OUT, DEFAULT_RAW, build
from pipeline.descriptor import DescriptorError
from pipeline.ingest import IngestError
from pipeline.publish import PublishError, open_database

CAUTION = (
    "Caution: these are reference data. Check values against the primary literature before "
    "they drive dosing, formulation, safety or regulatory decisions, and defer to local codes "
    "and licensed practice."
)


def _cmd_build(args: argparse.Namespace) -> int:
    summary = build(args.raw, args.out, args.config)
    if not args.quiet:
        print("\n".join(summary.lines()))
        print()
        print(CAUTION)
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    con = open_database(args.db)
    try:
        rows = con.execute(
            "SELECT rule, severity, count(*) FROM findings GROUP BY rule, severity ORDER BY severity, rule"
        ).fetchall()
    finally:
        con.close()
    errors = sum(n for _, sev, n in rows if sev == "error")
    for rule, severity, n in rows:
        print(f"{severity:8} {rule:32} {n}")
    if errors:
        print(f"{errors} error finding(s): the release is not fit to publish", file=sys.stderr)
        return 1
    print("no error findings")
    return 0


def trace(db: Path | str, value_id: str) -> dict:
    """Everything recorded about one published value, oldest step first."""
    con = open_database(db)
    try:
        steps = con.execute(
            "SELECT step_no, operation, parameters, inputs FROM lineage WHERE target_id = ? ORDER BY step_no",
            [value_id],
        ).fetchall()
        if not steps:
            raise KeyError(f"value id {value_id!r} is not in {db}")
        row = con.execute(
            """SELECT m.source_id, m.source_row, m.value_reported, m.pka, s.file, s.file_sha256,
                      s.citation, s.license
               FROM measurements m JOIN sources s USING (source_id) WHERE m.value_id = ?""",
            [value_id],
        ).fetchone()
    finally:
        con.close()
    account = {
        "value_id": value_id,
        "steps": [
            {"step": n, "operation": op, "parameters": json.loads(p), "inputs": json.loads(i)}
            for n, op, p, i in steps
        ],
    }
    if row is not None:
        keys = ("source_id", "source_row", "value_reported", "pka", "file", "file_sha256", "citation", "license")
        account["source"] = dict(zip(keys, row, strict=True))
    return account


def _cmd_trace(args: argparse.Namespace) -> int:
    account = trace(args.db, args.value_id)
    if args.json:
        print(json.dumps(account, indent=2, ensure_ascii=False))
        return 0
    print(f"value {account['value_id']}")
    for step in account["steps"]:
        params = ", ".join(f"{k}={v}" for k, v in step["parameters"].items() if v is not None)
        print(f"  {step['step']}. {step['operation']}: {params}")
    if "source" in account:
        s = account["source"]
        print(f"  from {s['file']} row {s['source_row']} (sha256 {s['file_sha256'][:12]}…), "
              f"cell text {s['value_reported']!r}")
        print(f"  cite: {s['citation']} [{s['license']}]")
    return 0


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="kaledger", description="pKa/Ka reference-data curation pipeline")
    sub = p.add_subparsers(dest="command", required=True)
    b = sub.add_parser("build", help="ingest raw/ and publish the database")
    b.add_argument("--raw", type=Path, default=DEFAULT_RAW, help="folder of source folders (default raw/)")
    b.add_argument("--out", type=Path, default=DEFAULT_OUT, help="database file (default build/kaledger.duckdb)")
    b.add_argument("--config", type=Path, default=Path("kaledger.toml"), help="project config (rule settings)")
    b.add_argument("--quiet", action="store_true", help="print nothing on success")
    b.set_defaults(func=_cmd_build)
    c = sub.add_parser("check", help="exit non-zero if the database holds error findings")
    c.add_argument("--db", type=Path, default=DEFAULT_OUT)
    c.set_defaults(func=_cmd_check)
    t = sub.add_parser("trace", help="show where a published value came from")
    t.add_argument("value_id")
    t.add_argument("--db", type=Path, default=DEFAULT_OUT)
    t.add_argument("--json", action="store_true")
    t.set_defaults(func=_cmd_trace)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = parser().parse_args(argv)
    try:
        return int(args.func(args))
    except (DescriptorError, IngestError, PublishError, FileNotFoundError, KeyError) as exc:
        message = exc.args[0] if isinstance(exc, KeyError) else str(exc)
        print(f"kaledger: {message}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    raise SystemExit(main())
