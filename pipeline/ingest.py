"""Stage 1, ingest: read each source table as text, number its rows, hash its files.

Nothing is interpreted here. Every cell of a mapped column is kept as the exact text the file
holds, every data row gets the row number a person sees in the file (the header is row
``skip_rows + 1``), and a row the reader cannot split cleanly is kept with a ``row_error`` so
that normalize turns it into a ``rejects`` row. This is the only stage that reads files.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from charset_normalizer import from_bytes

from pipeline.descriptor import FIELDS, SourceDescriptor, TableSpec
from pipeline.schemas.tables import RAW_CELLS, SOURCE_FILES

# csv refuses a field longer than its limit; we read the field and reject the row instead.
csv.field_size_limit(2**31 - 1)
MAX_CELL_CHARS = 10_000


class IngestError(ValueError):
    """A table that cannot be read at all; the message names the file."""


@dataclass(frozen=True)
class IngestResult:
    raw_cells: pd.DataFrame  # source_id, table_file, source_row, row_error, one column per field
    source_files: pd.DataFrame  # one row per source: metadata, file hashes, rows read
    tables: pd.DataFrame  # one row per table: its file hash, decimal mark, columns, defaults


def _decode(data: bytes, encoding: str | None, path: Path) -> tuple[str, str]:
    """Decode file bytes; return (text, encoding used). A UTF-8 byte-order mark is dropped."""
    if encoding is None:
        if data.startswith(b"\xef\xbb\xbf"):
            encoding = "utf-8-sig"
        else:
            try:
                data.decode("utf-8")
                encoding = "utf-8"
            except UnicodeDecodeError:
                best = from_bytes(data).best()
                if best is None:
                    raise IngestError(
                        f"{path}: is not a text table in any encoding we can detect; "
                        "set 'encoding' in [table] if it is text"
                    ) from None
                encoding = best.encoding
    elif encoding.lower().replace("_", "-") in ("utf-8", "utf8") and data.startswith(
        b"\xef\xbb\xbf"
    ):
        encoding = "utf-8-sig"
    # 'replace' keeps every row: a row holding U+FFFD is rejected by normalize with a reason.
    return data.decode(encoding, errors="replace"), encoding


def _read_delimited(text: str, delimiter: str, skip_rows: int) -> tuple[list[str], list[list[str]], list[int]]:
    """Split delimited text; return header, records and the file line each record starts on."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=False)
    records: list[list[str]] = []
    starts: list[int] = []
    header: list[str] | None = None
    previous_end = 0
    skipped = 0
    for record in reader:
        start = previous_end + 1
        previous_end = reader.line_num
        if skipped < skip_rows:
            skipped += 1
            continue
        if header is None:
            if not any(cell.strip() for cell in record):
                continue  # blank lines before the header
            header = [cell.strip() for cell in record]
            continue
        if not any(cell.strip() for cell in record):
            continue  # blank lines are not data rows
        records.append(record)
        starts.append(start)
    if header is None:
        header = []
    return header, records, starts


def _read_xlsx(path: Path, sheet: str | None, skip_rows: int) -> tuple[list[str], list[list[str]], list[int]]:
    from zipfile import BadZipFile

    from openpyxl import load_workbook
    from openpyxl.utils.exceptions import InvalidFileException

    try:
        book = load_workbook(path, read_only=True, data_only=True)
    except (InvalidFileException, BadZipFile, KeyError, OSError, ValueError) as exc:
        raise IngestError(f"{path}: is not a readable XLSX workbook ({exc})") from None
    try:
        if sheet is not None and sheet not in book.sheetnames:
            raise IngestError(
                f"{path}: sheet {sheet!r} not found; sheets: {', '.join(book.sheetnames)}"
            )
        ws = book[sheet] if sheet is not None else book.worksheets[0]
        header: list[str] | None = None
        records: list[list[str]] = []
        starts: list[int] = []
        for number, row in enumerate(ws.iter_rows(values_only=True), start=1):
            if number <= skip_rows:
                continue
            cells = ["" if v is None else str(v) for v in row]
            if not any(c.strip() for c in cells):
                continue
            if header is None:
                header = [c.strip() for c in cells]
                continue
            records.append(cells)
            starts.append(number)
    finally:
        book.close()
    return header or [], records, starts


