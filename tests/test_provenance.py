"""Provenance: trace accounts, build manifest, licence rule, PROV-JSON and Data Package exports.

External checks used here:
- pKw(25 °C, 0.1 MPa) = 13.994 by IAPWS R11-24 (the release the ``iapws`` package implements;
  /work/shared/REFERENCE-VALUES.md, computed with iapws).
- sha256 of the demo files as stored on disk (hashlib).
- Open Definition 2.1 (opendefinition.org/od/2.1/en/): 2.1.3 Modification and 2.1.8
  Application to Any Purpose rule out ND and NC licences; 2.2.1 Attribution and 2.2.3
  Share-alike are acceptable conditions. That CC0-1.0, PDDL-1.0, CC-BY-4.0, ODC-By-1.0,
  CC-BY-SA-4.0 and ODbL-1.0 are on the Open Definition's list of conformant licences is from
  memory.
- The ``prov`` library reads the PROV-JSON back; the ``frictionless`` library validates the
  data package; DuckDB reads the Parquet files.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings
from pathlib import Path

import duckdb
import frictionless
import prov
import pytest
from conftest import BASIC_TOML, DEMO_RAW, query, write_source
from prov.model import ProvDocument, ProvWarning

from pipeline import provenance
from pipeline.build import build
from pipeline.cli import main
from pipeline.publish import TABLE_ORDER

PORTABLE_TYPES = {"VARCHAR", "BIGINT", "INTEGER", "DOUBLE", "BOOLEAN"}


# ---------------------------------------------------------------------------------- trace


def test_trace_of_a_pkb_value_shows_cell_text_pkw_and_citation(
    demo_db: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Brackwater line 29: ammonia, pKb 4.75 at 25 °C (raw/README.md)
    (value_id,) = query(demo_db, """SELECT value_id FROM measurements WHERE source_id = 'brackwater-teaching-tables'
                                 AND source_row = 29""")[0]
    account = provenance.trace(demo_db, value_id)
    ops = [s["operation"] for s in account["steps"]]
    assert ops[0] == "read_cell" and ops[-1] == "pkb_to_pka"
    conversion = account["steps"][-1]["parameters"]
    # pKw at 25 °C, 0.1 MPa: 13.994 by IAPWS R11-24 (iapws; REFERENCE-VALUES), not the R11-07 13.995
    assert conversion["pkw_release"] == "IAPWS R11-24"
    assert conversion["pkw"] == pytest.approx(13.994, abs=6e-4)
    assert account["value"]["pka"] == pytest.approx(conversion["pkw"] - 4.75, abs=1e-9)
    source = account["source"]
    raw_file = DEMO_RAW / "brackwater-teaching-tables" / "acid-base-tables.csv"
    assert source["file_sha256"] == hashlib.sha256(raw_file.read_bytes()).hexdigest()
    assert (source["source_row"], source["value_reported"], source["column"]) == (29, "4.75", "Value")
    assert source["citation"].startswith("Brackwater College, Department of Chemistry")
    assert source["license"] == "CC0-1.0"

    assert main(["trace", value_id, "--db", str(demo_db)]) == 0
    text = capsys.readouterr().out
    lines = text.splitlines()
    assert "text '4.75'" in lines[2]  # step 1, the oldest, comes first
    assert "pKb -> pKa" in text and "pKw = 13.994" in text and "IAPWS R11-24" in text
    assert "original cell text '4.75'" in text and source["file_sha256"] in text
    assert "cite: Brackwater College" in lines[-2] and "licence: CC0-1.0" in lines[-1]


def test_trace_of_a_recommended_value_lists_traceable_members(
    demo_db: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rec_id, n = query(demo_db, "SELECT recommendation_id, n_values FROM recommended WHERE n_values >= 2 ORDER BY ALL LIMIT 1")[0]
    account = provenance.trace(demo_db, rec_id)
    assert account["kind"] == "recommended" and account["steps"][0]["operation"] == "consensus"
    member_ids = [m["value_id"] for m in account["members"]]
    assert member_ids == account["steps"][0]["inputs"] and len(member_ids) == n
    for member in account["members"]:
        assert member["steps"][0]["operation"] == "read_cell"
        assert len(member["source"]["file_sha256"]) == 64 and member["source"]["citation"]
        assert provenance.trace(demo_db, member["value_id"])["value_id"] == member["value_id"]
    assert main(["trace", rec_id, "--db", str(demo_db), "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert [m["value_id"] for m in printed["members"]] == member_ids


def test_trace_of_an_unknown_id_names_both_id_kinds(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(KeyError, match="kv-.*kr-"):
        provenance.trace(demo_db, "kv-0000000000000000")
    assert main(["trace", "nonsense", "--db", str(demo_db)]) == 2
    assert "'nonsense'" in capsys.readouterr().err


# ---------------------------------------------------------------------------- build manifest


def test_lineage_is_stored_in_two_runs_each_in_target_order(demo_db: Path) -> None:
    # Publish writes the cell steps, then the later steps, each run sorted by (target, step),
    # so a trace query reads one stretch of each run; the only break is where the runs meet.
    # Common practice (sorted storage for range pruning), not a published value.
    ((breaks, rows),) = query(demo_db, """
        SELECT count(*) FILTER (WHERE prev_t > target_id OR (prev_t = target_id AND prev_s >= step_no)),
               count(*)
        FROM (SELECT target_id, step_no, lag(target_id) OVER (ORDER BY rowid) AS prev_t,
                     lag(step_no) OVER (ORDER BY rowid) AS prev_s FROM lineage)""")
    assert rows > 0 and breaks <= 1


def test_build_manifest_hashes_every_input_and_counts_every_stage(demo_db: Path) -> None:
    info = dict(query(demo_db, "SELECT key, value FROM build_info"))
    assert info["schema_version"] == "1" and info["package_version"]
    assert json.loads(info["config"]) == {}
    hashes = json.loads(info["input_sha256"])
    on_disk = {
        str(p.relative_to(DEMO_RAW)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in DEMO_RAW.rglob("*") if p.is_file() and p.name not in ("README.md", ".gitattributes")
    }
    assert hashes == on_disk  # descriptors, data files and synonyms.csv, hashed as read
    counts = json.loads(info["stage_counts"])
    assert counts["ingest"] == {"sources": 5, "rows_read": 149}  # raw/README.md: 149 data rows
    # invariant 1 (nothing lost): rows read = measurements + rejected rows
    assert counts["normalize"]["measurements"] + counts["normalize"]["rejected_rows"] == 149
    for table, rows in counts["publish"]["tables"].items():
        assert query(demo_db, f"SELECT count(*) FROM {table}")[0][0] == rows, table
    assert sum(counts["consolidate"]["status"].values()) == counts["normalize"]["measurements"]
    assert "iapws" in json.loads(info["library_versions"])


def test_published_file_uses_portable_types_only(demo_db: Path) -> None:
    # readable by the DuckDB CLI, R and other clients: no Python-only or exotic column types
    types = query(demo_db, "SELECT table_name, column_name, data_type FROM information_schema.columns")
    assert {t for _, _, t in types} <= PORTABLE_TYPES, [x for x in types if x[2] not in PORTABLE_TYPES]
    assert {t for t, _, _ in types} >= set(TABLE_ORDER)


# ------------------------------------------------------------------------------- licences


@pytest.mark.parametrize(
    "expression",
    ["CC0-1.0", "PDDL-1.0", "CC-BY-4.0", "ODC-By-1.0", "CC-BY-SA-4.0", "ODbL-1.0", "cc-by-4.0",
     "CC-BY-NC-4.0 OR CC0-1.0", "CC-BY-4.0 AND ODbL-1.0"],
)
def test_open_licences_by_the_open_definition(expression: str) -> None:
    # conformant list of the Open Definition (from memory); attribution and share-alike are
    # acceptable conditions (Open Definition 2.1, 2.2.1 and 2.2.3)
    assert provenance.check_licence(expression).is_open


@pytest.mark.parametrize(
    ("expression", "why"),
    [
        ("CC-BY-NC-4.0", "NC/ND"),  # Open Definition 2.1, 2.1.8: any purpose, any field
        ("CC-BY-ND-4.0", "NC/ND"),  # Open Definition 2.1, 2.1.3: derivatives allowed
        ("CC-BY-NC-SA-4.0", "NC/ND"),
        ("LicenseRef-fernhollow-internal", "locally defined"),
        ("Acme-Data-Licence-1.0", "not a valid SPDX"),
        ("CC-BY-4.0 AND CC-BY-NC-4.0", "NC/ND"),
        ("BUSL-1.1", "Source-available"),  # a time-delayed, use-restricted licence (common practice)
    ],
)
def test_licences_that_are_not_open(expression: str, why: str) -> None:
    verdict = provenance.check_licence(expression)
    assert not verdict.is_open
    assert why in verdict.reason


# ----------------------------------------------------------------------------------- PROV


def test_prov_export_reads_back_and_validates(demo_db: Path, tmp_path: Path) -> None:
    """'Validates' means what the ``prov`` library offers: the PROV-JSON parses with
    ``prov.read`` while every ``ProvWarning`` is an error (including the warnings of inputs
    prov 3.3 will reject), the document read back equals the one written, it converts to
    PROV-N, and ``unified()`` succeeds, which checks the PROV-CONSTRAINTS type-compatibility
    (impossibility constraints 53-55) and key constraints 22-23 on shared identifiers."""
    path = provenance.export_prov(demo_db, tmp_path / "prov.json")
    with warnings.catch_warnings():
        warnings.simplefilter("error", ProvWarning)
        doc = prov.read(path, format="json")
        again = ProvDocument.deserialize(source=str(path), format="json")
        unified = doc.unified()
        assert doc.get_provn().startswith("document")
    assert doc == again == provenance.prov_document(demo_db)
    assert len(unified.get_records()) > 0

    entities = {str(e.identifier): e for e in doc.get_records(prov.model.ProvEntity)}
    n_values = query(demo_db, "SELECT count(*) FROM measurements")[0][0]
    n_recs = query(demo_db, "SELECT count(*) FROM recommended")[0][0]
    assert sum(k.startswith("kv:") for k in entities) == n_values
    assert sum(k.startswith("kr:") for k in entities) == n_recs
    assert sum(k.startswith("cell:") for k in entities) == n_values
    activities = {str(a.identifier) for a in doc.get_records(prov.model.ProvActivity)}
    assert {a.split(":")[1] for a in activities} == set(provenance.STAGES)

    # the pKb value: measurement <- cell <- file, with the file's sha256 and licence
    (value_id,) = query(demo_db, """SELECT value_id FROM measurements WHERE source_id = 'brackwater-teaching-tables'
                                 AND source_row = 29""")[0]
    derived = {}
    for rel in doc.get_records(prov.model.ProvDerivation):
        attrs = dict(rel.formal_attributes)
        gen = str(attrs[prov.model.PROV_ATTR_GENERATED_ENTITY])
        derived.setdefault(gen, []).append((str(attrs[prov.model.PROV_ATTR_USED_ENTITY]), rel))
    (cell_id, rel), = derived[f"kv:{value_id}"]
    assert "pkb_to_pka" in str(next(v for k, v in rel.attributes if str(k) == "kl:operations"))
    cell_attrs = {str(k): v for k, v in entities[cell_id].attributes}
    assert cell_attrs["prov:value"] == "4.75"
    ((file_id, _),) = derived[cell_id]
    file_attrs = {str(k): v for k, v in entities[file_id].attributes}
    raw_file = DEMO_RAW / "brackwater-teaching-tables" / "acid-base-tables.csv"
    assert file_attrs["kl:sha256"] == hashlib.sha256(raw_file.read_bytes()).hexdigest()
    assert file_attrs["dcterms:license"] == "CC0-1.0"


def test_prov_names_the_publisher_as_agent_when_known(demo_db: Path, tmp_path: Path) -> None:
    db = tmp_path / "with-publisher.duckdb"
    shutil.copy(demo_db, db)
    con = duckdb.connect(str(db))
    con.execute("ALTER TABLE sources ADD COLUMN publisher VARCHAR")
    con.execute("UPDATE sources SET publisher = 'Fernhollow Analytical' WHERE source_id = 'fernhollow-titrations'")
    con.close()
    doc = provenance.prov_document(db)
    agents = {str(a.identifier) for a in doc.get_records(prov.model.ProvAgent)}
    assert "pub:fernhollow-analytical" in agents
    attributed = [dict(r.formal_attributes) for r in doc.get_records(prov.model.ProvAttribution)]
    assert [str(a[prov.model.PROV_ATTR_ENTITY]) for a in attributed] == ["file:fernhollow-titrations/titrations.csv"]


# ---------------------------------------------------------------------------- data package


def test_data_package_validates_and_carries_licences_and_citations(demo_db: Path, tmp_path: Path) -> None:
    out = tmp_path / "package"
    assert main(["export", "--db", str(demo_db), "--package", str(out), "--prov", str(tmp_path / "p.json")]) == 0
    report = frictionless.validate(out / "datapackage.json")
    assert report.valid, report.flatten(["resourcePath", "type", "note"])[:10]

    descriptor = json.loads((out / "datapackage.json").read_text(encoding="utf-8"))
    sources = {s: (c, lic) for s, c, lic in query(demo_db, "SELECT source_id, citation, license FROM sources")}
    assert {lic["name"] for lic in descriptor["licenses"]} == {lic for _, lic in sources.values()}
    listed = {s["kaledger:source_id"]: (s["citation"], s["licenses"][0]["name"]) for s in descriptor["sources"]}
    assert listed == sources
    assert descriptor["kaledger:public"] is True and descriptor["kaledger:excluded_sources"] == []

    package = frictionless.Package(out / "datapackage.json")
    assert set(package.resource_names) == set(TABLE_ORDER) | {f"{t}-parquet" for t in TABLE_ORDER}
    fields = {f.name: f.type for f in package.get_resource("measurements").schema.fields}
    assert (fields["pka"], fields["source_row"], fields["step_inferred"], fields["value_id"]) == (
        "number", "integer", "boolean", "string")
    # the Parquet copy holds exactly the rows of the database
    for table in TABLE_ORDER:
        parquet = out / "parquet" / f"{table}.parquet"
        con = duckdb.connect()
        try:
            con.execute(f"ATTACH '{demo_db}' AS k (READ_ONLY)")
            diff = con.execute(
                f"SELECT count(*) FROM ((SELECT * FROM k.{table} EXCEPT ALL SELECT * FROM read_parquet('{parquet}')) "
                f"UNION ALL (SELECT * FROM read_parquet('{parquet}') EXCEPT ALL SELECT * FROM k.{table}))"
            ).fetchone()[0]
        finally:
            con.close()
        assert diff == 0, table


def test_export_refuses_a_non_empty_folder(demo_db: Path, tmp_path: Path) -> None:
    (tmp_path / "stuff.txt").write_text("x", encoding="utf-8")
    with pytest.raises(provenance.ExportError, match="not an empty folder"):
        provenance.export_package(demo_db, tmp_path)


@pytest.fixture(scope="module")
def restricted_db(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two small sources, one open (CC0-1.0) and one under a local LicenseRef licence."""
    root = tmp_path_factory.mktemp("restricted")
    raw = root / "raw"
    raw.mkdir()
    write_source(raw, "open-one", "Compound,Value\nacetic acid,4.756\nformic acid,3.75\n")
    toml = BASIC_TOML.format(id="closed-one", quantity="pKa", extra_columns="").replace(
        'license = "CC0-1.0"', 'license = "LicenseRef-closed-internal"')
    write_source(raw, "closed-one", "Compound,Value\nacetic acid,4.76\nbenzoic acid,4.20\n", toml=toml)
    out = root / "kaledger.duckdb"
    build(raw, out)
    return out


