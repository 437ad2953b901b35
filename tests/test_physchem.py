"""Tests for pipeline.physchem against published values.

Each check names its source and a status word, as in shared/REFERENCE-VALUES.md:
C  confirmed in a retrieved copy of the published text;
Cc confirmed in a public code copy that names the source;
K  computed (iapws or arithmetic from a published equation);
"from memory" recalled, unverified; "common practice" a rule of thumb.
"""

from __future__ import annotations

import math
from importlib import resources

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from iapws._iapws import _Kw
from numpy.testing import assert_allclose

from pipeline import physchem as pc
from pipeline.physchem import PhysChemRangeError

C_TO_K = 273.15

# ---------------------------------------------------------------------------
# water: pKw, density, permittivity
# ---------------------------------------------------------------------------

# IAPWS R11-24 (2024 revision) verification table: T [K], rho [g/cm3], pKw.
# Status Cc (public code copy naming the release) and K (iapws 1.5.5 reproduces it).
R11_24_TABLE = [
    (300.0, 1.0, 13.906672),
    (600.0, 0.07, 20.161651),
    (600.0, 0.7, 11.147093),
    (800.0, 0.2, 14.487671),
    (800.0, 1.2, 6.4058649),
]
# IAPWS R11-07 (2007 release; Bandura & Lvov 2006) values at the same points, Cc.
R11_07_TABLE = [13.906565, 21.048874, 11.203153, 15.089765, 6.438330]


@pytest.mark.parametrize(("t_k", "rho_g_cm3", "expected"), R11_24_TABLE)
def test_pkw_iapws_r11_24_verification_table(t_k: float, rho_g_cm3: float, expected: float) -> None:
    """IAPWS R11-24 verification values (Cc, K), tolerance 1e-6 (table rounding)."""
    got = pc.pkw(t_k, rho_g_cm3 * 1000.0)  # g/cm3 -> kg/m3
    assert_allclose(got, expected, atol=1e-6, rtol=0)


def test_pkw_is_r11_24_not_r11_07() -> None:
    """iapws implements R11-24; at 600 K / 0.07 g/cm3 R11-07 (Cc) differs by ~0.89."""
    got = pc.pkw(600.0, 70.0)
    assert abs(float(got) - R11_07_TABLE[1]) > 0.5
    assert abs(float(got) - R11_24_TABLE[1][2]) < 1e-6


def test_pkw_vectorized_matches_iapws_scalar() -> None:
    """Unique-value evaluation returns exactly what iapws._Kw gives point by point (K)."""
    t = np.array([[300.0, 600.0, 300.0], [800.0, 800.0, 600.0]])
    rho = np.array([[1000.0, 70.0, 1000.0], [200.0, 1200.0, 700.0]])
    expected = np.vectorize(lambda tt, rr: _Kw(rr, tt))(t, rho)
    assert_allclose(pc.pkw(t, rho), expected, rtol=1e-15)


# pKw at 0.101325 MPa, density from IAPWS-95 (K, IAPWS R11-24), rounded to 3 decimals.
PKW_AMBIENT = [
    (0.0, 14.946),
    (25.0, 13.994),
    (50.0, 13.265),
    (100.0, 12.254),  # saturation pressure (0.101418 MPa) at 100 °C
]


@pytest.mark.parametrize(("t_c", "expected"), PKW_AMBIENT)
def test_pkw_ambient_pressure_r11_24(t_c: float, expected: float) -> None:
    """pKw at 0.1 MPa, IAPWS R11-24 computed (K); tolerance 6e-4 (3-decimal rounding)."""
    assert_allclose(pc.pkw(t_c + C_TO_K), expected, atol=6e-4, rtol=0)


def test_pkw_25c_agrees_with_r11_07_and_crc() -> None:
    """R11-07 / CRC Handbook / Marshall & Franck 1981 give 13.995 at 25 °C (C); R11-24 within 2e-3."""
    assert_allclose(pc.pkw(298.15), 13.995, atol=2e-3, rtol=0)


def test_pkw_preserves_shape_and_nan() -> None:
    """NaN stays NaN (missing values), shape preserved; values equal scalar calls (K)."""
    t = np.array([[298.15, np.nan], [310.15, 298.15]])
    got = pc.pkw(t)
    assert got.shape == (2, 2)
    assert np.isnan(got[0, 1])
    assert_allclose(got[1, 1], float(pc.pkw(298.15)), rtol=0, atol=0)
    assert_allclose(got[1, 0], float(pc.pkw(310.15)), rtol=0, atol=0)


def test_water_density_25c_iapws95() -> None:
    """rho(25 °C, 0.1 MPa) = 997.047 kg/m3 (IAPWS-95, K); tolerance 1e-3 kg/m3."""
    assert_allclose(pc.water_density(298.15), 997.047, atol=1e-3, rtol=0)


