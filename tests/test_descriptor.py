"""Source descriptors: each broken descriptor fails with the file and the problem named."""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import BASIC_TOML, DEMO_RAW, write_source

from pipeline.descriptor import DescriptorError, discover_sources, load_descriptor


def _toml(**replace: str) -> str:
    text = BASIC_TOML.format(id="t1", quantity="pKa", extra_columns="")
    for old, new in replace.items():
        text = text.replace(old, new)
    return text


def test_demo_descriptors_load() -> None:
    sources = discover_sources(DEMO_RAW)
    assert len(sources) >= 3
    assert all(s.license and s.citation for s in sources)


def test_good_descriptor(raw_dir: Path) -> None:
    folder = write_source(raw_dir, "t1", "Compound,Value\nacetic acid,4.756\n")
    d = load_descriptor(folder / "source.toml")
    assert d.id == "t1" and d.tables[0].columns == {"name": "Compound", "value": "Value"}
    assert d.tables[0].defaults["temperature"] == "25 °C"
    assert len(d.sha256) == 64


@pytest.mark.parametrize(
    ("toml", "message"),
    [
        (_toml(**{'license = "CC0-1.0"\n': ""}), "missing required key 'license' in [source]"),
        (_toml(**{'name = "Compound"': 'name = "Compound"\ncolour = "Red"'}), "unknown field 'colour' in [columns]"),
        (_toml(**{'file = "data.csv"': 'file = "nowhere.csv"'}), "file 'nowhere.csv' named in [table] does not exist"),
        (_toml(**{'file = "data.csv"': 'file = "../outside.csv"'}), "points outside the source folder"),
        (_toml(**{'format = "csv"': "format = 3"}), "must be text, got int 3"),
        (_toml(**{'format = "csv"': 'format = "ods"'}), "format 'ods' in [table] is not supported"),
        (_toml(**{'license = "CC0-1.0"': 'license = "free for all!"'}), "is not an SPDX identifier"),
        (_toml(**{'id = "t1"': 'id = "other"'}), "must equal the folder name 't1'"),
        (_toml(**{'kind = "compilation"': 'kind = "hearsay"'}), "kind 'hearsay' in [source] is not one of"),
        (_toml(**{'[defaults]': '[defaults]\nsmiles = "C"'}), "unknown field 'smiles' in [defaults]"),
        ("[source\n", "is not valid TOML"),
    ],
)
def test_broken_descriptor_names_file_and_problem(raw_dir: Path, toml: str, message: str) -> None:
    (raw_dir.parent / "outside.csv").write_text("Compound,Value\n", encoding="utf-8")
    folder = write_source(raw_dir, "t1", "Compound,Value\nacetic acid,4.756\n", toml=toml)
    with pytest.raises(DescriptorError) as info:
        load_descriptor(folder / "source.toml")
    assert message in str(info.value)
    assert str(folder / "source.toml") in str(info.value)


def test_empty_raw_folder(raw_dir: Path) -> None:
    with pytest.raises(DescriptorError, match="holds no source folders"):
        discover_sources(raw_dir)
