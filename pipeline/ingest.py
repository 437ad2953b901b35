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
import itertools
import operator
import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
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


_LINE_END = re.compile(r"\r\n|\r|\n")  # the line ends the csv module knows


def _split_lines(text: str) -> list[str]:
    """Physical lines of ``text`` without their ends (a final line end opens no new line)."""
    lines = _LINE_END.split(text) if "\r" in text else text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return lines


def _tokenize(rows: Iterable[str], delimiter: str, path: Path) -> list[list[str]]:
    try:
        return list(csv.reader(rows, delimiter=delimiter, strict=False))
    except csv.Error as exc:  # e.g. a NUL byte beyond the first 4 KiB
        raise IngestError(f"{path}: cannot be split into {delimiter!r}-separated cells ({exc})") from None


def _is_blank(record: list[str]) -> bool:
    return not any(cell.strip() for cell in record)


@dataclass(frozen=True)
class _Rows:
    """The data rows of one table split into cells, in file order.

    A *plain* row (no quote character, one cell per header column, no long line, no U+FFFD)
    cannot carry a row error and splits exactly as the ``csv`` reader would split it, so all
    plain rows are cut out of the text by one ``str.split`` into a grid of cells. Only the
    other rows are kept as ``csv`` records, one list each, and checked one by one.
    """

    header: list[str]
    starts: np.ndarray  # the file line (sheet row) each data row starts on
    plain: np.ndarray  # bool per data row: its cells are a row of plain_cells
    plain_cells: np.ndarray  # object array (plain rows, header width)
    other_records: list[list[str]]  # the cells of the rows that are not plain
    other_sizes: np.ndarray  # per other record, an upper bound of its longest cell [characters]
    open_row: int | None = None  # line of a quoted cell that is never closed (last row)

    @classmethod
    def from_records(
        cls, header: list[str], records: list[list[str]], starts: np.ndarray, sizes: np.ndarray,
        open_row: int | None = None,
    ) -> _Rows:
        """Rows that are all kept as records (a workbook, a cell spanning lines)."""
        return cls(
            header, starts, np.zeros(len(records), dtype=bool),
            np.empty((0, len(header)), dtype=object), records, sizes, open_row,
        )


_NO_ROWS = _Rows.from_records([], [], np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64))


def _each(function: Callable[..., object], lines: list[str], dtype: type, *args: object) -> np.ndarray:
    """``function(line, *args)`` for every line as an array, looped in C by ``map``."""
    arguments = [itertools.repeat(a) for a in args]
    return np.fromiter(map(function, lines, *arguments), dtype=dtype, count=len(lines))