def test_water_density_saturated_liquid_at_100c() -> None:
    """At 373.15 K and 0.101325 MPa the saturated liquid (958.35 kg/m3, IAPWS-95, K) is used."""
    assert_allclose(pc.water_density(373.15), 958.349, atol=1e-3, rtol=0)


def test_water_density_pressure_argument() -> None:
    """Higher pressure gives denser liquid (IAPWS-95, K: 1017.85 kg/m3 at 300 K, 50 MPa)."""
    assert_allclose(pc.water_density(300.0, 50.0), 1017.846, atol=1e-2, rtol=0)


def test_permittivity_iapws_docstring_value() -> None:
    """_Dielectric(999.242866 kg/m3, 298.15 K) = 78.5907250 (IAPWS R8-97, iapws docstring, Cc)."""
    assert_allclose(pc.relative_permittivity(298.15, 999.242866), 78.5907250, rtol=1e-9)


# ---------------------------------------------------------------------------
# Debye-Hückel constants
# ---------------------------------------------------------------------------

# t [°C], A computed (K: Truesdell & Jones 1974 form, IAPWS R8-97 + IAPWS-95),
# A tabulated by NEA-TDB (C).
DH_A_TABLE = [
    (0.0, 0.4904, 0.491),
    (25.0, 0.5098, 0.509),
    (50.0, 0.5341, 0.534),
    (100.0, 0.5990, 0.600),
]


@pytest.mark.parametrize(("t_c", "computed", "nea_tdb"), DH_A_TABLE)
def test_debye_huckel_a(t_c: float, computed: float, nea_tdb: float) -> None:
    """A(T): computed (K) within 6e-5; NEA-TDB table (C) within 1.1e-3."""
    a = pc.debye_huckel_a(t_c + C_TO_K)
    assert_allclose(a, computed, atol=6e-5, rtol=0)
    assert_allclose(a, nea_tdb, atol=1.1e-3, rtol=0)


def test_debye_huckel_b_25c() -> None:
    """B(25 °C) = 0.3283 Å^-1 kg^1/2 mol^-1/2 (Truesdell & Jones 1974 tabulation, from memory)."""
    assert_allclose(pc.debye_huckel_b(298.15), 0.3283, atol=2e-4, rtol=0)


def test_debye_huckel_a_with_explicit_density_matches_default() -> None:
    """Passing the IAPWS-95 density explicitly reproduces the default path (K)."""
    t = np.array([283.15, 298.15, 333.15])
    assert_allclose(pc.debye_huckel_a(t, pc.water_density(t)), pc.debye_huckel_a(t), rtol=1e-14)


# ---------------------------------------------------------------------------
# activity models
# ---------------------------------------------------------------------------

# Davies 1962 (0.3 coefficient), A = 0.509, I = 0.1 mol/kg: worked values (K).
DAVIES_WORKED = [(1, -0.10702), (2, -0.42808), (-1, -0.10702), (0, 0.0)]


@pytest.mark.parametrize(("z", "expected"), DAVIES_WORKED)
def test_davies_worked_values(z: int, expected: float) -> None:
    """Davies 1962, p 41: log γ at A = 0.509, I = 0.1 (K), tolerance 5e-6."""
    got = pc.log_activity_coefficient(z, 0.1, model="davies", dh_a=0.509)
    assert_allclose(got, expected, atol=5e-6, rtol=0)


def test_davies_1938_coefficient_parameter() -> None:
    """Davies 1938 used 0.2 instead of 0.3: log γ(z=1, A=0.509, I=0.1) = -0.11211 (K)."""
    got = pc.log_activity_coefficient(1, 0.1, dh_a=0.509, davies_coefficient=0.2)
    assert_allclose(got, -0.509 * (math.sqrt(0.1) / (1 + math.sqrt(0.1)) - 0.02), rtol=1e-12)
    assert_allclose(got, -0.11211, atol=5e-6, rtol=0)


def test_extended_dh_bates_guggenheim_convention() -> None:
    """With B·å = 1.5 the extended DH equation is the Bates-Guggenheim convention
    -log γ(Cl-) = A√I/(1 + 1.5√I) (IUPAC, Pure Appl. Chem. 56, 567 (1984), C); I = 0.05."""
    b25 = float(pc.debye_huckel_b(298.15))
    a25 = float(pc.debye_huckel_a(298.15))
    got = pc.log_activity_coefficient(
        -1, 0.05, model="extended_debye_huckel", ion_size_angstrom=1.5 / b25
    )
    assert_allclose(got, -a25 * math.sqrt(0.05) / (1 + 1.5 * math.sqrt(0.05)), rtol=1e-12)