def test_public_export_refuses_a_source_without_an_open_licence(
    restricted_db: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(provenance.LicenceError, match="'closed-one' has licence 'LicenseRef-closed-internal'"):
        provenance.export_package(restricted_db, tmp_path / "pkg")
    assert not (tmp_path / "pkg").exists()
    assert main(["export", "--db", str(restricted_db), "--package", str(tmp_path / "pkg2")]) == 2
    err = capsys.readouterr().err
    assert "public export refused" in err and "--exclude-restricted" in err and "CC-BY-4.0" in err


def test_exclude_restricted_leaves_the_source_and_its_values_out(restricted_db: Path, tmp_path: Path) -> None:
    out = tmp_path / "pkg"
    path = provenance.export_package(restricted_db, out, exclude_restricted=True)
    assert frictionless.validate(path).valid
    descriptor = json.loads(path.read_text(encoding="utf-8"))
    assert descriptor["kaledger:excluded_sources"] == ["closed-one"]
    assert [s["kaledger:source_id"] for s in descriptor["sources"]] == ["open-one"]
    assert [lic["name"] for lic in descriptor["licenses"]] == ["CC0-1.0"]
    con = duckdb.connect()
    try:
        def rows(table: str) -> list[tuple]:
            return con.execute(f"SELECT * FROM read_parquet('{out / 'parquet' / (table + '.parquet')}')").fetchall()

        closed = {v for (v,) in query(restricted_db, "SELECT value_id FROM measurements WHERE source_id = 'closed-one'")}
        assert len(closed) == 2
        assert {r[0] for r in rows("measurements")}.isdisjoint(closed)
        assert {r[0] for r in rows("lineage")}.isdisjoint(closed)
        # acetic acid was recommended from both sources: that value is withheld; formic acid stays
        kept = con.execute(
            f"SELECT count(*) FROM read_parquet('{out / 'parquet' / 'recommended.parquet'}')").fetchone()[0]
    finally:
        con.close()
    assert query(restricted_db, "SELECT count(*) FROM recommended")[0][0] == 3  # acetic, formic, benzoic
    assert kept == 1


def test_internal_export_keeps_every_source_and_says_so(restricted_db: Path, tmp_path: Path) -> None:
    assert main(["export", "--db", str(restricted_db), "--package", str(tmp_path / "pkg"), "--internal"]) == 0
    descriptor = json.loads((tmp_path / "pkg" / "datapackage.json").read_text(encoding="utf-8"))
    assert descriptor["kaledger:public"] is False
    assert {s["kaledger:source_id"] for s in descriptor["sources"]} == {"open-one", "closed-one"}


def test_export_without_a_target_says_what_to_give(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["export", "--db", str(demo_db)]) == 2
    assert "--prov FILE, --package DIR" in capsys.readouterr().err
