"""Provenance of published values: trace accounts, the build manifest, licence checks, and the
open exports (W3C PROV-JSON, Frictionless Data Package with Parquet and CSV tables).

Every function here reads a published database (``build/kaledger.duckdb``) or, for
:func:`build_manifest`, the tables the build is about to publish; none of them changes a
database.

- :func:`trace` gives everything recorded about one value id (``kv-…``) or recommendation id
  (``kr-…``): the lineage steps oldest first, ending at the source file (name, sha256, row,
  original cell text) with the source's citation and licence; a recommended value lists its
  member measurements, each with its own trace. :func:`format_trace` renders it for people.
- :func:`check_licence` decides whether an SPDX licence expression is an *open* licence (rule
  below); :func:`export_package` refuses a public export that would carry a source that is not.
- :func:`prov_document` / :func:`export_prov` write the lineage as a W3C PROV document
  (PROV-JSON) with the ``prov`` library.
- :func:`export_package` writes every table as CSV and Parquet (DuckDB ``COPY``) with a
  Frictionless Data Package descriptor ``datapackage.json``.

Open licence rule
-----------------
A source may go into a public export when its ``license`` is an SPDX licence expression in
which every licence needed to use the data is open by the Open Definition 2.1 [1]_:

1. The expression parses against the SPDX licence list shipped with ``license-expression``
   (offline; unknown identifiers are refused).
2. ``LicenseRef-…`` / ``DocumentRef-…`` identifiers (licences defined locally, outside the
   SPDX list) are refused: no one has checked them against the definition.
3. A licence is open when its ScanCode LicenseDB category (shipped with ``license-expression``
   [2]_) is *Public Domain*, *Permissive*, *Copyleft* or *Copyleft Limited*, and its identifier
   has no ``NC`` (non-commercial) or ``ND`` (no derivatives) element. NC terms break
   section 2.1.8 of [1]_ (use for any purpose, no restriction on a field of endeavour); ND
   terms break 2.1.3 (derivatives must be allowed). Attribution (2.2.1) and share-alike
   (2.2.3) are acceptable conditions, so CC-BY-4.0 and CC-BY-SA-4.0 are open; so are CC0-1.0,
   PDDL-1.0, ODC-By-1.0 and ODbL-1.0. Categories such as *Proprietary Free*, *Commercial*,
   *Source-available* (where ScanCode files the CC NC and ND licences) and *Free Restricted*
   are not open.
4. ``A OR B`` is open when either side is (the user may choose it); ``A AND B`` only when both
   are; ``A WITH exception`` is judged by ``A`` (an exception only adds permissions).

References
----------
.. [1] Open Knowledge Foundation, "Open Definition 2.1", https://opendefinition.org/od/2.1/en/
       (sections 2.1 Required Permissions and 2.2 Acceptable Conditions).
.. [2] nexB, ScanCode LicenseDB index, vendored in the ``license-expression`` package
       (``scancode-licensedb-index.json``), with the SPDX licence list identifiers.
.. [3] W3C, "PROV-DM: The PROV Data Model", W3C Recommendation 30 April 2013,
       https://www.w3.org/TR/prov-dm/ ; "PROV-JSON Serialization", W3C Member Submission
       24 April 2013, https://www.w3.org/submissions/prov-json/ .
.. [4] Frictionless Data, "Data Package" and "Table Schema" specifications,
       https://datapackage.org/ (resources, sources, licenses, schema fields and types).
"""

from __future__ import annotations

import hashlib
import json
import math
import platform
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import lru_cache
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import duckdb
import license_expression
import pandas as pd
from prov.model import ProvDocument

from pipeline.publish import TABLE_ORDER, open_database
from pipeline.schemas import published_ddl


class ExportError(RuntimeError):
    """An export could not be written (the message says why and what to do)."""


class LicenceError(ExportError):
    """A public export would carry a source whose licence is not open."""


# --------------------------------------------------------------------------------------------
# trace


def _loads(text: str | None) -> Any:
    return json.loads(text) if text else None


def json_scalar(value: Any) -> Any:
    """Python scalars for JSON: NaN/NA -> None, numpy scalars -> int/float."""
    if value is None:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    if hasattr(value, "item"):  # numpy scalar
        return json_scalar(value.item())
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return value


def _record(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any]) -> dict[str, Any] | None:
    cursor = con.execute(sql, params)
    row = cursor.fetchone()
    if row is None:
        return None
    names = [d[0] for d in cursor.description]
    return {n: json_scalar(v) for n, v in zip(names, row, strict=True)}


def _steps(con: duckdb.DuckDBPyConnection, target_id: str) -> list[dict[str, Any]]:
    rows = con.execute(
        "SELECT step_no, operation, parameters, inputs FROM lineage WHERE target_id = ? ORDER BY step_no",
        [target_id],
    ).fetchall()
    return [
        {"step": int(n), "operation": op, "parameters": _loads(p) or {}, "inputs": _loads(i) or []}
        for n, op, p, i in rows
    ]


_MEASUREMENT_SQL = """
    SELECT m.value_id, m.compound_id, coalesce(c.name, m.name_reported) AS name, m.step, m.pka,
           m.pka_uncertainty, m.qualifier, m.temperature_k, m.ionic_strength_molal,
           m.constant_type, m.quantity_reported, m.value_reported, m.pkw_used, m.status,
           m.copy_of, m.source_id, m.source_row
    FROM measurements m LEFT JOIN compounds c USING (compound_id) WHERE m.value_id = ?"""

_SOURCE_SQL = """
    SELECT source_id, title, citation, license, url, retrieved, kind, file, file_sha256
    FROM sources WHERE source_id = ?"""

