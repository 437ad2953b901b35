"""Normalize: conversions to pKa checked against published values; bad rows to rejects."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from conftest import write_source

from pipeline import lineage
from pipeline.descriptor import load_descriptor
from pipeline.ingest import ingest
from pipeline.normalize import make_value_ids, normalize


def _run(folder: Path):
    read = ingest([load_descriptor(folder / "source.toml")])
    return read, normalize(read.raw_cells, read.tables)


def test_ka_to_pka_arithmetic(raw_dir: Path) -> None:
    # Ka 1.75e-5 -> pKa = -log10(1.75e-5) = 4.75696 (arithmetic); "1.8 × 10⁻⁵" -> 4.74473
    folder = write_source(raw_dir, "t1", "Compound,Value\nacetic acid,1.75e-5\nacetic acid,1.8 × 10⁻⁵\n", quantity="Ka")
    _, out = _run(folder)
    np.testing.assert_allclose(out.measurements["pka"], [4.756962, 4.744727], atol=1e-6)
    assert out.measurements["quantity_reported"].tolist() == ["Ka", "Ka"]
    assert out.measurements["value_reported"].tolist() == ["1.75e-5", "1.8 × 10⁻⁵"]


def test_pkb_to_pka_uses_pkw_at_25c(raw_dir: Path) -> None:
    # ammonia pKb 4.75 at 25 °C -> pKa(NH4+) = pKw - pKb = 13.994 - 4.75 = 9.244
    # (pKw 13.994 at 25 °C, 0.1 MPa: IAPWS R11-24 via iapws; R11-07 gives 13.995)
    folder = write_source(raw_dir, "t1", "Compound,Value\nammonia,4.75\n", quantity="pKb")
    _, out = _run(folder)
    m = out.measurements.iloc[0]
    assert m["pkw_used"] == pytest.approx(13.994, abs=1e-3)
    assert m["pka"] == pytest.approx(9.244, abs=1e-3)
    assert m["compound_id"] == "QGZKDVFQNNGYKY-UHFFFAOYSA-N"  # ammonia, InChI via RDKit
    steps = out.lineage[out.lineage["target_id"] == m["value_id"]]
    assert steps["operation"].tolist()[0] == "read_cell"
    conversion = json.loads(steps[steps["operation"] == "pkb_to_pka"]["parameters"].iloc[0])
    assert conversion["pkw_release"] == "IAPWS R11-24"
    assert conversion["pkw"] == pytest.approx(13.994, abs=1e-3)


def test_protonation_logk_is_pka(raw_dir: Path) -> None:
    # log K for H+ + A- -> HA equals pKa (IUPAC definition of a protonation constant)
    folder = write_source(raw_dir, "t1", "Compound,Value\nformic acid,3.75\n", quantity="logK")
    _, out = _run(folder)
    assert out.measurements["pka"].iloc[0] == pytest.approx(3.75)


def test_molar_ionic_strength_to_molal(raw_dir: Path) -> None:
    # 0.1 mol/L at 25 °C -> 0.1 / 0.997047 = 0.10030 mol/kg (dilute water, IAPWS-95 density)
    text = 'Compound,Value,I,Type\nacetic acid,4.54,0.1 M KCl,concentration\n'
    folder = write_source(raw_dir, "t1", text, extra_columns='ionic_strength = "I"\nconstant_type = "Type"')
    _, out = _run(folder)
    m = out.measurements.iloc[0]
    assert m["ionic_strength_molal"] == pytest.approx(0.1 / 0.997047, rel=1e-5)
    assert m["medium"] == "KCl" and m["constant_type"] == "concentration"


def test_bad_rows_become_rejects_with_reasons(raw_dir: Path) -> None:
    text = (
        "Compound,Value,T\n"
        "acetic acid,4.756,25 °C\n"
        'acetic acid,"4,7,6",25 °C\n'
        "formic acid,,25 °C\n"
        "formic acid,3.75,300 Q\n"
        ",3.75,25 °C\n"
    )
    folder = write_source(raw_dir, "t1", text, extra_columns='temperature = "T"')
    read, out = _run(folder)
    assert len(out.measurements) == 1
    reasons = dict(zip(out.rejects["source_row"], out.rejects["reason"], strict=True))
    assert reasons[3] == "value '4,7,6' is not a number"
    assert reasons[4] == "value is empty"
    assert "unknown unit 'Q'" in reasons[5]
    assert "names no compound" in reasons[6]
    # nothing lost: rows read = measurements + distinct rejected rows
    assert read.source_files["row_count"].iloc[0] == len(out.measurements) + out.rejects["source_row"].nunique()


def test_ka_zero_and_missing_constant_type(raw_dir: Path) -> None:
    text = "Compound,Value,I\nacetic acid,0,0\nacetic acid,1.8e-5,0.1 M\n"
    folder = write_source(raw_dir, "t1", text, quantity="Ka", extra_columns='ionic_strength = "I"')
    _, out = _run(folder)
    assert out.measurements.empty
    assert out.rejects["reason"].tolist() == [
        "Ka '0' must be a positive number",
        "constant type is missing for a value at I > 0: give thermodynamic, concentration or mixed",
    ]


def test_value_ids_stable_and_distinct() -> None:
    import pandas as pd

    a = make_value_ids(pd.Series(["s", "s"]), pd.Series(["f.csv", "f.csv"]), pd.Series([2, 3]))
    b = make_value_ids(pd.Series(["s", "s"]), pd.Series(["f.csv", "f.csv"]), pd.Series([2, 3]))
    assert a.tolist() == b.tolist() and a.nunique() == 2


def test_salt_row_keeps_its_species_and_maps_to_the_parent(raw_dir: Path) -> None:
    # sodium acetate as given: the compound is acetic acid (InChIKey QTBSBXVTEAMEQO-UHFFFAOYSA-N,
    # InChI via RDKit); the species the source named is kept beside it
    folder = write_source(
        raw_dir, "t1", "Compound,SMILES,Value\nsodium acetate,CC(=O)[O-].[Na+],4.76\n",
        extra_columns='smiles = "SMILES"',
    )
    _, out = _run(folder)
    m = out.measurements.iloc[0]
    assert m["compound_id"] == "QTBSBXVTEAMEQO-UHFFFAOYSA-N"
    assert m["species_smiles"] == "CC(=O)[O-].[Na+]"


def test_step_counts_match_the_steps_written(raw_dir: Path) -> None:
    # every optional step once: defaults (quantity, temperature), K -> pK, pKb -> pKa, and
    # mol/L -> mol/kg; the counts consolidate and the manifest use are what publish writes
    folder = write_source(
        raw_dir, "t1",
        "Compound,Value,Q,I,Type\nacetic acid,1.75e-5,Ka,0,\nammonia,4.75,pKb,0.1 mol/L,mixed\nformic acid,3.75,,0,\n",
        extra_columns='quantity = "Q"\nionic_strength = "I"\nconstant_type = "Type"',
        quantity="pKa",
    )
    _, out = _run(folder)
    written = out.lineage.groupby("target_id").size()
    counted = lineage.step_counts(out.cell_facts, out.measurements)
    assert len(counted) == len(out.measurements) == 3
    assert counted.sort_index().to_dict() == written.sort_index().to_dict()
