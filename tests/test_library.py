"""Library API: finding compounds, pKa at the user's conditions, errors, SQL parameters, CLI.

Check values and their sources (status words as in REFERENCE-VALUES.md):
- Goldberg et al. 2002 (J. Phys. Chem. Ref. Data 31, 231) worked transfers to 37 °C: Tris 7.753,
  HEPES 7.424, MES 6.170 (K, computed from Goldberg's ΔH°/ΔCp°).
- Harned & Ehlers 1933 acetic acid equation pKa = 1170.48/T - 3.1649 + 0.013399 T (from memory).
- Davies 1962 (Ion Association, p 41) equation, evaluated by hand in the test.
- InChIKeys from RDKit's InChI (RDKit).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pytest

from pipeline import Library
from pipeline.cli import main
from pipeline.library import (
    AmbiguousCompoundError,
    ConditionsOutOfRangeError,
    StepError,
    UnknownCompoundError,
    enthalpy_table,
)
from pipeline.physchem import GAS_CONSTANT, debye_huckel_a, van_t_hoff

ACETIC = "QTBSBXVTEAMEQO-UHFFFAOYSA-N"
TRIS = "LENZDBCJOHFCAS-UHFFFAOYSA-N"
HEPES = "JKMHFZQWWAIEOD-UHFFFAOYSA-N"
MES = "SXGZJKUKBWWHRA-UHFFFAOYSA-N"
INJECTIONS = [
    "x'; DROP TABLE measurements; --",
    "acetic acid' OR '1'='1",
    '"; DELETE FROM compounds; --',
    "64-19-7'; DROP TABLE recommended; --",
    "Robert'); DROP TABLE compounds;--",
]


@pytest.fixture
def lib(demo_db: Path) -> Library:
    with Library.open(demo_db) as opened:
        yield opened


# ---------------------------------------------------------------------------------------------
# a small hand-made database with only the columns the library reads
# ---------------------------------------------------------------------------------------------

_TABLES = """
CREATE TABLE compounds (compound_id VARCHAR PRIMARY KEY, name VARCHAR, inchikey VARCHAR,
    smiles VARCHAR, cas VARCHAR, formula VARCHAR, resolved_by VARCHAR);
CREATE TABLE measurements (value_id VARCHAR PRIMARY KEY, compound_id VARCHAR, step INTEGER,
    pka DOUBLE, temperature_k DOUBLE, ionic_strength_molal DOUBLE, constant_type VARCHAR,
    charge INTEGER, name_reported VARCHAR, cas_reported VARCHAR, status VARCHAR);
CREATE TABLE findings (rule VARCHAR, severity VARCHAR, value_id VARCHAR, compound_id VARCHAR,
    message VARCHAR);
CREATE TABLE recommended (recommendation_id VARCHAR PRIMARY KEY, compound_id VARCHAR,
    step INTEGER, temperature_k DOUBLE, ionic_strength_molal DOUBLE, constant_type VARCHAR,
    pka DOUBLE, pka_uncertainty DOUBLE, n_values BIGINT, n_sources BIGINT, method VARCHAR,
    birge_ratio DOUBLE, category VARCHAR, reason VARCHAR);
CREATE TABLE lineage (target_id VARCHAR, step_no INTEGER, operation VARCHAR,
    parameters VARCHAR, inputs VARCHAR);