def test_sit_debye_term_at_0_1() -> None:
    """NEA-TDB SIT: D = 0.509√I/(1 + 1.5√I) = 0.10917 at I = 0.1 (C form, K value)."""
    got = pc.log_activity_coefficient(1, 0.1, model="sit", medium="NaCl", epsilon=0.0, dh_a=0.509)
    assert_allclose(got, -0.10917, atol=5e-6, rtol=0)


def test_sit_h_in_naclo4() -> None:
    """NEA-TDB SIT: log γ(H+) in 1 mol/kg NaClO4 = -0.509/2.5 + ε(H+, ClO4-) with
    ε = 0.14 kg/mol (NEA-TDB App. B; as in ThermoChimie v12a sit.dat) -> -0.0636 (K)."""
    got = pc.log_activity_coefficient(
        1, 1.0, model="sit", ion="H+", medium="NaClO4", dh_a=0.509
    )
    assert_allclose(got, -0.509 / 2.5 + 0.14, atol=1e-12, rtol=0)


def test_sit_anion_uses_medium_cation() -> None:
    """SIT pairs an anion with the medium cation: OH- in NaCl uses ε(Na+, OH-) (NEA-TDB form)."""
    got = pc.log_activity_coefficient(-1, 0.5, model="sit", ion="OH-", medium="NaCl", dh_a=0.509)
    d = 0.509 * math.sqrt(0.5) / (1 + 1.5 * math.sqrt(0.5))
    assert_allclose(got, -d + pc.sit_epsilon("Na+", "OH-") * 0.5, atol=1e-12, rtol=0)


def test_sit_charge_mismatch_and_missing_ion() -> None:
    """SIT rejects a charge that contradicts the ion name, and a charged species without ion."""
    with pytest.raises(ValueError, match="does not match ion 'H\\+'"):
        pc.log_activity_coefficient(-1, 0.1, model="sit", ion="H+", medium="NaCl")
    with pytest.raises(ValueError, match="needs the name"):
        pc.log_activity_coefficient(1, 0.1, model="sit", medium="NaCl")
    with pytest.raises(ValueError, match="NaClO4"):
        pc.log_activity_coefficient(1, 0.1, model="sit", ion="H+", medium="seawater")


def test_unknown_model_lists_keys() -> None:
    """An unknown model key raises ValueError listing the valid keys."""
    with pytest.raises(ValueError, match="valid keys: davies, extended_debye_huckel, sit"):
        pc.log_activity_coefficient(1, 0.1, model="pitzer")


def test_bad_model_parameter_is_reported() -> None:
    """A misspelt model parameter raises ValueError naming the accepted ones."""
    with pytest.raises(ValueError, match="ion_size_angstrom"):
        pc.log_activity_coefficient(1, 0.05, model="extended_debye_huckel", ion_size=4.0)


def test_pkw_at_ionic_strength_sign() -> None:
    """Kw_c = Kw/(γ_H γ_OH): pKw_c = pKw + 2 log γ(z=1) < pKw (Davies 1962; K)."""
    lg = float(pc.log_activity_coefficient(1, 0.1))
    assert_allclose(pc.pkw_at_ionic_strength(298.15, 0.1), float(pc.pkw(298.15)) + 2 * lg,
                    rtol=1e-14)
    assert float(pc.pkw_at_ionic_strength(298.15, 0.1)) < float(pc.pkw(298.15))


def test_pkw_at_ionic_strength_literature_magnitude() -> None:
    """pKw_c in 0.1 mol/kg 1:1 salt at 25 °C is about 13.78 (common practice; Davies gives 13.780)."""
    assert_allclose(pc.pkw_at_ionic_strength(298.15, 0.1), 13.78, atol=0.01, rtol=0)


def test_pkw_at_ionic_strength_sit() -> None:
    """SIT pKw_c in NaCl: pKw - 2D + (ε(H+,Cl-) + ε(Na+,OH-)) I (NEA-TDB form; ε 0.12 and 0.04 as in
    ThermoChimie v12a sit.dat)."""
    i = 1.0
    a = float(pc.debye_huckel_a(298.15))
    d = a * math.sqrt(i) / (1 + 1.5 * math.sqrt(i))
    expected = float(pc.pkw(298.15)) - 2 * d + (0.12 + 0.04) * i
    assert_allclose(pc.pkw_at_ionic_strength(298.15, i, model="sit", medium="NaCl"), expected,
                    atol=1e-12, rtol=0)


# ---------------------------------------------------------------------------
# SIT data file
# ---------------------------------------------------------------------------


