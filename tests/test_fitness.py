"""Fitness-for-use suite on the demo library, and its failure when a needed constant drifts.

Reference values: IUPAC primary pH standards at 25 °C, Buck et al., Pure Appl. Chem. 74 (2002)
2169: potassium hydrogen phthalate 0.05 mol/kg 4.005 (C), KH2PO4/Na2HPO4 0.025/0.025 mol/kg
6.865 (from memory, M; 6.86 in JIS Z 8802, C), borax 0.01 mol/kg 9.180 (C), NaHCO3/Na2CO3
0.025/0.025 mol/kg 10.012 (C); tolerance 0.02 (see pipeline/fitness.py for why it is honest).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from conftest import DEMO_RAW
from test_library import make_db

from pipeline.build import build
from pipeline.cli import main
from pipeline.fitness import CASES, run_fitness

PUBLISHED = {"phthalate": 4.005, "phosphate": 6.865, "borax": 9.180, "carbonate": 10.012}


def test_cases_carry_the_published_values() -> None:
    by_key = {c.key: c for c in CASES}
    for key, value in PUBLISHED.items():
        assert by_key[key].expected == value
        assert by_key[key].tolerance == 0.02
        assert "Buck et al., Pure Appl. Chem. 74 (2002) 2169" in by_key[key].source
    assert by_key["equivalence"].comparison == "above" and by_key["equivalence"].expected == 7.0


def test_demo_library_is_fit_for_use(demo_db: Path) -> None:
    report = run_fitness(demo_db)
    assert report.ok, "\n".join(report.lines())
    outcomes = {r.case.key: r for r in report.results}
    assert set(outcomes) == {c.key for c in CASES}
    for key, value in PUBLISHED.items():
        got = outcomes[key].got
        assert got is not None and abs(got - value) <= 0.02, key
        assert outcomes[key].outcome == "pass"
    assert outcomes["equivalence"].got is not None and outcomes["equivalence"].got > 7
    # the other activity model is reported beside the case's own
    assert "davies" in outcomes["phthalate"].other_models


def test_cli_check_fitness_passes(demo_db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", "--fitness", "--db", str(demo_db)]) == 0
    out = capsys.readouterr().out
    assert "PASS    phthalate" in out and "all fitness-for-use cases pass" in out


# one edited cell, +0.1 on a constant the case needs (files as in raw/README.md)
EDITS = [
    pytest.param(
        "open-aqueous-acid-constants/oaac-2026.2.tsv", b"\t1\t0\t2.950\t", b"\t1\t0\t3.050\t",
        "phthalate", 4.005, id="phthalic-pK1",
    ),
    pytest.param(
        "fernhollow-titrations/titrations.csv", b",7.200,0.005,", b",7.300,0.005,",
        "phosphate", 6.865, id="phosphoric-pK2",
    ),
]


@pytest.mark.parametrize(("file", "old", "new", "case", "expected"), EDITS)
def test_edited_constant_fails_with_a_readable_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str],
    file: str, old: bytes, new: bytes, case: str, expected: float,
) -> None:
    raw = tmp_path / "raw"
    shutil.copytree(DEMO_RAW, raw)
    path = raw / file
    data = path.read_bytes()
    assert data.count(old) == 1
    path.write_bytes(data.replace(old, new))
    db = tmp_path / "edited.duckdb"
    build(raw, db)

    report = run_fitness(db)
    assert not report.ok
    failed = {r.case.key: r for r in report.failures}
    assert case in failed
    msg = failed[case].message
    assert msg.startswith(f"FAIL {case}:")
    assert f"expected pH {expected:.3f} ± 0.02" in msg and "got " in msg
    assert "Buck et al." in msg  # the source is named
    got = failed[case].got
    assert got is not None and abs(got - expected) > 0.02

    assert main(["check", "--fitness", "--db", str(db)]) == 1
    captured = capsys.readouterr()
    assert f"FAIL    {case}" in captured.out
    assert case in captured.err and "not fit to publish" in captured.err


def test_missing_constants_fail_required_and_skip_optional(tmp_path: Path) -> None:
    db = make_db(tmp_path / "acetic-only.duckdb", [
        {"compound_id": "QTBSBXVTEAMEQO-UHFFFAOYSA-N", "name": "acetic acid", "pka": 4.756},
    ])
    report = run_fitness(db)
    outcome = {r.case.key: r.outcome for r in report.results}
    assert outcome["phthalate"] == "fail" and outcome["phosphate"] == "fail"
    assert outcome["borax"] == "skip" and outcome["carbonate"] == "skip"
    assert outcome["weak-acid"] == "pass" and outcome["equivalence"] == "pass"
    msg = next(r.message for r in report.results if r.case.key == "phthalate")
    assert "needs phthalic acid (XNGIFLGASWRNHJ-UHFFFAOYSA-N)" in msg
