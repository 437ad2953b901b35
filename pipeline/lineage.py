"""The lineage of each measurement, from its typed facts to the published ``lineage`` rows.

Normalize does not write a measurement's steps out as JSON text. It keeps one row of typed
*cell facts* per measurement (what was parsed, which descriptor defaults were used, the
ionic strength as given, the file, its hash and the value column's header:
:data:`pipeline.schemas.tables.CELL_FACTS`). Together with the measurement itself these say
everything a step records. DuckDB expands them into the ordered steps (source cell first) with the SQL below,
at publish time inside the output database, so a million measurements never become millions
of Python strings.

Steps of a measurement, in order (a step is present only when its condition holds):

1. ``read_cell``: file, sha256, row, column header and text of the value cell;
2. ``apply_descriptor_defaults``: when a quantity, temperature or ionic strength came from
   the descriptor's ``[defaults]``;
3. ``parse_value``: quantity text, parsed value, uncertainty and qualifier;
4. ``ionic_strength_to_molal``: when the ionic strength was given in mol/L (and not 0);
5. ``k_to_pk``: when the value was a Ka or Kb;
6. ``pkb_to_pka``: when the value was a pKb or Kb (pKw and its release).

Numbers are written by DuckDB's ``json_object`` in their shortest round-trip form (lossless)
and missing values as ``null``.
"""

from __future__ import annotations

import duckdb
import pandas as pd

from pipeline.physchem import PKW_RELEASE
from pipeline.schemas.tables import LINEAGE

#: The measurement columns the cell steps read (besides the cell facts).
MEASUREMENT_COLUMNS = (
    "value_id", "source_id", "source_row", "value_reported", "quantity_reported",
    "ionic_strength_molal", "pkw_used", "constant_type",
)

# One CTE row per measurement: its facts joined to it (``f`` and ``m``, the relations named
# in :func:`cell_steps_sql`). Text facts are often categorical (DuckDB ENUM): cast to VARCHAR.
_CELLS = """
    SELECT m.value_id, m.source_row, m.value_reported, m.ionic_strength_molal, m.pkw_used,
           m.constant_type, f.file::VARCHAR AS file, f.file_sha256::VARCHAR AS file_sha256,
           f.value_header::VARCHAR AS value_header,
           f.quantity_text::VARCHAR AS quantity_text, f.value_parsed, f.uncertainty_parsed,
           f.qualifier_parsed::VARCHAR AS qualifier_parsed,
           f.quantity_default::VARCHAR AS quantity_default,
           f.temperature_default::VARCHAR AS temperature_default,
           f.ionic_strength_default::VARCHAR AS ionic_strength_default,
           f.ionic_strength_given, f.ionic_strength_was_molar AS is_molar,
           (f.quantity_default IS NOT NULL OR f.temperature_default IS NOT NULL
            OR f.ionic_strength_default IS NOT NULL) AS any_default,
           m.quantity_reported IN ('Ka', 'Kb') AS is_k,
           m.pkw_used IS NOT NULL AS is_base
    FROM {facts} f
    JOIN {measurements} m USING (value_id)
"""

# (operation, condition, parameters, inputs); a step's number is 1 + the steps before it
_STEPS = (
    ("read_cell", "TRUE",
     "json_object('file', file, 'sha256', file_sha256, 'row', source_row, 'column', value_header, "
     "'text', value_reported)",
     "cell"),
    ("apply_descriptor_defaults", "any_default",
     "json_object('quantity', quantity_default, 'temperature', temperature_default, "
     "'ionic_strength', ionic_strength_default)",
     "cell"),
    ("parse_value", "TRUE",
     "json_object('quantity', quantity_text, 'value', value_parsed, 'uncertainty', uncertainty_parsed, "
     "'qualifier', qualifier_parsed)",
     "cell"),
    ("ionic_strength_to_molal", "is_molar",
     "json_object('from_mol_per_l', ionic_strength_given, 'to_mol_per_kg', ionic_strength_molal, "
     "'method', 'dilute aqueous solution: b = c / rho_w(T), rho_w from IAPWS-95')",
     "own"),
    ("k_to_pk", "is_k", "json_object('formula', 'pK = -log10(K)')", "own"),
    ("pkb_to_pka", "is_base",
     f"json_object('formula', 'pKa = pKw - pKb', 'pkw', pkw_used, 'pkw_release', '{PKW_RELEASE}', "
     "'constant_type', constant_type, 'ionic_strength_molal', ionic_strength_molal)",
     "own"),
)