def test_sit_file_carries_provenance() -> None:
    """The shipped table names its published source (NEA-TDB; Grenthe et al.; Lemire et al.) and
    the ThermoChimie copies (PHREEQC sit.dat files) its values were checked against."""
    text = resources.files("pipeline").joinpath("data/sit_epsilon.csv").read_text("utf-8")
    header = [line for line in text.splitlines() if line.startswith("#")]
    joined = " ".join(header)
    for word in ("NEA-TDB", "Grenthe", "Lemire", "ThermoChimie", "usgs-coupled/phreeqc3", "from memory"):
        assert word in joined
    cols = next(line for line in text.splitlines() if not line.startswith("#"))
    assert cols.split(",") == [
        "species_1", "species_2", "epsilon_kg_mol", "uncertainty_kg_mol",
        "temperature_k", "source", "reference",
    ]


def test_sit_file_checksum() -> None:
    """Checksum of the shipped SIT table: a silent edit of a value breaks this test."""
    rows = pc.sit_coefficients()
    assert len(rows) == 31
    assert_allclose(sum(r.epsilon_kg_mol for r in rows), 0.87, atol=1e-9)
    assert_allclose(sum(r.uncertainty_kg_mol for r in rows), 0.69, atol=1e-9)
    assert all(r.uncertainty_kg_mol >= 0 for r in rows)
    assert all(r.temperature_k == 298.15 for r in rows)
    assert all(r.source.startswith(("checked: ", "from memory")) and r.reference for r in rows)
    # 30 values agree with a ThermoChimie copy (NEA-TDB-derived); Na+/acetate is from memory
    assert sum(r.source.startswith("checked: ") for r in rows) == 30
    assert [r.species_2 for r in rows if r.source.startswith("from memory")] == ["CH3COO-"]
    assert len({frozenset((r.species_1, r.species_2)) for r in rows}) == len(rows)


def test_sit_epsilon_lookup_symmetric_and_unknown() -> None:
    """ε(j,k) = ε(k,j); ε(H+, Cl-) = 0.12 kg/mol (NEA-TDB, as in ThermoChimie v12a sit.dat); unknown
    pair lists pairs."""
    assert pc.sit_epsilon("H+", "Cl-") == pc.sit_epsilon("Cl-", "H+") == 0.12
    with pytest.raises(KeyError, match="tabulated pairs"):
        pc.sit_epsilon("Cs+", "I-")


def test_sit_media_ions_are_tabulated_for_h_and_oh() -> None:
    """Every SIT medium has ε for H+ with its anion; those with Na+/K+/Li+ also for OH-."""
    for cation, anion in pc.SIT_MEDIA.values():
        pc.sit_epsilon("H+", anion)
        if cation in ("Na+", "K+", "Li+"):
            pc.sit_epsilon(cation, "OH-")


# ---------------------------------------------------------------------------
# validity ranges
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("bad_t", [250.0, 373.2, 400.0, math.inf])
def test_temperature_out_of_range_echoes_value(bad_t: float) -> None:
    """Temperatures outside 273.15-373.15 K raise PhysChemRangeError naming value and range."""
    with pytest.raises(PhysChemRangeError, match=r"valid range is \[273.15, 373.15\] K") as err:
        pc.pkw(np.array([298.15, bad_t]))
    assert f"{bad_t:.10g}" in str(err.value)
    for func in (pc.water_density, pc.debye_huckel_a, pc.relative_permittivity):
        with pytest.raises(PhysChemRangeError):
            func(bad_t)


def test_pkw_with_density_range() -> None:
    """With an explicit density IAPWS R11-24 (as implemented by iapws) covers 273.15-1073.15 K."""
    with pytest.raises(PhysChemRangeError, match="1200"):
        pc.pkw(1200.0, 500.0)
    with pytest.raises(PhysChemRangeError, match="1300"):
        pc.pkw(600.0, 1300.0)


@pytest.mark.parametrize(
    ("model", "bad_i"),
    [("davies", -0.1), ("davies", 0.6), ("extended_debye_huckel", 0.2), ("sit", 4.0)],
)
def test_ionic_strength_out_of_model_range(model: str, bad_i: float) -> None:
    """Each model's I range (Davies 0.5, ext. DH 0.1, SIT 3.5 mol/kg) is enforced, value echoed."""
    with pytest.raises(PhysChemRangeError, match=f"{bad_i:g} mol/kg") as err:
        pc.log_activity_coefficient(1, bad_i, model=model, ion="H+", medium="NaCl")
    assert model in str(err.value)


def test_sit_temperature_range() -> None:
    """SIT ε are 25 °C values: use is limited to 273.15-323.15 K."""
    with pytest.raises(PhysChemRangeError, match="323.15"):
        pc.log_activity_coefficient(1, 0.1, 330.0, model="sit", ion="H+", medium="NaCl")


