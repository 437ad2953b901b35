"""Release diff between two builds of copies of the demo raw/.

The new release differs from the old by exactly three edits:
1. one edited row: OAAC line 51, hydrogen peroxide pKa 11.62 -> 11.75;
2. one added row: OAAC line 74 (appended after the last row, so no other row number and hence
   no other value id moves), pivalic acid pKa 5.03 at 25 °C (value from memory);
3. one deleted source: celandine-buffer-datasheet (11 rows, 10 measurements and the rejected
   Tricine row R6, raw/README.md).

Deleting a source removes all its values: the diff must list those 10 value ids under the
removed source, and must also report the recommended values that depended on them. The
Celandine values are Ka at 37 °C (310.15 K); seven 37 °C groups have Celandine as their only
member (ammonia, carbonic acid step 1, phosphoric acid step 2, formic, acetic, MES, MOPS) and
disappear; three (Tris, HEPES, BIS-TRIS at 37 °C) keep one other member, so their value is
revised by less than the threshold. The edited hydrogen peroxide row is that compound's only
value, so its recommended value moves by +0.13; pivalic acid gains a new recommended value.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from conftest import DEMO_RAW, query

from pipeline.build import build
from pipeline.cli import main
from pipeline.diff import diff, format_diff

OAAC = "open-aqueous-acid-constants"
CELANDINE = "celandine-buffer-datasheet"


@pytest.fixture(scope="module")
def builds(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("diff")
    old_raw, new_raw = root / "old" / "raw", root / "new" / "raw"
    shutil.copytree(DEMO_RAW, old_raw)
    shutil.copytree(DEMO_RAW, new_raw)
    table = new_raw / OAAC / "oaac-2026.2.tsv"
    text = table.read_text(encoding="utf-8")
    row = "hydrogen peroxide\t7722-84-1\tOO\t1\t0\t11.62\t"
    assert text.count(row) == 1 and text.endswith("\n")
    text = text.replace(row, row.replace("11.62", "11.75"))
    text += "pivalic acid\t75-98-9\tCC(C)(C)C(=O)O\t1\t0\t5.03\t298.15 K\t0\tdemo row added for the diff test\n"
    table.write_text(text, encoding="utf-8")
    shutil.rmtree(new_raw / CELANDINE)
    old_db, new_db = root / "old" / "kaledger.duckdb", root / "new" / "kaledger.duckdb"
    build(old_raw, old_db)
    build(new_raw, new_db)
    return old_db, new_db


def _rec_of(db: Path, source_id: str, row: int) -> str:
    """The recommendation whose consensus lists the value of ``source_id`` row ``row``."""
    return query(db, f"""
        SELECT l.target_id FROM lineage l, measurements m
        WHERE l.operation = 'consensus' AND m.source_id = '{source_id}' AND m.source_row = {row}
          AND list_contains(json_extract_string(l.inputs, '$[*]'), m.value_id)""")[0][0]


def test_diff_reports_exactly_the_three_edits(builds: tuple[Path, Path]) -> None:
    old, new = builds
    report = diff(old, new)

    assert report["sources"]["added"] == []
    assert [s["source_id"] for s in report["sources"]["removed"]] == [CELANDINE]
    (changed_source,) = report["sources"]["changed"]
    assert changed_source["source_id"] == OAAC and set(changed_source["changes"]) == {"file_sha256"}

    values = report["values"]
    (added,) = values["added"]
    assert (added["source_id"], added["source_row"], added["name_reported"], added["pka"]) == (OAAC, 74, "pivalic acid", 5.03)
    assert values["removed"] == []
    celandine_ids = sorted(v for (v,) in query(old, f"SELECT value_id FROM measurements WHERE source_id = '{CELANDINE}'"))
    assert len(celandine_ids) == 10
    assert values["removed_with_source"] == {CELANDINE: celandine_ids}
    (edited,) = values["changed"]
    assert (edited["source_id"], edited["source_row"]) == (OAAC, 51)
    assert edited["changes"] == {"pka": [11.62, 11.75], "value_reported": ["11.62", "11.75"]}
    assert values["status_changed"] == []

    rec = report["recommended"]
    (moved,) = rec["moved"]
    assert moved["recommendation_id"] == _rec_of(old, OAAC, 51)
    assert moved["delta"] == pytest.approx(0.13, abs=1e-9)
    assert [r["recommendation_id"] for r in rec["added"]] == [_rec_of(new, OAAC, 74)]
    removed = {(r["name"], r["step"]) for r in rec["removed"]}
    assert removed == {("ammonia", 1), ("carbonic acid", 1), ("phosphoric acid", 2), ("formic acid", 1),
                       ("acetic acid", 1), ("MES", 1), ("MOPS", 1)}
    assert {r["temperature_k"] for r in rec["removed"]} == {310.15}
    revised = {r["recommendation_id"]: r for r in rec["revised"]}
    assert {r["name"] for r in revised.values()} == {"Tris", "HEPES", "BIS-TRIS"}  # the name most sources use
    for r in revised.values():
        assert r["changes"]["n_values"] == [2, 1]
        assert abs(r["changes"]["pka"][1] - r["changes"]["pka"][0]) <= 0.02


def test_threshold_decides_moved_or_revised(builds: tuple[Path, Path]) -> None:
    report = diff(*builds, threshold=0.2)
    assert report["recommended"]["moved"] == []
    assert len(report["recommended"]["revised"]) == 4  # the three 37 °C groups and hydrogen peroxide
    with pytest.raises(ValueError, match="threshold -1"):
        diff(*builds, threshold=-1)


def test_a_database_against_itself_has_no_differences(builds: tuple[Path, Path]) -> None:
    report = diff(builds[0], builds[0])
    assert all(not v for v in report["sources"].values())
    assert all(not v for v in report["values"].values())
    assert all(not v for v in report["recommended"].values())


def test_cli_diff_text_and_json(builds: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    old, new = builds
    assert main(["diff", str(old), str(new)]) == 0
    text = capsys.readouterr().out
    assert text == "\n".join(format_diff(diff(old, new))) + "\n"
    assert "values: 1 added, 10 removed (10 with their source), 1 changed" in text
    assert f"- 10 values of removed source {CELANDINE}" in text
    assert "pKa 11.620 -> 11.750 (+0.130)" in text
    assert main(["diff", str(old), str(new), "--json", "--threshold", "0.5"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed["threshold"] == 0.5 and printed["recommended"]["moved"] == []


def test_cli_diff_errors(builds: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["diff", str(builds[0]), str(tmp_path / "missing.duckdb")]) == 2
    assert "missing.duckdb" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["diff", str(builds[0]), str(builds[1]), "--threshold", "-0.1"])
    assert "must be >= 0" in capsys.readouterr().err