"""


def make_db(path: Path, entries: list[dict[str, Any]]) -> Path:
    """Write a minimal library: one entry per (compound, step, conditions) value.

    Entry keys: compound_id, name, pka; optional step (1), t (298.15), i (0.0),
    ctype ("thermodynamic"), u (None), category ("Tentative"), charge (0), name_reported,
    cas, smiles.
    """
    con = duckdb.connect(str(path))
    con.execute(_TABLES)
    seen: set[str] = set()
    for n, e in enumerate(entries):
        cid = e["compound_id"]
        if cid not in seen:
            seen.add(cid)
            con.execute(
                "INSERT INTO compounds VALUES (?, ?, ?, ?, ?, NULL, 'smiles')",
                [cid, e["name"], cid, e.get("smiles"), e.get("cas")],
            )
        vid, rid = f"kv-{n:016x}", f"kr-{n:016x}"
        step, t, i = e.get("step", 1), e.get("t", 298.15), e.get("i", 0.0)
        ctype = e.get("ctype", "thermodynamic")
        con.execute(
            "INSERT INTO measurements VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'ok')",
            [vid, cid, step, e["pka"], t, i, ctype, e.get("charge", 0),
             e.get("name_reported", e["name"]), e.get("cas")],
        )
        con.execute(
            "INSERT INTO recommended VALUES (?, ?, ?, ?, ?, ?, ?, ?, 1, 1, 'single', NULL, ?, 'test')",
            [rid, cid, step, t, i, ctype, e["pka"], e.get("u"), e.get("category", "Tentative")],
        )
        con.execute(
            "INSERT INTO lineage VALUES (?, 1, 'consensus', '{}', ?)", [rid, json.dumps([vid])]
        )
    con.close()
    return path


# ---------------------------------------------------------------------------------------------
# finding compounds
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("query", "expected"),
    [
        ("acetic acid", ACETIC),
        ("  Acetic   ACID ", ACETIC),  # case and spaces do not matter
        ("sodium acetate", ACETIC),  # a name a source used (measurements.name_reported)
        ("Tris base", TRIS),  # Celandine's name for Tris
        ("THAM", TRIS),  # through raw/synonyms.csv at build time
        ("64-19-7", ACETIC),  # CAS of acetic acid (cas.org check digit valid)
        ("7778-77-0", "NBIIXXVUZAFLBC-UHFFFAOYSA-N"),  # KH2PO4's own CAS -> phosphoric acid
        ("CC(=O)[O-].[Na+]", ACETIC),  # SMILES of the salt: RDKit parent is acetic acid
        ("OC(=O)C", ACETIC),  # another SMILES spelling
        (ACETIC, ACETIC),  # InChIKey (RDKit InChI)
    ],
)
def test_find_by_name_cas_smiles_inchikey(lib: Library, query: str, expected: str) -> None:
    assert lib.find(query).compound_id == expected


def test_find_forced_kind(lib: Library) -> None:
    assert lib.find("CNC", by="smiles").name == "dimethylamine"
    with pytest.raises(ValueError, match="valid choices: name, cas, smiles, inchikey"):
        lib.find("CNC", by="formula")


def test_name_on_a_row_whose_structure_disagrees_is_not_a_synonym(lib: Library) -> None:
    # raw/README.md I2: a Fernhollow row names formic acid but gives acetic acid's SMILES
    assert lib.find("formic acid").compound_id == "BDAGIHXWWSANSR-UHFFFAOYSA-N"


def test_compound_record_lists_source_synonyms(lib: Library) -> None:
    c = lib.find("acetic acid")
    assert c.cas == "64-19-7" and c.smiles == "CC(=O)O"
    assert "sodium acetate" in c.synonyms


def test_ambiguous_cas_lists_candidates(lib: Library) -> None:
    # raw/README.md I1: 124-40-3 carried by dimethylamine and (wrongly) by diethylamine
    with pytest.raises(AmbiguousCompoundError, match="matches 2 compounds") as err:
        lib.find("124-40-3")
    names = {name for _, name in err.value.candidates}
    assert names == {"diethylamine", "dimethylamine"}
    assert isinstance(err.value, LookupError)
    assert "diethylamine" in str(err.value) and "dimethylamine" in str(err.value)


def test_ambiguous_name_lists_candidates(tmp_path: Path) -> None:
    db = make_db(tmp_path / "amb.duckdb", [
        {"compound_id": "AAAAAAAAAAAAAA-UHFFFAOYSA-N", "name": "acid one", "pka": 4.0,
         "name_reported": "lab acid"},
        {"compound_id": "BBBBBBBBBBBBBB-UHFFFAOYSA-N", "name": "acid two", "pka": 5.0,
         "name_reported": "lab acid"},
    ])
    with Library.open(db) as lib, pytest.raises(AmbiguousCompoundError) as err:
        lib.find("lab acid")
    assert [c for c, _ in err.value.candidates] == [
        "AAAAAAAAAAAAAA-UHFFFAOYSA-N", "BBBBBBBBBBBBBB-UHFFFAOYSA-N"]
    assert "acid one" in str(err.value) and "acid two" in str(err.value)


def test_unknown_compound_suggests_close_names(lib: Library) -> None:
    with pytest.raises(UnknownCompoundError, match="'acetic'") as err:
        lib.find("acetic")
    assert "acetic acid" in err.value.suggestions
    assert isinstance(err.value, LookupError)


def test_cas_with_a_bad_check_digit_is_refused(lib: Library) -> None:
    # cas.org check-digit rule: 64-19-8 is invalid (64-19-7 valid)
    with pytest.raises(UnknownCompoundError, match="check-digit"):
        lib.find("64-19-8")


@pytest.mark.parametrize("text", INJECTIONS)
def test_user_text_is_a_sql_parameter(demo_db: Path, text: str) -> None:
    with Library.open(demo_db) as lib:
        before = lib._con.execute("SELECT count(*) FROM measurements").fetchone()
        with pytest.raises(UnknownCompoundError) as err:
            lib.find(text)
        assert text in str(err.value)  # the message echoes the query
        with pytest.raises(LookupError):
            lib.pka(text)
        assert lib._con.execute("SELECT count(*) FROM measurements").fetchone() == before
        assert lib.find("acetic acid").compound_id == ACETIC
    tables = {r[0] for r in duckdb.connect(str(demo_db), read_only=True).execute("SHOW TABLES").fetchall()}
    assert {"measurements", "compounds", "recommended"} <= tables


def test_database_is_opened_read_only(lib: Library) -> None:
    with pytest.raises(duckdb.Error):
        lib._con.execute("CREATE TABLE intruder (x INTEGER)")


def test_missing_file_says_build_first(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match="kaledger build"):
        Library.open(tmp_path / "none.duckdb")


# ---------------------------------------------------------------------------------------------
# pKa lookups and transfers
# ---------------------------------------------------------------------------------------------


def test_value_as_published_at_25c(lib: Library) -> None:
    r = lib.pka("acetic acid")
    # Harned & Ehlers 1933 4.756 (from memory); the library's median of 4.756/4.757 sources
    assert r.pka == pytest.approx(4.756, abs=2e-3)
    assert r.model.endswith("as published") and not r.extrapolated
    assert r.value_ids and all(v.startswith("kv-") for v in r.value_ids)
    assert r.recommendation_ids[0].startswith("kr-")
    json.dumps(r.to_dict())  # plain JSON


def test_series_fit_reproduces_harned_ehlers(lib: Library) -> None:
    # acetic acid 0-50 °C series in the demo library; Harned & Ehlers 1933 equation (from memory)
    t = 308.15
    expected = 1170.48 / t - 3.1649 + 0.013399 * t
    r = lib.pka("acetic acid", temperature="35 °C")
    assert r.pka == pytest.approx(expected, abs=3e-3)
    assert "fit of the library's" in r.model and not r.extrapolated
    assert r.delta_cp_j_mol_k is not None and r.delta_cp_j_mol_k < 0  # fitted ΔCp° kept


def test_series_fit_tris_against_goldberg(lib: Library) -> None:
    # Goldberg et al. 2002: pKa 8.072, ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol) (Cc)
    expected = float(van_t_hoff(8.072, 298.15, 303.15, 47450.0, -59.0).value)
    r = lib.pka("Tris", temperature=303.15)
    assert r.pka == pytest.approx(expected, abs=5e-3)
    assert r.uncertainty > 0


@pytest.mark.parametrize(
    ("key", "name", "pka25", "expected37"),
    [
        (TRIS, "Tris", 8.072, 7.753),  # Goldberg et al. 2002 worked transfer (K)
        (HEPES, "HEPES", 7.564, 7.424),  # Goldberg et al. 2002 worked transfer (K)
        (MES, "MES", 6.270, 6.170),  # Goldberg et al. 2002 worked transfer (K)
    ],
)
def test_table_enthalpy_transfer_goldberg(
    tmp_path: Path, key: str, name: str, pka25: float, expected37: float
) -> None:
    db = make_db(tmp_path / "one.duckdb", [{"compound_id": key, "name": name, "pka": pka25, "u": 0.002}])
    with Library.open(db) as lib:
        r = lib.pka(name, temperature="37 °C")
        at25 = lib.pka(name)
    assert r.pka == pytest.approx(expected37, abs=2e-3)
    assert "enthalpies.csv" in (r.enthalpy_source or "") and "Goldberg" in r.enthalpy_source
    assert r.extrapolated  # one library temperature: every transfer extrapolates
    assert r.uncertainty > at25.uncertainty


def test_series_outlier_is_left_out_and_named(tmp_path: Path) -> None:
    # Tris series from Goldberg's equation with a +0.30 outlier at 15 °C (like raw/ C7)
    temps = [278.15, 288.15, 298.15, 310.15, 318.15]
    vals = [float(van_t_hoff(8.072, 298.15, t, 47450.0, -59.0).value) for t in temps]
    vals[1] += 0.30
    db = make_db(tmp_path / "series.duckdb", [
        {"compound_id": TRIS, "name": "Tris", "pka": round(p, 3), "t": t, "charge": 1}
        for p, t in zip(vals, temps, strict=True)
    ])
    with Library.open(db) as lib:
        r = lib.pka("Tris", temperature="30 °C")
    assert "series outlier" in r.model and "288.15 K" in r.model
    assert r.pka == pytest.approx(float(van_t_hoff(8.072, 298.15, 303.15, 47450.0, -59.0).value), abs=3e-3)
    assert r.delta_h_j_mol == pytest.approx(47450.0, rel=0.03)
    assert not r.extrapolated


def test_extrapolation_widens_the_uncertainty(lib: Library) -> None:
    inside = lib.pka("Tris", temperature="40 °C")
    outside = lib.pka("Tris", temperature="60 °C")  # series spans 5-45 °C
    assert not inside.extrapolated and outside.extrapolated
    assert outside.uncertainty_parts["temperature"] > inside.uncertainty_parts["temperature"]


def _davies_log_gamma(z: int, i: float, a: float) -> float:
    # Davies 1962, Ion Association p 41: log γ = -A z² (√I/(1+√I) - 0.3 I)
    s = math.sqrt(i)
    return -a * z * z * (s / (1 + s) - 0.3 * i)


def test_ionic_strength_transfer_matches_davies_by_hand(lib: Library) -> None:
    i = 0.12
    a = float(debye_huckel_a(298.15))
    r = lib.pka("phosphoric acid", step=2, ionic_strength=i, constant_type="concentration")
    thermo = lib.pka("phosphoric acid", step=2)
    # H2PO4- ⇌ H+ + HPO4 2-: pKc = pK + log γ(H+) + log γ(HPO4 2-) - log γ(H2PO4-)
    expected = thermo.pka + _davies_log_gamma(1, i, a) + _davies_log_gamma(-2, i, a) - _davies_log_gamma(-1, i, a)
    assert r.pka == pytest.approx(expected, abs=1e-6)
    assert r.charge == -1 and r.activity_model == "davies"
    assert r.uncertainty_parts["ionic_strength"] > 0


def test_concentration_constant_as_published(lib: Library) -> None:
    # Fernhollow line 7: 6.770 in 0.1 M KCl (stored as 0.1003 mol/kg)
    r = lib.pka("phosphoric acid", step=2, ionic_strength=0.1, constant_type="concentration")
    assert r.pka == pytest.approx(6.770, abs=1e-9) and "as published" in r.model


def test_cationic_acid_is_insensitive_to_ionic_strength_under_davies(lib: Library) -> None:
    # Tris-H+ ⇌ H+ + Tris: z² terms cancel (1 + 0 - 1 = 0) in the Davies equation
    r = lib.pka("Tris", temperature=310.15, ionic_strength=0.15, constant_type="concentration")
    assert r.charge == 1
    assert r.pka == pytest.approx(lib.pka("Tris", temperature=310.15).pka, abs=1e-12)


def test_pkas_lists_every_step(lib: Library) -> None:
    results = lib.pkas("phosphoric acid")
    assert [r.step for r in results] == [1, 2, 3]
    # phosphoric acid 2.148 / 7.198 / 12.35 (pK1, pK2 as in NIST46 in PHREEQC minteq.v4.dat; pK3 from memory), library medians
    np.testing.assert_allclose([r.pka for r in results], [2.148, 7.198, 12.35], atol=2e-3)


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"temperature": 400.0}, ConditionsOutOfRangeError, "273.15-373.15 K"),
        ({"temperature": "37"}, ConditionsOutOfRangeError, "no unit"),
        ({"ionic_strength": 0.6}, ConditionsOutOfRangeError, "0-0.5 mol/kg"),
        ({"ionic_strength": -0.1}, ConditionsOutOfRangeError, "valid range"),
        ({"ionic_strength": "0.1 M"}, ConditionsOutOfRangeError, "mol/kg"),
        ({"constant_type": "apparent"}, ValueError, "thermodynamic, concentration, mixed"),
        ({"activity_model": "sit"}, ValueError, "davies, extended_debye_huckel"),
        ({"step": 4}, StepError, "valid steps: 1, 2, 3"),
    ],
)
def test_errors_name_the_value_and_the_choices(
    lib: Library, kwargs: dict[str, Any], error: type[Exception], match: str
) -> None:
    args = {"step": 2, **kwargs}
    with pytest.raises(error, match=match):
        lib.pka("phosphoric acid", **args)


def test_step_needed_for_polyprotic(lib: Library) -> None:
    with pytest.raises(StepError, match="give step= one of 1, 2, 3"):
        lib.pka("phosphoric acid")


def test_no_enthalpy_means_no_transfer(lib: Library) -> None:
    # boric acid: one library temperature, no row in enthalpies.csv
    with pytest.raises(ConditionsOutOfRangeError, match="valid temperatures: 298.15 K"):
        lib.pka("boric acid", temperature="50 °C")


# ---------------------------------------------------------------------------------------------
# the shipped enthalpy table
# ---------------------------------------------------------------------------------------------

RL = GAS_CONSTANT * math.log(10.0)


@pytest.mark.parametrize(
    ("key", "step", "a", "c", "source_word"),
    [
        # pKa = A/T + B + C T published equations (REFERENCE-VALUES.md; status in the CSV)
        (ACETIC, 1, 1170.48, 0.013399, "Harned & Ehlers"),
        ("BDAGIHXWWSANSR-UHFFFAOYSA-N", 1, 1342.85, 0.015168, "Harned & Owen"),
        ("QGZKDVFQNNGYKY-UHFFFAOYSA-N", 1, 2835.76, 0.001225, "Bates & Pinching"),
        ("NBIIXXVUZAFLBC-UHFFFAOYSA-N", 2, 2073.0, 0.020912, "Bates & Acree"),
        ("BVKZGUZCCUSVTD-UHFFFAOYSA-N", 1, 3404.71, 0.032786, "Harned & Davis"),
        ("BVKZGUZCCUSVTD-UHFFFAOYSA-N", 2, 2902.39, 0.02379, "Harned & Scholes"),
    ],
)
def test_enthalpy_rows_follow_their_equations(
    key: str, step: int, a: float, c: float, source_word: str
) -> None:
    row = enthalpy_table()[(key, step)]
    t = 298.15
    assert row.delta_h_j_mol == pytest.approx(RL * (a - c * t * t), abs=0.5)
    assert row.delta_cp_j_mol_k == pytest.approx(-2 * RL * c * t, abs=0.5)
    assert source_word in row.source and row.status.startswith("K")


def test_enthalpy_bis_tris_follows_roy_2014() -> None:
    # Roy et al. 2014: pKa = 921.66/T + 14.0007 - 1.86197 ln T (C)
    row = enthalpy_table()[("OWMVSZAMULFTJU-UHFFFAOYSA-N", 1)]
    assert row.delta_h_j_mol == pytest.approx(RL * (921.66 + 1.86197 * 298.15), abs=0.5)


def test_enthalpy_keys_are_rdkit_inchikeys() -> None:
    from rdkit import Chem

    smiles = {
        "Tris": "NC(CO)(CO)CO", "HEPES": "O=S(=O)(O)CCN1CCN(CCO)CC1", "MES": "O=S(=O)(O)CCN1CCOCC1",
        "MOPS": "O=S(=O)(O)CCCN1CCOCC1", "BIS-TRIS": "OCCN(CCO)C(CO)(CO)CO", "acetic acid": "CC(=O)O",
        "formic acid": "OC=O", "ammonium": "N", "phosphoric acid": "OP(=O)(O)O",
        "carbonic acid": "OC(=O)O",
    }
    for (key, _), row in enthalpy_table().items():
        assert Chem.MolToInchiKey(Chem.MolFromSmiles(smiles[row.name])) == key, row.name
        assert row.status and row.source and row.u_delta_h_j_mol > 0


# ---------------------------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------------------------


def test_cli_lookup_table(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["lookup", "Tris", "--temperature", "37C", "--ionic-strength", "0.15",
                 "--db", str(demo_db)]) == 0
    out = capsys.readouterr().out
    assert "LENZDBCJOHFCAS-UHFFFAOYSA-N" in out and "concentration pKa at 310.15 K" in out
    assert "7.75" in out and "kv-" in out


def test_cli_lookup_json_every_step(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["lookup", "phosphoric acid", "--json", "--db", str(demo_db)]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["step"] for r in rows] == [1, 2, 3]
    assert rows[1]["pka"] == pytest.approx(7.198, abs=2e-3)  # as in NIST46 in PHREEQC minteq.v4.dat


def test_cli_lookup_errors(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["lookup", "124-40-3", "--db", str(demo_db)]) == 2
    assert "dimethylamine" in capsys.readouterr().err
    assert main(["lookup", INJECTIONS[0], "--db", str(demo_db)]) == 2
    assert "no compound" in capsys.readouterr().err


def test_shared_library_reopens_a_replaced_file(tmp_path: Path) -> None:
    db = make_db(tmp_path / "lib.duckdb", [{"compound_id": ACETIC, "name": "acetic acid", "pka": 4.756}])
    first = Library.shared(db)
    assert Library.shared(db) is first
    assert first.pka("acetic acid").pka == pytest.approx(4.756)
    # a rebuild publishes a new file by atomic replace
    new = make_db(tmp_path / "next.duckdb", [{"compound_id": ACETIC, "name": "acetic acid", "pka": 4.8}])
    new.replace(db)
    second = Library.shared(db)
    assert second is not first
    assert second.pka("acetic acid").pka == pytest.approx(4.8)
