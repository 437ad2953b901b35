"""pandera schemas: the contract each stage's output must meet.

Stages validate what they return (``SCHEMA.validate(frame)``); a failure here is a bug in
kaledger, never a problem of the input, because bad input is turned into ``rejects`` rows
before it reaches a schema.
"""

import pandera.pandas as pa

SEVERITIES = ("error", "warning", "info")
CONSTANT_TYPES = ("thermodynamic", "concentration", "mixed")
QUANTITIES = ("pKa", "Ka", "pKb", "Kb", "logK")
SOURCE_KINDS = ("experimental", "critical_review", "compilation", "estimated")
CATEGORIES = ("Recommended", "Tentative", "Doubtful")
STATUSES = ("ok", "flagged", "excluded")


def _text(nullable: bool = True, **kwargs: object) -> pa.Column:
    return pa.Column(str, nullable=nullable, coerce=True, **kwargs)


RAW_CELLS = pa.DataFrameSchema(
    {
        "source_id": _text(False),
        "table_file": _text(False),
        "source_row": pa.Column("int64", pa.Check.ge(1)),
        "row_error": _text(),
    },
    # one text column per mapped field follows; they are checked by normalize
    strict=False,
    unique=["source_id", "table_file", "source_row"],
    name="raw_cells",
)

SOURCE_FILES = pa.DataFrameSchema(
    {
        "source_id": _text(False, unique=True),
        "title": _text(False),
        "citation": _text(False),
        "license": _text(False),
        "url": _text(),
        "retrieved": _text(),
        "kind": _text(False, checks=pa.Check.isin(SOURCE_KINDS)),
        "file": _text(False),
        "file_sha256": _text(False, checks=pa.Check.str_matches(r"^[0-9a-f]{64}$")),
        "descriptor_sha256": _text(False, checks=pa.Check.str_matches(r"^[0-9a-f]{64}$")),
        "row_count": pa.Column("int64", pa.Check.ge(0)),
    },
    strict=False,
    name="source_files",
)

MEASUREMENTS = pa.DataFrameSchema(
    {
        "value_id": _text(False, unique=True, checks=pa.Check.str_matches(r"^kv-[0-9a-f]{16}$")),
        "compound_id": _text(False),
        "step": pa.Column("Int64", pa.Check.ge(1), nullable=True, coerce=True),
        "step_inferred": pa.Column(bool, coerce=True),
        "pka": pa.Column(float, pa.Check(lambda s: s.abs() < 1e3, element_wise=False)),
        "pka_uncertainty": pa.Column(float, pa.Check.ge(0), nullable=True),
        "qualifier": _text(checks=pa.Check.isin(["<", ">", "<=", ">=", "~"])),
        "temperature_k": pa.Column(float, pa.Check.gt(0)),
        "ionic_strength_molal": pa.Column(float, pa.Check.ge(0)),
        "medium": _text(),
        "solvent": _text(False),
        "constant_type": _text(False, checks=pa.Check.isin(CONSTANT_TYPES)),
        "charge": pa.Column("Int64", nullable=True, coerce=True),
        "quantity_reported": _text(False, checks=pa.Check.isin(QUANTITIES)),
        "value_reported": _text(False),
        "pkw_used": pa.Column(float, nullable=True),
        "quantity_alt_reported": _text(checks=pa.Check.isin(QUANTITIES)),
        "value_alt_reported": _text(),
        "pka_alt": pa.Column(float, nullable=True),
        "name_reported": _text(),
        "cas_reported": _text(),
        "smiles_reported": _text(),
        "species_smiles": _text(),
        "method": _text(),
        "reference": _text(),
        "source_id": _text(False),
        "source_row": pa.Column("int64", pa.Check.ge(1)),
        "copy_of": _text(),
        "status": _text(False, checks=pa.Check.isin(STATUSES)),
    },
    strict=True,
    coerce=True,
    ordered=True,
    name="measurements",
)

