"""Bounded fuzz of ingest + normalize (hypothesis): random bytes and random CSV structures.

Whatever the input, the two stages either refuse the file with an :class:`IngestError` /
:class:`DescriptorError` carrying a message, or return tables that keep DESIGN.md invariant 1
(rows read = measurements + distinct rejected rows). Any other exception is a bug. The example
counts keep the whole file well under a minute on two cores.
"""

from __future__ import annotations

import csv
import io
import shutil
import tempfile
from pathlib import Path

from conftest import write_source
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.descriptor import DescriptorError, load_descriptor
from pipeline.ingest import IngestError, ingest
from pipeline.normalize import normalize

# ingest alone is cheap: many examples; normalize costs ~0.3 s per example (identity lookups)
FUZZ = settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True
)
NORMALIZE_EXAMPLES = 10

# cells that look like what tables hold, mixed with hostile text
CELL = st.one_of(
    st.sampled_from(
        ["", " ", "acetic acid", "phenol", "4.76", "4,76", "1.8e-5", "1.8 × 10⁻⁵", "< 2", "n/a",
         "25 °C", "298.15 K", "0.1 M KCl", "pKa", "Ka", "pKb", "logK", "CC(=O)O", "C1CC(", '"',
         '""', ",", "\n", "\r\n", "\t", "\ufffd", "\x00", "é", "64-19-7", "-1", "1e999", "nan"]
    ),
    st.text(max_size=12),
)


_normalized = {"n": 0}


def _check(folder: Path) -> None:
    """Run ingest (+ normalize on the first few readable examples of a run) on one source
    folder; assert refusal-with-message or no loss."""
    try:
        read = ingest([load_descriptor(folder / "source.toml")])
    except (IngestError, DescriptorError) as exc:
        assert str(exc).strip()
        return
    cells = read.raw_cells
    assert len(cells) == int(read.source_files["row_count"].sum())
    assert cells["source_row"].is_unique and (cells["source_row"] >= 1).all()
    if _normalized["n"] >= NORMALIZE_EXAMPLES or cells.empty:
        return
    _normalized["n"] += 1
    out = normalize(read.raw_cells, read.tables)
    read_rows = int(read.source_files["row_count"].sum())
    rejected = out.rejects.drop_duplicates(["source_id", "source_row"])
    assert read_rows == len(out.measurements) + len(rejected)
    assert out.rejects["reason"].str.len().gt(0).all()


def _source(data: bytes, columns: str = "") -> tuple[Path, Path]:
    root = Path(tempfile.mkdtemp(prefix="kaledger-fuzz-"))
    folder = write_source(root, "fuzz", "", extra_columns=columns)
    (folder / "data.csv").write_bytes(data)
    return root, folder


@FUZZ
@given(st.binary(max_size=600))
def test_random_bytes(data: bytes) -> None:
    _normalized["n"] = 0 if data == b"" else _normalized["n"]  # hypothesis tries b"" first
    root, folder = _source(b"Compound,Value\n" + data)
    try:
        _check(folder)
    finally:
        shutil.rmtree(root)


@FUZZ
@given(
    rows=st.lists(st.lists(CELL, min_size=0, max_size=5), max_size=12),
    quoting=st.sampled_from([csv.QUOTE_MINIMAL, csv.QUOTE_ALL, csv.QUOTE_NONNUMERIC]),
    line_end=st.sampled_from(["\n", "\r\n", "\r"]),
    header_extra=st.lists(st.sampled_from(["T", "I", "SMILES", "Compound", ""]), max_size=3),
    tail=st.sampled_from(["", "\n", '"', "\n\n", ",,"]),
)
def test_random_csv_structures(
    rows: list[list[str]], quoting: int, line_end: str, header_extra: list[str], tail: str
) -> None:
    if not rows:
        _normalized["n"] = 0
    buffer = io.StringIO()
    writer = csv.writer(buffer, quoting=quoting, lineterminator=line_end)
    writer.writerow(["Compound", "Value", *header_extra])
    writer.writerows(rows)
    columns = 'temperature = "T"' if "T" in header_extra else ""
    root, folder = _source((buffer.getvalue() + tail).encode("utf-8"), columns)
    try:
        _check(folder)
    finally:
        shutil.rmtree(root)


@FUZZ
@given(st.text(alphabet=st.sampled_from('ab,"\n\r 4.7'), max_size=80))
def test_random_quote_and_line_end_soup(text: str) -> None:
    if not text:
        _normalized["n"] = 0
    root, folder = _source(("Compound,Value\n" + text).encode("utf-8"))
    try:
        _check(folder)
    finally:
        shutil.rmtree(root)
