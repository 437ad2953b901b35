"""Consolidation: copies, groups, consensus arithmetic, categories, optional reference state.

Check values: the weighted mean, its uncertainty and the Birge ratio (Birge 1932, Phys. Rev.
40, 207) are worked out by hand in the test (arithmetic); acetic acid pKa 4.756, boric acid
9.237 and ammonium 9.245 at 25 °C are from memory of the standard compilations; Tris ΔH°
47.45 kJ/mol, ΔCp° -59 J/(K mol), pKa 8.072 / 7.753 (25 / 37 °C) from Goldberg et al. 2002,
J. Phys. Chem. Ref. Data 31, 231 (confirmed in a code copy; 7.753 computed); the ammonium
series from the Bates & Pinching (1949) equation (from memory); the acetic acid concentration
constant 4.542 at I = 0.1 from the Davies equation with A = 0.509 (computed).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from test_checks import make_measurements

from pipeline.consolidate import consensus, consolidate, mark_copies, transfer_to_reference_state

KINDS = {"lab": "experimental", "comp1": "compilation", "comp2": "compilation", "est": "estimated"}


def _sources() -> pd.DataFrame:
    return pd.DataFrame({"source_id": list(KINDS), "kind": list(KINDS.values())})


def _no_findings() -> pd.DataFrame:
    return pd.DataFrame(columns=["rule", "severity", "value_id", "message"])


def _run(rows: list[dict], findings: pd.DataFrame | None = None, **kwargs: object):
    m = make_measurements(rows)
    return m, consolidate(m, _no_findings() if findings is None else findings, _sources(), **kwargs)


def _members(pka: list[float], u: list[float | None], sources: list[str] | None = None,
             flagged: bool = False) -> pd.DataFrame:
    return pd.DataFrame({"group": 1, "pka": pka, "pka_uncertainty": [np.nan if x is None else x for x in u],
                         "source_id": sources or [f"s{n}" for n in range(len(pka))], "flagged": flagged})


# --- copies ------------------------------------------------------------------------------------


def test_copy_through_two_compilations_points_at_the_experimental_row() -> None:
    ref = "Harned & Ehlers 1933, J. Am. Chem. Soc. 55, 652"
    m = make_measurements([
        {"pka": 4.756, "reference": ref, "source_id": "comp1"},
        {"pka": 4.756, "reference": ref.upper(), "source_id": "lab"},
        {"pka": 4.756, "reference": ref + ".", "source_id": "comp2"},
        {"pka": 4.756, "reference": "another paper", "source_id": "comp2"},
        {"pka": 4.757, "reference": ref, "source_id": "est"},  # another value: not a copy
    ])
    copy_of = mark_copies(m, _sources().set_index("source_id")["kind"])
    original = m.loc[1, "value_id"]
    assert [x if isinstance(x, str) else None for x in copy_of] == [original, None, original, None, None]


def test_copies_count_once_in_the_group() -> None:
    m, result = _run([
        {"pka": 4.756, "reference": "R", "source_id": "comp1"},
        {"pka": 4.756, "reference": "R", "source_id": "comp2"},
        {"pka": 4.757, "pka_uncertainty": 0.004, "source_id": "lab"},
    ])
    assert result.recommended["n_values"].tolist() == [2]
    assert result.measurements["copy_of"].notna().sum() == 1
    assert "recognised_as_copy" in set(result.lineage["operation"])


# --- consensus arithmetic ----------------------------------------------------------------------


def test_weighted_mean_and_birge_ratio_by_hand() -> None:
    # arithmetic: x = 4.752, 4.760, 4.768, u = 0.005 each -> w = 40000 each;
    # mean 4.760; chi2 = 40000 (0.008² + 0 + 0.008²) = 5.12; Birge ratio √(5.12 / 2) = 1.6;
    # internal u = 1/√(120000) = 0.0028868; scaled by the Birge ratio -> 0.0046188
    table, outlier = consensus(_members([4.752, 4.760, 4.768], [0.005] * 3))
    row = table.iloc[0]
    assert row["method"] == "weighted_mean"
    assert row["pka"] == pytest.approx(4.760, abs=1e-12)
    assert row["birge_ratio"] == pytest.approx(1.6, rel=1e-9)
    assert row["pka_uncertainty"] == pytest.approx(1.6 / np.sqrt(120000.0), rel=1e-9)
    assert row["category"] == "Recommended" and not outlier.any()


def test_unequal_weights_by_hand() -> None:
    # arithmetic: 4.756 ± 0.002 (w 250000) and 4.760 ± 0.004 (w 62500): mean 4.7568,
    # chi2 = 250000·0.0008² + 62500·0.0032² = 0.16 + 0.64 = 0.8, Birge √0.8 = 0.8944 (< 1: u not scaled)
    table, _ = consensus(_members([4.756, 4.760], [0.002, 0.004]))
    row = table.iloc[0]
    assert row["pka"] == pytest.approx(4.7568, abs=1e-12)
    assert row["birge_ratio"] == pytest.approx(np.sqrt(0.8), rel=1e-9)
    assert row["pka_uncertainty"] == pytest.approx(1 / np.sqrt(312500.0), rel=1e-9)


def test_gross_outlier_is_left_out_and_flagged() -> None:
    # boric acid 9.237 (NIST46 in PHREEQC minteq.v4.dat: 9.236), 9.24 and 9.235 agree; 9.5 from an old course handout does not
    m, result = _run([
        {"compound_id": "boric", "pka": 9.237, "source_id": "comp1"},
        {"compound_id": "boric", "pka": 9.24, "source_id": "lab"},
        {"compound_id": "boric", "pka": 9.235, "source_id": "est"},
        {"compound_id": "boric", "pka": 9.5, "source_id": "comp2"},
    ])
    rec = result.recommended.iloc[0]
    assert rec["pka"] == pytest.approx(9.237, abs=1e-9) and rec["n_values"] == 3
    assert "1 outlier(s) left out" in rec["reason"]
    outlier_id = m.loc[3, "value_id"]
    found = result.findings
    assert found.loc[found["rule"] == "consensus_outlier", "value_id"].tolist() == [outlier_id]
    assert result.measurements.set_index("value_id").loc[outlier_id, "status"] == "flagged"
    inputs = json.loads(result.lineage.loc[result.lineage["operation"] == "consensus", "inputs"].iloc[0])
    assert outlier_id not in inputs and len(inputs) == 3


def test_median_and_mad_without_uncertainties() -> None:
    # arithmetic: median of 4.20, 4.204, 4.21 is 4.204
    table, _ = consensus(_members([4.20, 4.204, 4.21], [None, 0.005, None]))
    assert table.iloc[0]["method"] == "median_mad" and table.iloc[0]["pka"] == pytest.approx(4.204)


# --- categories --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("pka", "u", "sources", "flagged", "category", "reason"),
    [
        ([4.756], [0.004], ["a"], False, "Tentative", "one measurement only"),
        ([4.756, 4.757], [0.004, 0.004], ["a", "b"], False, "Recommended", "2 sources agree"),
        ([4.756, 4.757], [0.004, 0.004], ["a", "a"], False, "Tentative", "1 sources agree"),
        ([4.756, 4.757], [None, None], ["a", "b"], False, "Tentative", "uncertainties missing"),
        ([4.70, 4.80], [0.004, 0.004], ["a", "b"], False, "Doubtful", "disagree beyond their uncertainties"),
        ([4.756, 4.757], [0.004, 0.004], ["a", "b"], True, "Doubtful", "every member carries a warning"),
    ],
)
def test_category_rules(pka: list[float], u: list[float | None], sources: list[str], flagged: bool,
                        category: str, reason: str) -> None:
    table, _ = consensus(_members(pka, u, sources, flagged))
    assert table.iloc[0]["category"] == category
    assert reason in table.iloc[0]["reason"]


def test_error_findings_keep_a_value_out() -> None:
    m = make_measurements([{"pka": 40.0}, {"pka": 4.756, "compound_id": "Y"}])
    findings = pd.DataFrame({"rule": ["pka_physical_bounds"], "severity": ["error"],
                             "value_id": [m.loc[0, "value_id"]], "message": ["pKa 40"]})
    result = consolidate(m, findings, _sources())
    assert result.measurements["status"].tolist() == ["excluded", "ok"]
    assert result.recommended["compound_id"].tolist() == ["Y"]


# --- reference state ---------------------------------------------------------------------------

TRIS_DH = pd.DataFrame({"compound_id": ["tris"], "step": [1], "delta_h_j_mol": [47450.0],
                        "delta_cp_j_mol_k": [-59.0], "source": ["Goldberg et al. 2002"]})


def _tris_rows() -> list[dict]:
    return [
        {"compound_id": "tris", "pka": 8.072, "pka_uncertainty": 0.003, "charge": 1, "source_id": "comp1"},
        {"compound_id": "tris", "pka": 7.753, "pka_uncertainty": 0.006, "charge": 1, "temperature_k": 310.15,
         "source_id": "lab"},
    ]


def test_default_transfers_nothing() -> None:
    _, plain = _run(_tris_rows())
    assert sorted(plain.recommended["temperature_k"]) == [298.15, 310.15]
    assert "transfer_to_reference_state" not in set(plain.lineage["operation"])


def test_reference_state_with_a_given_enthalpy() -> None:
    m, result = _run(_tris_rows(), reference_state=(298.15, 0.0), enthalpies=TRIS_DH)
    rec = result.recommended
    assert len(rec) == 1 and rec.iloc[0]["n_values"] == 2
    assert rec.iloc[0]["pka"] == pytest.approx(8.072, abs=0.001)
    assert "1 of 2 values carried to 298.15 K" in rec.iloc[0]["reason"]
    steps = result.lineage[result.lineage["target_id"] == rec.iloc[0]["recommendation_id"]]
    assert steps["operation"].tolist() == ["transfer_to_reference_state", "consensus"]
    detail = json.loads(steps.iloc[0]["parameters"])["members"][0]
    assert detail["value_id"] == m.loc[1, "value_id"] and detail["delta_h_j_mol"] == 47450.0
    assert detail["pka_transferred"] == pytest.approx(8.072, abs=0.001)
    # the measurement itself keeps the measured value
    assert result.measurements.loc[1, "pka"] == 7.753


def test_reference_state_without_enthalpy_says_so() -> None:
    _, result = _run(_tris_rows(), reference_state=(298.15, 0.0))
    rec = result.recommended.set_index("temperature_k")
    assert sorted(rec.index) == [298.15, 310.15]
    assert "no ΔH° known" in rec.loc[310.15, "reason"]


def test_reference_state_fits_enthalpy_to_a_series_and_corrects_ionic_strength() -> None:
    # ammonium, Bates & Pinching (1949) equation (from memory) at 15, 25, 35 °C -> 9.245 at 25 °C;
    # acetic acid concentration constant 4.542 at I = 0.1 (Davies, A = 0.509) -> 4.756
    t = np.array([288.15, 298.15, 308.15])
    nh4 = np.round(2835.76 / t - 0.6322 + 0.001225 * t, 3)
    rows = [{"compound_id": "ammonium", "pka": p, "temperature_k": x, "charge": 1} for x, p in zip(t, nh4, strict=True)]
    rows += [{"compound_id": "acetic", "pka": 4.542, "constant_type": "concentration", "ionic_strength_molal": 0.1,
              "charge": 0}]
    _, result = _run(rows, reference_state=(298.15, 0.0))
    rec = result.recommended.set_index("compound_id")
    assert rec.loc["ammonium", "n_values"] == 3
    assert rec.loc["ammonium", "pka"] == pytest.approx(9.245, abs=0.003)
    assert "fitted to 3 temperatures" in rec.loc["ammonium", "reason"]
    assert rec.loc["acetic", "pka"] == pytest.approx(4.756, abs=0.002)
    assert rec.loc["acetic", "constant_type"] == "thermodynamic"


def test_transfer_reports_missing_charge() -> None:
    m = make_measurements([{"pka": 4.542, "constant_type": "concentration", "ionic_strength_molal": 0.1,
                            "charge": None}])
    out = transfer_to_reference_state(m, (298.15, 0.0))
    assert not out["transferred"].iloc[0] and out["note"].iloc[0] == "no charge of the acid form given"


def test_transfer_rejects_a_bad_reference_state() -> None:
    m = make_measurements([{}])
    with pytest.raises(ValueError, match="273.15-373.15"):
        transfer_to_reference_state(m, (400.0, 0.0))
    with pytest.raises(ValueError, match="davies, extended_debye_huckel"):
        transfer_to_reference_state(m, (298.15, 0.0), activity_model="pitzer")