@pytest.mark.parametrize("bad_ka", [0.0, -1e-5, math.inf])
def test_ka_nonpositive_raises(bad_ka: float) -> None:
    """Ka <= 0 (or infinite) has no pKa: PhysChemRangeError echoes the value."""
    with pytest.raises(PhysChemRangeError, match="Ka out of range") as err:
        pc.ka_to_pka([1e-5, bad_ka])
    assert f"{bad_ka:.10g}" in str(err.value)


def test_kb_nonpositive_raises_naming_kb() -> None:
    """kb_to_pka reports a bad Kb as Kb."""
    with pytest.raises(PhysChemRangeError, match="Kb out of range: -2"):
        pc.kb_to_pka(-2.0, 298.15)


def test_range_error_is_value_error() -> None:
    """PhysChemRangeError subclasses ValueError so callers may catch either."""
    assert issubclass(PhysChemRangeError, ValueError)


def test_nan_propagates_through_conversions() -> None:
    """A missing ionic strength or temperature stays missing (NaN), no error."""
    got = pc.pkb_to_pka([4.75, 4.75, 4.75], [298.15, np.nan, 298.15], [0.0, 0.0, np.nan]).value
    assert np.isfinite(got[0]) and np.isnan(got[1]) and np.isnan(got[2])


# ---------------------------------------------------------------------------
# conversions
# ---------------------------------------------------------------------------


def test_ka_pka_basic() -> None:
    """pKa = -log10 Ka (IUPAC Gold Book 'pK'): acetic Ka 1.754e-5 -> 4.756 (K)."""
    assert_allclose(pc.ka_to_pka(1.754e-5), 4.756, atol=1e-3, rtol=0)
    assert_allclose(pc.pka_to_ka(4.756), 1.754e-5, rtol=1e-3)


def test_protonation_logk_is_pka() -> None:
    """H+ + A- ⇌ HA: log K = pKa (definition)."""
    assert_allclose(pc.protonation_logk_to_pka([9.25, 4.76]), [9.25, 4.76], rtol=0)


def test_pkb_to_pka_uses_r11_24_pkw() -> None:
    """pKa + pKb = pKw(T) at I = 0 (Ka Kb = Kw), pKw from IAPWS R11-24 (K)."""
    t = np.array([273.15, 298.15, 323.15])
    conv = pc.pkb_to_pka(np.array([4.7, 4.75, 4.8]), t)
    assert_allclose(conv.value + [4.7, 4.75, 4.8], pc.pkw(t), rtol=1e-14)
    assert conv.parameters["pkw_source"].startswith("IAPWS R11-24")
    assert_allclose(conv.parameters["pkw"], pc.pkw(t), rtol=1e-14)
    assert conv.parameters["activity_model"] == "davies"


def test_pkb_to_pka_ammonia() -> None:
    """Ammonia pKb 4.751 (from memory) -> ammonium pKa 9.243, vs 9.245 (Bates & Pinching 1949, from memory)."""
    assert_allclose(pc.pkb_to_pka(4.751, 298.15).value, 9.245, atol=3e-3, rtol=0)


def test_pkb_to_pka_at_ionic_strength() -> None:
    """At I > 0 concentration constants obey Ka_c Kb_c = Kw_c (Davies 1962 for γ; K)."""
    conv = pc.pkb_to_pka(4.75, 298.15, 0.1)
    assert_allclose(conv.value, pc.pkw_at_ionic_strength(298.15, 0.1) - 4.75, rtol=1e-14)
    for key in ("pkw", "pkw_thermodynamic", "log_gamma_h", "log_gamma_oh", "dh_a"):
        assert key in conv.parameters
    assert_allclose(np.asarray(conv), conv.value)


def test_kb_to_pka() -> None:
    """kb_to_pka(Kb) = pkb_to_pka(-log10 Kb) (K)."""
    assert_allclose(pc.kb_to_pka(1.78e-5, 298.15).value,
                    pc.pkb_to_pka(-math.log10(1.78e-5), 298.15).value, rtol=1e-14)


def test_molal_to_molar_dilute() -> None:
    """0.1 mol/kg -> 0.09970 mol/L at 25 °C, c = b ρ_w (IAPWS-95 density, K)."""
    assert_allclose(pc.molal_to_molar(0.1, 298.15), 0.09970, atol=1e-5, rtol=0)
    assert_allclose(pc.molar_to_molal(0.09970, 298.15), 0.1, atol=1e-5, rtol=0)


def test_molal_to_molar_with_solution_density() -> None:
    """c = b ρ/(1 + b M) (IUPAC Green Book definitions): 1 mol/kg NaCl, ρ = 1036.9 kg/m3
    (from memory), M = 0.05844 kg/mol -> 0.9797 mol/L (K)."""
    got = pc.molal_to_molar(1.0, 298.15, 1036.9, 0.05844)
    assert_allclose(got, 1.0369 / 1.05844, rtol=1e-12)