def read_table(source: SourceDescriptor, table: TableSpec) -> tuple[pd.DataFrame, dict]:
    """Read one table into raw cells (text) and a record of the file it came from."""
    data = table.file.read_bytes()
    digest = hashlib.sha256(data).hexdigest()
    encoding_used = None
    if table.format == "xlsx":
        header, records, starts = _read_xlsx(table.file, table.sheet, table.skip_rows)
    else:
        if b"\x00" in data[:4096] and not data.startswith((b"\xff\xfe", b"\xfe\xff")):
            raise IngestError(
                f"{table.file}: holds binary data (NUL bytes), not a {table.format.upper()} table"
            )
        text, encoding_used = _decode(data, table.encoding, table.file)
        header, records, starts = _read_delimited(
            text, "\t" if table.format == "tsv" else ",", table.skip_rows
        )
    if not header and data.strip():
        raise IngestError(f"{table.file}: no header row found")
    missing = [h for f, h in table.columns.items() if h not in header]
    if missing:
        raise IngestError(
            f"{table.file}: column {missing[0]!r} named in [columns] is not in the header; "
            f"the header has: {', '.join(repr(h) for h in header)}"
        )
    position = {h: i for i, h in enumerate(header)}
    width = len(header)
    row_error: list[str | None] = []
    for record in records:
        # trailing empty cells are harmless; missing or extra filled cells are not
        if len(record) < width or any(c.strip() for c in record[width:]):
            row_error.append(f"row has {len(record)} cells but the header has {width}")
        elif any(len(c) > MAX_CELL_CHARS for c in record):
            row_error.append(f"a cell is longer than {MAX_CELL_CHARS} characters")
        elif any("\ufffd" in c for c in record):
            row_error.append(
                f"row holds bytes that are not valid {encoding_used}; set 'encoding' in [table]"
            )
        else:
            row_error.append(None)
    frame = pd.DataFrame(
        {
            "source_id": source.id,
            "table_file": table.relative_file,
            "source_row": pd.array(starts, dtype="int64"),
            "row_error": pd.array(row_error, dtype=object),
        }
    )
    for field in FIELDS:
        if field in table.columns:
            i = position[table.columns[field]]
            frame[field] = pd.array(
                [r[i][:MAX_CELL_CHARS] if i < len(r) else None for r in records], dtype=object
            )
        else:
            frame[field] = pd.array([None] * len(records), dtype=object)
    file_record = {
        "source_id": source.id,
        "table_file": table.relative_file,
        "file_sha256": digest,
        "encoding": encoding_used or "xlsx",
        "row_count": len(records),
        "decimal": table.decimal,
        "columns": dict(table.columns),
        "defaults": dict(table.defaults),
    }
    return frame, file_record


def ingest(sources: list[SourceDescriptor]) -> IngestResult:
    """Read every table of every source.

    Returns the raw cells of all tables and one row per source with its metadata, file hashes
    and the number of data rows read (the left side of the accounting invariant).
    """
    frames: list[pd.DataFrame] = []
    rows: list[dict] = []
    table_rows: list[dict] = []
    for source in sources:
        files = []
        for table in source.tables:
            frame, record = read_table(source, table)
            frames.append(frame)
            files.append(record)
            table_rows.append(record)
        rows.append(
            {
                "source_id": source.id,
                "title": source.title,
                "citation": source.citation,
                "license": source.license,
                "url": source.url,
                "retrieved": source.retrieved,
                "kind": source.kind,
                "file": ";".join(f"{source.id}/{f['table_file']}" for f in files),
                # one hash per source: of the table files' hashes in descriptor order
                "file_sha256": files[0]["file_sha256"]
                if len(files) == 1
                else hashlib.sha256("".join(f["file_sha256"] for f in files).encode()).hexdigest(),
                "descriptor_sha256": source.sha256,
                "row_count": sum(f["row_count"] for f in files),
                "encoding": ",".join(f["encoding"] for f in files),
            }
        )
    raw_cells = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
    source_files = pd.DataFrame(rows)
    return IngestResult(
        RAW_CELLS.validate(raw_cells), SOURCE_FILES.validate(source_files), pd.DataFrame(table_rows)
    )
