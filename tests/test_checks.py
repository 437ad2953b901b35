"""Rules of pipeline/checks.py: for each rule one case that must fire and one that must not.

Values and their sources (status words as in the project's reference-value notes):

- acetic acid pKa 4.756, ammonium pKa 9.245, boric acid 9.237, benzoic acid 4.204, oxalic acid
  pK1 1.25 / pK2 4.27, phosphoric acid pK2 7.198 at 25 °C, I = 0: standard compilations, from
  memory.
- pKw(25 °C) = 13.994: IAPWS R11-24 through the iapws package (computed; the 2007 release
  R11-07 gives 13.995).
- Tris: pKa(25 °C) 8.072, ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol) (Goldberg, Kishore & Lennen 2002,
  J. Phys. Chem. Ref. Data 31, 231; confirmed in a code copy).
- Acetic acid 0-50 °C: Harned & Ehlers (1933) equation pKa = 1170.48/T - 3.1649 + 0.013399 T
  (equation from memory).
- Concentration constants: Davies equation (Davies 1962, *Ion Association*, p. 41) with
  A = 0.509 (NEA-TDB rounded value, confirmed): acetic acid 4.542 and phosphate pK2 6.770 at
  I = 0.1 (computed).
- Tolerances and limits (3 normalized residuals, Birge ratio 2, 0.05 pK units): common practice.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
from conftest import write_source
from pipeline.schemas.tables import FINDINGS, MEASUREMENTS

from pipeline import checks, physchem
from pipeline.build import build, load_config
from pipeline.cli import main
from pipeline.descriptor import DescriptorError

T25 = 298.15
PKW_25_R11_24 = 13.994  # IAPWS R11-24 via iapws at 25 °C, 0.1 MPa (computed)


def make_measurements(rows: list[dict]) -> pd.DataFrame:
    """A MEASUREMENTS-valid frame; each row dict overrides the defaults below."""
    base = {
        "compound_id": "X", "step": 1, "step_inferred": False, "pka": 4.756, "pka_uncertainty": np.nan,
        "qualifier": None, "temperature_k": T25, "ionic_strength_molal": 0.0, "medium": "water",
        "solvent": "water", "constant_type": "thermodynamic", "charge": 0, "quantity_reported": "pKa",
        "value_reported": None, "pkw_used": np.nan, "name_reported": None, "cas_reported": None,
        "smiles_reported": None, "method": None, "reference": None, "source_id": "src", "copy_of": None,
        "status": "ok",
    }
    records = []
    for n, row in enumerate(rows, start=1):
        r = {**base, **row}
        r["value_id"] = f"kv-{n:016x}"
        r["source_row"] = n + 1
        if r["value_reported"] is None:
            r["value_reported"] = str(r["pka"])
        records.append(r)
    frame = pd.DataFrame.from_records(records).reindex(columns=list(MEASUREMENTS.columns))
    return MEASUREMENTS.validate(frame)


def fired(frame: pd.DataFrame, name: str, config: dict | None = None) -> list[int]:
    """Source rows (= position + 2) the rule flags."""
    result = checks.RULES[name].function(frame, config or {})
    rows = frame.set_index("value_id").loc[result.value_id, "source_row"]
    assert result.message.str.len().gt(0).all()
    return sorted(int(r) for r in rows)


# --- single-value rules ------------------------------------------------------------------------


def test_physical_bounds_fire_and_pass() -> None:
    m = make_measurements([{"pka": 40.0}, {"pka": 4.756}])  # methane-like 40: common-practice bound 35
    assert fired(m, "pka_physical_bounds") == [2]


def test_water_range_fires_below_h3o_plus() -> None:
    # pKa(H3O+) = -1.74 on the 55.5 mol/L convention (common practice); -2 (sulfuric acid row of the demo)
    m = make_measurements([{"pka": -2.0}, {"pka": 4.756}])
    assert fired(m, "pka_outside_water_range") == [2]


def test_implausible_precision_on_decimals_and_uncertainty() -> None:
    m = make_measurements([
        {"pka": 3.8601234567, "value_reported": "3.8601234567"},
        {"pka": 3.86, "value_reported": "3.86"},
        {"pka": 3.86, "pka_uncertainty": 1e-6},
    ])
    assert fired(m, "implausible_precision") == [2, 4]


def test_implausible_uncertainty_fires_above_one_unit() -> None:
    m = make_measurements([{"pka_uncertainty": 5.0}, {"pka_uncertainty": 0.02}])
    assert fired(m, "implausible_uncertainty") == [2]


def test_non_aqueous_solvent_fires() -> None:
    m = make_measurements([{"solvent": "water-dioxane"}, {"solvent": "water"}])
    assert fired(m, "non_aqueous_solvent") == [2]


def test_bounded_value_fires() -> None:
    m = make_measurements([{"pka": 1.0, "qualifier": "<"}, {"pka": 0.66}])
    assert fired(m, "bounded_value") == [2]


def test_conditions_outside_model_range() -> None:
    m = make_measurements([{"temperature_k": 393.15}, {"ionic_strength_molal": 1.0}, {}])
    assert fired(m, "conditions_outside_model_range") == [2, 3]


def test_polyprotic_order_swapped_oxalic_steps() -> None:
    # oxalic acid pK1 1.25 < pK2 4.27 (from memory); the swapped pair must fire, the right one not
    good = make_measurements([{"step": 1, "pka": 1.25}, {"step": 2, "pka": 4.27, "charge": -1}])
    bad = make_measurements([{"step": 1, "pka": 4.27}, {"step": 2, "pka": 1.25, "charge": -1}])
    assert fired(good, "polyprotic_order") == []
    assert fired(bad, "polyprotic_order") == [3]


# --- Ka·Kb = Kw --------------------------------------------------------------------------------


def _pair(compound: str, pka: float, pkb: float, charge: int) -> list[dict]:
    pkw = float(physchem.pkw(T25))
    return [
        {"compound_id": compound, "pka": pka, "charge": charge},
        {"compound_id": compound, "pka": pkw - pkb, "charge": charge, "quantity_reported": "pKb",
         "value_reported": str(pkb), "pkw_used": pkw, "source_id": "other"},
    ]


def test_pkw_is_iapws_r11_24() -> None:
    assert float(physchem.pkw(T25)) == pytest.approx(PKW_25_R11_24, abs=1e-3)


def test_ka_kb_kw_acetic_acid_and_ammonia_consistent() -> None:
    # acetic acid pKa 4.756 / acetate pKb = pKw - 4.756; ammonium pKa 9.245 / ammonia pKb = pKw - 9.245
    # (pKa values from memory of the standard compilations; pKw IAPWS R11-24 via iapws)
    m = make_measurements(
        _pair("acetic", 4.756, PKW_25_R11_24 - 4.756, 0) + _pair("ammonium", 9.245, PKW_25_R11_24 - 9.245, 1)
    )
    assert fired(m, "ka_kb_kw") == []


def test_ka_kb_kw_fires_on_a_wrong_pkb() -> None:
    # ammonia pKb 4.60 with ammonium pKa 9.245: 9.245 + 4.60 = 13.845, not 13.994 (IAPWS R11-24)
    m = make_measurements(_pair("acetic", 4.756, 9.238, 0) + _pair("ammonium", 9.245, 4.60, 1))
    assert fired(m, "ka_kb_kw") == [5]


# --- temperature series ------------------------------------------------------------------------

TRIS_T = np.array([278.15, 288.15, 298.15, 310.15, 318.15])  # 5, 15, 25, 37, 45 °C


def _tris_series(offset_at_15c: float = 0.0) -> pd.DataFrame:
    # Goldberg et al. 2002: pKa 8.072, ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol), rounded to 3 decimals
    pka = np.round(physchem.van_t_hoff(8.072, T25, TRIS_T, 47450.0, -59.0).value, 3)
    pka[1] += offset_at_15c
    return make_measurements([{"compound_id": "tris", "pka": p, "temperature_k": t, "pka_uncertainty": 0.006,
                               "charge": 1} for t, p in zip(TRIS_T, pka, strict=True)])


def test_van_t_hoff_tris_series_passes() -> None:
    assert fired(_tris_series(), "van_t_hoff_outlier") == []


def test_van_t_hoff_tris_outlier_at_15c_does_not_hide() -> None:
    # the demo's Fernhollow defect: 8.662 where the series gives 8.362 (+0.30); only that row fires
    m = _tris_series(+0.30)
    assert fired(m, "van_t_hoff_outlier") == [3]
    message = checks.RULES["van_t_hoff_outlier"].function(m, {}).message.iloc[0]
    assert "288.15 K" in message and "+0.29" in message  # +0.30 against the true curve


def _acetic_series(offset_at_10c: float = 0.0) -> pd.DataFrame:
    t = np.array([273.15, 283.15, 293.15, 298.15, 303.15, 313.15, 323.15])
    pka = np.round(1170.48 / t - 3.1649 + 0.013399 * t, 3)  # Harned & Ehlers 1933 (equation from memory)
    pka[1] += offset_at_10c
    return make_measurements([{"compound_id": "acetic", "pka": p, "temperature_k": x}
                              for x, p in zip(t, pka, strict=True)])


def test_van_t_hoff_curved_acetic_series_uses_heat_capacity() -> None:
    # acetic acid passes through a minimum near 25 °C: a constant-ΔH° line would not fit it
    assert fired(_acetic_series(), "van_t_hoff_outlier") == []
    assert fired(_acetic_series(+0.10), "van_t_hoff_outlier") == [3]


def test_van_t_hoff_needs_four_temperatures() -> None:
    m = _tris_series(+0.30).iloc[:3].reset_index(drop=True)  # 5, 15, 25 °C only
    assert fired(m, "van_t_hoff_outlier") == []


def test_van_t_hoff_leaves_one_bad_value_at_one_temperature_to_source_disagreement() -> None:
    # three values at 25 °C, one of them wrong: the temperature's median is right, the series fits
    m = pd.concat([_tris_series(), make_measurements([{"compound_id": "tris", "pka": 7.5, "charge": 1},
                                                      {"compound_id": "tris", "pka": 8.07, "charge": 1}])])
    m["value_id"] = [f"kv-{n:016x}" for n in range(len(m))]
    m["source_row"] = np.arange(2, len(m) + 2)
    m = m.reset_index(drop=True)
    assert fired(m, "van_t_hoff_outlier") == []
    assert fired(m, "source_disagreement") == [7]


# --- ionic-strength series ---------------------------------------------------------------------


def _ionic(pkc_acetic: float, pkc_phosphate: float, charge_acetic: int | None = 0) -> pd.DataFrame:
    i_molal = 0.1
    return make_measurements([
        {"compound_id": "acetic", "pka": 4.756},
        {"compound_id": "acetic", "pka": pkc_acetic, "constant_type": "concentration",
         "ionic_strength_molal": i_molal, "charge": charge_acetic, "pka_uncertainty": 0.006},
        {"compound_id": "phosphate", "step": 2, "pka": 7.198, "charge": -1},
        {"compound_id": "phosphate", "step": 2, "pka": pkc_phosphate, "constant_type": "concentration",
         "ionic_strength_molal": i_molal, "charge": -1, "pka_uncertainty": 0.006},
    ])


def test_ionic_strength_consistent_with_davies() -> None:
    # Davies (1962) with A = 0.509: 4.756 -> 4.542, 7.198 -> 6.770 at I = 0.1 (computed)
    assert fired(_ionic(4.542, 6.770), "ionic_strength_inconsistent") == []


def test_ionic_strength_fires_on_a_mislabelled_constant() -> None:
    # a thermodynamic 4.756 labelled as a concentration constant at I = 0.1 is 0.21 off
    assert fired(_ionic(4.756, 6.770), "ionic_strength_inconsistent") == [3]


def test_ionic_strength_skips_rows_without_charge() -> None:
    assert fired(_ionic(4.756, 6.770, charge_acetic=None), "ionic_strength_inconsistent") == []


def test_ionic_strength_unknown_model_lists_choices() -> None:
    with pytest.raises(ValueError, match="davies, extended_debye_huckel"):
        checks.RULES["ionic_strength_inconsistent"].function(_ionic(4.542, 6.770), {"activity_model": "pitzer"})


# --- independent values at the same conditions ------------------------------------------------


def test_source_disagreement_boric_acid_outlier() -> None:
    # boric acid 9.237 (NIST46 in PHREEQC minteq.v4.dat: 9.236), 9.24 ± 0.01, and 9.5 from an old course handout (demo defect C8)
    m = make_measurements([
        {"compound_id": "boric", "pka": 9.237, "source_id": "a"},
        {"compound_id": "boric", "pka": 9.24, "pka_uncertainty": 0.01, "source_id": "b"},
        {"compound_id": "boric", "pka": 9.5, "source_id": "c"},
    ])
    assert fired(m, "source_disagreement") == [4]


def test_source_disagreement_agreeing_benzoic_acid() -> None:
    # benzoic acid 4.204 (from memory), 4.205 ± 0.005, 4.20 ± 0.02
    m = make_measurements([
        {"compound_id": "benzoic", "pka": 4.204},
        {"compound_id": "benzoic", "pka": 4.205, "pka_uncertainty": 0.005},
        {"compound_id": "benzoic", "pka": 4.20, "pka_uncertainty": 0.02},
    ])
    assert fired(m, "source_disagreement") == []


def test_source_disagreement_pair_flags_both_and_copies_count_once() -> None:
    pair = make_measurements([{"pka": 5.23}, {"pka": 4.494}])  # pyridine pKa vs a wrong pKb (demo C1)
    assert fired(pair, "source_disagreement") == [2, 3]
    # the same 9.5 copied from one primary reference into two compilations is still one value
    copies = make_measurements([
        {"pka": 9.237}, {"pka": 9.5, "reference": "Notes 1998"}, {"pka": 9.5, "reference": "notes, 1998"},
    ])
    assert fired(copies, "source_disagreement") == [2, 3]  # now a discordant pair


# --- engine and configuration -----------------------------------------------------------------


def _mixed_bag() -> pd.DataFrame:
    return make_measurements([
        {"pka": 40.0, "compound_id": "methane"},
        {"pka": 4.756, "pka_uncertainty": 5.0},
        {"compound_id": "boric", "pka": 9.237}, {"compound_id": "boric", "pka": 9.24},
        {"compound_id": "boric", "pka": 9.5},
    ])


def test_run_rules_collects_every_rule() -> None:
    found = checks.run_rules(_mixed_bag())
    FINDINGS.validate(found)
    assert {"pka_physical_bounds", "implausible_uncertainty", "source_disagreement"} <= set(found["rule"])


def test_config_switches_a_rule_off_and_sets_a_tolerance() -> None:
    config = {"source_disagreement": {"enabled": False}, "implausible_uncertainty": {"max_uncertainty": 10.0}}
    found = checks.run_rules(_mixed_bag(), config)
    assert "source_disagreement" not in set(found["rule"])
    assert "implausible_uncertainty" not in set(found["rule"])
    assert "pka_physical_bounds" in set(found["rule"])


def test_kaledger_toml_switches_a_rule_off_and_is_recorded(raw_dir: Path, tmp_path: Path) -> None:
    write_source(raw_dir, "t1", "Compound,Value\nmethane,40\nacetic acid,4.756\n")
    on = tmp_path / "on.duckdb"
    build(raw_dir, on)
    assert main(["check", "--db", str(on)]) == 1  # pKa 40 is an error finding
    toml = tmp_path / "kaledger.toml"
    toml.write_text("[rules.pka_physical_bounds]\nenabled = false\n", encoding="utf-8")
    off = tmp_path / "off.duckdb"
    build(raw_dir, off, toml)
    con = duckdb.connect(str(off), read_only=True)
    try:
        rules = {r[0] for r in con.execute("SELECT rule FROM findings").fetchall()}
        (config,) = con.execute("SELECT value FROM build_info WHERE key = 'config'").fetchone()
    finally:
        con.close()
    assert "pka_physical_bounds" not in rules
    assert json.loads(config) == {"rules": {"pka_physical_bounds": {"enabled": False}}}
    assert main(["check", "--db", str(off)]) == 0


def test_unknown_rule_in_config_lists_the_rules(tmp_path: Path) -> None:
    toml = tmp_path / "kaledger.toml"
    toml.write_text("[rules.no_such_rule]\nenabled = false\n", encoding="utf-8")
    with pytest.raises(DescriptorError, match="van_t_hoff_outlier"):
        load_config(toml)


def test_reference_key_reduces_punctuation_and_case() -> None:
    keys = checks.reference_key(pd.Series(["Bates & Acree 1943, J. Res.", "bates acree 1943 j res", None, ""]))
    assert keys.tolist() == ["bates acree 1943 j res", "bates acree 1943 j res", None, None]


# ------------------------------------------------------------------ Ka and pKa in one row


@pytest.mark.parametrize(
    ("ka", "pka", "fires"),
    [
        # -log10(1.75e-5) = 4.757 (arithmetic): agrees with "4.757" and, within rounding, "4.76"
        ("1.75e-5", "4.757", False),
        ("1.8e-5", "4.74", False),  # 4.7447; rounding of 1.8e-5 alone is 0.012 pK
        # chloroacetic acid: Ka 1.36e-3 gives 2.866, not the typed 2.96 (demo row, arithmetic)
        ("1.36e-3", "2.96", True),
    ],
)
def test_ka_and_pka_in_one_row(raw_dir: Path, tmp_path: Path, ka: str, pka: str, fires: bool) -> None:
    write_source(
        raw_dir, "t1", f"Compound,Value,Ka\nacetic acid,{pka},{ka}\n",
        extra_columns='value_alt = "Ka"',
    )
    toml = raw_dir / "t1" / "source.toml"
    toml.write_text(toml.read_text().replace('quantity = "pKa"', 'quantity = "pKa"\nquantity_alt = "Ka"'))
    out = tmp_path / "db.duckdb"
    build(raw_dir, out)
    con = duckdb.connect(str(out), read_only=True)
    try:
        rules = [r[0] for r in con.execute("SELECT rule FROM findings").fetchall()]
    finally:
        con.close()
    assert ("ka_pka_row_mismatch" in rules) is fires


def test_pk_rounding_half_units() -> None:
    # half a unit in the last digit (common practice): "4.76" -> 0.005 pK; Ka "1.8e-5" ->
    # log10(1 + 0.05/1.8) = 0.01190 pK (arithmetic)
    got = checks.pk_rounding(pd.Series(["4.76", "1.8e-5", "0.000177"]), pd.Series(["pKa", "Ka", "Ka"]))
    np.testing.assert_allclose(got, [0.005, np.log10(1 + 0.05 / 1.8), np.log10(1 + 0.005 / 1.77)], rtol=1e-12)