_RECOMMENDED_SQL = """
    SELECT r.recommendation_id, r.compound_id, c.name, r.step, r.pka, r.pka_uncertainty,
           r.temperature_k, r.ionic_strength_molal, r.constant_type, r.n_values, r.n_sources,
           r.method, r.birge_ratio, r.category, r.reason
    FROM recommended r LEFT JOIN compounds c USING (compound_id) WHERE r.recommendation_id = ?"""


def _measurement_account(con: duckdb.DuckDBPyConnection, value_id: str) -> dict[str, Any] | None:
    value = _record(con, _MEASUREMENT_SQL, [value_id])
    if value is None:
        return None
    account: dict[str, Any] = {"kind": "measurement", "value_id": value_id, "value": value}
    account["steps"] = _steps(con, value_id)
    src = _record(con, _SOURCE_SQL, [value["source_id"]]) or {}
    cell = next((s["parameters"] for s in account["steps"] if s["operation"] == "read_cell"), {})
    account["source"] = {
        "source_id": value["source_id"],
        "title": src.get("title"),
        "file": cell.get("file", src.get("file")),
        "file_sha256": cell.get("sha256", src.get("file_sha256")),
        "source_row": value["source_row"],
        "column": cell.get("column"),
        "value_reported": cell.get("text", value["value_reported"]),
        "pka": value["pka"],
        "citation": src.get("citation"),
        "license": src.get("license"),
        "url": src.get("url"),
        "retrieved": src.get("retrieved"),
    }
    return account


def _recommendation_account(con: duckdb.DuckDBPyConnection, rec_id: str) -> dict[str, Any] | None:
    value = _record(con, _RECOMMENDED_SQL, [rec_id])
    if value is None:
        return None
    steps = _steps(con, rec_id)
    member_ids: list[str] = []
    for step in steps:
        if step["operation"] == "consensus":
            member_ids += [str(i) for i in step["inputs"]]
    members = [m for m in (_measurement_account(con, i) for i in member_ids) if m is not None]
    return {
        "kind": "recommended",
        "recommendation_id": rec_id,
        "value": value,
        "steps": steps,
        "members": members,
    }


def trace(db: Path | str, target_id: str) -> dict[str, Any]:
    """Everything recorded about one published value, oldest step first.

    Parameters
    ----------
    db : path of a published database
    target_id : a measurement's ``value_id`` (``kv-…``) or a ``recommendation_id`` (``kr-…``)

    Returns
    -------
    dict
        For a measurement: ``kind`` = ``"measurement"``, ``value_id``, ``value`` (the stored
        row), ``steps`` (lineage, oldest first: ``step``, ``operation``, ``parameters``,
        ``inputs``) and ``source`` (file, sha256, row, column, original cell text, citation,
        licence). For a recommended value: ``kind`` = ``"recommended"``,
        ``recommendation_id``, ``value``, ``steps`` (the consensus) and ``members`` (the trace
        of each member measurement).

    Raises
    ------
    KeyError
        When the id is neither a value id nor a recommendation id of ``db``.
    """
    con = open_database(db)
    try:
        account = _measurement_account(con, target_id) or _recommendation_account(con, target_id)
    finally:
        con.close()
    if account is None:
        raise KeyError(
            f"id {target_id!r} is not in {db}: give a value id (kv-…, table measurements) "
            "or a recommendation id (kr-…, table recommended)"
        )
    return account


def _num(x: Any, digits: int = 4) -> str:
    if x is None:
        return "?"
    if isinstance(x, float):
        return f"{x:.{digits}f}".rstrip("0").rstrip(".") if abs(x) < 1e6 else f"{x:.{digits}g}"
    return str(x)


def describe_step(step: Mapping[str, Any], pka: float | None = None) -> str:
    """One line for a lineage step, in words; unknown operations list their parameters."""
    op, p, inputs = step["operation"], step["parameters"], step.get("inputs", [])
    if op == "read_cell":
        return (f"read cell {p.get('column')!r} of {p.get('file')} row {p.get('row')}: "
                f"text {p.get('text')!r}")
    if op == "apply_descriptor_defaults":
        used = ", ".join(f"{k} = {v!r}" for k, v in p.items() if v is not None)
        return f"source.toml [defaults] used where the table gives nothing: {used}"
    if op == "parse_value":
        text = f"parsed as {p.get('quantity')} = {_num(p.get('value'), 6)}"
        if p.get("uncertainty") is not None:
            text += f" ± {_num(p.get('uncertainty'), 6)}"
        if p.get("qualifier"):
            text += f" (qualifier {p['qualifier']!r})"
        return text
    if op == "ionic_strength_to_molal":
        return (f"ionic strength {_num(p.get('from_mol_per_l'))} mol/L -> "
                f"{_num(p.get('to_mol_per_kg'), 5)} mol/kg ({p.get('method')})")
    if op == "k_to_pk":
        return f"constant to its negative logarithm: {p.get('formula')}"
    if op == "pkb_to_pka":
        tail = f" = {_num(pka)}" if pka is not None else ""
        return (f"pKb -> pKa of the conjugate acid: {p.get('formula')} with pKw = "
                f"{_num(p.get('pkw'))} ({p.get('pkw_release')}; {p.get('constant_type')}, "
                f"I = {_num(p.get('ionic_strength_molal'))} mol/kg){tail}")
    if op == "recognised_as_copy":
        return f"recognised as a copy of {', '.join(map(str, inputs))} ({p.get('rule')})"
    if op == "consensus":
        birge = p.get("birge_ratio")
        extra = f", Birge ratio {_num(birge, 3)}" if birge is not None else ""
        return (f"consensus: {p.get('method')} of {p.get('n_values')} value(s){extra}; "
                f"category {p.get('category')}")
    params = ", ".join(f"{k}={v}" for k, v in p.items() if v is not None)
    return f"{op}: {params}"


