"""Kept per-source stage outputs, so an unchanged source is not read or parsed again.

A build keeps what ingest and normalize made of each source (:class:`CachedSource`: its
``sources`` row, its table records and the :class:`~pipeline.normalize.SourcePart`) in
``build/cache/sources/`` beside the output. An entry is found by a key that covers
everything those stages depend on (:func:`source_key`): the descriptor's sha256, each data
file's sha256, the steward's synonyms file, the versions of kaledger, RDKit and
``chemicals`` and a fingerprint of the stage code itself. Any change gives another key, so a
kept entry is either exactly right or not used. The whole-set stages (step inference, rules,
consolidation) always run again on the joined parts.

Frames are stored as Parquet written by DuckDB, with a small JSON file holding the pandas
dtypes so a frame reads back equal to what was written. An entry is written into a temporary
folder and renamed into place, so a killed build leaves either a whole entry or none. Delete
``build/cache/`` to start cold.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import tempfile
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from time import perf_counter

import duckdb
import pandas as pd

from pipeline import identity, ingest, normalize
from pipeline.descriptor import SourceDescriptor
from pipeline.ingest import IngestResult
from pipeline.normalize import NormalizeResult, SourcePart
from pipeline.schemas.tables import SOURCE_FILES

log = logging.getLogger(__name__)

FORMAT = "2"  # bump when the layout of an entry changes
#: Modules whose code shapes a source's ingest and normalize output (their text is hashed).
_STAGE_MODULES = (
    "descriptor.py",
    "ingest.py",
    "normalize.py",
    "parse.py",
    "physchem.py",
    "identity.py",
    "schemas/tables.py",
)
_FRAMES = ("measurements", "rejects", "cell_facts", "resolved")


def code_fingerprint(package_version: str) -> str:
    """sha256 of the stage modules' source text, the package and library versions."""
    root = Path(__file__).resolve().parent
    digest = hashlib.sha256(f"{FORMAT}\x1f{package_version}\x1f{identity.cache_version()}".encode())
    for name in _STAGE_MODULES:
        path = root / name
        if not path.is_file():  # installed layout: schemas/ is pipeline/schemas/
            path = root.parent / name
        digest.update(name.encode() + b"\x1f" + (path.read_bytes() if path.is_file() else b""))
    return digest.hexdigest()


def file_sha256(path: Path) -> str:
    """sha256 of a file's bytes (read in 1 MiB blocks)."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def source_key(source: SourceDescriptor, synonyms_sha256: str | None, code: str) -> str:
    """The key of a source's kept entry: everything its ingest and normalize output depends on.

    Examples
    --------
    The key changes with any input; here only the synonyms hash differs:

    >>> from pipeline.descriptor import load_descriptor
    >>> src = load_descriptor("raw/fernhollow-titrations/source.toml")
    >>> source_key(src, "a", "code") == source_key(src, "b", "code")
    False
    """
    facts = {
        "source_id": source.id,
        "descriptor_sha256": source.sha256,
        "files": [file_sha256(t.file) for t in source.tables],
        "synonyms_sha256": synonyms_sha256,
        "code": code,
    }
    return hashlib.sha256(json.dumps(facts, sort_keys=True).encode()).hexdigest()


@dataclass(frozen=True)
class CachedSource:
    """Ingest and normalize output of one source."""

    source_file: dict  # the source's row of ingest's ``source_files``
    tables: list[dict]  # its rows of ingest's ``tables``
    part: SourcePart


def _write_frame(con: duckdb.DuckDBPyConnection, frame: pd.DataFrame, path: Path) -> dict[str, str]:
    con.register("frame_out", frame)
    target = str(path).replace("'", "''")
    con.execute(f"COPY frame_out TO '{target}' (FORMAT parquet)")
    con.unregister("frame_out")
    return {c: str(t) for c, t in frame.dtypes.items()}


def _shared_texts(values: pd.Series) -> pd.Series:
    """``values`` with one Python string per distinct text, when texts repeat.

    DuckDB hands back a new string object for every row, so a kept part read back took about
    three times the memory of the same part made by normalize (whose parsers share them).
    Mostly distinct columns (ids) are left as they are, judged on their first rows.
    """
    head = values.iloc[:2000]
    if len(head) == 0 or head.nunique() > 0.5 * len(head):
        return values
    codes, texts = pd.factorize(values)
    return pd.Series(pd.Categorical.from_codes(codes, categories=texts), index=values.index).astype(values.dtype)


def _read_frame(con: duckdb.DuckDBPyConnection, path: Path, dtypes: dict[str, str]) -> pd.DataFrame:
    frame = con.execute("SELECT * FROM read_parquet(?)", [str(path)]).df()
    frame = frame[list(dtypes)]
    for column, dtype in dtypes.items():
        values = frame[column]
        if dtype in ("str", "object"):
            values = _shared_texts(values)
        if dtype == "object":  # DuckDB gives text back as str with NaN: restore None
            values = values.astype(object)
            values = values.where(values.notna(), None)
        elif str(values.dtype) != dtype:
            values = values.astype(dtype)
        frame[column] = values
    return frame


def _native(value: object) -> object:
    """numpy scalars to Python numbers for JSON."""
    item = getattr(value, "item", None)
    if callable(item):
        return item()
    raise TypeError(f"cannot keep {type(value).__name__} {value!r} in a stage-cache entry")


class StageCache:
    """Per-source entries under ``folder`` (e.g. ``build/cache/sources``).

    Attributes
    ----------
    hits, misses : int
        Sources served from / not found in the cache since it was opened.
    """

    def __init__(self, folder: Path | str) -> None:
        self.folder = Path(folder)
        self.hits = 0
        self.misses = 0

    def _entry(self, source_id: str, key: str) -> Path:
        return self.folder / f"{source_id}--{key[:32]}"

    def load(self, source_id: str, key: str) -> CachedSource | None:
        """The kept entry for ``(source_id, key)``, or None (missing, partial or unreadable)."""
        entry = self._entry(source_id, key)
        meta_path = entry / "meta.json"
        try:
            meta = json.loads(meta_path.read_text(encoding="utf-8"))
            if meta.get("key") != key or meta.get("format") != FORMAT:
                raise ValueError("key mismatch")
            with duckdb.connect() as con:
                frames = {
                    name: _read_frame(con, entry / f"{name}.parquet", meta["dtypes"][name])
                    for name in _FRAMES
                }
        except (OSError, ValueError, KeyError, duckdb.Error):
            self.misses += 1
            return None
        self.hits += 1
        return CachedSource(meta["source_file"], meta["tables"], SourcePart(**frames))

    def store(self, source_id: str, key: str, cached: CachedSource) -> None:
        """Keep ``cached`` under ``(source_id, key)`` atomically; drop the source's older entries."""
        self.folder.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{source_id}--", dir=self.folder))
        try:
            dtypes = {}
            with duckdb.connect() as con:
                for name in _FRAMES:
                    dtypes[name] = _write_frame(con, getattr(cached.part, name), tmp / f"{name}.parquet")
            meta = {
                "format": FORMAT,
                "key": key,
                "source_file": cached.source_file,
                "tables": cached.tables,
                "dtypes": dtypes,
            }
            (tmp / "meta.json").write_text(json.dumps(meta, default=_native), encoding="utf-8")
            entry = self._entry(source_id, key)
            for old in self.folder.glob(f"{source_id}--*"):
                if old != entry and old.name.rsplit("--", 1)[0] == source_id:
                    shutil.rmtree(old, ignore_errors=True)
            if entry.exists():
                shutil.rmtree(entry)
            os.replace(tmp, entry)
        finally:
            if tmp.exists():
                shutil.rmtree(tmp, ignore_errors=True)