REJECTS = pa.DataFrameSchema(
    {
        "source_id": _text(False),
        "source_row": pa.Column("int64", pa.Check.ge(1)),
        "field": _text(False),
        "raw_text": _text(),
        "reason": _text(False),
    },
    strict=True,
    coerce=True,
    ordered=True,
    name="rejects",
)

FINDINGS = pa.DataFrameSchema(
    {
        "rule": _text(False),
        "severity": _text(False, checks=pa.Check.isin(SEVERITIES)),
        "value_id": _text(),
        "compound_id": _text(),
        "source_id": _text(),
        "source_row": pa.Column("Int64", nullable=True, coerce=True),
        "message": _text(False),
    },
    strict=True,
    coerce=True,
    ordered=True,
    name="findings",
)

COMPOUNDS = pa.DataFrameSchema(
    {
        "compound_id": _text(False, unique=True),
        "name": _text(),
        "inchikey": _text(checks=pa.Check.str_matches(r"^[A-Z]{14}-[A-Z]{10}-[A-Z]$")),
        "smiles": _text(),
        "cas": _text(),
        "formula": _text(),
        "resolved_by": _text(),
    },
    strict=True,
    coerce=True,
    ordered=True,
    name="compounds",
)

RECOMMENDED = pa.DataFrameSchema(
    {
        "recommendation_id": _text(False, unique=True),
        "compound_id": _text(False),
        "step": pa.Column("Int64", nullable=True, coerce=True),
        "temperature_k": pa.Column(float, pa.Check.gt(0)),
        "ionic_strength_molal": pa.Column(float, pa.Check.ge(0)),
        "constant_type": _text(False, checks=pa.Check.isin(CONSTANT_TYPES)),
        "pka": pa.Column(float),
        "pka_uncertainty": pa.Column(float, pa.Check.ge(0), nullable=True),
        "n_values": pa.Column("int64", pa.Check.ge(1)),
        "n_sources": pa.Column("int64", pa.Check.ge(1)),
        "method": _text(False, checks=pa.Check.isin(["weighted_mean", "median_mad", "single"])),
        "birge_ratio": pa.Column(float, nullable=True),
        "category": _text(False, checks=pa.Check.isin(CATEGORIES)),
        "reason": _text(False),
    },
    strict=True,
    coerce=True,
    ordered=True,
    name="recommended",
)

LINEAGE = pa.DataFrameSchema(
    {
        "target_id": _text(False),
        "step_no": pa.Column("int64", pa.Check.ge(1), coerce=True),
        "operation": _text(False),
        "parameters": _text(False),
        "inputs": _text(False),
    },
    strict=True,
    coerce=True,
    ordered=True,
    unique=["target_id", "step_no"],
    name="lineage",
)

# One row per accepted measurement: the typed facts its lineage steps record (see
# pipeline/lineage.py, which expands them into ``lineage`` rows). Text facts that repeat
# within a table (file, hash, header, defaults, quantity text) are categorical.
CELL_FACTS = pa.DataFrameSchema(
    {
        "value_id": _text(False),
        "file": pa.Column("category"),  # <source id>/<table file>
        "file_sha256": pa.Column("category"),
        "value_header": pa.Column("category", nullable=True),  # the value column's header
        "quantity_text": pa.Column("category", nullable=True),  # as given or defaulted
        "quantity_default": pa.Column("category", nullable=True),  # set when from [defaults]
        "temperature_default": pa.Column("category", nullable=True),
        "ionic_strength_default": pa.Column("category", nullable=True),
        "value_parsed": pa.Column("float64", nullable=True),  # before any conversion
        "uncertainty_parsed": pa.Column("float64", nullable=True),
        "qualifier_parsed": pa.Column("category", nullable=True),
        "ionic_strength_given": pa.Column("float64", nullable=True),  # before molar -> molal
        "ionic_strength_was_molar": pa.Column("bool"),
    },
    strict=True,
    ordered=True,
    name="cell_facts",
)
