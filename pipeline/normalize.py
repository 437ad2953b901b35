"""Stage 2, normalize: from cell text to pKa of the acid form at T [K] and I [mol/kg].

Input is the ingest stage's ``raw_cells`` (text only). Output is three tables:

- ``measurements``: one row per accepted source row, in the published layout;
- ``rejects``: one row per (source row, field) that could not be read, with a plain reason;
- ``cell_facts``: one row per measurement, the typed facts of its steps from the source cell
  to the stored number (what was parsed, which defaults were used); :mod:`pipeline.lineage`
  expands them into ``lineage`` rows.

Every source row ends in exactly one of ``measurements`` or ``rejects`` (a rejected row may have
several ``rejects`` rows, one per bad field). All work is column-wise; the physical chemistry is
evaluated on the few unique conditions and broadcast back.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import duckdb
import numpy as np
import pandas as pd
from pandas.api.types import union_categoricals

from pipeline import identity, lineage, parse, physchem
from pipeline.schemas.tables import CELL_FACTS, MEASUREMENTS, REJECTS

CONSTANT_TYPES = ("thermodynamic", "concentration", "mixed")


@dataclass(frozen=True)
class NormalizeResult:
    measurements: pd.DataFrame
    rejects: pd.DataFrame
    cell_facts: pd.DataFrame  # one row per measurement (see pipeline.lineage)
    compounds: pd.DataFrame  # one row per compound_id, from identity resolution
    identity_findings: pd.DataFrame

    @property
    def lineage(self) -> pd.DataFrame:
        """The measurements' lineage steps, expanded in memory (publish does it in the file)."""
        return lineage.measurement_lineage(self.cell_facts, self.measurements)


def make_value_ids(source_id: pd.Series, table_file: pd.Series, source_row: pd.Series) -> pd.Series:
    """Stable value ids: ``kv-`` + 16 hex digits of sha256(source id, table file, row).

    The key is the three joined by U+001F (unit separator), hashed as UTF-8 with SHA-256
    (FIPS 180-4), computed by DuckDB's ``sha256`` over the whole column.

    The id depends only on where the value sits, so an unchanged source gives the same ids on
    every rebuild and an edited cell keeps its id (a diff then shows it as changed).

    References
    ----------
    .. [1] NIST. Secure Hash Standard (SHS), FIPS PUB 180-4, 2015.
           https://doi.org/10.6028/NIST.FIPS.180-4

    Examples
    --------
    >>> make_value_ids(pd.Series(["demo"]), pd.Series(["t.csv"]), pd.Series([2])).iloc[0]
    'kv-2125e212d7f0c450'
    """
    if source_id.empty:
        return pd.Series([], index=source_id.index, dtype=object)
    keys = pd.DataFrame(
        {
            "source_id": source_id.astype(object).to_numpy(),
            "table_file": table_file.astype(object).to_numpy(),
            "source_row": source_row.to_numpy(dtype="int64"),
        }
    )
    # DuckDB's sha256 (of the UTF-8 bytes, hex) is hashlib.sha256; the key is joined and
    # hashed column-wise in C++ rather than as a million Python strings
    with duckdb.connect() as con:
        con.register("value_keys", keys)
        ids = con.execute(
            "SELECT 'kv-' || left(sha256(concat_ws(chr(31), source_id, table_file, "
            "source_row::VARCHAR)), 16) FROM value_keys"
        ).fetchnumpy()
    return pd.Series(next(iter(ids.values())).astype(object), index=source_id.index, dtype=object)


def _blank(text: pd.Series) -> pd.Series:
    """True where a cell is missing or only whitespace (stripped once per distinct text)."""
    missing = text.isna()
    if missing.all():
        return missing
    codes, uniques = pd.factorize(text)  # missing cells get code -1
    blank = pd.Series(uniques, dtype=object).str.strip().eq("").to_numpy(dtype=bool)
    return pd.Series(np.where(codes < 0, True, blank[codes]), index=text.index)