def test_pka_scale_shift_molal_molar() -> None:
    """pKa_c = pKa_b - log10(ρ_w/(kg/L)) for a 1:1 acid: +0.00128 at 25 °C (derived; IAPWS-95 ρ, K)."""
    shift = pc.pka_molal_to_molar(4.756, 298.15) - 4.756
    assert_allclose(shift, -math.log10(0.997047), atol=1e-6, rtol=0)
    assert_allclose(pc.pka_molar_to_molal(pc.pka_molal_to_molar(4.756, 310.15), 310.15), 4.756,
                    rtol=1e-14)
    # Δn = 0 (no net change in the number of solute particles) leaves pK unchanged
    assert_allclose(pc.pka_molal_to_molar(4.756, 298.15, delta_n=0), 4.756, rtol=0)


# Phosphoric acid pK2 = 7.198 at I = 0 (Bates & Acree 1943, from memory), H2PO4- -> HPO4^2-,
# Davies at 25 °C, I = 0.1 mol/kg (acceptance worked example, K).
PHOSPHATE_CASES = [
    ("concentration", 6.769),
    ("mixed", 6.876),
    ("thermodynamic", 7.198),
]


@pytest.mark.parametrize(("to_type", "expected"), PHOSPHATE_CASES)
def test_convert_constant_type_phosphate(to_type: str, expected: float) -> None:
    """Phosphate pK2 7.198 -> ~6.77 (concentration), ~6.88 (mixed) at I = 0.1 (Davies; K), 1e-3."""
    conv = pc.convert_constant_type(7.198, "thermodynamic", to_type, 0.1, z_acid=-1)
    assert_allclose(conv.value, expected, atol=1e-3, rtol=0)
    assert conv.parameters["to_type"] == to_type
    assert conv.parameters["activity_model"] == "davies"


def test_convert_constant_type_acetic_concentration() -> None:
    """Acetic acid pKa 4.756 (I = 0) -> about 4.54 at I = 0.1 (common practice; Davies gives 4.542)."""
    conv = pc.convert_constant_type(4.756, "thermodynamic", "concentration", 0.1, z_acid=0)
    assert_allclose(conv.value, 4.54, atol=0.01, rtol=0)


@pytest.mark.parametrize("model", ["davies", "extended_debye_huckel"])
def test_convert_constant_type_round_trip(model: str) -> None:
    """thermodynamic -> mixed -> concentration -> thermodynamic returns the input (K)."""
    p = np.array([4.756, 7.198, 9.245])
    z = np.array([0, -1, 1])
    i = np.array([0.05, 0.1, 0.02])
    m = pc.convert_constant_type(p, "thermodynamic", "mixed", i, z, model=model).value
    c = pc.convert_constant_type(m, "mixed", "concentration", i, z, model=model).value
    back = pc.convert_constant_type(c, "concentration", "thermodynamic", i, z, model=model).value
    assert_allclose(back, p, rtol=1e-13)


def test_convert_constant_type_sit() -> None:
    """SIT conversion of acetic acid in NaCl: pK_c = pK + log γ_H + log γ_Ac (NEA-TDB form)."""
    i = 0.5
    conv = pc.convert_constant_type(
        4.756, "thermodynamic", "concentration", i, z_acid=0, model="sit",
        medium="NaCl", base_species="CH3COO-",
    )
    a = float(pc.debye_huckel_a(298.15))
    d = a * math.sqrt(i) / (1 + 1.5 * math.sqrt(i))
    expected = 4.756 + (-d + 0.12 * i) + (-d + 0.08 * i)
    assert_allclose(conv.value, expected, atol=1e-12, rtol=0)


def test_convert_constant_type_unknown_type() -> None:
    """Unknown constant types list the valid choices."""
    with pytest.raises(ValueError, match="thermodynamic, concentration, mixed"):
        pc.convert_constant_type(4.756, "apparent", "concentration", 0.1, 0)


# ---------------------------------------------------------------------------
# temperature transfer
# ---------------------------------------------------------------------------

# Goldberg, Kishore & Lennen 2002, J. Phys. Chem. Ref. Data 31, 231: pKa(25 °C), ΔH°, ΔCp°
# (Cc for Tris; pK C, ΔH Cc for HEPES and MES); 37 °C values computed with the same equation (K).
GOLDBERG_CASES = [
    ("Tris", 8.072, 47450.0, -59.0, 7.753),
    ("HEPES", 7.564, 20400.0, 0.0, 7.424),
    ("MES", 6.270, 14800.0, 0.0, 6.170),
]


