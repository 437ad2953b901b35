"""Equilibrium solver against hand-calculable cases.

Sources: arithmetic (K) for strong acids and bases; the exact quadratic
[H+] = (-Ka + sqrt(Ka² + 4 Ka C))/2 (Harris, Quantitative Chemical Analysis, 8th ed., §9-2);
pKw 13.994 at 25 °C from IAPWS R11-24 (iapws, K); acetic acid pKa 4.756 (Harned & Ehlers 1933,
from memory); Davies 1962 (Ion Association p 41) and the Bates-Guggenheim convention
(IUPAC, Pure Appl. Chem. 56, 567 (1984), C), evaluated by hand in the tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.equilibrium import (
    AcidBase,
    Ion,
    bates_guggenheim_log_gamma,
    exact_weak_acid_ph,
    shortcut_weak_acid_ph,
    solve,
    strong_acid,
    strong_base,
)
from pipeline.physchem import PhysChemRangeError, debye_huckel_a, pkw

ACETIC_PKA = 4.756  # Harned & Ehlers 1933 (from memory; NIST46 in PHREEQC minteq.v4.dat: 4.757)


def test_strong_acid_ideal() -> None:
    # 0.01 mol/kg HCl: pH = -log10(0.01) = 2.00 (arithmetic)
    s = solve(ions=[strong_acid(0.01)], activity_model="ideal")
    assert s.ph == pytest.approx(2.0, abs=1e-6)
    assert s.ionic_strength == pytest.approx(0.01, rel=1e-6)


def test_strong_acid_davies_by_hand() -> None:
    # conventional pH = -log10(γ_H m_H), log γ_H from the Davies equation at I = 0.01 mol/kg
    a = float(debye_huckel_a(298.15))
    i = 0.01
    log_g = -a * (math.sqrt(i) / (1 + math.sqrt(i)) - 0.3 * i)
    s = solve(ions=[strong_acid(0.01)], activity_model="davies")
    assert s.ph == pytest.approx(2.0 - log_g, abs=1e-5)
    assert s.ph_free == pytest.approx(2.0, abs=1e-6)


def test_strong_base_uses_iapws_pkw() -> None:
    # 0.01 mol/kg NaOH, ideal: pH = pKw - 2; pKw(25 °C) = 13.994 (IAPWS R11-24 via iapws)
    s = solve(ions=[strong_base(0.01)], activity_model="ideal")
    assert s.ph == pytest.approx(float(pkw(298.15)) - 2.0, abs=1e-6)
    assert s.pkw == pytest.approx(13.994, abs=1e-3)


@pytest.mark.parametrize("c", [1e-1, 1e-2, 1e-3, 1e-4])
def test_weak_acid_matches_exact_quadratic(c: float) -> None:
    # water's protons are negligible at these C (< 1e-4 relative), so the quadratic is exact
    ka = 10**-ACETIC_PKA
    h = (-ka + math.sqrt(ka * ka + 4 * ka * c)) / 2
    s = solve([AcidBase("acetic acid", (ACETIC_PKA,), c)], activity_model="ideal")
    assert s.ph == pytest.approx(-math.log10(h), abs=2e-5)
    assert exact_weak_acid_ph(ACETIC_PKA, c) == pytest.approx(-math.log10(h), abs=1e-12)


@pytest.mark.parametrize(
    ("c", "flagged"),
    [(1e-1, False), (1e-2, False), (1e-3, True), (1e-4, True)],
)
def test_shortcut_error_flagged_at_low_concentration(c: float, flagged: bool) -> None:
    s = solve([AcidBase("acetic acid", (ACETIC_PKA,), c)], activity_model="ideal")
    assert s.shortcut is not None
    assert s.shortcut.ph_shortcut == pytest.approx(0.5 * (ACETIC_PKA - math.log10(c)))
    assert s.shortcut.flagged is flagged
    assert s.shortcut.error == pytest.approx(shortcut_weak_acid_ph(ACETIC_PKA, c) - s.ph)


def test_no_shortcut_report_for_mixtures() -> None:
    s = solve([AcidBase("acetic acid", (ACETIC_PKA,), 0.1)], [strong_base(0.05)])
    assert s.shortcut is None


def test_weak_acid_at_equivalence_is_basic() -> None:
    # acetic acid 0.1 mol/kg + NaOH 0.1 mol/kg: acetate solution; ideal hand formula
    # pOH = ½(pKb - log10 C), pKb = pKw - pKa (Harris §11-2)
    s = solve([AcidBase("acetic acid", (ACETIC_PKA,), 0.1)], [strong_base(0.1)], activity_model="ideal")
    pkb = float(pkw(298.15)) - ACETIC_PKA
    assert s.ph > 7
    assert s.ph == pytest.approx(float(pkw(298.15)) - 0.5 * (pkb + 1.0), abs=2e-3)
    assert solve([AcidBase("acetic acid", (ACETIC_PKA,), 0.1)], [strong_base(0.1)]).ph > 7


def test_half_neutralized_weak_acid_near_pka() -> None:
    # Henderson-Hasselbalch at C = 0.1: pH ≈ pKa when half the acid is neutralized (ideal)
    s = solve([AcidBase("acetic acid", (ACETIC_PKA,), 0.1)], [strong_base(0.05)], activity_model="ideal")
    assert s.ph == pytest.approx(ACETIC_PKA, abs=1e-3)


def test_polyprotic_balances_and_labels() -> None:
    # phosphate standard composition (Buck et al. 2002): mass, charge and I are consistent
    phos = AcidBase("phosphoric acid", (2.148, 7.198, 12.35), 0.05)
    ions = [Ion("K+", 1, 0.025), Ion("Na+", 1, 0.05)]
    s = solve([phos], ions, activity_model="davies")
    sp = s.species
    forms = sp[sp["system"] == "phosphoric acid"]
    assert forms["species"].tolist() == ["H3A", "H2A-", "HA2-", "A3-"]
    assert forms["molal"].sum() == pytest.approx(0.05, rel=1e-10)
    assert forms["fraction"].sum() == pytest.approx(1.0, rel=1e-12)
    assert float((sp["charge"] * sp["molal"]).sum()) == pytest.approx(0.0, abs=1e-12)
    assert 0.5 * float((sp["charge"] ** 2 * sp["molal"]).sum()) == pytest.approx(s.ionic_strength, rel=1e-8)
    assert 6.8 < s.ph < 6.95


def test_cationic_acid() -> None:
    # ammonium chloride 0.1 mol/kg, pKa 9.245 (Bates & Pinching 1949, from memory), ideal:
    # exact quadratic in the same form as a neutral acid
    s = solve([AcidBase("ammonium", (9.245,), 0.1, z_acid=1)], [Ion("Cl-", -1, 0.1)], activity_model="ideal")
    assert s.ph == pytest.approx(exact_weak_acid_ph(9.245, 0.1), abs=1e-3)


def test_bates_guggenheim_form() -> None:
    # -log γ(Cl-) = A √I / (1 + 1.5 √I) (IUPAC 1984, C); at I = 0.1 with A = 0.509 this is the
    # NEA-TDB D = 0.10917 (REFERENCE-VALUES, K); our A(25 °C) = 0.5098 from IAPWS water
    a = float(debye_huckel_a(298.15))
    assert float(bates_guggenheim_log_gamma(-1, 0.1)) == pytest.approx(-0.10917 * a / 0.509, rel=1e-4)
    with pytest.raises(PhysChemRangeError, match="Bates-Guggenheim"):
        bates_guggenheim_log_gamma(1, 0.2)


def test_temperature_sets_pkw() -> None:
    s = solve(ions=[strong_base(0.001)], temperature_k=310.15, activity_model="ideal")
    assert s.ph == pytest.approx(float(pkw(310.15)) - 3.0, abs=1e-6)


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"activity_model": "pitzer"}, ValueError, "davies, bates_guggenheim, ideal"),
        ({"ions": [Ion("Na+", 1, 0.6)]}, PhysChemRangeError, "ionic_strength"),
    ],
)
def test_solver_errors(kwargs: dict, error: type[Exception], match: str) -> None:
    with pytest.raises(error, match=match):
        solve([AcidBase("acetic acid", (ACETIC_PKA,), 0.01)], **kwargs)


def test_input_validation() -> None:
    with pytest.raises(ValueError, match="total_molal"):
        AcidBase("x", (4.0,), -1.0)
    with pytest.raises(ValueError, match="pka"):
        AcidBase("x", (), 0.1)
    with pytest.raises(ValueError, match="charge"):
        Ion("X", 0, 0.1)


@settings(max_examples=40, deadline=None)
@given(
    pkas=st.lists(st.floats(1.0, 13.0), min_size=1, max_size=3).map(sorted),
    c=st.floats(1e-4, 0.05),
    base=st.floats(0.0, 0.1),
    model=st.sampled_from(["ideal", "davies"]),
)
def test_balances_hold_for_random_solutions(pkas: list[float], c: float, base: float, model: str) -> None:
    s = solve([AcidBase("acid", tuple(pkas), c)], [strong_base(base)], activity_model=model)
    sp = s.species
    assert float((sp["charge"] * sp["molal"]).sum()) == pytest.approx(0.0, abs=1e-10)
    np.testing.assert_allclose(sp.loc[sp["system"] == "acid", "molal"].sum(), c, rtol=1e-9)
    assert 0.0 < s.ph < 14.5