def ingest_and_normalize(
    descriptors: list[SourceDescriptor],
    keys: dict[str, str],
    synonyms: pd.DataFrame | None,
    identity_cache: identity.IdentityCache | None,
    cache: StageCache | None,
    between: Callable[[], None] | None = None,
) -> tuple[IngestResult, NormalizeResult]:
    """Ingest and normalize every source, reusing kept entries of unchanged sources.

    A source whose key (``keys[source.id]``, from :func:`source_key`) has a kept entry is not
    read; the others are ingested, normalized on their own and kept. The parts are joined in
    descriptor order and the whole-set steps run on them (:func:`pipeline.normalize.combine`),
    exactly as :func:`pipeline.normalize.normalize` does, so the result equals a clean build's.
    ``raw_cells`` of the returned ingest result is empty (kept sources have none).
    ``between`` is called after the kept entries are loaded and before the first source is
    read (a build marks its stages there). Sources are read and normalized one at a time, so
    only one source's raw cells are held at once (at 1M rows, reading all first made the raw
    cells 0.7 GiB of the peak); the reading time is logged.
    """
    entries: dict[str, CachedSource] = {}
    todo: list[SourceDescriptor] = []
    for source in descriptors:
        hit = cache.load(source.id, keys[source.id]) if cache is not None else None
        if hit is None:
            todo.append(source)
        else:
            entries[source.id] = hit
    if todo:
        if between is not None:
            between()
        # one writer thread keeps each normalized source while the next is normalized (DuckDB
        # writes the Parquet files on the build's second core); errors surface at result().
        reading = 0.0
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="stage-cache") as writer:
            stored: list[Future[None]] = []
            for source in todo:
                started = perf_counter()
                read = ingest.ingest([source])
                reading += perf_counter() - started
                (source_file,) = json.loads(read.source_files.to_json(orient="records"))
                own_tables = json.loads(read.tables.to_json(orient="records"))
                part = normalize.normalize_rows(read.raw_cells, read.tables, synonyms, identity_cache)
                del read
                entries[source.id] = CachedSource(source_file, own_tables, part)
                if cache is not None:
                    stored.append(writer.submit(cache.store, source.id, keys[source.id], entries[source.id]))
            for done in stored:
                done.result()
        log.info("read %d sources in %.2f s (within normalize)", len(todo), reading)
    elif between is not None:
        between()
    ordered = [entries[s.id] for s in descriptors]
    source_files = SOURCE_FILES.validate(pd.DataFrame([e.source_file for e in ordered]))
    tables_frame = pd.DataFrame([t for e in ordered for t in e.tables])
    result = IngestResult(pd.DataFrame(), source_files, tables_frame)
    return result, normalize.combine([e.part for e in ordered])