def _with_defaults(cells: pd.DataFrame, tables: pd.DataFrame, field: str) -> pd.DataFrame:
    """The cell text of ``field``, or the table's descriptor default where the cell is blank.

    Returns columns ``text`` and ``from_default`` (bool).
    """
    text = cells[field]
    own = tables[tables["source_id"] == cells["source_id"].iat[0]] if len(cells) else tables
    if len(own) == 1 and (cells["source_id"].to_numpy() == own["source_id"].iat[0]).all():
        # one table (a build normalizes one source at a time): the default is one value
        value = own["defaults"].iat[0].get(field)
        default = pd.Series(value, index=cells.index, dtype=object)
    else:
        defaults = tables.set_index(["source_id", "table_file"])["defaults"].map(
            lambda d: d.get(field)
        )
        key = pd.MultiIndex.from_frame(cells[["source_id", "table_file"]])
        default = pd.Series(defaults.reindex(key).to_numpy(), index=cells.index, dtype=object)
    use_default = _blank(text) & default.notna()
    return pd.DataFrame(
        {"text": text.where(~use_default, default), "from_default": use_default},
        index=cells.index,
    )


def _on_unique(
    func: Callable[..., np.ndarray], *columns: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Evaluate ``func`` on the unique rows of ``columns``; return (values, error text).

    A condition outside the valid range of the physical chemistry gives NaN and the error's
    message for the rows that carry it, and does not stop the others.
    """
    stacked = np.column_stack(columns) if columns[0].size else np.empty((0, len(columns)))
    unique, inverse = np.unique(stacked, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    errors = np.full(len(unique), None, dtype=object)
    try:
        values = np.asarray(func(*unique.T), dtype=float)
    except physchem.PhysChemRangeError:
        values = np.full(len(unique), np.nan)
        for i, row in enumerate(unique):  # few unique conditions: find the bad ones
            try:
                values[i] = np.asarray(func(*row[:, None]), dtype=float)[0]
            except physchem.PhysChemRangeError as exc:
                errors[i] = str(exc)
    return values[inverse], errors[inverse]


def _on_rows(
    mask: pd.Series, func: Callable[..., np.ndarray], *columns: pd.Series
) -> tuple[pd.Series, pd.Series]:
    """:func:`_on_unique` over the rows where ``mask`` holds; values (NaN elsewhere) and errors
    (None elsewhere) aligned with ``mask``'s index."""
    picked = mask[mask].index
    values, errors = _on_unique(func, *(c[picked].to_numpy(dtype=float) for c in columns))
    return (
        pd.Series(values, index=picked).reindex(mask.index),
        pd.Series(errors, index=picked, dtype=object).reindex(mask.index),
    )


def _to_pk(value: pd.Series, is_k: pd.Series) -> pd.Series:
    """pK = -log10(K) where ``is_k`` (Ka, Kb), the value itself elsewhere; K <= 0 gives NaN.

    Examples
    --------
    >>> _to_pk(pd.Series([1.75e-5, 4.756]), pd.Series([True, False])).round(5).tolist()
    [4.75696, 4.756]
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        return pd.Series(np.where(is_k, -np.log10(value.where(value > 0)), value), index=value.index)


def _by_decimal(
    func: Callable[..., pd.DataFrame], text: pd.Series, row_decimal: np.ndarray
) -> pd.DataFrame:
    """``func(text, decimal=mark)`` for each decimal mark in use, rows back in place.

    A table with decimal ``","`` writes its conditions with that mark too (``298,15 K``).
    """
    marks = np.unique(row_decimal.astype(str))
    if len(marks) <= 1:
        return func(text, decimal=str(marks[0]) if len(marks) else ".")
    parts = [func(text[row_decimal == mark], decimal=str(mark)) for mark in marks]
    return pd.concat(parts).reindex(text.index)


#: A reject's reason: one text, one per row, or a function of the rejected rows' mask that
#: gives theirs (so a message quoting the cell is built for the few bad rows, not for all).
Reason = str | pd.Series | Callable[[pd.Series], pd.Series]


def _rejects_for(
    frame: pd.DataFrame, mask: pd.Series, field: str, raw: pd.Series, reason: Reason
) -> pd.DataFrame:
    picked = mask.fillna(False).astype(bool)
    if callable(reason):
        reason = reason(picked)
    elif isinstance(reason, pd.Series):
        reason = reason[picked]
    return pd.DataFrame(
        {
            "source_id": frame.loc[picked, "source_id"],
            "source_row": frame.loc[picked, "source_row"],
            "field": field,
            "raw_text": raw[picked],
            "reason": reason,
        }
    )


@dataclass(frozen=True)
class SourcePart:
    """What normalize makes of one source's rows on their own (see :func:`normalize_rows`).

    Everything here depends only on that source's cells, its descriptor, the steward's
    synonyms and the code, so a build may keep it and reuse it while those are unchanged.
    """

    measurements: pd.DataFrame  # accepted rows, published layout; steps as given (not inferred)
    rejects: pd.DataFrame
    cell_facts: pd.DataFrame
    resolved: pd.DataFrame  # identity resolution of the accepted rows, row for row


def normalize(
    raw_cells: pd.DataFrame,
    tables: pd.DataFrame,
    synonyms: pd.DataFrame | None = None,
    identity_cache: identity.IdentityCache | None = None,
) -> NormalizeResult:
    """Normalize raw cells to measurements, rejects and cell facts (see module docstring).

    Each source is normalized on its own (:func:`normalize_rows`), then the steps that look
    across sources (step inference, identity findings, the compounds table) run on the whole
    set (:func:`combine`). A build that reuses kept parts of unchanged sources therefore gets
    exactly what this function returns.
    """
    if raw_cells.empty:
        parts = [normalize_rows(raw_cells, tables, synonyms, identity_cache)]
    else:
        parts = [
            normalize_rows(group, tables, synonyms, identity_cache)
            for _, group in raw_cells.groupby("source_id", sort=False)
        ]
    return combine(parts)


def combine(parts: list[SourcePart]) -> NormalizeResult:
    """Join per-source parts (in source order) and run the whole-set steps of normalize."""
    measurements = pd.concat([p.measurements for p in parts], ignore_index=True)
    resolved = pd.concat([p.resolved for p in parts], ignore_index=True)
    rejects = pd.concat([p.rejects for p in parts], ignore_index=True)
    cell_facts = concat_cell_facts([p.cell_facts for p in parts])
    filled = identity.infer_steps(measurements)
    measurements["step"] = filled["step"].astype("Int64")
    measurements["step_inferred"] = filled["step_inferred"].astype(bool)
    measurements = MEASUREMENTS.validate(measurements)
    return NormalizeResult(
        measurements=measurements,
        rejects=REJECTS.validate(
            rejects.sort_values(["source_id", "source_row", "field"], kind="stable").reset_index(drop=True)
        ),
        cell_facts=cell_facts,
        compounds=_compound_table(resolved),
        identity_findings=identity.identity_findings(
            resolved, measurements["source_id"], measurements["value_id"]
        ),
    )


def normalize_rows(
    raw_cells: pd.DataFrame,
    tables: pd.DataFrame,
    synonyms: pd.DataFrame | None = None,
    identity_cache: identity.IdentityCache | None = None,
) -> SourcePart:
    """Normalize rows on their own: parse, convert, resolve identity, keep the cell facts.

    Works on any subset of rows (a build calls it once per source); see :func:`combine`.
    """
    cells = raw_cells.reset_index(drop=True)
    rejects: list[pd.DataFrame] = []

    def reject(mask: pd.Series, field: str, raw: pd.Series, reason: Reason) -> None:
        rejects.append(_rejects_for(cells, mask, field, raw, reason))

    # 0. rows the reader could not split cleanly
    reject(cells["row_error"].notna(), "row", pd.Series(None, index=cells.index), cells["row_error"])

    # 1. quantity (pKa, Ka, pKb, Kb, logK), possibly carrying a step ("pKa2")
    quantity_text = _with_defaults(cells, tables, "quantity")
    quantity_blank = _blank(quantity_text["text"])
    quantity = parse.parse_quantity(quantity_text["text"].where(~quantity_blank, ""))
    reject(
        quantity_blank,
        "quantity",
        quantity_text["text"],
        "quantity is missing: add a quantity column or a [defaults] quantity (pKa, Ka, pKb, Kb, logK)",
    )
    reject(~quantity_blank & quantity["error"].notna(), "quantity", quantity_text["text"], quantity["error"])

    # 2. the value itself, with the source's decimal mark
    decimal = tables.set_index(["source_id", "table_file"])["decimal"]
    row_decimal = decimal.reindex(pd.MultiIndex.from_frame(cells[["source_id", "table_file"]])).to_numpy()
    value_text = cells["value"]
    value_blank = _blank(value_text)
    parsed = pd.DataFrame(index=cells.index, columns=["value", "uncertainty", "qualifier", "low", "high", "missing", "error"])
    for mark in np.unique(row_decimal.astype(str)):  # one or two decimal marks at most
        rows = row_decimal == mark
        parsed.loc[rows] = parse.parse_values(value_text[rows].fillna(""), decimal=mark).to_numpy()
    parsed["value"] = parsed["value"].astype(float)
    parsed["uncertainty"] = parsed["uncertainty"].astype(float)
    reject(value_blank | parsed["missing"].astype(bool), "value", value_text, "value is empty")
    reject(
        ~value_blank & ~parsed["missing"].astype(bool) & parsed["error"].notna(),
        "value",
        value_text,
        parsed["error"],
    )

    # 3. a separate uncertainty column overrides none: it fills where the value had no ±
    unc_text = cells["uncertainty"]
    unc_given = ~_blank(unc_text)
    unc = parse.parse_values(unc_text.where(unc_given, ""))
    reject(unc_given & unc["error"].notna(), "uncertainty", unc_text, unc["error"])
    uncertainty = parsed["uncertainty"].where(parsed["uncertainty"].notna(), unc["value"].astype(float))
    reject(
        uncertainty < 0, "uncertainty", unc_text.fillna(value_text), "uncertainty must not be negative"
    )

    # 4. temperature
    temp_text = _with_defaults(cells, tables, "temperature")
    temp_blank = _blank(temp_text["text"])
    temp = _by_decimal(parse.parse_temperature, temp_text["text"].where(~temp_blank, ""), row_decimal)
    reject(temp_blank, "temperature", temp_text["text"], "temperature is missing and [defaults] gives none")
    reject(~temp_blank & temp["error"].notna(), "temperature", temp_text["text"], temp["error"])
    temperature_k = temp["kelvin"].astype(float)

    # 5. ionic strength, with its scale and background electrolyte
    ionic_text = _with_defaults(cells, tables, "ionic_strength")
    ionic_blank = _blank(ionic_text["text"])
    ionic = _by_decimal(parse.parse_ionic_strength, ionic_text["text"].where(~ionic_blank, ""), row_decimal)
    reject(
        ionic_blank, "ionic_strength", ionic_text["text"], "ionic strength is missing and [defaults] gives none"
    )
    reject(~ionic_blank & ionic["error"].notna(), "ionic_strength", ionic_text["text"], ionic["error"])
    ionic_value = ionic["value"].astype(float)

    # 6. solvent / medium text to the controlled vocabulary
    medium_text = _with_defaults(cells, tables, "medium")
    medium_blank = _blank(medium_text["text"])
    medium = parse.parse_medium(medium_text["text"].where(~medium_blank, "water"))
    reject(~medium_blank & medium["error"].notna(), "medium", medium_text["text"], medium["error"])

    # 7. constant type: required at I > 0, thermodynamic by definition at I = 0
    ctype_text = _with_defaults(cells, tables, "constant_type")
    ctype = ctype_text["text"].astype(str).str.strip().str.lower().where(~_blank(ctype_text["text"]))
    ctype = ctype.where(ctype.notna() | (ionic_value != 0), "thermodynamic")
    reject(
        ctype.isna() & ionic_value.gt(0),
        "constant_type",
        ctype_text["text"],
        "constant type is missing for a value at I > 0: give thermodynamic, concentration or mixed",
    )
    bad_ctype = ctype.notna() & ~ctype.isin(CONSTANT_TYPES)
    reject(
        bad_ctype,
        "constant_type",
        ctype_text["text"],
        lambda rows: "constant type '" + ctype_text["text"][rows].astype(str) + "' is not one of "
        + ", ".join(CONSTANT_TYPES),
    )

    # 8. step and charge (whole numbers)
    step_text = _with_defaults(cells, tables, "step")
    step_given = ~_blank(step_text["text"])
    step_num = pd.to_numeric(step_text["text"].astype(str).str.strip().str.lstrip("pPkKaA "), errors="coerce")
    bad_step = step_given & ~(step_num.notna() & (step_num == step_num.round()) & (step_num >= 1))
    reject(bad_step, "step", step_text["text"],
           lambda rows: "step '" + step_text["text"][rows].astype(str) + "' is not a whole number from 1")
    step = pd.array(step_num.where(step_given & ~bad_step), dtype="Float64").round().astype("Int64")
    step = pd.Series(step, index=cells.index).fillna(quantity["step"].astype("Int64"))

    charge_text = _with_defaults(cells, tables, "charge")
    charge_given = ~_blank(charge_text["text"])
    charge_num = pd.to_numeric(charge_text["text"].astype(str).str.strip().str.replace("+", "", regex=False), errors="coerce")
    bad_charge = charge_given & ~(charge_num.notna() & (charge_num == charge_num.round()))
    reject(bad_charge, "charge", charge_text["text"],
           lambda rows: "charge '" + charge_text["text"][rows].astype(str) + "' is not a whole number")
    charge = pd.Series(pd.array(charge_num.where(charge_given & ~bad_charge), dtype="Float64").round().astype("Int64"), index=cells.index)

    # 9. identity of the compound
    ident_in = pd.DataFrame({f: cells[f].where(~_blank(cells[f])) for f in ("name", "cas", "smiles", "inchi")})
    no_identity = ident_in.isna().all(axis=1)
    reject(no_identity, "name", cells["name"], "row names no compound: give a name, CAS number, SMILES or InChI")
    resolved = identity.resolve_identities(ident_in, synonyms=synonyms, cache=identity_cache)
    ident_error = resolved["error"].notna() & ~no_identity & resolved["inchikey"].isna()
    reject(ident_error & ident_in["smiles"].notna(), "smiles", cells["smiles"], resolved["error"])
    reject(ident_error & ident_in["smiles"].isna() & ident_in["inchi"].notna(), "inchi", cells["inchi"], resolved["error"])

    # 10. conversion to pKa of the acid form
    q = quantity["quantity"]
    x = parsed["value"]
    is_k = q.isin(["Ka", "Kb"])
    reject(is_k & x.le(0), "value", value_text,
           lambda rows: q[rows] + " '" + value_text[rows].astype(str) + "' must be a positive number")
    p_value = _to_pk(x, is_k)
    with np.errstate(divide="ignore", invalid="ignore"):
        # u(pK) = u(K) / (K ln 10), first-order propagation (GUM, JCGM 100:2008, eq. 10)
        p_unc = np.where(is_k, uncertainty / (x * np.log(10)), uncertainty)
    qualifier = parsed["qualifier"].where(parsed["qualifier"].notna(), None)
    flip = {"<": ">", ">": "<", "<=": ">=", ">=": "<="}
    # a bound on K is the opposite bound on pK; a base's pKb bound flips once more to pKa
    flips = is_k.astype(int) + q.isin(["pKb", "Kb"]).astype(int)
    qualifier = qualifier.where(flips % 2 == 0, qualifier.map(flip).fillna(qualifier))

    ok_conditions = temperature_k.notna() & ionic_value.notna()
    units = ionic["unit"].fillna("mol/L")  # a bare number in a constants table is molar by custom
    is_molar = units.eq("mol/L") & ionic_value.gt(0)
    molal = ionic_value.copy()
    rows = ok_conditions & is_molar
    if rows.any():
        vals, errs = _on_rows(rows, physchem.molar_to_molal, ionic_value, temperature_k)
        molal[rows] = vals[rows]
        reject(errs.notna(), "temperature", temp_text["text"], errs)

    is_base = q.isin(["pKb", "Kb"])
    pkw_used = pd.Series(np.nan, index=cells.index)
    need_pkw = is_base & ok_conditions & molal.notna()
    if need_pkw.any():
        conc = ctype.eq("concentration") & need_pkw  # Kw of the same kind as the constants
        for mask, func in (
            (need_pkw & ~conc, lambda t, i: physchem.pkw(t)),
            (conc, lambda t, i: physchem.pkw_at_ionic_strength(t, i)),
        ):
            if mask.any():
                vals, errs = _on_rows(mask, func, temperature_k, molal)
                pkw_used[mask] = vals[mask]
                reject(errs.notna(), "temperature", temp_text["text"],
                       lambda rows, errs=errs: "cannot convert " + q[rows] + " to pKa: " + errs[rows].astype(str))
    pka = pd.Series(np.where(is_base, pkw_used - p_value, p_value), index=cells.index)

    # 10b. a second cell giving the same constant as another quantity (e.g. Ka beside pKa):
    # converted the same way and kept for the row cross-check rule (ka_pka_row_mismatch)
    alt_text = cells["value_alt"]
    alt_given = ~_blank(alt_text)
    alt_quantity = pd.Series(None, index=cells.index, dtype=object)
    pka_alt = pd.Series(np.nan, index=cells.index)
    if alt_given.any():
        alt_q_text = _with_defaults(cells, tables, "quantity_alt")["text"]
        alt_q_blank = _blank(alt_q_text)
        alt_q = parse.parse_quantity(alt_q_text.where(~alt_q_blank, ""))
        alt_quantity = alt_q["quantity"].where(alt_given)
        reject(alt_given & alt_q_blank, "quantity_alt", alt_q_text,
               "value_alt is given but not its quantity: map or default quantity_alt (pKa, Ka, pKb, Kb, logK)")
        reject(alt_given & ~alt_q_blank & alt_q["error"].notna(), "quantity_alt", alt_q_text, alt_q["error"])
        alt_is_base = alt_quantity.isin(["pKb", "Kb"])
        other_side = alt_given & alt_quantity.notna() & (alt_is_base != is_base)
        reject(other_side, "quantity_alt", alt_q_text,
               lambda rows: "quantity_alt '" + alt_q_text[rows].astype(str)
               + "' is the other side of the pair from quantity '" + q[rows].astype(str)
               + "'; value_alt must report the same constant")
        alt = parse.parse_values(alt_text.where(alt_given, ""))
        reject(alt_given & alt["error"].notna(), "value_alt", alt_text, alt["error"])
        alt_value = alt["value"].astype(float)
        alt_is_k = alt_quantity.isin(["Ka", "Kb"])
        reject(alt_given & alt_is_k & alt_value.le(0), "value_alt", alt_text,
               lambda rows: alt_quantity[rows].astype(str) + " '" + alt_text[rows].astype(str)
               + "' must be a positive number")
        p_alt = _to_pk(alt_value, alt_is_k)
        pka_alt = pd.Series(np.where(is_base, pkw_used - p_alt, p_alt), index=cells.index).where(alt_given)

    # 11. assemble; a row with any reject is not a measurement
    all_rejects = pd.concat(rejects, ignore_index=True) if rejects else pd.DataFrame(columns=REJECTS.columns)
    rejected_rows = pd.MultiIndex.from_frame(all_rejects[["source_id", "source_row"]])
    key = pd.MultiIndex.from_frame(cells[["source_id", "source_row"]])
    accepted = ~key.isin(rejected_rows) & pka.notna().to_numpy()
    leftover = ~key.isin(rejected_rows) & ~accepted  # safety net: never drop a row silently
    if leftover.any():
        left = pd.Series(leftover, index=cells.index)
        all_rejects = pd.concat(
            [all_rejects, _rejects_for(cells, left, "value", value_text, "value could not be converted to a pKa")],
            ignore_index=True,
        )
    acc = pd.Series(accepted, index=cells.index)

    value_id = make_value_ids(cells["source_id"], cells["table_file"], cells["source_row"])
    measurements = pd.DataFrame(
        {
            "value_id": value_id,
            "compound_id": resolved["compound_id"],
            "step": step,
            "step_inferred": False,
            "pka": pka,
            "pka_uncertainty": pd.Series(p_unc, index=cells.index).abs(),
            "qualifier": qualifier,
            "temperature_k": temperature_k,
            "ionic_strength_molal": molal,
            "medium": ionic["medium"],
            "solvent": medium["solvent"],
            "constant_type": ctype,
            "charge": charge,
            "quantity_reported": q,
            "value_reported": value_text,
            "pkw_used": pkw_used,
            "quantity_alt_reported": alt_quantity,
            "value_alt_reported": alt_text.where(alt_given),
            "pka_alt": pka_alt,
            "name_reported": cells["name"],
            "cas_reported": cells["cas"],
            "smiles_reported": cells["smiles"],
            "species_smiles": resolved["species_smiles"],
            "method": _with_defaults(cells, tables, "method")["text"],
            "reference": _with_defaults(cells, tables, "reference")["text"],
            "source_id": cells["source_id"],
            "source_row": cells["source_row"],
            "copy_of": None,
            "status": "ok",
        }
    )[acc]
    cell_facts = _cell_facts(
        cells[acc], tables, value_id[acc], quantity_text[acc], temp_text[acc], ionic_text[acc],
        parsed[acc], ionic_value[acc], units[acc],
    )
    return SourcePart(
        measurements=measurements.reset_index(drop=True),
        rejects=all_rejects.reset_index(drop=True),
        cell_facts=cell_facts,
        resolved=resolved[acc].reset_index(drop=True),
    )


def _first_present(values: np.ndarray, by_group: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group (codes 0..n-1), the first non-missing value in row order, else None.

    ``by_group`` is a stable argsort of ``group`` (rows grouped, row order kept within each).
    """
    rows = by_group[~pd.isna(values[by_group])]
    groups = group[rows]
    starts = np.flatnonzero(np.diff(groups, prepend=-1) != 0)  # first present row of each group
    out = np.full(n_groups, None, dtype=object)
    out[groups[starts]] = values[rows[starts]]
    return out


def _most_common(values: np.ndarray, group: np.ndarray, n_groups: int, rows: np.ndarray) -> np.ndarray:
    """Per group, the most frequent non-missing value among ``rows`` (ties: alphabetical)."""
    picked = rows & ~pd.isna(values)
    codes, uniques = pd.factorize(values[picked])
    if not len(uniques):
        return np.full(n_groups, None, dtype=object)
    rank = np.empty(len(uniques), dtype=np.int64)  # alphabetical rank of each distinct value
    rank[np.argsort(uniques.astype(str), kind="stable")] = np.arange(len(uniques))
    pairs, counts = np.unique(group[picked].astype(np.int64) * len(uniques) + rank[codes], return_counts=True)
    pair_group, pair_rank = np.divmod(pairs, len(uniques))
    best = np.lexsort((pair_rank, -counts, pair_group))  # by group, count down, then name
    groups, first = np.unique(pair_group[best], return_index=True)
    by_rank = np.empty(len(uniques), dtype=object)
    by_rank[rank] = np.asarray(uniques, dtype=object)
    out = np.full(n_groups, None, dtype=object)
    out[groups] = by_rank[pair_rank[best][first]]
    return out


def _compound_table(resolved: pd.DataFrame) -> pd.DataFrame:
    """One row per compound: its structure, and the name and CAS most sources use for it.

    Compounds come sorted by id; each field is the first value given for the compound, except
    the name and the CAS, which are the ones most rows give (ties: alphabetical). The CAS is
    counted only on rows that gave the parent itself (not a salt), so that sodium acetate's
    CAS does not become acetic acid's. Works on integer codes of the compound ids.
    """
    cols = ["compound_id", "name", "inchikey", "smiles", "cas", "formula", "resolved_by"]
    frame = resolved.reindex(columns=cols + ["species_smiles"])
    group, ids = pd.factorize(frame["compound_id"].to_numpy(dtype=object), sort=True)
    n = len(ids)
    column = {c: frame[c].to_numpy(dtype=object) for c in cols[1:] + ["species_smiles"]}
    table = {"compound_id": np.asarray(ids, dtype=object)}
    by_group = np.argsort(group, kind="stable")
    table.update({c: _first_present(column[c], by_group, group, n) for c in cols[1:]})
    every_row = np.ones(len(frame), dtype=bool)
    name = _most_common(column["name"], group, n, every_row)
    species = column["species_smiles"]
    parent_rows = pd.isna(species) | (species == column["smiles"])
    cas = _most_common(column["cas"], group, n, parent_rows)
    table["name"] = np.where(pd.isna(name), table["name"], name)
    table["cas"] = np.where(pd.isna(cas), table["cas"], cas)
    return pd.DataFrame(table)[cols]


def _cell_facts(
    cells: pd.DataFrame,
    tables: pd.DataFrame,
    value_id: pd.Series,
    quantity_text: pd.DataFrame,
    temp_text: pd.DataFrame,
    ionic_text: pd.DataFrame,
    parsed: pd.DataFrame,
    ionic_value: pd.Series,
    units: pd.Series,
) -> pd.DataFrame:
    """The typed facts behind each accepted measurement's lineage steps (see :mod:`lineage`)."""
    # the table facts are looked up once per table and broadcast by the rows' table codes
    table_codes = cells.groupby(["source_id", "table_file"], sort=False).ngroup().to_numpy()
    _, first_row = np.unique(table_codes, return_index=True)  # the first row of each table code
    table_keys = pd.MultiIndex.from_frame(cells[["source_id", "table_file"]].iloc[first_row])
    t = tables.set_index(["source_id", "table_file"]).reindex(table_keys)

    def per_table(values: list[object]) -> pd.Categorical:  # one value per table -> per row
        codes, uniques = pd.factorize(np.asarray(values, dtype=object))  # None gets code -1
        return pd.Categorical.from_codes(codes[table_codes], categories=pd.Index(uniques, dtype=object))

    def category(values: pd.Series | np.ndarray) -> pd.Categorical:
        return _text_categorical(pd.Categorical(np.asarray(values, dtype=object)))

    def defaulted(frame: pd.DataFrame) -> pd.Categorical:
        return category(frame["text"].where(frame["from_default"]))

    facts = pd.DataFrame(
        {
            "value_id": value_id.to_numpy(dtype=object),
            "file": per_table([f"{s}/{f}" for s, f in table_keys]),
            "file_sha256": per_table(list(t["file_sha256"])),
            "value_header": per_table([c.get("value") for c in t["columns"]]),
            "quantity_text": category(quantity_text["text"]),
            "quantity_default": defaulted(quantity_text),
            "temperature_default": defaulted(temp_text),
            "ionic_strength_default": defaulted(ionic_text),
            "value_parsed": parsed["value"].to_numpy(dtype=float),
            "uncertainty_parsed": parsed["uncertainty"].to_numpy(dtype=float),
            "qualifier_parsed": category(parsed["qualifier"]),
            "ionic_strength_given": ionic_value.to_numpy(dtype=float),
            "ionic_strength_was_molar": (units.eq("mol/L") & ionic_value.gt(0)).to_numpy(dtype=bool),
        }
    )
    return CELL_FACTS.validate(facts)


def _text_categorical(values: pd.Categorical | pd.Series) -> pd.Categorical:
    """The same categorical with object-dtype categories (so that any two can be joined)."""
    values = pd.Categorical(values)
    return pd.Categorical.from_codes(values.codes, categories=pd.Index(values.categories, dtype=object))


def concat_cell_facts(parts: list[pd.DataFrame]) -> pd.DataFrame:
    """Join cell-fact frames, keeping the text facts categorical (plain concat would not)."""
    joined = pd.concat(parts, ignore_index=True)
    for column, spec in CELL_FACTS.columns.items():
        if str(spec.dtype) == "category":
            joined[column] = union_categoricals([_text_categorical(p[column]) for p in parts])
    return joined
