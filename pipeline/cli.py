"""Command line: ``kaledger build | check | trace | export | diff``; a thin layer over functions tests call."""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from pipeline import diff as release_diff
from pipeline import provenance
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
    if args.verbose:
        logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s: %(message)s")
    show_progress = not args.quiet and sys.stdout.isatty()
    summary = build(args.raw, args.out, args.config, progress=show_progress, force=args.force)
    if not args.quiet:
        print("\n".join(summary.lines()))
        print()
        print(CAUTION)
    return 0


def _cmd_check_fitness(args: argparse.Namespace) -> int:
    from pipeline.fitness import run_fitness

    report = run_fitness(args.db)
    print("\n".join(report.lines()))
    if not report.ok:
        names = ", ".join(r.case.key for r in report.failures)
        print(f"fitness-for-use failed ({names}): the release is not fit to publish", file=sys.stderr)
        return 1
    print("all fitness-for-use cases pass")
    return 0


def recheck(db: Path | str, config_path: Path | str | None = None) -> pd.DataFrame:
    """Run the chemistry rules again on a built database; return every finding.

    The registered rules (``pipeline.checks.RULES``) run on the published measurements with
    the settings of ``config_path``, or, without one, the config recorded in ``build_info``
    when the database was built. Findings of the other stages (identity, consensus) are taken
    as stored, since they need the build's inputs.
    """
    from pipeline.build import load_config
    from pipeline.checks import RULES, run_rules
    from pipeline.schemas.tables import FINDINGS, MEASUREMENTS

    con = open_database(db)
    try:
        measurements = con.execute("SELECT * FROM measurements ORDER BY value_id").df()
        stored = con.execute("SELECT * FROM findings").df()
        recorded = con.execute("SELECT value FROM build_info WHERE key = 'config'").fetchone()
    finally:
        con.close()
    if config_path is not None:
        config = load_config(Path(config_path))
    else:
        config = json.loads(recorded[0]) if recorded else {}
    measurements = MEASUREMENTS.validate(measurements[list(MEASUREMENTS.columns)])
    fresh = run_rules(measurements, config.get("rules", {}))
    other = stored[~stored["rule"].isin(list(RULES))]
    return FINDINGS.validate(pd.concat([fresh, other], ignore_index=True))


def _cmd_check(args: argparse.Namespace) -> int:
    if getattr(args, "fitness", False):
        return _cmd_check_fitness(args)
    findings = recheck(args.db, args.config)
    counts = findings.groupby(["severity", "rule"]).size()
    for (severity, rule), n in counts.items():
        print(f"{severity:8} {rule:32} {n}")
    errors = int((findings["severity"] == "error").sum())
    if errors:
        print(f"{errors} error finding(s): the release is not fit to publish", file=sys.stderr)
        return 1
    print("no error findings")
    return 0


