"""Source descriptors: the ``source.toml`` a data steward writes beside each table.

A source is a folder ``raw/<source-id>/`` holding one ``source.toml`` and its data file(s).
This module reads and checks the descriptor only; it does not open the data files.
Every problem is a :class:`DescriptorError` naming the file and the key.
"""

from __future__ import annotations

import hashlib
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

DESCRIPTOR_NAME = "source.toml"

#: Our field names that a ``[columns]`` entry may map to a header of the data file.
FIELDS = (
    "name",
    "cas",
    "smiles",
    "inchi",
    "value",
    "quantity",
    "step",
    "temperature",
    "ionic_strength",
    "medium",
    "method",
    "uncertainty",
    "reference",
    "constant_type",
    "charge",
    "value_alt",  # a second cell giving the same constant as another quantity (e.g. Ka beside pKa)
    "quantity_alt",
)

#: Fields that may take a descriptor-wide default where the table has no column.
DEFAULTABLE = (
    "quantity",
    "temperature",
    "ionic_strength",
    "medium",
    "method",
    "reference",
    "constant_type",
    "step",
    "charge",
    "quantity_alt",
)

SOURCE_KINDS = ("experimental", "critical_review", "compilation", "estimated")
FORMATS = ("csv", "tsv", "xlsx")

_SOURCE_KEYS = {
    "id": True,
    "title": True,
    "citation": True,
    "license": True,
    "url": False,
    "retrieved": False,
    "kind": False,
}
_TABLE_KEYS = {
    "file": True,
    "format": True,
    "encoding": False,
    "sheet": False,
    "skip_rows": False,
    "decimal": False,
    "columns": False,
    "defaults": False,
}
_TOP_KEYS = ("source", "table", "columns", "defaults")
# SPDX short identifiers: letters, digits, '.', '-', '+', optionally joined by AND/OR/WITH.
_SPDX = re.compile(r"^[A-Za-z0-9.+-]+( (AND|OR|WITH) [A-Za-z0-9.+-]+)*$")
_SOURCE_ID = re.compile(r"^[a-z0-9][a-z0-9._-]*$")


class DescriptorError(ValueError):
    """A source descriptor that cannot be used; the message names the file and the key."""

    def __init__(self, path: Path | str, problem: str) -> None:
        self.path = Path(path)
        self.problem = problem
        super().__init__(f"{path}: {problem}")


@dataclass(frozen=True)
class TableSpec:
    """One data table of a source."""

    file: Path  # absolute path of the data file
    relative_file: str  # as written in the descriptor
    format: str
    encoding: str | None
    sheet: str | None
    skip_rows: int
    decimal: str
    columns: dict[str, str]  # our field -> header text in the file
    defaults: dict[str, str]  # our field -> default cell text


@dataclass(frozen=True)
class SourceDescriptor:
    """A checked ``source.toml``."""

    path: Path
    id: str
    title: str
    citation: str
    license: str
    url: str | None
    retrieved: str | None
    kind: str
    tables: tuple[TableSpec, ...]
    sha256: str = field(repr=False)


def _check_keys(path: Path, section: str, got: dict, allowed: dict[str, bool]) -> None:
    unknown = sorted(set(got) - set(allowed))
    if unknown:
        raise DescriptorError(
            path,
            f"unknown key {unknown[0]!r} in [{section}]; valid keys: {', '.join(allowed)}",
        )
    for key, required in allowed.items():
        if required and key not in got:
            raise DescriptorError(path, f"missing required key {key!r} in [{section}]")


def _text(path: Path, section: str, key: str, value: object) -> str:
    if not isinstance(value, str):
        raise DescriptorError(
            path,
            f"key {key!r} in [{section}] must be text, got {type(value).__name__} {value!r}",
        )
    if not value.strip():
        raise DescriptorError(path, f"key {key!r} in [{section}] is empty")
    return value.strip()


def _mapping(path: Path, section: str, got: object, allowed: tuple[str, ...]) -> dict[str, str]:
    if not isinstance(got, dict):
        raise DescriptorError(path, f"[{section}] must be a table of key = \"text\" pairs")
    out: dict[str, str] = {}
    for key, value in got.items():
        if key not in allowed:
            raise DescriptorError(
                path, f"unknown field {key!r} in [{section}]; valid fields: {', '.join(allowed)}"
            )
        if isinstance(value, bool) or not isinstance(value, str | int | float):
            raise DescriptorError(
                path, f"field {key!r} in [{section}] must be text, got {value!r}"
            )
        out[key] = str(value)
    return out