def _read_delimited(text: str, delimiter: str, skip_rows: int, path: Path = Path("<text>")) -> _Rows:
    """Split delimited text into a header and data rows numbered by the file line they start on.

    When no quoted cell spans a line end, record ``i`` is physical line ``i + 1``: the lines
    holding a quote character are tokenized by the ``csv`` module (one C call) and the others
    are split on the delimiter, which is all the ``csv`` reader does with a line without
    quotes. Otherwise the text is read as one stream by :func:`_read_delimited_stream`.
    """
    lines = _split_lines(text)
    n_lines = len(lines)
    has_quote = _each(operator.contains, lines, bool, '"')
    quoted = np.flatnonzero(has_quote)
    quoted_records = _tokenize([lines[i] for i in quoted], delimiter, path)
    # one record per quoted line, unless a quote is still open at the end of a line (the
    # lenient reader then reads on into the next line); the file's last line may stay open
    if len(quoted_records) != len(quoted) or (
        len(quoted) and quoted[-1] != n_lines - 1 and _ends_inside_quotes(lines[quoted[-1]], delimiter)
    ):
        return _read_delimited_stream(text, lines, delimiter, skip_rows, path)
    quoted_rank = np.cumsum(has_quote) - 1  # line -> its record in quoted_records

    def record(line: int) -> list[str]:
        return quoted_records[quoted_rank[line]] if has_quote[line] else lines[line].split(delimiter)

    # which lines can be blank is cheap to tell: a line without quotes only if its first and
    # last characters are delimiters or white space, a quoted line only if its first cell is
    def blank_or_delimiter(chars: np.ndarray) -> np.ndarray:
        return (chars == "") | (chars == delimiter) | _each(str.isspace, chars.tolist(), bool)

    maybe_blank = blank_or_delimiter(_each(operator.getitem, lines, object, slice(0, 1)))
    candidates = np.flatnonzero(maybe_blank)
    last_chars = _each(operator.getitem, [lines[i] for i in candidates], object, slice(-1, None))
    maybe_blank[candidates] = blank_or_delimiter(last_chars)
    maybe_blank[quoted] = [not (r and r[0].strip()) for r in quoted_records]
    # a line without quotes is blank when it holds only delimiters and white space: the same
    # as all of its cells being blank
    blank = np.zeros(n_lines, dtype=bool)
    for i in np.flatnonzero(maybe_blank):
        blank[i] = _is_blank(quoted_records[quoted_rank[i]]) if has_quote[i] else (
            not lines[i].replace(delimiter, "").strip()
        )
    # skip_rows counts records above the header, then blank records before it are passed over
    non_blank = np.flatnonzero(~blank[skip_rows:]) + skip_rows
    if not len(non_blank):
        return _NO_ROWS
    header_line = int(non_blank[0])
    header = [cell.strip() for cell in record(header_line)]
    width = len(header)
    data = non_blank[1:]  # blank records are not data rows
    sizes = _each(len, lines, np.int64)
    plain = ~has_quote[data] & (sizes[data] <= MAX_CELL_CHARS)
    plain &= _each(str.count, lines, np.int64, delimiter)[data] == width - 1
    if "\ufffd" in text:
        plain &= ~_each(operator.contains, lines, bool, "\ufffd")[data]
    plain_lines = [lines[i] for i in data[plain]]
    plain_cells = (
        np.array(delimiter.join(plain_lines).split(delimiter), dtype=object).reshape(-1, width)
        if plain_lines
        else np.empty((0, width), dtype=object)
    )
    other = data[~plain]
    open_row = None
    if len(data) and data[-1] == n_lines - 1 and has_quote[-1] and _quote_left_open(lines[-1:], delimiter):
        open_row = n_lines
    return _Rows(
        header, data + 1, plain, plain_cells, [record(i) for i in other], sizes[other], open_row
    )