def _cmd_lookup(args: argparse.Namespace) -> int:
    from pipeline.library import ConditionsOutOfRangeError, Library, LibraryLookupError

    i_text = args.ionic_strength
    ctype = args.constant_type
    try:
        lib = Library.shared(args.db)  # kept open for further lookups in this process
        compound = lib.find(args.name)
        if ctype is None:  # a value "at I" means the concentration constant at that I
            from pipeline.library import _parse_ionic_strength

            ctype = "concentration" if _parse_ionic_strength(i_text) > 0 else "thermodynamic"
        if args.step is None:
            results = lib.pkas(compound, args.temperature, i_text, ctype)
        else:
            results = [lib.pka(compound, args.step, args.temperature, i_text, ctype)]
    except (LibraryLookupError, ConditionsOutOfRangeError, ValueError) as exc:
        print(f"kaledger lookup: {exc}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps([r.to_dict() for r in results], indent=2, ensure_ascii=False))
        return 0
    first = results[0]
    print(f"{compound.name} ({compound.compound_id}{', CAS ' + compound.cas if compound.cas else ''})")
    print(f"{ctype} pKa at {first.temperature_k:.2f} K, I = {first.ionic_strength_molal:g} mol/kg")
    print(f"{'step':>4}  {'pKa':>8}  {'u(pKa)':>7}  {'category':11}  values")
    for r in results:
        mark = " (extrapolated)" if r.extrapolated else ""
        print(f"{r.step:>4}  {r.pka:8.4f}  {r.uncertainty:7.4f}  {r.category:11}  {', '.join(r.value_ids)}")
        print(f"{'':>4}  model: {r.model}{mark}")
    return 0


def trace(db: Path | str, value_id: str) -> dict:
    """Everything recorded about a value id or recommendation id (see :func:`provenance.trace`)."""
    return provenance.trace(db, value_id)


def _cmd_trace(args: argparse.Namespace) -> int:
    account = trace(args.db, args.value_id)
    if args.json:
        print(json.dumps(account, indent=2, ensure_ascii=False))
        return 0
    print("\n".join(provenance.format_trace(account)))
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    if args.prov is None and args.package is None:
        raise provenance.ExportError("nothing to export: give --prov FILE, --package DIR or both")
    if args.package is not None:
        path = provenance.export_package(
            args.db, args.package, public=not args.internal, exclude_restricted=args.exclude_restricted
        )
        print(f"data package: {path}")
    if args.prov is not None:
        print(f"PROV-JSON: {provenance.export_prov(args.db, args.prov)}")
    return 0


def _threshold(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"threshold {text!r} is not a number (pK units, >= 0)") from None
    if not value >= 0:
        raise argparse.ArgumentTypeError(f"threshold {text!r} must be >= 0 (pK units)")
    return value


def _cmd_diff(args: argparse.Namespace) -> int:
    report = release_diff.diff(args.old, args.new, args.threshold)
    if args.json:
        print(json.dumps(report, indent=2, ensure_ascii=False))
    else:
        print("\n".join(release_diff.format_diff(report)))
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from pipeline.report import render  # matplotlib is imported only for this command

    index = render(args.db, args.out)
    print(f"report written to {index}")
    print(f"open {index.resolve().as_uri()} in a browser (works offline)")
    return 0


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="kaledger", description="pKa/Ka reference-data curation pipeline")
    sub = p.add_subparsers(dest="command", required=True)
    b = sub.add_parser("build", help="ingest raw/ and publish the database")
    b.add_argument("--raw", type=Path, default=DEFAULT_RAW, help="folder of source folders (default raw/)")
    b.add_argument("--out", type=Path, default=DEFAULT_OUT, help="database file (default build/kaledger.duckdb)")
    b.add_argument("--config", type=Path, default=Path("kaledger.toml"), help="project config (rule settings, [consolidate] reference state)")
    b.add_argument("--quiet", action="store_true", help="print nothing on success")
    b.add_argument("--force", action="store_true",
                   help="rebuild and republish even when no input has changed")
    b.add_argument("--verbose", "-v", action="store_true", help="log each stage and its time to stderr")
    b.set_defaults(func=_cmd_build)
    r = sub.add_parser("report", help="write a static HTML validation report of the database")
    r.add_argument("--db", type=Path, default=DEFAULT_OUT, help="database file (default build/kaledger.duckdb)")
    r.add_argument("--out", type=Path, default=Path("build/report"), help="report folder (default build/report/)")
    r.set_defaults(func=_cmd_report)
    c = sub.add_parser("check", help="run the rules on a built database; exit 1 on error findings")
    c.add_argument("--db", type=Path, default=DEFAULT_OUT)
    c.add_argument("--config", type=Path, default=None,
                   help="rule settings to check with (default: those the database was built with)")
    c.add_argument("--fitness", action="store_true",
                   help="instead, recompute the reference pH solutions (IUPAC buffer standards) "
                   "from the library and exit 1 when one drifts beyond its tolerance")
    c.set_defaults(func=_cmd_check)
    lk = sub.add_parser("lookup", help="pKa of a compound at given conditions, with uncertainty and source")
    lk.add_argument("name", help="name, CAS, SMILES or InChIKey")
    lk.add_argument("--temperature", default="25 °C", help="with a unit, e.g. 37C or 310.15 K (default 25 °C)")
    lk.add_argument("--ionic-strength", default="0", help="mol/kg (default 0)")
    lk.add_argument("--step", type=int, default=None, help="dissociation step (default: every step)")
    lk.add_argument("--constant-type", choices=("thermodynamic", "concentration", "mixed"), default=None,
                    help="default: concentration when --ionic-strength > 0, else thermodynamic")
    lk.add_argument("--db", type=Path, default=DEFAULT_OUT)
    lk.add_argument("--json", action="store_true")
    lk.set_defaults(func=_cmd_lookup)
    t = sub.add_parser("trace", help="show where a published value came from")
    t.add_argument("value_id", help="a value id (kv-…) or a recommendation id (kr-…)")
    t.add_argument("--db", type=Path, default=DEFAULT_OUT)
    t.add_argument("--json", action="store_true")
    t.set_defaults(func=_cmd_trace)
    e = sub.add_parser("export", help="write W3C PROV-JSON provenance and/or an open data package")
    e.add_argument("--db", type=Path, default=DEFAULT_OUT)
    e.add_argument("--prov", type=Path, metavar="FILE", help="PROV-JSON document of the lineage")
    e.add_argument("--package", type=Path, metavar="DIR",
                   help="new folder: tables as CSV and Parquet with a Frictionless datapackage.json")
    e.add_argument("--exclude-restricted", action="store_true",
                   help="leave sources without an open licence (and their values) out of the package")
    e.add_argument("--internal", action="store_true",
                   help="package every source, marked not public (skips the open-licence check)")
    e.set_defaults(func=_cmd_export)
    d = sub.add_parser("diff", help="what changed between two published databases")
    d.add_argument("old", type=Path, help="the earlier database")
    d.add_argument("new", type=Path, help="the later database")
    d.add_argument("--threshold", type=_threshold, default=release_diff.DEFAULT_THRESHOLD,
                   help="pK units a recommended value must move by to be reported as moved (default 0.02)")
    d.add_argument("--json", action="store_true")
    d.set_defaults(func=_cmd_diff)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = parser().parse_args(argv)
    try:
        return int(args.func(args))
    except (DescriptorError, IngestError, PublishError, provenance.ExportError, FileNotFoundError,
            KeyError) as exc:
        message = exc.args[0] if isinstance(exc, KeyError) else str(exc)
        print(f"kaledger: {message}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    raise SystemExit(main())