def _conditions(v: Mapping[str, Any]) -> str:
    step = f" step {v['step']}" if v.get("step") is not None else ""
    u = f" ± {_num(v['pka_uncertainty'])}" if v.get("pka_uncertainty") is not None else ""
    return (f"{v.get('name') or v.get('compound_id')}{step}: pKa {_num(v.get('pka'))}{u} at "
            f"{_num(v.get('temperature_k'), 2)} K, I = {_num(v.get('ionic_strength_molal'))} "
            f"mol/kg ({v.get('constant_type')})")


def format_trace(account: Mapping[str, Any], indent: str = "") -> list[str]:
    """The account of :func:`trace` as lines of text: steps oldest first, then the source."""
    v = account["value"]
    if account["kind"] == "recommended":
        lines = [f"{indent}recommended value {account['recommendation_id']}",
                 f"{indent}  {_conditions(v)}; {v['category']} ({v['reason']})"]
        for step in account["steps"]:
            lines.append(f"{indent}  {step['step']}. {describe_step(step)}")
        lines.append(f"{indent}  members ({len(account['members'])}), each traceable by its value id:")
        for member in account["members"]:
            lines += format_trace(member, indent + "    ")
        return lines
    lines = [f"{indent}value {account['value_id']}",
             f"{indent}  {_conditions(v)}; status {v['status']}"]
    for step in account["steps"]:
        lines.append(f"{indent}  {step['step']}. {describe_step(step, v.get('pka'))}")
    s = account["source"]
    lines += [
        f"{indent}  source file {s['file']} (sha256 {s['file_sha256']})",
        f"{indent}    row {s['source_row']}, column {s['column']!r}, original cell text "
        f"{s['value_reported']!r}",
        f"{indent}    source {s['source_id']}: {s['title']}",
        f"{indent}    cite: {s['citation']}",
        f"{indent}    licence: {s['license']}",
    ]
    return lines


# --------------------------------------------------------------------------------------------
# licences

OPEN_CATEGORIES = ("Public Domain", "Permissive", "Copyleft", "Copyleft Limited")
_NC_ND = re.compile(r"(^|-)(NC|ND)(-|$)", re.IGNORECASE)
_LOCAL_REF = re.compile(r"\b(LicenseRef|DocumentRef)-", re.IGNORECASE)
OPEN_EXAMPLES = "CC0-1.0, PDDL-1.0, CC-BY-4.0, CC-BY-SA-4.0, ODC-By-1.0, ODbL-1.0"


@dataclass(frozen=True)
class LicenceVerdict:
    """Whether a licence expression is open, with the reason in words."""

    expression: str
    normalized: str | None
    is_open: bool
    reason: str


@lru_cache(maxsize=1)
def _spdx() -> license_expression.Licensing:
    return license_expression.get_spdx_licensing()


@lru_cache(maxsize=1)
def _categories() -> dict[str, str]:
    """SPDX identifier (lower case) -> ScanCode LicenseDB category, from the vendored index."""
    out: dict[str, str] = {}
    for entry in license_expression.get_license_index():
        category = entry.get("category") or ""
        for key in [entry.get("spdx_license_key"), *entry.get("other_spdx_license_keys", [])]:
            if key:
                out[key.lower()] = category
    return out


def _licence_open(key: str) -> tuple[bool, str]:
    category = _categories().get(key.lower(), "")
    if _NC_ND.search(key):
        return False, f"{key} forbids commercial use or derivatives (NC/ND; Open Definition 2.1, 2.1.3/2.1.8)"
    if category not in OPEN_CATEGORIES:
        return False, f"{key} is in the licence category {category or 'unknown'!r}, not an open one"
    return True, f"{key} is open ({category})"


def _judge(node: Any) -> tuple[bool, str]:
    spdx = _spdx()
    if isinstance(node, license_expression.LicenseWithExceptionSymbol):
        return _licence_open(node.license_symbol.key)
    if isinstance(node, license_expression.LicenseSymbol):
        return _licence_open(node.key)
    verdicts = [_judge(arg) for arg in node.args]
    if isinstance(node, spdx.OR):
        ok = [r for o, r in verdicts if o]
        return (True, ok[0]) if ok else (False, "; ".join(r for _, r in verdicts))
    bad = [r for o, r in verdicts if not o]
    return (False, "; ".join(bad)) if bad else (True, "; ".join(r for _, r in verdicts))


@lru_cache(maxsize=256)
def check_licence(expression: str) -> LicenceVerdict:
    """Judge an SPDX licence expression by the open licence rule of this module.

    Parameters
    ----------
    expression : SPDX licence expression, e.g. ``"CC-BY-4.0"`` or ``"CC0-1.0 OR MIT"``

    Returns
    -------
    LicenceVerdict
        ``is_open`` and the reason; ``normalized`` is the SPDX spelling (None when the
        expression does not parse).

    References
    ----------
    .. [1] Open Knowledge Foundation, "Open Definition 2.1", sections 2.1 and 2.2,
           https://opendefinition.org/od/2.1/en/

    Examples
    --------
    >>> check_licence("CC-BY-4.0").is_open, check_licence("cc-by-sa-4.0").normalized
    (True, 'CC-BY-SA-4.0')
    >>> check_licence("CC-BY-NC-4.0").is_open, check_licence("LicenseRef-acme-internal").is_open
    (False, False)
    >>> check_licence("CC-BY-NC-4.0 OR CC0-1.0").is_open
    True
    """
    text = expression.strip()
    if _LOCAL_REF.search(text):
        return LicenceVerdict(
            expression, None, False,
            f"{text!r} is a locally defined licence (LicenseRef-/DocumentRef-), not on the SPDX "
            "list, so it has not been checked against the Open Definition",
        )
    try:
        parsed = _spdx().parse(text, validate=True, strict=True)
    except license_expression.ExpressionError as exc:
        return LicenceVerdict(expression, None, False, f"{text!r} is not a valid SPDX licence expression: {exc}")
    if parsed is None:
        return LicenceVerdict(expression, None, False, "the licence is empty")
    is_open, reason = _judge(parsed)
    return LicenceVerdict(expression, str(parsed), is_open, reason)