def _table_spec(
    path: Path, section: str, raw: object, columns: dict[str, str], defaults: dict[str, str]
) -> TableSpec:
    if not isinstance(raw, dict):
        raise DescriptorError(path, f"[{section}] must be a table")
    _check_keys(path, section, raw, _TABLE_KEYS)
    folder = path.parent.resolve()
    relative = _text(path, section, "file", raw["file"])
    data_file = (folder / relative).resolve()
    if not data_file.is_relative_to(folder):
        raise DescriptorError(
            path, f"file {relative!r} in [{section}] points outside the source folder {folder}"
        )
    if not data_file.is_file():
        raise DescriptorError(path, f"file {relative!r} named in [{section}] does not exist")
    fmt = _text(path, section, "format", raw["format"]).lower()
    if fmt not in FORMATS:
        raise DescriptorError(
            path, f"format {fmt!r} in [{section}] is not supported; use one of {', '.join(FORMATS)}"
        )
    skip_rows = raw.get("skip_rows", 0)
    if isinstance(skip_rows, bool) or not isinstance(skip_rows, int) or skip_rows < 0:
        raise DescriptorError(
            path, f"skip_rows in [{section}] must be a whole number >= 0, got {skip_rows!r}"
        )
    decimal = raw.get("decimal", ".")
    if decimal not in (".", ","):
        raise DescriptorError(path, f"decimal in [{section}] must be '.' or ',', got {decimal!r}")
    encoding = _text(path, section, "encoding", raw["encoding"]) if "encoding" in raw else None
    if encoding is not None:
        try:
            "".encode(encoding)
        except LookupError:
            raise DescriptorError(
                path, f"encoding {encoding!r} in [{section}] is not a known text encoding"
            ) from None
    sheet = _text(path, section, "sheet", raw["sheet"]) if "sheet" in raw else None
    own_columns = _mapping(path, f"{section}.columns", raw.get("columns", {}), FIELDS)
    own_defaults = _mapping(path, f"{section}.defaults", raw.get("defaults", {}), DEFAULTABLE)
    merged_columns = {**columns, **own_columns}
    if "value" not in merged_columns:
        raise DescriptorError(path, f"[columns] must map the field 'value' for [{section}]")
    if not any(k in merged_columns for k in ("name", "cas", "smiles", "inchi")):
        raise DescriptorError(
            path, "[columns] must map at least one of 'name', 'cas', 'smiles', 'inchi'"
        )
    return TableSpec(
        file=data_file,
        relative_file=relative,
        format=fmt,
        encoding=encoding,
        sheet=sheet,
        skip_rows=skip_rows,
        decimal=decimal,
        columns=merged_columns,
        defaults={**defaults, **own_defaults},
    )


def load_descriptor(path: Path | str) -> SourceDescriptor:
    """Read and check one ``source.toml``.

    Raises
    ------
    DescriptorError
        Unknown or missing keys, keys of the wrong type, a license that is not an SPDX
        identifier, a data file that is missing or outside the source folder.
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise DescriptorError(path, f"cannot be read ({exc.strerror})") from None
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise DescriptorError(path, f"is not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - set(_TOP_KEYS))
    if unknown:
        raise DescriptorError(
            path, f"unknown section [{unknown[0]}]; valid sections: {', '.join(_TOP_KEYS)}"
        )
    if "source" not in doc:
        raise DescriptorError(path, "missing required section [source]")
    if "table" not in doc:
        raise DescriptorError(path, "missing required section [table] (or [[table]])")
    source = doc["source"]
    if not isinstance(source, dict):
        raise DescriptorError(path, "[source] must be a table")
    _check_keys(path, "source", source, _SOURCE_KEYS)
    values = {k: _text(path, "source", k, v) for k, v in source.items()}
    if not _SOURCE_ID.match(values["id"]):
        raise DescriptorError(
            path,
            f"id {values['id']!r} must be lower-case letters, digits, '.', '_' or '-'",
        )
    if values["id"] != path.parent.name:
        raise DescriptorError(
            path, f"id {values['id']!r} must equal the folder name {path.parent.name!r}"
        )
    if not _SPDX.match(values["license"]):
        raise DescriptorError(
            path, f"license {values['license']!r} is not an SPDX identifier (e.g. CC-BY-4.0)"
        )
    kind = values.get("kind", "compilation")
    if kind not in SOURCE_KINDS:
        raise DescriptorError(
            path, f"kind {kind!r} in [source] is not one of {', '.join(SOURCE_KINDS)}"
        )
    columns = _mapping(path, "columns", doc.get("columns", {}), FIELDS)
    defaults = _mapping(path, "defaults", doc.get("defaults", {}), DEFAULTABLE)
    raw_tables = doc["table"] if isinstance(doc["table"], list) else [doc["table"]]
    tables = tuple(
        _table_spec(path, "table" if len(raw_tables) == 1 else f"table {i + 1}", t, columns, defaults)
        for i, t in enumerate(raw_tables)
    )
    files = [t.relative_file for t in tables]
    if len(set(files)) != len(files):
        raise DescriptorError(path, "the same file is listed twice in [[table]]")
    return SourceDescriptor(
        path=path,
        id=values["id"],
        title=values["title"],
        citation=values["citation"],
        license=values["license"],
        url=values.get("url"),
        retrieved=values.get("retrieved"),
        kind=kind,
        tables=tables,
        sha256=hashlib.sha256(data).hexdigest(),
    )


def discover_sources(raw_dir: Path | str) -> list[SourceDescriptor]:
    """Load every ``raw/<source-id>/source.toml``, sorted by source id."""
    raw_dir = Path(raw_dir)
    if not raw_dir.is_dir():
        raise DescriptorError(raw_dir, "is not a folder of sources")
    descriptors = [load_descriptor(p) for p in sorted(raw_dir.glob(f"*/{DESCRIPTOR_NAME}"))]
    if not descriptors:
        raise DescriptorError(raw_dir, f"holds no source folders with a {DESCRIPTOR_NAME}")
    return descriptors
