"""Tests for pipeline.identity.

Outside references used here:

- InChIKeys: the InChI standard as computed by RDKit's bundled InChI library, each one also
  confirmed against the ``chemicals`` 1.5.2 offline database (PubChem-derived ``InChI_key``
  field). Where the two disagreed the test would say so; for the four keys below they agree.
- CAS check digits: the CAS Registry Number check-digit rule (cas.org), with the valid and
  invalid numbers listed in REFERENCE-VALUES.md (status C), and ``chemicals.identifiers.
  check_CAS`` as an independent implementation of the same rule.
- Names and CAS numbers: the ``chemicals`` 1.5.2 offline identifier database.
- pKa values in the step tests: IUPAC compilations as listed in REFERENCE-VALUES.md, "from
  memory" (only their order matters there).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from chemicals.identifiers import check_CAS, search_chemical
from hypothesis import given, settings
from hypothesis import strategies as st
from rdkit import Chem

from pipeline import identity
from pipeline.identity import (
    FINDING_RULES,
    IdentityCache,
    cas_check_digit_ok,
    cas_is_missing,
    identity_findings,
    infer_steps,
    resolve_identities,
    standardize_structures,
)

ACETIC = "QTBSBXVTEAMEQO-UHFFFAOYSA-N"
AMMONIA = "QGZKDVFQNNGYKY-UHFFFAOYSA-N"
PHOSPHORIC = "NBIIXXVUZAFLBC-UHFFFAOYSA-N"
TRIS = "LENZDBCJOHFCAS-UHFFFAOYSA-N"
FORMIC = "BDAGIHXWWSANSR-UHFFFAOYSA-N"
ETHANOL = "LFQSCWFLJHTTHZ-UHFFFAOYSA-N"


def rows(**columns: list[object]) -> pd.DataFrame:
    """A resolve_identities input frame; absent columns are all None."""
    n = len(next(iter(columns.values())))
    data = {c: columns.get(c, [None] * n) for c in ("name", "cas", "smiles", "inchi")}
    return pd.DataFrame(data, dtype=object)


# ------------------------------------------------------------------ reference InChIKeys

# (compound, SMILES, name for the chemicals database, standard InChIKey)
# InChI standard via RDKit; confirmed by the chemicals 1.5.2 database InChI_key field.
REFERENCE_KEYS = [
    ("acetic acid", "CC(=O)O", "acetic acid", ACETIC),
    ("ammonia", "N", "ammonia", AMMONIA),
    ("phosphoric acid", "OP(=O)(O)O", "phosphoric acid", PHOSPHORIC),
    ("Tris", "NC(CO)(CO)CO", "tris(hydroxymethyl)aminomethane", TRIS),
]


@pytest.mark.parametrize(("label", "smiles", "db_name", "key"), REFERENCE_KEYS)
def test_inchikey_matches_inchi_standard_via_rdkit(
    label: str, smiles: str, db_name: str, key: str
) -> None:
    out = standardize_structures(pd.Series([smiles]), None)
    assert out.loc[0, "inchikey"] == key, label
    # the same key straight from RDKit's InChI, no standardization in between
    assert Chem.MolToInchiKey(Chem.MolFromSmiles(smiles)) == key


@pytest.mark.parametrize(("label", "smiles", "db_name", "key"), REFERENCE_KEYS)
def test_inchikey_matches_chemicals_database(
    label: str, smiles: str, db_name: str, key: str
) -> None:
    # chemicals 1.5.2 offline database (PubChem-derived InChI_key column)
    assert search_chemical(db_name).InChI_key == key, label
    out = resolve_identities(rows(name=[db_name]))
    assert out.loc[0, "compound_id"] == key


# ------------------------------------------------------------------ standardization


@pytest.mark.parametrize(
    ("label", "given", "parent_key", "given_canonical"),
    [
        # salts and charged species reduce to the parent (RDKit MolStandardize + InChI)
        ("sodium acetate", "CC(=O)[O-].[Na+]", ACETIC, "CC(=O)[O-].[Na+]"),
        ("sodium acetate, covalent Na", "CC(=O)O[Na]", ACETIC, "CC(=O)O[Na]"),
        ("ammonium chloride", "[NH4+].[Cl-]", AMMONIA, "[Cl-].[NH4+]"),
        (
            "disodium hydrogen phosphate",
            "OP(=O)([O-])[O-].[Na+].[Na+]",
            PHOSPHORIC,
            "O=P([O-])([O-])O.[Na+].[Na+]",
        ),
        ("Tris hydrochloride", "OCC(N)(CO)CO.Cl", TRIS, "Cl.NC(CO)(CO)CO"),
        ("acetic acid hydrate", "CC(=O)O.O", ACETIC, "CC(=O)O.O"),
    ],
)
def test_salts_map_to_parent(label: str, given: str, parent_key: str, given_canonical: str) -> None:
    out = standardize_structures(pd.Series([given]), None)
    assert out.loc[0, "inchikey"] == parent_key, label
    assert out.loc[0, "input_smiles_canonical"] == Chem.MolToSmiles(
        Chem.MolFromSmiles(given_canonical)
    )
    assert out.loc[0, "error"] is None


def test_standardize_keeps_index_formula_and_reports_errors() -> None:
    smiles = pd.Series(
        ["CC(=O)[O-].[Na+]", "C(C", None, "N(C)(C)(C)(C)C", "CC(=O)[O-].[Na+]"], index=list("abcde")
    )
    out = standardize_structures(smiles, None)
    assert list(out.index) == list("abcde")
    assert out.loc["a", "formula"] == "C2H4O2"  # Hill formula of acetic acid
    assert out.loc["a", "parent_smiles"] == "CC(=O)O"
    assert out.loc["b", "error"] == "SMILES 'C(C' could not be parsed"
    assert out.loc["c", "error"] is None and out.loc["c", "inchikey"] is None
    assert "N(C)(C)(C)(C)C" in out.loc["d", "error"] and "valence" in out.loc["d", "error"]
    assert out.loc["e", "inchikey"] == ACETIC


def test_standardize_from_inchi_and_conflicting_inputs() -> None:
    # standard InChI of acetic acid (InChI standard; chemicals database InChI column)
    acetic_inchi = "InChI=1S/C2H4O2/c1-2(3)4/h1H3,(H,3,4)"
    out = standardize_structures(
        pd.Series([None, "C(=O)O", "C(C"]), pd.Series([acetic_inchi, acetic_inchi, acetic_inchi])
    )
    assert out["inchikey"].tolist() == [ACETIC, FORMIC, ACETIC]
    assert out["structure_from"].tolist() == ["inchi", "smiles", "inchi"]
    assert "give different parents" in out.loc[1, "error"]
    assert "taken from the InChI" in out.loc[2, "error"]
    bad = standardize_structures(None, pd.Series(["not an inchi"]))
    assert "InChI 'not an inchi' could not be parsed" in bad.loc[0, "error"]


def test_standardize_needs_an_input() -> None:
    with pytest.raises(ValueError, match="needs smiles, inchi or both"):
        standardize_structures(None, None)


def test_standardize_runs_over_unique_inputs(monkeypatch: pytest.MonkeyPatch) -> None:
    seen: list[str] = []
    real = identity._standardize_texts

    def spy(kind: str, texts: list[str]) -> list[tuple[str | None, ...]]:
        seen.extend(texts)
        return real(kind, texts)

    monkeypatch.setattr(identity, "_standardize_texts", spy)
    smiles = pd.Series(["CCO", " CCO ", "CCO", "CC(=O)O", None] * 10)
    out = standardize_structures(smiles, None)
    assert sorted(seen) == ["CC(=O)O", "CCO"]
    assert (out["inchikey"].iloc[:3] == ETHANOL).all()


# ------------------------------------------------------------------ CAS check digits


# cas.org check-digit rule; values from REFERENCE-VALUES.md (status C)
@pytest.mark.parametrize(
    ("cas", "ok"),
    [
        ("107-07-3", True),
        ("71-23-8", True),
        ("7732-18-5", True),
        ("64-19-7", True),
        ("7732-18-6", False),
        ("64-19-8", False),
        (" 64-19-7 ", True),  # surrounding blanks ignored
        ("64197", False),  # hyphens lost
        ("064-19-7", False),  # leading zero (common practice: CAS numbers print without one)
        ("12345678-90-1", False),  # first part longer than 7 digits
        ("water", False),
    ],
)
def test_cas_check_digit_cas_org_rule(cas: str, ok: bool) -> None:
    assert cas_check_digit_ok(pd.Series([cas])).tolist() == [ok]


def test_cas_missing_is_told_apart() -> None:
    cas = pd.Series(["64-19-7", None, np.nan, "", "64-19-8", pd.NA], dtype=object)
    assert cas_check_digit_ok(cas).tolist() == [True, False, False, False, False, False]
    assert cas_is_missing(cas).tolist() == [False, True, True, True, False, True]


@settings(max_examples=300, deadline=None)
@given(
    first=st.integers(min_value=10, max_value=9_999_999),
    mid=st.integers(min_value=0, max_value=99),
    check=st.integers(min_value=0, max_value=9),
)
def test_cas_check_digit_agrees_with_chemicals_check_cas(first: int, mid: int, check: int) -> None:
    # independent implementation of the cas.org rule: chemicals.identifiers.check_CAS
    cas = f"{first}-{mid:02d}-{check}"
    assert bool(cas_check_digit_ok(pd.Series([cas]))[0]) == check_CAS(cas)


# ------------------------------------------------------------------ resolution


def test_name_cas_and_smiles_give_same_compound() -> None:
    # chemicals 1.5.2 database: "acetic acid", "ethanoic acid" and 64-19-7 are acetic acid
    out = resolve_identities(
        rows(
            name=["acetic acid", "ethanoic acid", None, None, "  Acetic   ACID "],
            cas=[None, None, "64-19-7", None, None],
            smiles=[None, None, None, "CC(=O)O", None],
        )
    )
    assert out["compound_id"].tolist() == [ACETIC] * 5
    assert out["resolved_by"].tolist() == ["name", "name", "cas", "smiles", "name"]
    assert out["cas"].tolist() == ["64-19-7"] * 5  # resolved where not given
    assert out.loc[2, "name"] == "acetic acid"  # database common name where none given
    assert out.loc[4, "name"] == "Acetic ACID"  # given name kept (whitespace collapsed)
    assert out["error"].isna().all()


def test_structure_takes_precedence_and_name_key_is_kept() -> None:
    out = resolve_identities(rows(name=["acetic acid"], cas=["64-19-7"], smiles=["C(=O)O"]))
    assert out.loc[0, "compound_id"] == FORMIC
    assert out.loc[0, "resolved_by"] == "smiles"
    assert out.loc[0, "name_inchikey"] == ACETIC
    assert out.loc[0, "cas_inchikey"] == ACETIC


def test_salt_names_and_inchi_resolve_to_parent() -> None:
    # chemicals database: "sodium acetate" is CAS 127-09-3, "ammonium chloride" 12125-02-9
    out = resolve_identities(
        rows(
            name=["sodium acetate", "ammonium chloride", None],
            inchi=[None, None, "InChI=1S/H3N/h1H3"],
        )
    )
    assert out["compound_id"].tolist() == [ACETIC, AMMONIA, AMMONIA]
    assert out["resolved_by"].tolist() == ["name", "name", "inchi"]


def test_cas_validity_and_replacement() -> None:
    out = resolve_identities(
        rows(name=["water", "water", "water"], cas=["7732-18-5", "7732-18-6", None])
    )
    assert out["cas_valid"].tolist() == [True, False, pd.NA]
    assert str(out["cas_valid"].dtype) == "boolean"
    assert out["cas"].tolist() == ["7732-18-5"] * 3  # invalid one replaced by the resolved CAS
    assert out["cas_given"].tolist() == ["7732-18-5", "7732-18-6", None]


def test_unresolved_rows_get_stable_ids_and_reasons() -> None:
    out = resolve_identities(
        rows(
            name=["  No Such   Compound ", None, None, None],
            cas=[None, "7732-18-6", None, None],
            smiles=[None, None, "C(C", None],
        )
    )
    assert out["compound_id"].tolist() == [
        "unresolved:name:no such compound",
        "unresolved:cas:7732-18-6",
        "unresolved:smiles:C(C",
        None,
    ]
    assert out["resolved_by"].isna().all()
    assert (
        "'No Such Compound' is neither a steward synonym nor in the chemicals database"
        in out.loc[0, "error"]
    )
    assert "fails the CAS check-digit rule" in out.loc[1, "error"]
    assert "could not be parsed" in out.loc[2, "error"]
    assert out.loc[3, "error"] == "no name, CAS, SMILES or InChI given"


def test_synonyms_override_database() -> None:
    synonyms = pd.DataFrame(
        {
            # deliberately wrong for the database, to prove the steward table wins
            "synonym": ["Ethanoic Acid", "house buffer A"],
            "smiles": ["C(=O)O", "OCC(N)(CO)CO.Cl"],
            "cas": [None, "77-86-1"],
            "note": ["test override", "invented lab name"],
        }
    )
    out = resolve_identities(
        rows(name=["  ethanoic   ACID", "House Buffer a", "acetic acid"]), synonyms=synonyms
    )
    assert out["compound_id"].tolist() == [FORMIC, TRIS, ACETIC]
    assert out["resolved_by"].tolist() == ["synonym", "synonym", "name"]
    assert out["name_inchikey"].tolist() == [FORMIC, TRIS, ACETIC]
    assert out.loc[1, "cas"] == "77-86-1"


def test_synonym_cas_overrides_database_cas() -> None:
    synonyms = pd.DataFrame({"synonym": ["my formic"], "smiles": ["C(=O)O"], "cas": ["64-19-7"]})
    out = resolve_identities(rows(cas=["64-19-7"]), synonyms=synonyms)
    assert out.loc[0, "cas_inchikey"] == FORMIC
    assert out.loc[0, "resolved_by"] == "cas"


def test_bad_synonym_tables_are_refused() -> None:
    with pytest.raises(ValueError, match=r"lacks column\(s\) \['smiles'\]"):
        resolve_identities(rows(name=["x"]), synonyms=pd.DataFrame({"synonym": ["x"]}))
    with pytest.raises(ValueError, match="'C\\(C' could not be parsed"):
        resolve_identities(
            rows(name=["x"]), synonyms=pd.DataFrame({"synonym": ["x"], "smiles": ["C(C"]})
        )
    with pytest.raises(ValueError, match="map to more than one structure"):
        resolve_identities(
            rows(name=["x"]), synonyms=pd.DataFrame({"synonym": ["x", "X "], "smiles": ["C", "CC"]})
        )


# ------------------------------------------------------------------ findings


def findings_for(frame: pd.DataFrame, sources: list[str]) -> pd.DataFrame:
    resolved = resolve_identities(frame)
    value_id = pd.Series([f"v{i}" for i in range(len(frame))], index=frame.index)
    return identity_findings(resolved, pd.Series(sources, index=frame.index), value_id)


CLEAN = rows(
    name=["acetic acid", "ethanoic acid", "ammonia"],
    cas=["64-19-7", "64-19-7", "7664-41-7"],
    smiles=["CC(=O)O", "CC(=O)[O-].[Na+]", None],
)


def test_clean_case_has_no_findings() -> None:
    f = findings_for(CLEAN, ["src-a", "src-b", "src-b"])
    assert list(f.columns) == ["rule", "severity", "value_id", "message"]
    assert f.empty


def test_cas_check_digit_finding() -> None:
    f = findings_for(rows(name=["acetic acid"], cas=["64-19-8"], smiles=["CC(=O)O"]), ["src-a"])
    assert f["rule"].tolist() == ["cas_check_digit"]
    assert f.loc[0, "severity"] == "warning" and f.loc[0, "value_id"] == "v0"
    assert "64-19-8" in f.loc[0, "message"] and "expected 7" in f.loc[0, "message"]


def test_cas_structure_conflict_finding() -> None:
    f = findings_for(
        rows(cas=["64-19-7", "64-19-7"], smiles=["CC(=O)O", "C(=O)O"]), ["src-a", "src-b"]
    )
    hit = f[f["rule"] == "cas_structure_conflict"]
    assert hit["value_id"].tolist() == ["v0", "v1"]
    assert (hit["severity"] == "warning").all()
    assert FORMIC in hit["message"].iloc[0] and ACETIC in hit["message"].iloc[0]
    assert "src-b" in hit["message"].iloc[0]


def test_name_structure_mismatch_finding() -> None:
    f = findings_for(rows(name=["ethanol"], smiles=["CC(=O)O"]), ["src-a"])
    assert f["rule"].tolist() == ["name_structure_mismatch"]
    assert ETHANOL in f.loc[0, "message"] and "'ethanol'" in f.loc[0, "message"]


def test_structure_multiple_cas_finding() -> None:
    # 127-09-3 is sodium acetate in the chemicals database; its parent is acetic acid
    f = findings_for(
        rows(cas=["64-19-7", "127-09-3"], smiles=["CC(=O)O", "CC(=O)O"]), ["src-a", "src-b"]
    )
    assert f["rule"].tolist() == ["structure_multiple_cas", "structure_multiple_cas"]
    assert (f["severity"] == FINDING_RULES["structure_multiple_cas"]).all()
    assert f.loc[0, "severity"] == "info"
    assert "127-09-3" in f.loc[0, "message"] and "64-19-7" in f.loc[0, "message"]


def test_unresolved_identity_finding() -> None:
    f = findings_for(rows(name=["no such compound xyz", "acetic acid"]), ["src-a", "src-a"])
    assert f["rule"].tolist() == ["unresolved_identity"]
    assert f.loc[0, "value_id"] == "v0"
    assert "no such compound xyz" in f.loc[0, "message"]


# ------------------------------------------------------------------ cache


def test_cache_round_trip_skips_rdkit_and_database(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "cache" / "identity.parquet"
    frame = rows(
        name=["acetic acid", None, "ethanol", "no such compound xyz"],
        cas=[None, "7664-41-7", None, None],
        smiles=[None, None, "CCO", None],
        inchi=[None, "InChI=1S/H3N/h1H3", None, None],
    )
    first = resolve_identities(frame, cache=IdentityCache(path))
    assert path.exists()

    calls = {"rdkit": 0, "db": 0}

    def no_rdkit(kind: str, texts: list[str]) -> list[tuple[str | None, ...]]:
        calls["rdkit"] += 1
        raise AssertionError(f"RDKit called for {kind} {texts}")

    def no_db(kind: str, texts: list[str]) -> list[tuple[str | None, ...]]:
        calls["db"] += 1
        raise AssertionError(f"database called for {kind} {texts}")

    monkeypatch.setattr(identity, "_standardize_texts", no_rdkit)
    monkeypatch.setattr(identity, "_lookup_texts", no_db)
    cache = IdentityCache(path)
    second = resolve_identities(frame, cache=cache)
    assert calls == {"rdkit": 0, "db": 0}
    assert cache.misses == 0 and cache.hits > 0
    pd.testing.assert_frame_equal(first, second)

    structures = standardize_structures(pd.Series(["CCO"]), None, cache=IdentityCache(path))
    assert structures.loc[0, "inchikey"] == ETHANOL


def test_cache_version_change_invalidates(tmp_path: Path) -> None:
    path = tmp_path / "identity.parquet"
    standardize_structures(pd.Series(["CCO", "CC(=O)O"]), None, cache=IdentityCache(path))
    assert len(IdentityCache(path)) == 2
    other = IdentityCache(path, version="rdkit 0000.00.0")
    assert len(other) == 0 and other.stale_rows == 2
    assert other.lookup("smiles", ["CCO"]).empty


def test_cache_refuses_unknown_kind(tmp_path: Path) -> None:
    with pytest.raises(
        ValueError, match="unknown identity cache kind 'formula'; valid kinds: smiles"
    ):
        IdentityCache(tmp_path / "c.parquet").lookup("formula", ["C"])


# ------------------------------------------------------------------ steps


def step_frame(
    compound: list[str],
    step: list[int | None],
    pka: list[float],
    source: list[str],
    temperature: list[float] | None = None,
) -> pd.DataFrame:
    n = len(compound)
    return pd.DataFrame(
        {
            "compound_id": compound,
            "step": pd.array(step, dtype="Int64"),
            "pka": pka,
            "source_id": source,
            "temperature_k": temperature or [298.15] * n,
            "ionic_strength_molal": [0.0] * n,
        }
    )


def test_infer_steps_ranks_unnumbered_polyprotic_values() -> None:
    # phosphoric acid pK1/pK2/pK3 = 2.148 / 7.198 / 12.35 (pK1, pK2 as in NIST46 in PHREEQC minteq.v4.dat; pK3 from memory)
    f = step_frame(["P"] * 3, [None] * 3, [7.198, 12.35, 2.148], ["s1"] * 3)
    out = infer_steps(f)
    assert out["step"].tolist() == [2, 3, 1]
    assert out["step_inferred"].all()
    assert out["step_note"].isna().all()


def test_infer_steps_keeps_given_and_uses_known_single_step() -> None:
    # carbonic acid pK1/pK2 = 6.351 / 10.329 (REFERENCE-VALUES, Cc). s2 gives one unnumbered
    # value at another temperature; C has two known steps elsewhere, so it is not guessed.
    f = step_frame(
        ["C", "C", "C"],
        [1, 2, None],
        [6.351, 10.329, 10.33],
        ["s1", "s1", "s2"],
        temperature=[298.15, 298.15, 310.15],
    )
    out = infer_steps(f)
    assert out["step"].iloc[:2].tolist() == [1, 2]
    assert out["step"].isna().iloc[2]
    # compound C has two known steps: a lone unnumbered value stays missing
    assert "several known steps" in out.loc[2, "step_note"]
    # acetic acid pKa 4.756 (REFERENCE-VALUES, from memory): one known step 1 elsewhere
    g = step_frame(["A", "A"], [1, None], [4.756, 4.76], ["s1", "s2"])
    out_g = infer_steps(g)
    assert out_g["step"].tolist() == [1, 1]
    assert out_g["step_inferred"].tolist() == [False, True]
    # a source listing only carbonic pK2 (10.329): the one known step elsewhere is 2
    h = step_frame(["C", "C"], [2, None], [10.329, 10.33], ["s1", "s2"])
    assert infer_steps(h)["step"].tolist() == [2, 2]


def test_infer_steps_leaves_ambiguous_cases() -> None:
    f = step_frame(
        ["X", "X", "Y", "Y", "P", "P", "P", "P"],
        [None, None, 1, None, None, None, None, None],
        [5.0, 5.0, 3.0, 4.0, 2.148, 7.198, 12.35, 7.2],
        ["s1", "s1", "s2", "s2", "s3", "s3", "s3", "s4"],
    )
    out = infer_steps(f)
    assert out["step"].isna().tolist() == [True, True, False, True, False, False, False, True]
    assert "repeated pKa values" in out.loc[0, "step_note"]
    assert "partial set" in out.loc[3, "step_note"]
    assert "may be a subset" in out.loc[7, "step_note"]
    assert not out["step_inferred"].iloc[[0, 1, 2, 3, 7]].any()


def test_infer_steps_names_missing_columns() -> None:
    with pytest.raises(ValueError, match=r"missing column\(s\) \['ionic_strength_molal'\]"):
        infer_steps(step_frame(["A"], [None], [4.7], ["s"]).drop(columns="ionic_strength_molal"))


def test_findings_refuse_misaligned_ids() -> None:
    resolved = resolve_identities(rows(name=["acetic acid", "water"]))
    with pytest.raises(ValueError, match="source_id must be aligned"):
        identity_findings(resolved, pd.Series(["a"], index=[9]), pd.Series(["v0", "v1"]))


def test_empty_input_gives_empty_tables() -> None:
    resolved = resolve_identities(rows(name=[]))
    assert len(resolved) == 0 and "compound_id" in resolved.columns
    f = identity_findings(resolved, pd.Series([], dtype=object), pd.Series([], dtype=object))
    assert list(f.columns) == ["rule", "severity", "value_id", "message"] and f.empty


def test_salt_cas_with_salt_structure_is_not_a_second_cas() -> None:
    # sodium acetate given as its own species (CC(=O)[O-].[Na+], CAS 127-09-3 in the chemicals
    # database) beside acetic acid (64-19-7): two species, two CAS numbers, no finding
    f = findings_for(
        rows(cas=["64-19-7", "127-09-3"], smiles=["CC(=O)O", "CC(=O)[O-].[Na+]"]), ["src-a", "src-b"]
    )
    assert "structure_multiple_cas" not in f["rule"].tolist()