def licence_report(sources: pd.DataFrame) -> pd.DataFrame:
    """``source_id, license, normalized, is_open, reason`` for each source (judged per unique licence)."""
    verdicts = {lic: check_licence(lic) for lic in sources["license"].astype(str).unique()}
    lic = sources["license"].astype(str)
    return pd.DataFrame(
        {
            "source_id": sources["source_id"],
            "license": lic,
            "normalized": lic.map(lambda x: verdicts[x].normalized),
            "is_open": lic.map(lambda x: verdicts[x].is_open).astype(bool),
            "reason": lic.map(lambda x: verdicts[x].reason),
        }
    )


def _spdx_url(expression: str) -> str | None:
    verdict = check_licence(expression)
    key = verdict.normalized
    if key and re.fullmatch(r"[A-Za-z0-9.+-]+", key):
        return f"https://spdx.org/licenses/{key}.html"
    return None


# --------------------------------------------------------------------------------------------
# build manifest

_LIBRARIES = ("duckdb", "pandas", "numpy", "pandera", "iapws", "rdkit", "chemicals")


def _sha256_file(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def source_files(
    sources: pd.DataFrame, lineage: pd.DataFrame | None = None, cell_facts: pd.DataFrame | None = None
) -> pd.DataFrame:
    """One row per data file of each source: ``source_id, file, sha256``.

    ``sources.file`` lists a source's files joined by ';' (several tables in one source); a
    single file's hash is ``sources.file_sha256``, several files' hashes come from normalize's
    ``cell_facts`` when given, else from the lineage's ``read_cell`` steps (None for a file
    none of whose rows was accepted).
    """
    files = sources[["source_id", "file", "file_sha256"]].assign(file=sources["file"].str.split(";"))
    single = files["file"].str.len() == 1
    files = files.explode("file", ignore_index=True)
    files["single"] = files["source_id"].map(dict(zip(sources["source_id"], single, strict=True)))
    read_sha = pd.Series(dtype=object)
    if cell_facts is not None and not single.all():
        pairs = cell_facts[["file", "file_sha256"]].drop_duplicates("file")
        read_sha = pd.Series(pairs["file_sha256"].astype(object).to_numpy(), index=pairs["file"].astype(object))
    cells = None
    if cell_facts is None and lineage is not None and not single.all():
        cells = lineage.loc[lineage["operation"] == "read_cell", "parameters"]
    if cells is not None and len(cells):
        # the read_cell JSON starts {"file":...,"sha256":...}; a regex over the text avoids
        # decoding a million JSON objects just to list a few file hashes
        pairs = cells.str.extract(r'^\{"file":"((?:[^"\\]|\\.)*)","sha256":"([0-9a-f]{64})"')
        pairs = pairs.dropna().drop_duplicates(0)
        read_sha = pd.Series(pairs[1].to_numpy(), index=pairs[0].str.replace("\\/", "/", regex=False))
    files["sha256"] = files["file_sha256"].where(files["single"], files["file"].map(read_sha))
    return files[["source_id", "file", "sha256"]]


def build_manifest(
    tables: Mapping[str, pd.DataFrame],
    raw_dir: Path | str,
    config_path: Path | str | None = None,
    cell_steps: pd.Series | None = None,
) -> dict[str, str]:
    """Manifest entries for ``build_info``, beside the keys ``build.py`` writes itself.

    Parameters
    ----------
    tables : the tables about to be published (``sources``, ``measurements``, ``rejects``,
        ``findings``, ``recommended``, ``lineage``, ``compounds``); with normalize's
        ``cell_facts`` too, ``lineage`` holds only the steps after the measurements' own
        (which publish expands from the facts)
    cell_steps : with ``cell_facts``, each measurement's number of those steps
        (:func:`pipeline.lineage.step_counts`, as the build computed them for consolidate)
    raw_dir : the folder of source folders (for the descriptors and ``synonyms.csv``)
    config_path : the project config given to the build, if any

    Returns
    -------
    dict of str to str (JSON text values)
        ``input_sha256``: every input file read (descriptors, data files, the steward's
        synonyms file, the config) relative to ``raw_dir`` (the config by its given path) ->
        sha256; ``stage_counts``: rows in and out of each stage; ``library_versions``: Python
        and the libraries that compute or store values.
    """
    raw_dir = Path(raw_dir)
    sources = tables["sources"]
    facts = tables.get("cell_facts")
    files = source_files(sources, tables["lineage"], facts)
    missing = files["sha256"].isna()
    files.loc[missing, "sha256"] = files.loc[missing, "file"].map(lambda f: _sha256_file(raw_dir / f))
    inputs = dict(zip(files["file"], files["sha256"], strict=True))
    inputs.update(
        dict(zip(sources["source_id"] + "/source.toml", sources["descriptor_sha256"], strict=True))
    )
    synonyms = raw_dir / "synonyms.csv"
    if synonyms.is_file():
        inputs["synonyms.csv"] = _sha256_file(synonyms)
    if config_path is not None and Path(config_path).is_file():
        inputs[str(config_path)] = _sha256_file(Path(config_path))

    m, rejects, findings = tables["measurements"], tables["rejects"], tables["findings"]
    rec, lineage = tables["recommended"], tables["lineage"]
    is_rec = lineage["operation"].isin(["consensus", "recognised_as_copy"])  # added by consolidate
    normalize_steps = int((~is_rec).sum())
    if cell_steps is not None:
        normalize_steps += int(cell_steps.sum())
    stage_counts = {
        "ingest": {"sources": len(sources), "rows_read": int(sources["row_count"].sum())},
        "normalize": {
            "measurements": len(m),
            "rejected_rows": int(rejects[["source_id", "source_row"]].drop_duplicates().shape[0]),
            "rejected_cells": len(rejects),
            "compounds": len(tables["compounds"]),
            "lineage_steps": normalize_steps,
        },
        "validate": {
            "findings": len(findings),
            "by_severity": {k: int(v) for k, v in findings["severity"].value_counts().sort_index().items()},
            "by_rule": {k: int(v) for k, v in findings["rule"].value_counts().sort_index().items()},
        },
        "consolidate": {
            "copies": int(m["copy_of"].notna().sum()),
            "status": {k: int(v) for k, v in m["status"].value_counts().sort_index().items()},
            "recommended": len(rec),
            "by_category": {k: int(v) for k, v in rec["category"].value_counts().sort_index().items()},
            "lineage_steps": int(is_rec.sum()),
        },
        "publish": {"tables": {
            name: normalize_steps + int(is_rec.sum()) if name == "lineage" else len(tables[name])
            for name in TABLE_ORDER if name in tables
        }},
    }
    libraries = {"python": platform.python_version()}
    for name in _LIBRARIES:
        try:
            libraries[name] = version(name)
        except PackageNotFoundError:
            libraries[name] = "not installed"
    return {
        "input_sha256": json.dumps(inputs, sort_keys=True),
        "stage_counts": json.dumps(stage_counts, sort_keys=True),
        "library_versions": json.dumps(libraries, sort_keys=True),
    }


# --------------------------------------------------------------------------------------------
# W3C PROV

NAMESPACES = {
    "kl": "urn:kaledger:term:",
    "kv": "urn:kaledger:value:",
    "kr": "urn:kaledger:recommended:",
    "file": "urn:kaledger:file:",
    "cell": "urn:kaledger:cell:",
    "pub": "urn:kaledger:publisher:",
    "dcterms": "http://purl.org/dc/terms/",
}
STAGES = ("ingest", "normalize", "validate", "consolidate", "publish")


def _attrs(pairs: Mapping[str, Any]) -> dict[str, Any]:
    """PROV attributes without missing values, as plain Python scalars."""
    out: dict[str, Any] = {}
    for key, value in pairs.items():
        value = json_scalar(value)
        if value is not None:
            out[key] = value
    return out


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "unnamed"


def _read_tables(db: Path | str, names: Iterable[str]) -> dict[str, pd.DataFrame]:
    con = open_database(db)
    try:
        return {n: con.execute(f"SELECT * FROM {n} ORDER BY ALL").df() for n in names}
    finally:
        con.close()


def prov_document(db: Path | str) -> ProvDocument:
    """The provenance of a published database as a W3C PROV document [3]_.

    Entities: each source file (``file:``, with sha256, title, citation, licence), each source
    cell a value was read from (``cell:``, ``prov:value`` = the cell text), each measurement
    (``kv:``) and recommended value (``kr:``), and the database (a ``prov:Collection`` whose
    members are the published values). Activities: the five build stages of the run, in order
    (``wasInformedBy``), each associated with the kaledger software agent. Relations: the
    stages ``used`` their inputs and generated their outputs (``wasGeneratedBy``); each cell
    ``wasDerivedFrom`` its file, each measurement from its cell (the lineage operations and
    their parameters as attributes), each recommended value from its members; a copy is
    ``alternateOf`` its original. A source file ``wasAttributedTo`` its publisher when the
    ``sources`` table has a ``publisher`` column with a value.

    References
    ----------
    .. [3] W3C, "PROV-DM: The PROV Data Model", W3C Recommendation 30 April 2013.
    """
    t = _read_tables(db, ("sources", "measurements", "recommended", "lineage", "build_info", "compounds"))
    info = dict(zip(t["build_info"]["key"], t["build_info"]["value"], strict=True))
    stamp = re.sub(r"[^0-9TZ]", "", info.get("built_at", "unknown")) or "unknown"
    doc = ProvDocument()
    for prefix, uri in NAMESPACES.items():
        doc.add_namespace(prefix, uri)
    doc.add_namespace("run", f"urn:kaledger:build:{stamp}:")

    software = doc.agent(
        f"kl:kaledger-{info.get('package_version', 'unknown')}",
        _attrs({"prov:type": "prov:SoftwareAgent", "prov:label": "kaledger",
                "kl:package_version": info.get("package_version")}),
    )
    activities = {}
    for i, stage in enumerate(STAGES):
        start = info.get("built_at") if i == 0 else None
        activities[stage] = doc.activity(f"run:{stage}", start, None, {"prov:label": f"kaledger {stage}"})
        doc.wasAssociatedWith(activities[stage], software)
        if i:
            doc.wasInformedBy(activities[stage], activities[STAGES[i - 1]])

    # source files (one entity per data file) and their publishers
    lineage = t["lineage"]
    sources = t["sources"].set_index("source_id", drop=False)
    files = {}
    publishers = {}
    for f in source_files(t["sources"], lineage).to_dict("records"):
        s = sources.loc[f["source_id"]]
        files[f["file"]] = doc.entity(
            f"file:{f['file']}",
            _attrs({
                "prov:type": "kl:SourceFile", "prov:label": f["file"], "kl:source_id": s["source_id"],
                "kl:sha256": f["sha256"], "kl:descriptor_sha256": s["descriptor_sha256"],
                "dcterms:title": s["title"], "dcterms:bibliographicCitation": s["citation"],
                "dcterms:license": s["license"], "dcterms:source": s.get("url"),
                "kl:retrieved": s.get("retrieved"), "kl:kind": s["kind"],
            }),
        )
        doc.used(activities["ingest"], files[f["file"]])
        publisher = json_scalar(s.get("publisher"))
        if publisher:
            key = _slug(str(publisher))
            if key not in publishers:
                publishers[key] = doc.agent(f"pub:{key}", {"prov:type": "prov:Organization",
                                                           "prov:label": str(publisher)})
            doc.wasAttributedTo(files[f["file"]], publishers[key])

    lineage = lineage.assign(params=lineage["parameters"].map(json.loads),
                             ins=lineage["inputs"].map(json.loads))
    cells = lineage[lineage["operation"] == "read_cell"].set_index("target_id")["params"]
    ops = lineage[~lineage["target_id"].str.startswith("kr-")].groupby("target_id", sort=False)
    operations = ops["operation"].agg(" -> ".join)
    step_json = '{"operation":' + lineage["operation"].map(json.dumps) + ',"parameters":' + lineage["parameters"] + "}"
    detail = "[" + step_json[~lineage["target_id"].str.startswith("kr-")].groupby(
        lineage["target_id"], sort=False).agg(",".join) + "]"
    names = t["compounds"].set_index("compound_id")["name"]

    database = doc.collection(
        "run:database",
        _attrs({"prov:label": "published kaledger database", **{f"kl:{k}": v for k, v in info.items()
                                                                 if k in ("schema_version", "package_version", "built_at", "pkw_release")}}),
    )
    doc.wasGeneratedBy(database, activities["publish"])

    values = {}
    m = t["measurements"]
    for r in m.to_dict("records"):
        vid = r["value_id"]
        cell_params = cells.get(vid, {})
        cell = doc.entity(
            f"cell:{cell_params.get('file', r['source_id'])}/row-{r['source_row']}",
            _attrs({"prov:type": "kl:SourceCell", "prov:value": cell_params.get("text", r["value_reported"]),
                    "kl:row": r["source_row"], "kl:column": cell_params.get("column"),
                    "kl:file_sha256": cell_params.get("sha256")}),
        )
        doc.wasGeneratedBy(cell, activities["ingest"])
        source_file = files.get(cell_params.get("file")) or next(
            e for k, e in files.items() if k.startswith(r["source_id"] + "/"))
        doc.wasDerivedFrom(cell, source_file, activity=activities["ingest"])
        doc.used(activities["normalize"], cell)
        entity = doc.entity(
            f"kv:{vid}",
            _attrs({"prov:type": "kl:Measurement", "prov:value": r["pka"],
                    "prov:label": f"pKa of {names.get(r['compound_id'], r['name_reported'])}",
                    "kl:compound_id": r["compound_id"], "kl:step": r["step"],
                    "kl:pka_uncertainty": r["pka_uncertainty"], "kl:temperature_k": r["temperature_k"],
                    "kl:ionic_strength_molal": r["ionic_strength_molal"], "kl:constant_type": r["constant_type"],
                    "kl:quantity_reported": r["quantity_reported"], "kl:value_reported": r["value_reported"],
                    "kl:pkw_used": r["pkw_used"], "kl:status": r["status"]}),
        )
        values[vid] = entity
        doc.wasGeneratedBy(entity, activities["normalize"])
        doc.wasDerivedFrom(entity, cell, activity=activities["normalize"],
                           other_attributes=_attrs({"kl:operations": operations.get(vid),
                                                    "kl:lineage": detail.get(vid)}))
        doc.used(activities["validate"], entity)
        doc.hadMember(database, entity)
    for r in m[m["copy_of"].notna()].to_dict("records"):
        if r["copy_of"] in values:
            doc.alternateOf(values[r["value_id"]], values[r["copy_of"]])

    consensus = lineage[lineage["operation"] == "consensus"].set_index("target_id")
    for r in t["recommended"].to_dict("records"):
        rid = r["recommendation_id"]
        entity = doc.entity(
            f"kr:{rid}",
            _attrs({"prov:type": "kl:RecommendedValue", "prov:value": r["pka"],
                    "prov:label": f"recommended pKa of {names.get(r['compound_id'], r['compound_id'])}",
                    "kl:compound_id": r["compound_id"], "kl:step": r["step"],
                    "kl:pka_uncertainty": r["pka_uncertainty"], "kl:temperature_k": r["temperature_k"],
                    "kl:ionic_strength_molal": r["ionic_strength_molal"], "kl:constant_type": r["constant_type"],
                    "kl:method": r["method"], "kl:category": r["category"], "kl:n_values": r["n_values"]}),
        )
        doc.wasGeneratedBy(entity, activities["consolidate"])
        doc.hadMember(database, entity)
        members = consensus["ins"].get(rid, [])
        for member in members:
            if member in values:
                doc.used(activities["consolidate"], values[member])
                doc.wasDerivedFrom(entity, values[member], activity=activities["consolidate"],
                                   other_attributes={"kl:method": r["method"]})
    return doc


def export_prov(db: Path | str, path: Path | str) -> Path:
    """Write :func:`prov_document` of ``db`` to ``path`` as PROV-JSON; return the path."""
    path = Path(path)
    doc = prov_document(db)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(doc.serialize(format="json", indent=1), encoding="utf-8")
    return path


# --------------------------------------------------------------------------------------------
# Frictionless Data Package

FRICTIONLESS_TYPES = {"VARCHAR": "string", "BIGINT": "integer", "INTEGER": "integer",
                      "DOUBLE": "number", "BOOLEAN": "boolean"}
FOREIGN_KEYS = {
    "measurements": [("source_id", "sources", "source_id"), ("compound_id", "compounds", "compound_id")],
    "rejects": [("source_id", "sources", "source_id")],
    "recommended": [("compound_id", "compounds", "compound_id")],
}
PACKAGE_DESCRIPTION = (
    "Acid-dissociation constants (pKa of the acid form, temperature in K, ionic strength in "
    "mol/kg) compiled from the sources listed, normalized and checked by kaledger; every row "
    "of measurements, rejects and findings names its source_id, and each source's licence and "
    "citation apply to its rows. Check values against the primary literature before they drive "
    "dosing, formulation, safety or regulatory decisions."
)


def _ddl_comments() -> dict[tuple[str, str], str]:
    """(table, column) -> the comment beside the column in ``schemas/kaledger.sql``."""
    out = {}
    for table, body in re.findall(r"CREATE TABLE (\w+) \((.*?)\n\);", published_ddl(), flags=re.DOTALL):
        for column, comment in re.findall(r"^\s+(\w+)\s+[A-Z]+[^\n]*?--\s*(.*)$", body, flags=re.MULTILINE):
            out[(table, column)] = comment.strip()
    return out


def _sql_path(path: Path) -> str:
    return "'" + str(path).replace("'", "''") + "'"


_FILTERED = {
    "sources": "SELECT * FROM k.sources WHERE source_id NOT IN (SELECT source_id FROM x_sources)",
    "measurements": "SELECT * FROM k.measurements WHERE source_id NOT IN (SELECT source_id FROM x_sources)",
    "rejects": "SELECT * FROM k.rejects WHERE source_id NOT IN (SELECT source_id FROM x_sources)",
    "compounds": "SELECT * FROM k.compounds WHERE compound_id IN (SELECT compound_id FROM measurements)",
    "findings": """SELECT * FROM k.findings
        WHERE (source_id IS NULL OR source_id NOT IN (SELECT source_id FROM x_sources))
          AND (value_id IS NULL OR value_id NOT IN (SELECT value_id FROM x_values))
          AND (compound_id IS NULL OR compound_id IN (SELECT compound_id FROM compounds))""",
    "recommended": "SELECT * FROM k.recommended WHERE recommendation_id NOT IN (SELECT id FROM x_recs)",
    "lineage": """SELECT * FROM k.lineage WHERE target_id NOT IN (SELECT value_id FROM x_values)
        AND target_id NOT IN (SELECT id FROM x_recs)""",
    "build_info": "SELECT * FROM k.build_info",
}


def _schema(con: duckdb.DuckDBPyConnection, table: str, comments: Mapping[tuple[str, str], str]) -> dict[str, Any]:
    columns = con.execute(
        """SELECT column_name, data_type, is_nullable FROM information_schema.columns
           WHERE table_catalog = 'k' AND table_name = ? ORDER BY ordinal_position""",
        [table],
    ).fetchall()
    fields = []
    for name, dtype, nullable in columns:
        if dtype not in FRICTIONLESS_TYPES:
            raise ExportError(
                f"column {table}.{name} has type {dtype}, which the export does not map; "
                f"portable types: {', '.join(FRICTIONLESS_TYPES)}"
            )
        field: dict[str, Any] = {"name": name, "type": FRICTIONLESS_TYPES[dtype]}
        if (table, name) in comments:
            field["description"] = comments[(table, name)]
        if nullable == "NO":
            field["constraints"] = {"required": True}
        fields.append(field)
    schema: dict[str, Any] = {"fields": fields, "missingValues": [""]}
    pk = con.execute(
        """SELECT constraint_column_names FROM duckdb_constraints()
           WHERE database_name = 'k' AND table_name = ? AND constraint_type = 'PRIMARY KEY'""",
        [table],
    ).fetchone()
    if pk:
        schema["primaryKey"] = list(pk[0])
    if table in FOREIGN_KEYS:
        schema["foreignKeys"] = [
            {"fields": [f], "reference": {"resource": ref, "fields": [rf]}} for f, ref, rf in FOREIGN_KEYS[table]
        ]
    return schema


def _file_facts(path: Path) -> dict[str, Any]:
    return {"bytes": path.stat().st_size, "hash": "sha256:" + _sha256_file(path)}


def export_package(
    db: Path | str,
    out_dir: Path | str,
    *,
    public: bool = True,
    exclude_restricted: bool = False,
) -> Path:
    """Write the tables as CSV and Parquet with a Frictionless ``datapackage.json``.

    Parameters
    ----------
    db : path of a published database
    out_dir : folder to write (must not exist or be empty): ``datapackage.json``,
        ``data/<table>.csv``, ``parquet/<table>.parquet``
    public : a public export (the default) refuses sources whose licence is not open (see the
        module docstring); ``False`` writes an internal export of every source, marked
        ``"kaledger:public": false`` in the descriptor
    exclude_restricted : leave sources whose licence is not open out of a public export,
        together with every row derived from them (their measurements, rejects, findings,
        lineage, compounds no other source names, and recommended values with one of their
        measurements as a member), instead of refusing

    Returns
    -------
    Path of ``datapackage.json``

    Raises
    ------
    LicenceError
        A public export without ``exclude_restricted`` would carry a source that is not open.
    ExportError
        ``out_dir`` is not empty.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())):
        raise ExportError(f"{out_dir} exists and is not an empty folder; give a new or empty folder")
    con = open_database(db)
    try:
        sources = con.execute("SELECT * FROM sources ORDER BY source_id").df()
        info = dict(con.execute("SELECT key, value FROM build_info").fetchall())
    finally:
        con.close()
    verdicts = licence_report(sources)
    restricted = verdicts[~verdicts["is_open"]]
    if public and not restricted.empty and not exclude_restricted:
        listing = "; ".join(f"source {s!r} has licence {lic!r}: {why}"
                            for s, lic, why in restricted[["source_id", "license", "reason"]].itertuples(index=False))
        raise LicenceError(
            f"public export refused: {listing}. Open licences are SPDX licences without NC/ND terms "
            f"in the categories {', '.join(OPEN_CATEGORIES)} (Open Definition 2.1), e.g. {OPEN_EXAMPLES}. "
            "Fix the licence in the source's source.toml if it is wrong, leave these sources out with "
            "--exclude-restricted, or write an internal export with --internal"
        )
    excluded = sorted(restricted["source_id"]) if public else []

    (out_dir / "data").mkdir(parents=True, exist_ok=True)
    (out_dir / "parquet").mkdir(exist_ok=True)
    comments = _ddl_comments()
    mem = duckdb.connect()
    try:
        mem.execute(f"ATTACH {_sql_path(Path(db))} AS k (READ_ONLY)")
        mem.execute("CREATE TEMP TABLE x_sources (source_id VARCHAR)")
        if excluded:
            mem.executemany("INSERT INTO x_sources VALUES (?)", [[s] for s in excluded])
        mem.execute("CREATE TEMP VIEW x_values AS SELECT value_id FROM k.measurements "
                    "WHERE source_id IN (SELECT source_id FROM x_sources)")
        mem.execute(
            """CREATE TEMP VIEW x_recs AS SELECT DISTINCT target_id AS id FROM (
                   SELECT target_id, unnest(json_extract_string(inputs, '$[*]')) AS member
                   FROM k.lineage WHERE operation = 'consensus')
               WHERE member IN (SELECT value_id FROM x_values)"""
        )
        for name in ("sources", "measurements", "rejects", "compounds", "findings", "recommended", "lineage", "build_info"):
            mem.execute(f"CREATE TEMP VIEW {name} AS {_FILTERED[name]}")
        resources: list[dict[str, Any]] = []
        parquet_resources: list[dict[str, Any]] = []
        for name in TABLE_ORDER:
            csv_path = out_dir / "data" / f"{name}.csv"
            pq_path = out_dir / "parquet" / f"{name}.parquet"
            query = f"SELECT * FROM {name} ORDER BY ALL"
            mem.execute(f"COPY ({query}) TO {_sql_path(csv_path)} (FORMAT csv, HEADER true, DELIMITER ',')")
            mem.execute(f"COPY ({query}) TO {_sql_path(pq_path)} (FORMAT parquet)")
            (rows,) = mem.execute(f"SELECT count(*) FROM {name}").fetchone()
            resources.append({
                "name": name, "path": f"data/{name}.csv", "format": "csv", "mediatype": "text/csv",
                "encoding": "utf-8", "description": f"Table {name} of the kaledger database ({rows} rows).",
                **_file_facts(csv_path), "schema": _schema(mem, name, comments),
            })
            parquet_resources.append({
                "name": f"{name}-parquet", "type": "file", "path": f"parquet/{name}.parquet",
                "format": "parquet", "mediatype": "application/vnd.apache.parquet",
                "description": f"Table {name} as Apache Parquet: the same rows and columns as data/{name}.csv.",
                **_file_facts(pq_path),
            })
        kept = mem.execute("SELECT * FROM sources ORDER BY source_id").df()
    finally:
        mem.close()

    licences = []
    for lic in sorted(kept["license"].unique()):
        entry = {"name": lic, "title": f"SPDX licence expression {lic}"}
        if _spdx_url(lic):
            entry["path"] = _spdx_url(lic)
        licences.append(entry)
    package_sources = []
    for s in kept.to_dict("records"):
        entry = {"title": s["title"]}
        if json_scalar(s.get("url")):
            entry["path"] = s["url"]
        lic = {"name": s["license"]}
        if _spdx_url(s["license"]):
            lic["path"] = _spdx_url(s["license"])
        entry.update({"citation": s["citation"], "licenses": [lic], "kaledger:source_id": s["source_id"],
                      "kaledger:kind": s["kind"], "kaledger:file": s["file"],
                      "kaledger:file_sha256": s["file_sha256"]})
        if json_scalar(s.get("retrieved")):
            entry["kaledger:retrieved"] = s["retrieved"]
        package_sources.append(entry)
    descriptor = {
        "name": "kaledger",
        "title": "kaledger pKa reference library",
        "description": PACKAGE_DESCRIPTION,
        "keywords": ["pKa", "acid dissociation constant", "ionic strength", "reference data"],
        "created": info.get("built_at"),
        "licenses": licences,
        "sources": package_sources,
        "resources": resources + parquet_resources,
        "kaledger:public": public,
        "kaledger:excluded_sources": excluded,
        "kaledger:build_info": info,
    }
    if descriptor["created"] is None:
        del descriptor["created"]
    path = out_dir / "datapackage.json"
    path.write_text(json.dumps(descriptor, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    return path