_INPUTS = {
    # the source cell, as a JSON array of one location string
    "cell": "'[\"' || replace(file || '#row=' || source_row, '\"', '\\\"') || '\"]'",
    # the measurement's own earlier state
    "own": "'[\"' || value_id || '\"]'",
}


def _cells(facts: str, measurements: str) -> str:
    return "WITH cells AS (" + _CELLS.format(facts=facts, measurements=measurements) + ") "


def cell_steps_sql(facts: str, measurements: str) -> str:
    """SQL giving the lineage rows of every measurement from the two named relations.

    ``facts``: cell facts (:data:`~pipeline.schemas.tables.CELL_FACTS`); ``measurements``: the
    measurements (at least :data:`MEASUREMENT_COLUMNS`). Columns as in the published
    ``lineage`` table, in order of target and step: the one-row-per-measurement cells are
    sorted and each is then unnested into its steps, which keeps a measurement's steps
    together at a fraction of the memory of sorting the expanded rows (4-5 per measurement).
    The order is what lets a trace query skip the rest of the table (DuckDB zone maps).
    """
    flags = [condition for _, condition, _, _ in _STEPS]
    entries = []
    for i, (operation, condition, parameters, inputs) in enumerate(_STEPS):
        before = " + ".join(f"({c})::INTEGER" for c in flags[:i]) or "0"
        entries.append(
            f"CASE WHEN {condition} THEN {{'step_no': (1 + {before})::BIGINT, "
            f"'operation': '{operation}', 'parameters': {parameters}::VARCHAR, "
            f"'inputs': {_INPUTS[inputs]}}} END"
        )
    steps = f"list_filter([{', '.join(entries)}], lambda s: s IS NOT NULL)"
    return (
        _cells(facts, measurements)
        + f", listed AS (SELECT value_id, {steps} AS steps FROM cells ORDER BY value_id) "
        + "SELECT value_id AS target_id, unnest(steps, recursive := true) FROM listed"
    )


def step_counts_sql(facts: str, measurements: str) -> str:
    """SQL giving ``value_id, steps``: how many rows :func:`cell_steps_sql` writes for each
    measurement (the same step conditions, no JSON written)."""
    total = " + ".join(f"({condition})::INTEGER" for _, condition, _, _ in _STEPS)
    return _cells(facts, measurements) + f"SELECT value_id, {total} AS steps FROM cells"


def step_counts(facts: pd.DataFrame, measurements: pd.DataFrame) -> pd.Series:
    """Number of cell steps of each measurement (by ``value_id``), without writing them.

    Consolidate numbers its own steps after these; the build manifest counts them.
    """
    with duckdb.connect() as con:
        con.register("cell_facts", facts)
        con.register("measurement_rows", measurements[list(MEASUREMENT_COLUMNS)])
        counts = con.execute(step_counts_sql("cell_facts", "measurement_rows")).df()
    return pd.Series(counts["steps"].to_numpy(dtype="int64"), index=counts["value_id"].to_numpy(dtype=object))


def measurement_lineage(facts: pd.DataFrame, measurements: pd.DataFrame) -> pd.DataFrame:
    """The cell steps of ``measurements`` as a ``lineage`` frame, sorted by target and step.

    What publish writes into the database, computed in memory (for small sets and tests).
    """
    with duckdb.connect() as con:
        con.register("cell_facts", facts)
        con.register("measurement_rows", measurements[list(MEASUREMENT_COLUMNS)])
        frame = con.execute(
            f"SELECT * FROM ({cell_steps_sql('cell_facts', 'measurement_rows')}) ORDER BY target_id, step_no"
        ).df()
    frame["step_no"] = frame["step_no"].astype("int64")
    return LINEAGE.validate(frame)