@pytest.mark.parametrize(("name", "pka25", "dh", "dcp", "pka37"), GOLDBERG_CASES)
def test_van_t_hoff_goldberg_2002(name: str, pka25: float, dh: float, dcp: float,
                                  pka37: float) -> None:
    """Integrated van 't Hoff (Clarke & Glew 1966) transfers to 37 °C within 3e-3."""
    conv = pc.van_t_hoff(pka25, 298.15, 310.15, dh, dcp)
    assert_allclose(conv.value, pka37, atol=3e-3, rtol=0)
    assert_allclose(conv.parameters["delta_h_j_mol"], dh)
    assert_allclose(conv.parameters["t_ref_k"], 298.15)


def test_tris_dpka_dt() -> None:
    """Tris dpKa/dT ≈ -0.028 K^-1 at 25 °C (Goldberg et al. 2002, Cc; common practice)."""
    assert_allclose(pc.dpka_dt(298.15, 47450.0, -59.0), -0.028, atol=1e-3, rtol=0)


def test_dpka_dt_matches_finite_difference() -> None:
    """dpKa/dT is the derivative of van_t_hoff (K), central difference with h = 1e-3 K."""
    h = 1e-3
    t = 318.15
    fd = (pc.van_t_hoff(8.072, 298.15, t + h, 47450.0, -59.0).value
          - pc.van_t_hoff(8.072, 298.15, t - h, 47450.0, -59.0).value) / (2 * h)
    assert_allclose(pc.dpka_dt(t, 47450.0, -59.0), fd, rtol=1e-6)


def test_van_t_hoff_identity_at_reference() -> None:
    """At T = θ the transfer returns pKa(θ)."""
    assert_allclose(pc.van_t_hoff(7.198, 298.15, 298.15, 4000.0, -200.0).value, 7.198, rtol=0)


def test_bis_tris_roy_2014_through_fit() -> None:
    """BIS-TRIS (Roy et al. 2014, C): pKa = 921.66/T + 14.0007 - 1.86197 ln T gives 6.4828 at
    25 °C and 6.2906 at 37 °C. The equation has the constant-ΔCp form, so a fit of its points
    transfers 25 °C -> 37 °C within 1e-3."""
    t = np.linspace(278.15, 328.15, 11)
    p = 921.66 / t + 14.0007 - 1.86197 * np.log(t)
    fit = pc.fit_van_t_hoff(t, p, with_heat_capacity=True)
    assert_allclose(fit.pka_ref, 6.4828, atol=1e-3, rtol=0)
    p37 = pc.van_t_hoff(fit.pka_ref, 298.15, 310.15, fit.delta_h, fit.delta_cp).value
    assert_allclose(p37, 6.2906, atol=1e-3, rtol=0)
    assert_allclose(fit.residuals, 0.0, atol=1e-10)


def test_fit_recovers_synthetic_tris() -> None:
    """A series generated with ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol) (Goldberg 2002) is recovered."""
    t = np.linspace(278.15, 338.15, 13)
    p = pc.van_t_hoff(8.072, 298.15, t, 47450.0, -59.0).value
    fit = pc.fit_van_t_hoff(t, p, with_heat_capacity=True)
    assert_allclose([fit.pka_ref, fit.delta_h, fit.delta_cp], [8.072, 47450.0, -59.0], rtol=1e-6)
    assert fit.covariance.shape == (3, 3)
    fit2 = pc.fit_van_t_hoff(t, pc.van_t_hoff(8.072, 298.15, t, 47450.0).value)
    assert_allclose(fit2.delta_h, 47450.0, rtol=1e-8)
    assert fit2.delta_cp == 0.0 and fit2.covariance.shape == (2, 2)


def test_fit_weights_and_normalized_residuals() -> None:
    """With weights 1/u² the normalized residuals are residual/u and the covariance is absolute."""
    rng = np.random.default_rng(7)
    t = np.linspace(278.15, 328.15, 9)
    u = np.full(t.shape, 0.002)
    p = pc.van_t_hoff(7.564, 298.15, t, 20400.0).value + rng.normal(0.0, 0.002, t.shape)
    fit = pc.fit_van_t_hoff(t, p, weights=1.0 / u**2)
    assert_allclose(fit.normalized_residuals, fit.residuals / u, rtol=1e-12)
    assert_allclose(fit.delta_h, 20400.0, atol=5 * fit.standard_errors[1])
    assert fit.residuals.shape == t.shape