def _read_delimited_stream(
    text: str, lines: list[str], delimiter: str, skip_rows: int, path: Path
) -> _Rows:
    """Read text in which a quoted cell spans lines as one stream; each record's first line
    is taken from the reader's line counter (same tokenizer, same cells)."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=False)
    records, first = [], []
    previous_end = 0
    try:
        for record in reader:
            records.append(record)
            first.append(previous_end + 1)
            previous_end = reader.line_num
    except csv.Error as exc:
        raise IngestError(
            f"{path}: cannot be split into {delimiter!r}-separated cells ({exc})"
        ) from None
    starts = np.asarray(first, dtype=np.int64)
    sizes = np.fromiter((max(map(len, r), default=0) for r in records), np.int64, len(records))
    open_quote = None  # index of a record whose quoted cell never closes
    if records and _quote_left_open(lines[starts[-1] - 1 :], delimiter):
        open_quote = len(records) - 1
    # skip_rows counts records above the header, then blank records before it are passed over
    position = skip_rows
    while position < len(records) and _is_blank(records[position]):
        position += 1
    if position >= len(records):
        return _NO_ROWS
    header = [cell.strip() for cell in records[position]]
    data, starts, sizes = records[position + 1 :], starts[position + 1 :], sizes[position + 1 :]
    open_row = int(starts[open_quote - position - 1]) if open_quote is not None and open_quote > position else None
    # blank records are not data rows; a blank record has a blank first cell (cheap filter)
    keep = np.ones(len(data), dtype=bool)
    maybe_blank = [i for i, r in enumerate(data) if not (r and r[0].strip())]
    keep[maybe_blank] = [not _is_blank(data[i]) for i in maybe_blank]
    if not keep.all():
        data = [r for r, k in zip(data, keep, strict=True) if k]
        starts, sizes = starts[keep], sizes[keep]
    if open_row is not None and not (len(starts) and starts[-1] == open_row):
        open_row = None  # the open-quote record was blank (or the header) and is no data row
    return _Rows.from_records(header, data, starts, sizes, open_row)


def _ends_inside_quotes(line: str, delimiter: str) -> bool:
    """Whether the lenient reader is still inside a quoted cell at the end of ``line``: it then
    reads the next line into the same record (one record from two lines, not two)."""
    return len(_tokenize([line, ""], delimiter, Path("<line>"))) == 1


def _quote_left_open(tail: list[str], delimiter: str) -> bool:
    """Whether the record spanning ``tail`` (its lines to the end of the file) ends inside a
    quoted cell; the lenient reader accepts that silently, a strict one raises."""
    try:
        list(csv.reader(io.StringIO("\n".join(tail), newline=""), delimiter=delimiter, strict=True))
    except csv.Error as exc:
        return "unexpected end of data" in str(exc)
    return False


def _read_xlsx(path: Path, sheet: str | None, skip_rows: int) -> _Rows:
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
    sizes = np.fromiter((max(map(len, r), default=0) for r in records), np.int64, len(records))
    return _Rows.from_records(header or [], records, np.asarray(starts, dtype=np.int64), sizes)


def _row_errors(
    records: list[list[str]], width: int, sizes: np.ndarray, encoding: str | None,
    replaced: bool,
) -> np.ndarray:
    """Why each record cannot be used (None where it can), checked column-wise.

    Trailing empty cells are harmless; missing or extra filled cells are not. Only the few
    records that can fail a check (wrong length, a long line, a U+FFFD) are looked at one by one.
    """
    n = len(records)
    error = np.full(n, None, dtype=object)
    if n == 0:
        return error
    lengths = np.fromiter(map(len, records), dtype=np.int64, count=n)
    ragged = lengths < width
    for i in np.flatnonzero(lengths > width):
        ragged[i] = any(c.strip() for c in records[i][width:])
    for i in np.flatnonzero(~ragged & (sizes > MAX_CELL_CHARS)):
        if any(len(c) > MAX_CELL_CHARS for c in records[i]):
            error[i] = f"a cell is longer than {MAX_CELL_CHARS} characters"
    if replaced:  # the decoder put U+FFFD somewhere in the text
        for i in np.flatnonzero(~ragged & (error == None)):  # noqa: E711 (element-wise)
            if any("\ufffd" in c for c in records[i]):
                error[i] = (
                    f"row holds bytes that are not valid {encoding}; set 'encoding' in [table]"
                )
    bad = np.flatnonzero(ragged)
    error[bad] = [f"row has {lengths[i]} cells but the header has {width}" for i in bad]
    return error


def _columns(records: list[list[str]], wanted: list[int], sizes: np.ndarray) -> dict[int, np.ndarray]:
    """The cells of columns ``wanted`` (None past a short record's end), cut to
    :data:`MAX_CELL_CHARS`; one C-level transpose instead of a loop over records."""
    if not wanted or not records:
        return {i: np.full(len(records), None, dtype=object) for i in wanted}
    transposed = itertools.islice(itertools.zip_longest(*records), max(wanted) + 1)
    out = {
        i: np.array(column, dtype=object)
        for i, column in enumerate(transposed)
        if i in set(wanted)
    }
    for i in wanted:  # every record ends before this column
        out.setdefault(i, np.full(len(records), None, dtype=object))
    for r in np.flatnonzero(sizes > MAX_CELL_CHARS):  # the few records with a long line
        for column in out.values():
            cell = column[r]
            if cell is not None and len(cell) > MAX_CELL_CHARS:
                column[r] = cell[:MAX_CELL_CHARS]
    return out


def read_table(source: SourceDescriptor, table: TableSpec) -> tuple[pd.DataFrame, dict]:
    """Read one table into raw cells (text) and a record of the file it came from."""
    data = table.file.read_bytes()
    digest = hashlib.sha256(data).hexdigest()
    encoding_used = None
    text: str | None = None
    if table.format == "xlsx":
        rows = _read_xlsx(table.file, table.sheet, table.skip_rows)
    else:
        if b"\x00" in data[:4096] and not data.startswith((b"\xff\xfe", b"\xfe\xff")):
            raise IngestError(
                f"{table.file}: holds binary data (NUL bytes), not a {table.format.upper()} table"
            )
        text, encoding_used = _decode(data, table.encoding, table.file)
        if "\x00" in text:
            line = text.count("\n", 0, text.index("\x00")) + 1
            raise IngestError(
                f"{table.file}: holds a NUL character on line {line} (binary data), "
                f"not a {table.format.upper()} table"
            )
        rows = _read_delimited(
            text, "\t" if table.format == "tsv" else ",", table.skip_rows, table.file
        )
    header = rows.header
    if not header:
        what = f"has only blank lines below skip_rows = {table.skip_rows}" if data.strip() else "is empty"
        raise IngestError(
            f"{table.file}: {what}; no header row found (expected a header naming the columns "
            f"{', '.join(repr(h) for h in table.columns.values())})"
        )
    missing = [h for f, h in table.columns.items() if h not in header]
    if missing:
        raise IngestError(
            f"{table.file}: column {missing[0]!r} named in [columns] is not in the header; "
            f"the header has: {', '.join(repr(h) for h in header)}"
        )
    position = {h: i for i, h in enumerate(header)}
    n_rows = len(rows.starts)
    plain = np.flatnonzero(rows.plain)
    other = np.flatnonzero(~rows.plain)
    row_error = np.full(n_rows, None, dtype=object)  # plain rows have none
    row_error[other] = _row_errors(
        rows.other_records, len(header), rows.other_sizes, encoding_used,
        text is not None and "\ufffd" in text,
    )
    if rows.open_row is not None:  # the last record swallowed every line after its opening quote
        row_error[-1] = (
            f"a quoted cell opened on line {rows.open_row} is never closed: it runs to the end of "
            f"the file (line {len(_split_lines(text or ''))}); close the quote"
        )
    wanted = sorted({position[table.columns[f]] for f in FIELDS if f in table.columns})
    other_columns = _columns(rows.other_records, wanted, rows.other_sizes)
    cells: dict[str, np.ndarray] = {}
    for field in FIELDS:
        if field not in table.columns:
            cells[field] = np.full(n_rows, None, dtype=object)
            continue
        index = position[table.columns[field]]
        if not len(other):  # a view: pandas copies it into a text array of its own
            cells[field] = rows.plain_cells[:, index]
        elif not len(plain):
            cells[field] = other_columns[index]
        else:
            cells[field] = np.empty(n_rows, dtype=object)
            cells[field][plain] = rows.plain_cells[:, index]
            cells[field][other] = other_columns[index]
    # pandas infers each text column's dtype here (str when it holds any text); copy=False:
    # the arrays are ours alone, so neither copying nor merging them into blocks is needed
    frame = pd.DataFrame(
        {
            "source_id": source.id,
            "table_file": table.relative_file,
            "source_row": pd.array(rows.starts, dtype="int64"),
            "row_error": row_error,
            **cells,
        },
        copy=False,
    )
    file_record = {
        "source_id": source.id,
        "table_file": table.relative_file,
        "file_sha256": digest,
        "encoding": encoding_used or "xlsx",
        "row_count": n_rows,
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
        RAW_CELLS.validate(raw_cells, inplace=True),
        SOURCE_FILES.validate(source_files, inplace=True),
        pd.DataFrame(table_rows),
    )