def test_fit_acetic_harned_ehlers_small_enthalpy() -> None:
    """Acetic acid, Harned & Ehlers 1933 equation pKa = 1170.48/T - 3.1649 + 0.013399 T
    (from memory), 0-60 °C: ΔH°(25 °C) ≈ -0.41 kJ/mol (from memory) and ΔCp° ≈ -153 J/(K mol)
    (K, differentiating the same equation)."""
    t = np.arange(0.0, 61.0, 5.0) + C_TO_K
    p = 1170.48 / t - 3.1649 + 0.013399 * t
    fit = pc.fit_van_t_hoff(t, p, with_heat_capacity=True)
    assert abs(fit.delta_h) < 2000.0
    assert_allclose(fit.delta_h, -410.0, atol=100.0, rtol=0)
    assert_allclose(fit.delta_cp, -2 * pc.GAS_CONSTANT * pc.LN10 * 0.013399 * 298.15,
                    rtol=0.05)
    assert_allclose(fit.pka_ref, 4.756, atol=1e-3, rtol=0)
    assert abs(pc.fit_van_t_hoff(t, p).delta_h) < 2000.0


def test_fit_rejects_bad_input() -> None:
    """Too few points, NaN, bad weights and out-of-range T are refused with ValueError."""
    with pytest.raises(ValueError, match="at least 4"):
        pc.fit_van_t_hoff([290.0, 300.0, 310.0], [1.0, 2.0, 3.0], with_heat_capacity=True)
    with pytest.raises(ValueError, match="NaN"):
        pc.fit_van_t_hoff([290.0, 300.0, np.nan], [1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="weights"):
        pc.fit_van_t_hoff([290.0, 300.0, 310.0], [1.0, 2.0, 3.0], weights=[1.0, 0.0, 1.0])
    with pytest.raises(PhysChemRangeError, match="500"):
        pc.fit_van_t_hoff([290.0, 300.0, 500.0], [1.0, 2.0, 3.0])


# ---------------------------------------------------------------------------
# properties (hypothesis)
# ---------------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1e-30, max_value=1e10, allow_nan=False))
def test_ka_pka_round_trip(ka: float) -> None:
    """Ka -> pKa -> Ka is the identity to 1e-12 relative."""
    assert_allclose(pc.pka_to_ka(pc.ka_to_pka(ka)), ka, rtol=1e-12)


@settings(max_examples=60, deadline=None)
@given(
    c=st.floats(min_value=0.0, max_value=5.0, allow_nan=False),
    t=st.sampled_from([273.15, 288.15, 298.15, 310.15, 353.15, 373.15]),
    mm=st.sampled_from([0.0, 0.05844, 0.1]),
    rho=st.sampled_from([None, 1036.9, 1200.0]),
)
def test_molar_molal_round_trip(c: float, t: float, mm: float, rho: float | None) -> None:
    """molar -> molal -> molar is the identity to 1e-12 relative."""
    b = pc.molar_to_molal(c, t, rho, mm)
    assert_allclose(pc.molal_to_molar(b, t, rho, mm), c, rtol=1e-12, atol=1e-300)


@settings(max_examples=40, deadline=None)
@given(
    t1=st.floats(min_value=273.15, max_value=373.0),
    dt=st.floats(min_value=0.05, max_value=100.0),
)
def test_pkw_decreases_with_temperature(t1: float, dt: float) -> None:
    """pKw at 0.1 MPa decreases monotonically from 0 to 100 °C (IAPWS R11-24)."""
    t2 = min(t1 + dt, 373.15)
    assert float(pc.pkw(t1)) > float(pc.pkw(t2))


# The Davies term √I/(1+√I) - 0.3 I peaks where d/dI = 0, i.e. s(1+s)² = 1/(2·0.3) with
# s = √I: I* ≈ 0.395 mol/kg (K). |log γ| therefore increases with I only up to I*, not up to
# the model's 0.5 mol/kg limit.
DAVIES_TURNING_POINT = 0.395


@settings(max_examples=200, deadline=None)
@given(
    i1=st.floats(min_value=0.0, max_value=DAVIES_TURNING_POINT - 0.01),
    di=st.floats(min_value=1e-4, max_value=0.39),
    z=st.sampled_from([1, 2, 3]),
)
def test_davies_abs_log_gamma_increases_below_turning_point(i1: float, di: float, z: int) -> None:
    """|log γ| (Davies 1962) increases with I below its turning point I* ≈ 0.395 mol/kg."""
    i2 = min(i1 + di, DAVIES_TURNING_POINT - 0.005)
    if i2 <= i1:
        return
    g1, g2 = np.abs(pc.log_activity_coefficient(z, [i1, i2]))
    assert g2 > g1


def test_davies_turning_point_location() -> None:
    """s(1+s)² = 1/0.6 at s = √0.395 (K): |log γ| is larger at 0.395 than at 0.5 mol/kg."""
    s = math.sqrt(DAVIES_TURNING_POINT)
    assert_allclose(s * (1 + s) ** 2, 1 / 0.6, rtol=5e-3)
    g = np.abs(pc.log_activity_coefficient(1, [0.3, DAVIES_TURNING_POINT, 0.5]))
    assert g[1] > g[0] and g[1] > g[2]
