"""Compound identity: CAS check digits, structure standardization, name resolution, step numbers.

This module knows nothing about source files. It takes pandas Series / DataFrames and returns
DataFrames with the same index. Structures go through RDKit; names and CAS numbers are looked up
in the offline identifier database of the ``chemicals`` package (no network). A steward's
synonym table overrides that database.

Identity of a compound is the standard InChIKey of its *standardized parent*: the as-given
species (salt, hydrate, charged form) is reduced by

1. ``MetalDisconnector`` (covalent metal bonds such as ``O[Na]`` become ion pairs),
2. ``Normalizer`` (RDKit's functional-group normalization rules, e.g. charge-separated nitro),
3. ``LargestFragmentChooser`` (keeps the largest fragment: counter-ions and solvents go),
4. ``Uncharger`` (neutralizes charges by adding or removing H where possible),

all from ``rdkit.Chem.MolStandardize.rdMolStandardize`` [1]_. The InChIKey is computed with
RDKit's bundled InChI library using standard options [2]_. Tautomers are not canonicalized by
RDKit here; the standard InChI layer already treats mobile hydrogen for most acid/base groups.
Stereo and isotopes are kept as given.

Pipeline-facing functions:

* :func:`cas_check_digit_ok`, :func:`cas_is_missing`: CAS Registry Number rule [3]_.
* :func:`standardize_structures`: SMILES / InChI -> parent SMILES, InChIKey, formula.
* :func:`resolve_identities`: name / CAS / SMILES / InChI -> one ``compound_id`` per row.
* :func:`identity_findings`: identity checks as a findings table.
* :func:`infer_steps`: fill missing dissociation-step numbers where unambiguous.
* :class:`IdentityCache`: persistent Parquet cache of RDKit and database results.

References
----------
.. [1] RDKit: Open-source cheminformatics, MolStandardize module (a C++ port of MolVS),
       https://www.rdkit.org/docs/source/rdkit.Chem.MolStandardize.rdMolStandardize.html
.. [2] Heller, S. R.; McNaught, A.; Pletnev, I.; Stein, S.; Tchekhovskoi, D. InChI, the IUPAC
       International Chemical Identifier. J. Cheminform. 2015, 7, 23.
       https://doi.org/10.1186/s13321-015-0068-4
.. [3] CAS, a division of the American Chemical Society. CAS Registry Number: check digit
       verification. https://www.cas.org/support/documentation/chemical-substances/checkdig
"""

from __future__ import annotations

import multiprocessing
import os
import re
import tempfile
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import chemicals
import duckdb
import numpy as np
import pandas as pd
import rdkit
from chemicals import identifiers as chem_ids
from rdkit import Chem, rdBase
from rdkit.Chem.MolStandardize import rdMolStandardize
from rdkit.Chem.rdMolDescriptors import CalcMolFormula

__all__ = [
    "CACHE_KINDS",
    "FINDING_RULES",
    "RESOLVED_BY",
    "STANDARDIZE_RECIPE",
    "IdentityCache",
    "cache_version",
    "cas_check_digit_ok",
    "cas_is_missing",
    "identity_findings",
    "infer_steps",
    "resolve_identities",
    "standardize_structures",
]

#: Steps applied to every structure, in order; part of the cache version key.
STANDARDIZE_RECIPE = "metal-disconnect>normalize>largest-fragment>uncharge"
#: Bump when the cached columns or their meaning change.
CACHE_SCHEMA = 1

STRUCTURE_COLUMNS: tuple[str, ...] = (
    "parent_smiles",
    "inchikey",
    "formula",
    "input_smiles_canonical",
    "error",
)
#: Columns returned by :func:`standardize_structures`.
STRUCTURE_RESULT_COLUMNS: tuple[str, ...] = (
    "parent_smiles",
    "inchikey",
    "formula",
    "input_smiles_canonical",
    "structure_from",
    "error",
)
LOOKUP_COLUMNS: tuple[str, ...] = ("db_smiles", "db_cas", "db_name", "error")
#: Cache kinds and the result columns each one stores.
CACHE_KINDS: dict[str, tuple[str, ...]] = {
    "smiles": STRUCTURE_COLUMNS,
    "inchi": STRUCTURE_COLUMNS,
    "name": LOOKUP_COLUMNS,
    "cas": LOOKUP_COLUMNS,
    "inchikey": LOOKUP_COLUMNS,
}
#: Values of ``resolved_by``, highest precedence first.
RESOLVED_BY: tuple[str, ...] = ("smiles", "inchi", "synonym", "cas", "name")
#: Rule name -> severity, in the order findings are reported.
FINDING_RULES: dict[str, str] = {
    "cas_check_digit": "warning",
    "cas_structure_conflict": "warning",
    "name_structure_mismatch": "warning",
    "structure_multiple_cas": "info",
    "unresolved_identity": "warning",
}

# Unique-input count from which work is spread over processes when n_jobs is not given.
PARALLEL_MIN_UNIQUE = 20_000
_CHUNK = 2_000
# First part 2-7 digits without a leading zero, then 2 digits, then the check digit [3].
_CAS_PATTERN = r"[1-9]\d{1,6}-\d{2}-\d"
_CAS_FULL = re.compile(_CAS_PATTERN)
_CAS_DIGITS = 10  # at most 7 + 2 + 1 digits
_LOOKUP_ERRORS = (ValueError, KeyError, IndexError, TypeError)


# --------------------------------------------------------------------------------------------
# text helpers
# --------------------------------------------------------------------------------------------
# Identity columns repeat the same few texts many times (one SMILES per compound, thousands of
# rows each), so text work runs on the unique values of a column and is broadcast back through
# integer codes: ``codes`` holds, per row, a position in the unique values, or -1 for missing.


def _clean_codes(
    values: pd.Series | Sequence[object] | None, n_rows: int
) -> tuple[np.ndarray, np.ndarray]:
    """Per-row codes into the unique cleaned texts (whitespace collapsed and stripped).

    Missing, NaN and empty texts get code -1. The unique texts (object array) are in order of
    first appearance among the rows, as ``pd.unique`` of the cleaned column would give them.
    """
    if values is None:
        return np.full(n_rows, -1, dtype=np.intp), np.empty(0, dtype=object)
    raw = values.to_numpy(dtype=object) if isinstance(values, pd.Series) else None
    if raw is None:
        raw = np.empty(len(values), dtype=object)
        raw[:] = list(values)
    if pd.api.types.infer_dtype(raw, skipna=True) not in ("string", "empty"):
        # non-text cells (numbers from a spreadsheet) are turned into text the pandas way
        raw = pd.Series(raw, dtype=object).astype("string").to_numpy(dtype=object, na_value=None)
    raw_codes, raw_unique = pd.factorize(raw)
    cleaned = np.empty(len(raw_unique), dtype=object)
    # str.split() splits at runs of the characters re's \s matches (str.isspace), and drops
    # them at both ends: the same as re.sub(r"\s+", " ", text).strip(), only faster
    cleaned[:] = [" ".join(text.split()) or None for text in raw_unique]
    if not np.not_equal(cleaned, raw_unique).any():  # already clean (the usual case)
        return raw_codes.astype(np.intp, copy=False), raw_unique.astype(object, copy=False)
    # distinct raw texts may clean to one text ("a  b", "a b"): factorize once more
    unique_codes, unique = pd.factorize(cleaned)
    codes = np.append(unique_codes, -1)[raw_codes]
    return codes.astype(np.intp, copy=False), unique.astype(object, copy=False)


def _take(values: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """``values[codes]`` as an object array, ``None`` where the code is -1."""
    padded = np.empty(len(values) + 1, dtype=object)
    padded[:-1] = values
    padded[-1] = None
    return padded[codes]


def _take_flag(flags: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """``flags[codes]`` as a bool array, False where the code is -1."""
    return np.append(np.asarray(flags, dtype=bool), False)[codes]


def _present(values: np.ndarray) -> np.ndarray:
    """True where an object array holds a value: the arrays here mark missing by ``None`` only
    (a plain comparison, several times faster than ``pd.notna`` on object arrays)."""
    return np.not_equal(values, None)


def _fill(values: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """``values`` with its missing entries taken from ``fallback`` (both object arrays)."""
    return np.where(_present(values), values, fallback)


def _clean_text(
    values: pd.Series | Sequence[object] | None, index: pd.Index | None = None
) -> pd.Series:
    """Strip and collapse whitespace; missing, NaN and empty text become ``<NA>`` (string dtype)."""
    if values is None:
        return pd.Series(pd.NA, index=index, dtype="string")
    if isinstance(values, pd.Series):
        index = values.index
    codes, unique = _clean_codes(values, len(values))
    return pd.Series(pd.array(_take(unique, codes), dtype="string"), index=index)


def _has_text(part: np.ndarray) -> np.ndarray:
    """True where a message part holds text other than whitespace."""
    present = _present(part)
    if present.any():
        codes, unique = pd.factorize(part[present])
        nonblank = np.array([bool(str(text).strip()) for text in unique], dtype=bool)
        present[present] = nonblank[codes]
    return present


def _join_parts(*parts: np.ndarray) -> np.ndarray:
    """Join message arrays with '; ', skipping missing or blank parts; all missing -> None."""
    joined = np.full(len(parts[0]), None, dtype=object)
    has = np.zeros(len(parts[0]), dtype=bool)
    for part in parts:
        valid = _has_text(part)
        both = valid & has
        if both.any():
            joined[both] = joined[both] + "; " + part[both]
        first = valid & ~has
        joined[first] = part[first]
        has |= valid
    return joined


def _quote(s: pd.Series) -> pd.Series:
    return "'" + s.astype("string") + "'"


def _none_object(s: pd.Series) -> pd.Series:
    """Object Series with ``None`` for every missing value (for plain-Python consumers)."""
    return s.astype("object").where(s.notna(), None)


def _object_series(values: np.ndarray, index: pd.Index) -> pd.Series:
    """Object Series of ``values`` (pandas would otherwise infer its string dtype)."""
    return pd.Series(values, index=index, dtype=object)


# --------------------------------------------------------------------------------------------
# CAS Registry Numbers
# --------------------------------------------------------------------------------------------


def cas_is_missing(cas: pd.Series) -> np.ndarray:
    """Mask of CAS cells that hold no text (None, NaN, ``<NA>``, empty or blank).

    Parameters
    ----------
    cas : pandas.Series
        CAS Registry Number text.

    Returns
    -------
    numpy.ndarray of bool
        True where no CAS was given. Use it beside :func:`cas_check_digit_ok`, which returns
        False for both missing and invalid numbers.

    References
    ----------
    .. [1] CAS. CAS Registry Number format. https://www.cas.org/support/documentation/chemical-substances/checkdig

    Examples
    --------
    >>> import pandas as pd
    >>> cas_is_missing(pd.Series(["64-19-7", None, "  ", float("nan")])).tolist()
    [False, True, True, True]
    """
    return _clean_text(cas).isna().to_numpy(dtype=bool)


def _cas_rule(texts: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(well-formed, expected check digit (-1 if not formed), ok) for clean CAS texts."""
    formed = np.array([_CAS_FULL.fullmatch(t) is not None for t in texts], dtype=bool)
    expected = np.full(len(texts), -1, dtype=np.int64)
    ok = np.zeros(len(texts), dtype=bool)
    if formed.any():
        digits = [t.replace("-", "").zfill(_CAS_DIGITS) for t in texts[formed]]
        arr = np.frombuffer("".join(digits).encode("ascii"), dtype=np.uint8)
        arr = arr.reshape(-1, _CAS_DIGITS).astype(np.int64) - ord("0")
        # position 1 is the digit just left of the check digit; zero padding adds nothing
        weights = np.arange(_CAS_DIGITS - 1, 0, -1, dtype=np.int64)
        exp = (arr[:, :-1] @ weights) % 10
        expected[formed] = exp
        ok[formed] = exp == arr[:, -1]
    return formed, expected, ok


def _cas_analysis(
    cas: pd.Series,
) -> tuple[pd.Series, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return (clean text, missing, well-formed, expected check digit (-1 if not formed), ok)."""
    codes, unique = _clean_codes(cas, len(cas))
    formed, expected, ok = _cas_rule(unique)
    s = pd.Series(pd.array(_take(unique, codes), dtype="string"), index=cas.index)
    missing = codes < 0
    return (
        s,
        missing,
        _take_flag(formed, codes),
        np.append(expected, -1)[codes],
        _take_flag(ok, codes),
    )


def cas_check_digit_ok(cas: pd.Series) -> np.ndarray:
    """Vectorized CAS Registry Number format and check-digit test.

    A CAS RN has three hyphen-separated parts of 2-7, 2 and 1 digits; the last is the check
    digit R = (sum of i * d_i) mod 10, with i = 1 for the digit just left of the check digit
    and counting up leftwards [1]_. Surrounding whitespace is ignored. A leading zero is
    rejected (CAS numbers are printed without one; common practice).

    Parameters
    ----------
    cas : pandas.Series
        CAS Registry Number text, any dtype; missing values allowed.

    Returns
    -------
    numpy.ndarray of bool
        True where the text is a well-formed CAS RN with a correct check digit. Missing cells
        are False too; tell them apart with :func:`cas_is_missing`.

    References
    ----------
    .. [1] CAS. Check Digit Verification of CAS Registry Numbers.
           https://www.cas.org/support/documentation/chemical-substances/checkdig

    Examples
    --------
    Water is 7732-18-5: 8*1 + 1*2 + 2*3 + 3*4 + 7*5 + 7*6 = 105, 105 mod 10 = 5.

    >>> import pandas as pd
    >>> cas_check_digit_ok(pd.Series(["7732-18-5", "7732-18-6", "64-19-7", None])).tolist()
    [True, False, True, False]
    """
    return _cas_analysis(cas)[4]


# --------------------------------------------------------------------------------------------
# persistent cache
# --------------------------------------------------------------------------------------------


def cache_version() -> str:
    """Version key of cached identity results.

    Any change of RDKit, its InChI library, ``chemicals``, the standardization recipe or the
    cache layout gives a different key, and rows stored under another key are ignored.

    Returns
    -------
    str
        The version key.

    References
    ----------
    .. [1] RDKit version string, ``rdkit.__version__``; InChI library version,
           ``rdkit.Chem.GetInchiVersion()``.

    Examples
    --------
    >>> cache_version().startswith("kaledger-identity/")
    True
    """
    return (
        f"kaledger-identity/{CACHE_SCHEMA}; rdkit {rdkit.__version__}; "
        f"inchi {Chem.GetInchiVersion()}; chemicals {chemicals.__version__}; {STANDARDIZE_RECIPE}"
    )


def _none_for_null(values: np.ndarray) -> np.ndarray:
    """Object array of a DuckDB ``fetchnumpy`` column, ``None`` where the value was NULL."""
    out = np.asarray(np.ma.getdata(values), dtype=object).copy()
    out[np.ma.getmaskarray(values)] = None
    return out


def _check_kind(kind: str) -> tuple[str, ...]:
    try:
        return CACHE_KINDS[kind]
    except KeyError:
        raise ValueError(
            f"unknown identity cache kind {kind!r}; valid kinds: {', '.join(CACHE_KINDS)}"
        ) from None


class IdentityCache:
    """Persistent cache of identity results keyed by (kind, input text).

    Kinds and their stored columns are listed in :data:`CACHE_KINDS` (``smiles`` and ``inchi``
    hold standardization results; ``name``, ``cas`` and ``inchikey`` hold ``chemicals``
    database hits). The file is a Parquet file written by DuckDB; every row carries the
    :func:`cache_version` key and rows under another key are dropped when the file is read,
    so an RDKit or ``chemicals`` upgrade recomputes everything. Writes are atomic (temporary
    file, then rename).

    Parameters
    ----------
    path : str or pathlib.Path
        Parquet file, e.g. ``build/cache/identity.parquet``; created on first :meth:`save`.
    version : str, optional
        Version key; default :func:`cache_version`.

    Attributes
    ----------
    hits, misses : int
        Lookups answered / not answered since the cache was opened.
    stale_rows : int
        Rows found in the file under another version key (ignored).

    References
    ----------
    .. [1] Apache Parquet file format, https://parquet.apache.org/docs/file-format/
    .. [2] DuckDB, ``COPY ... TO ... (FORMAT parquet)`` and ``read_parquet``,
           https://duckdb.org/docs/data/parquet/overview

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "identity.parquet"
    >>> cache = IdentityCache(path)
    >>> _ = standardize_structures(pd.Series(["CC(=O)[O-].[Na+]"]), None, cache=cache)
    >>> IdentityCache(path).lookup("smiles", ["CC(=O)[O-].[Na+]"])["inchikey"].iloc[0]
    'QTBSBXVTEAMEQO-UHFFFAOYSA-N'
    """

    def __init__(self, path: str | os.PathLike[str], version: str | None = None) -> None:
        self.path = Path(path)
        self.version = version if version is not None else cache_version()
        self.hits = 0
        self.misses = 0
        self.stale_rows = 0
        self._frames: dict[str, pd.DataFrame] = {
            kind: pd.DataFrame(columns=list(cols), index=pd.Index([], name="text"), dtype="object")
            for kind, cols in CACHE_KINDS.items()
        }
        self._dirty = False
        # per kind, the stored frame's columns as object arrays (built on first use)
        self._values: dict[str, dict[str, np.ndarray]] = {}
        if self.path.exists():
            self._load()

    def _load(self) -> None:
        path = str(self.path)
        with duckdb.connect() as con:
            # only rows of this version, each kind with its own columns, in file order
            self.stale_rows = con.execute(
                "SELECT count(*) FROM read_parquet(?) WHERE version IS DISTINCT FROM ?",
                [path, self.version],
            ).fetchone()[0]
            con.execute(
                "CREATE TEMP TABLE current_rows AS SELECT * FROM read_parquet(?) WHERE version = ?",
                [path, self.version],
            )
            for kind, cols in CACHE_KINDS.items():
                select = ", ".join(f'"{c}"' for c in ("text", *cols))
                got = con.execute(
                    f"SELECT {select} FROM current_rows WHERE kind = ?", [kind]
                ).fetchnumpy()
                text = pd.Index(_none_for_null(got["text"]), name="text")
                frame = pd.DataFrame(
                    {c: _none_for_null(got[c]) for c in cols}, index=text, dtype=object
                )
                self._frames[kind] = frame[~frame.index.duplicated(keep="last")]

    def __len__(self) -> int:
        return sum(len(f) for f in self._frames.values())

    def _positions(self, kind: str, texts: Sequence[str] | pd.Index) -> np.ndarray:
        """Row position of each text in the kind's stored frame, -1 if absent (counts hits)."""
        _check_kind(kind)
        # the stored index is unique, and its hash table is kept between calls
        positions = self._frames[kind].index.get_indexer(pd.Index(texts))
        found = int((positions >= 0).sum())
        self.hits += found
        self.misses += len(positions) - found
        return positions

    def lookup(self, kind: str, texts: Sequence[str] | pd.Index) -> pd.DataFrame:
        """Cached rows for ``texts`` (those present), indexed by text."""
        positions = self._positions(kind, texts)
        return self._frames[kind].iloc[positions[positions >= 0]]

    def _columns(self, kind: str) -> dict[str, np.ndarray]:
        """The kind's stored columns as object arrays, each with one ``None`` appended (the
        slot that absent texts point to)."""
        stored = self._values.get(kind)
        if stored is None:
            frame = self._frames[kind]
            stored = {c: np.append(frame[c].to_numpy(dtype=object), None) for c in frame}
            self._values[kind] = stored
        return stored

    def store(self, kind: str, results: pd.DataFrame) -> None:
        """Add results (indexed by text, with the kind's columns); later rows win."""
        cols = _check_kind(kind)
        if results.empty:
            return
        missing = [c for c in cols if c not in results.columns]
        if missing:
            raise ValueError(
                f"results for cache kind {kind!r} lack columns {missing}; expected {list(cols)}"
            )
        new = results[list(cols)].astype("object")
        new = new.where(new.notna(), None)
        old = self._frames[kind]
        merged = pd.concat([old[~old.index.isin(new.index)], new]) if len(old) else new
        merged.index.name = "text"
        self._frames[kind] = merged
        self._values.pop(kind, None)
        self._dirty = True

    def save(self, force: bool = False) -> None:
        """Write the cache atomically if anything was stored since the last save."""
        if not (self._dirty or force):
            return
        all_cols = sorted({c for cols in CACHE_KINDS.values() for c in cols})
        parts = []
        for kind, frame in self._frames.items():
            part = frame.reset_index().reindex(columns=["text", *all_cols])
            part.insert(0, "kind", kind)
            parts.append(part)
        rows = pd.concat(parts, ignore_index=True).astype("object")
        rows = rows.where(rows.notna(), None)
        rows["version"] = self.version
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=self.path.name + ".", suffix=".tmp", dir=self.path.parent)
        os.close(fd)
        select = ", ".join(f'CAST("{c}" AS VARCHAR) AS "{c}"' for c in rows.columns)
        target = tmp.replace("'", "''")
        try:
            with duckdb.connect() as con:
                con.register("cache_rows", rows)
                con.execute(
                    f"COPY (SELECT {select} FROM cache_rows) TO '{target}' (FORMAT parquet)"
                )
            os.replace(tmp, self.path)
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)
        self._dirty = False


class _Results:
    """Results for unique texts: column ``c`` of text ``i`` is ``values[c][slot[i]]``.

    The last element of every ``values`` array is ``None``; it stands for "no text". Rows
    coded against the texts (see :func:`_clean_codes`) are served by one take through
    :meth:`rows`, without first building a per-text array.
    """

    def __init__(self, values: dict[str, np.ndarray], slot: np.ndarray) -> None:
        self.values = values
        self.slot = slot
        self.none_slot = len(next(iter(values.values()))) - 1

    def __getitem__(self, col: str) -> np.ndarray:
        """Column ``col`` per text."""
        return self.values[col][self.slot]

    def rows(self, col: str, codes: np.ndarray) -> np.ndarray:
        """Column ``col`` per row, for row codes into the texts (``None`` where -1)."""
        return self.values[col][np.append(self.slot, self.none_slot)[codes]]


def _cached(
    kind: str,
    texts: pd.Index,
    compute: Callable[[list[str]], list[tuple[str | None, ...]]],
    cache: IdentityCache | None,
) -> _Results:
    """Results for ``texts`` (unique, none missing): cache hits plus ``compute(list_of_texts)``
    for the rest. A warm cache answers with one index lookup and no copy of its columns."""
    cols = list(CACHE_KINDS[kind])
    if cache is not None:
        values = cache._columns(kind)
        slot = cache._positions(kind, texts)
    else:
        values = {c: np.array([None], dtype=object) for c in cols}
        slot = np.full(len(texts), -1, dtype=np.intp)
    found = slot >= 0
    todo = texts[~found]
    if len(todo):
        rows = compute(list(todo))
        new = pd.DataFrame(rows, columns=cols, index=pd.Index(todo, name="text"), dtype="object")
        new = new.where(new.notna(), None)
        if cache is not None:
            cache.store(kind, new)
        # computed results go between the known values and the final None slot
        first_new = len(values[cols[0]]) - 1
        values = {
            c: np.concatenate([values[c][:-1], new[c].to_numpy(dtype=object), [None]]) for c in cols
        }
        slot = slot.copy()
        slot[~found] = first_new + np.arange(len(todo))
    return _Results(values, slot)


# --------------------------------------------------------------------------------------------
# RDKit standardization (worker side: runs over unique texts only)
# --------------------------------------------------------------------------------------------

_TOOLS: dict[str, Any] = {}


def _tools() -> dict[str, Any]:
    if not _TOOLS:
        _TOOLS["metal"] = rdMolStandardize.MetalDisconnector()
        _TOOLS["normalizer"] = rdMolStandardize.Normalizer()
        _TOOLS["fragment"] = rdMolStandardize.LargestFragmentChooser()
        _TOOLS["uncharger"] = rdMolStandardize.Uncharger()
    return _TOOLS


def _parse_failure(kind: str, text: str) -> str:
    if kind == "smiles":
        raw = Chem.MolFromSmiles(text, sanitize=False)
        if raw is not None:
            try:
                Chem.SanitizeMol(raw)
            except ValueError as exc:  # MolSanitizeException derives from ValueError
                return f"SMILES {text!r} is not a valid structure: {exc}"
        return f"SMILES {text!r} could not be parsed"
    if not text.startswith("InChI="):
        return f"InChI {text!r} could not be parsed (an InChI starts with 'InChI=')"
    return f"InChI {text!r} could not be parsed"


def _standardize_one(kind: str, text: str) -> tuple[str | None, ...]:
    tools = _tools()
    mol = Chem.MolFromSmiles(text) if kind == "smiles" else Chem.MolFromInchi(text)
    label = "SMILES" if kind == "smiles" else "InChI"
    if mol is None:
        return (None, None, None, None, _parse_failure(kind, text))
    if mol.GetNumAtoms() == 0:
        return (None, None, None, None, f"{label} {text!r} holds no atoms")
    try:
        given = Chem.MolToSmiles(mol)
        parent = tools["metal"].Disconnect(mol)
        parent = tools["normalizer"].normalize(parent)
        parent = tools["fragment"].choose(parent)
        parent = tools["uncharger"].uncharge(parent)
        parent_smiles = Chem.MolToSmiles(parent)
        key = Chem.MolToInchiKey(parent) or None
        formula = CalcMolFormula(parent)
    except (ValueError, RuntimeError) as exc:
        return (None, None, None, None, f"{label} {text!r} could not be standardized: {exc}")
    error = None if key else f"no InChI could be generated for the parent {parent_smiles!r}"
    return (parent_smiles, key, formula, given, error)


def _standardize_texts(kind: str, texts: Sequence[str]) -> list[tuple[str | None, ...]]:
    """Standardize a list of unique SMILES or InChI texts (one worker's share)."""
    with rdBase.BlockLogs():
        return [_standardize_one(kind, t) for t in texts]


def _standardize_parallel(
    kind: str, texts: list[str], n_jobs: int | None
) -> list[tuple[str | None, ...]]:
    if n_jobs is None:
        n_jobs = (os.cpu_count() or 1) if len(texts) >= PARALLEL_MIN_UNIQUE else 1
    if n_jobs <= 1 or len(texts) < 2 * _CHUNK:
        return _standardize_texts(kind, texts)
    chunks = [texts[i : i + _CHUNK] for i in range(0, len(texts), _CHUNK)]
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=n_jobs, mp_context=ctx) as pool:
        parts = pool.map(_standardize_texts, [kind] * len(chunks), chunks)
        return [row for part in parts for row in part]


def _standardize_unique(
    kind: str, texts: pd.Index, cache: IdentityCache | None, n_jobs: int | None = None
) -> _Results:
    return _cached(kind, texts, lambda todo: _standardize_parallel(kind, todo, n_jobs), cache)


def _structure_rows(
    smiles_codes: np.ndarray,
    smiles_texts: np.ndarray,
    inchi_codes: np.ndarray,
    inchi_texts: np.ndarray,
    cache: IdentityCache | None,
    n_jobs: int | None,
) -> dict[str, np.ndarray]:
    """Per-row structure results (the columns of :func:`standardize_structures`) from coded
    SMILES and InChI texts (see :func:`_clean_codes`)."""
    cols = ("parent_smiles", "inchikey", "formula", "input_smiles_canonical")
    by_smiles = _standardize_unique("smiles", pd.Index(smiles_texts), cache, n_jobs)
    by_inchi = _standardize_unique("inchi", pd.Index(inchi_texts), cache, n_jobs)
    sm_ok = _take_flag(_present(by_smiles["inchikey"]), smiles_codes)
    in_ok = _take_flag(_present(by_inchi["inchikey"]), inchi_codes)
    use_inchi = ~sm_ok & in_ok
    out = {c: by_smiles.rows(c, smiles_codes) for c in cols}
    if use_inchi.any():
        for c in cols:
            out[c][use_inchi] = by_inchi.rows(c, inchi_codes[use_inchi])
    out["structure_from"] = np.where(sm_ok, "smiles", np.where(use_inchi, "inchi", None))
    out["has_structure"] = sm_ok | use_inchi

    n_rows = len(smiles_codes)
    rescued = np.full(n_rows, None, dtype=object)
    rescued[(smiles_codes >= 0) & ~sm_ok & use_inchi] = "the structure was taken from the InChI"
    both = sm_ok & in_ok
    differ = np.zeros(n_rows, dtype=bool)
    sm_key_both = by_smiles.rows("inchikey", smiles_codes[both])
    in_key_both = by_inchi.rows("inchikey", inchi_codes[both])
    differ[both] = sm_key_both != in_key_both
    clash = np.full(n_rows, None, dtype=object)
    if differ.any():
        clash[differ] = (
            "SMILES '"
            + _take(smiles_texts, smiles_codes[differ])
            + "' and InChI '"
            + _take(inchi_texts, inchi_codes[differ])
            + "' give different parents ("
            + by_smiles.rows("inchikey", smiles_codes[differ])
            + " vs "
            + by_inchi.rows("inchikey", inchi_codes[differ])
            + "); the SMILES was used"
        )
    sm_err = by_smiles.rows("error", smiles_codes)
    in_err = np.full(n_rows, None, dtype=object)
    has_inchi = inchi_codes >= 0
    if has_inchi.any():
        in_err[has_inchi] = by_inchi.rows("error", inchi_codes[has_inchi])
    out["error"] = _join_parts(sm_err, in_err, rescued, clash)
    return out


def standardize_structures(
    smiles: pd.Series | None,
    inchi: pd.Series | None,
    cache: IdentityCache | None = None,
    n_jobs: int | None = None,
    *,
    save: bool = True,
) -> pd.DataFrame:
    """Standardize given structures to their parent and compute its InChIKey.

    The SMILES is used where one is given and parses; otherwise the InChI. The parent is the
    as-given species after metal disconnection, functional-group normalization, keeping the
    largest fragment and neutralizing charges [1]_; its standard InChIKey comes from RDKit's
    InChI library [2]_. Work runs over unique inputs only (dedupe, compute, map back), through
    ``cache`` when one is given, and over ``n_jobs`` processes (default: all cores once there
    are at least ``PARALLEL_MIN_UNIQUE`` new unique inputs). Worker processes use the
    "spawn" start method (no fork of a process holding DuckDB or other threads), so a script
    that reaches the parallel path must guard its entry point with
    ``if __name__ == "__main__":``; pass ``n_jobs=1`` to stay in one process.

    Parameters
    ----------
    smiles, inchi : pandas.Series or None
        Structure text per row (missing allowed). When both are given they share an index.
    cache : IdentityCache, optional
        Cache read before and written (saved) after the computation.
    n_jobs : int, optional
        Worker processes for new inputs.
    save : bool, default True
        Save the cache before returning (callers that batch several steps pass False).

    Returns
    -------
    pandas.DataFrame
        Same index; columns ``parent_smiles``, ``inchikey``, ``formula`` (Hill formula of the
        parent), ``input_smiles_canonical`` (canonical SMILES of the as-given species, charge
        kept), ``structure_from`` ("smiles", "inchi" or None) and ``error`` (None or a reason;
        also set when the SMILES and InChI of a row give different parents).

    References
    ----------
    .. [1] RDKit MolStandardize (MetalDisconnector, Normalizer, LargestFragmentChooser,
           Uncharger), https://www.rdkit.org/docs/source/rdkit.Chem.MolStandardize.rdMolStandardize.html
    .. [2] Heller, S. R. et al. InChI, the IUPAC International Chemical Identifier.
           J. Cheminform. 2015, 7, 23. https://doi.org/10.1186/s13321-015-0068-4

    Examples
    --------
    Sodium acetate reduces to acetic acid (InChIKey as computed by RDKit's InChI):

    >>> import pandas as pd
    >>> out = standardize_structures(pd.Series(["CC(=O)[O-].[Na+]", "C(C"]), None)
    >>> out.loc[0, ["parent_smiles", "inchikey", "input_smiles_canonical"]].tolist()
    ['CC(=O)O', 'QTBSBXVTEAMEQO-UHFFFAOYSA-N', 'CC(=O)[O-].[Na+]']
    >>> out.loc[1, "error"]
    "SMILES 'C(C' could not be parsed"
    """
    if smiles is None and inchi is None:
        raise ValueError("standardize_structures needs smiles, inchi or both; both were None")
    if smiles is not None and inchi is not None and not smiles.index.equals(inchi.index):
        raise ValueError("smiles and inchi must share one index; got different indexes")
    index = smiles.index if smiles is not None else inchi.index if inchi is not None else None
    assert index is not None
    smiles_codes, smiles_texts = _clean_codes(smiles, len(index))
    inchi_codes, inchi_texts = _clean_codes(inchi, len(index))
    rows = _structure_rows(smiles_codes, smiles_texts, inchi_codes, inchi_texts, cache, n_jobs)
    if cache is not None and save:
        cache.save()
    return pd.DataFrame({c: _object_series(rows[c], index) for c in STRUCTURE_RESULT_COLUMNS})


# --------------------------------------------------------------------------------------------
# chemicals database lookups
# --------------------------------------------------------------------------------------------


def _lookup_texts(kind: str, texts: Sequence[str]) -> list[tuple[str | None, ...]]:
    """Look up names, CAS numbers or InChIKeys in the chemicals offline database."""
    label = {"name": "name", "cas": "CAS", "inchikey": "InChIKey"}[kind]
    out: list[tuple[str | None, ...]] = []
    for text in texts:
        query = f"InChIKey={text}" if kind == "inchikey" else text
        try:
            hit = chem_ids.search_chemical(query)
        except _LOOKUP_ERRORS:
            hit = None
        if hit is None or not getattr(hit, "smiles", None):
            out.append((None, None, None, f"{label} {text!r} is not in the chemicals database"))
        else:
            out.append((hit.smiles, hit.CASs, hit.common_name, None))
    return out


def _lookup_unique(kind: str, texts: pd.Index, cache: IdentityCache | None) -> _Results:
    return _cached(kind, texts, lambda todo: _lookup_texts(kind, todo), cache)


def _parent_keys(
    db_smiles: np.ndarray, cache: IdentityCache | None
) -> tuple[np.ndarray, np.ndarray]:
    """(parent SMILES, parent InChIKey) for database SMILES (object array, ``None`` allowed)."""
    codes, texts = _clean_codes(pd.Series(db_smiles, dtype=object), len(db_smiles))
    res = _standardize_unique("smiles", pd.Index(texts), cache)
    return res.rows("parent_smiles", codes), res.rows("inchikey", codes)


def _lookup_on(
    kind: str, texts: np.ndarray, need: np.ndarray, cache: IdentityCache | None
) -> dict[str, np.ndarray]:
    """Database columns for the unique ``texts`` where ``need`` holds (``None`` elsewhere)."""
    res = _lookup_unique(kind, pd.Index(texts[need]), cache)
    out: dict[str, np.ndarray] = {}
    for col in LOOKUP_COLUMNS:
        values = np.full(len(texts), None, dtype=object)
        values[need] = res[col]
        out[col] = values
    return out


def _lookup_rows(
    kind: str, keys: np.ndarray, rows: np.ndarray, cache: IdentityCache | None
) -> dict[str, np.ndarray]:
    """Database columns per row for ``keys[rows]`` (``None`` on other rows), over unique keys."""
    codes = np.full(len(keys), -1, dtype=np.intp)
    codes[rows], unique = pd.factorize(keys[rows])
    res = _lookup_unique(kind, pd.Index(unique), cache)
    return {c: res.rows(c, codes) for c in LOOKUP_COLUMNS}


def _prepare_synonyms(synonyms: pd.DataFrame | None, cache: IdentityCache | None) -> pd.DataFrame:
    """Steward synonyms indexed by casefolded, whitespace-normalized synonym."""
    cols = ["inchikey", "parent_smiles", "cas"]
    if synonyms is None or synonyms.empty:
        return pd.DataFrame(columns=cols, index=pd.Index([], name="key"), dtype="object")
    missing = [c for c in ("synonym", "smiles") if c not in synonyms.columns]
    if missing:
        raise ValueError(
            f"synonyms table lacks column(s) {missing}; required: ['synonym', 'smiles'], "
            f"optional: ['cas', 'note']; got {list(synonyms.columns)}"
        )
    syn = pd.DataFrame({"key": _clean_text(synonyms["synonym"]).str.casefold()})
    st = standardize_structures(synonyms["smiles"], None, cache=cache, save=False)
    bad = syn["key"].isna() | st["inchikey"].isna()
    if bad.any():
        first = synonyms[bad].iloc[0]
        reason = st.loc[bad, "error"].iloc[0] or "empty synonym or SMILES"
        raise ValueError(
            f"synonyms table: {int(bad.sum())} row(s) unusable, first synonym "
            f"{first['synonym']!r} with SMILES {first['smiles']!r}: {reason}"
        )
    syn["inchikey"] = st["inchikey"]
    syn["parent_smiles"] = st["parent_smiles"]
    if "cas" in synonyms.columns:
        cas_s, _, _, _, ok = _cas_analysis(synonyms["cas"])
        if (cas_s.notna().to_numpy() & ~ok).any():
            wrong = cas_s[cas_s.notna().to_numpy() & ~ok].tolist()
            raise ValueError(f"synonyms table: CAS number(s) {wrong} fail the CAS check-digit rule")
        syn["cas"] = _none_object(cas_s)
    else:
        syn["cas"] = None
    conflict = syn.groupby("key")["inchikey"].nunique()
    conflict = conflict[conflict > 1]
    if len(conflict):
        raise ValueError(
            f"synonyms table: synonym(s) {conflict.index.tolist()} map to more than one structure"
        )
    syn = syn.drop_duplicates("key", keep="first").set_index("key")
    return syn[cols]


# --------------------------------------------------------------------------------------------
# resolution
# --------------------------------------------------------------------------------------------


def resolve_identities(
    frame: pd.DataFrame,
    synonyms: pd.DataFrame | None = None,
    cache: IdentityCache | None = None,
    n_jobs: int | None = None,
) -> pd.DataFrame:
    """Resolve each row's compound from its structure, name or CAS Registry Number.

    Precedence: a given structure (SMILES, else InChI) > the steward ``synonyms`` table >
    the CAS number (steward table, then the ``chemicals`` database) > the name via the
    ``chemicals`` database. Names are matched case-insensitively with whitespace collapsed.
    Every database answer is reduced to its standardized parent (see
    :func:`standardize_structures`), so a salt's CAS or name maps to the parent acid/base.

    Parameters
    ----------
    frame : pandas.DataFrame
        Columns ``name``, ``cas``, ``smiles``, ``inchi`` (text, missing allowed; an absent
        column counts as all missing); any index.
    synonyms : pandas.DataFrame, optional
        Steward synonyms: columns ``synonym``, ``smiles``, optional ``cas`` and ``note``. They
        override the database for name (and, via ``cas``, CAS) lookups. A synonym whose SMILES
        does not parse, or that maps to two structures, raises ``ValueError``.
    cache : IdentityCache, optional
        Cache for RDKit and database results (saved before returning).
    n_jobs : int, optional
        Worker processes for standardizing new structures.

    Returns
    -------
    pandas.DataFrame
        Same index, columns:

        - ``compound_id``: the parent InChIKey when a structure is known; otherwise a stable
          text id ``"unresolved:name:" + casefolded name``, else ``"unresolved:cas:" + CAS``,
          else ``"unresolved:smiles:"`` / ``"unresolved:inchi:"`` + the given text; None for a
          row that names nothing.
        - ``inchikey``, ``smiles`` (parent SMILES), ``formula`` (parent).
        - ``cas``: as given when valid, else the steward's or database's CAS of the parent.
        - ``name``: as given (whitespace collapsed), else the database's common name.
        - ``resolved_by``: one of :data:`RESOLVED_BY` or None.
        - ``cas_valid``: boolean (pandas ``boolean`` dtype), ``<NA>`` where no CAS was given.
        - ``cas_given``: the given CAS text (whitespace collapsed), kept for messages.
        - ``name_inchikey``: parent InChIKey the name resolves to (synonyms, then database).
        - ``cas_inchikey``: parent InChIKey the CAS resolves to (synonyms, then database).
        - ``error``: None or the reasons (structure errors; why nothing resolved).

    References
    ----------
    .. [1] ``chemicals`` package, ``chemicals.identifiers.search_chemical`` (offline PubChem-
           derived identifier tables), https://chemicals.readthedocs.io/chemicals.identifiers.html
    .. [2] CAS. Check Digit Verification of CAS Registry Numbers,
           https://www.cas.org/support/documentation/chemical-substances/checkdig

    Examples
    --------
    >>> import pandas as pd
    >>> rows = pd.DataFrame({"name": ["ethanoic acid", None], "cas": [None, "64-19-7"],
    ...                      "smiles": [None, None], "inchi": [None, None]})
    >>> out = resolve_identities(rows)
    >>> out["compound_id"].tolist(), out["resolved_by"].tolist()
    (['QTBSBXVTEAMEQO-UHFFFAOYSA-N', 'QTBSBXVTEAMEQO-UHFFFAOYSA-N'], ['name', 'cas'])
    """
    index = frame.index
    n_rows = len(index)

    def column(field: str) -> pd.Series | None:
        return frame[field] if field in frame else None

    # Each identifier column as per-row codes into its unique cleaned texts; everything that
    # depends on one column (lookups, messages) is worked out once per unique text.
    name_codes, names = _clean_codes(column("name"), n_rows)
    smiles_codes, smiles_texts = _clean_codes(column("smiles"), n_rows)
    inchi_codes, inchi_texts = _clean_codes(column("inchi"), n_rows)
    cas_codes, cas_texts = _clean_codes(column("cas"), n_rows)
    name_keys = np.array([t.casefold() for t in names], dtype=object)
    _, _, cas_ok_u = _cas_rule(cas_texts)
    cas_missing = cas_codes < 0
    cas_ok = _take_flag(cas_ok_u, cas_codes)

    st = _structure_rows(smiles_codes, smiles_texts, inchi_codes, inchi_texts, cache, n_jobs)
    syn = _prepare_synonyms(synonyms, cache)

    # --- synonym hits by name (per unique name)
    syn_pos = syn.index.get_indexer(pd.Index(name_keys)) if len(syn) else np.full(len(names), -1)
    syn_key_u = _take(syn["inchikey"].to_numpy(dtype=object), syn_pos)
    syn_smiles_u = _take(syn["parent_smiles"].to_numpy(dtype=object), syn_pos)
    syn_cas_u = _take(syn["cas"].to_numpy(dtype=object), syn_pos)
    syn_hit_u = _present(syn_key_u)

    # --- CAS (per unique CAS): steward table first, then the database
    syn_by_cas = syn[syn["cas"].notna()].drop_duplicates("cas").set_index("cas")
    cas_pos = (
        syn_by_cas.index.get_indexer(pd.Index(cas_texts))
        if len(syn_by_cas)
        else np.full(len(cas_texts), -1)
    )
    cas_pos[~cas_ok_u] = -1
    cas_syn_key_u = _take(syn_by_cas["inchikey"].to_numpy(dtype=object), cas_pos)
    cas_syn_smiles_u = _take(syn_by_cas["parent_smiles"].to_numpy(dtype=object), cas_pos)
    cas_db_u = _lookup_on("cas", cas_texts, cas_ok_u & ~_present(cas_syn_key_u), cache)
    cas_par_smiles_u, cas_par_key_u = _parent_keys(cas_db_u["db_smiles"], cache)
    cas_key_u = _fill(cas_syn_key_u, cas_par_key_u)
    cas_smiles_u = _fill(cas_syn_smiles_u, cas_par_smiles_u)

    # --- name via the database (per unique name that is not a steward synonym)
    name_db_u = _lookup_on("name", names, ~syn_hit_u, cache)
    name_par_smiles_u, name_par_key_u = _parent_keys(name_db_u["db_smiles"], cache)
    name_inchikey_u = _fill(syn_key_u, name_par_key_u)

    # --- precedence per row: structure > synonym > CAS > name
    has_struct = st["has_structure"]
    by_syn = ~has_struct & _take_flag(syn_hit_u, name_codes)
    by_cas = ~has_struct & ~by_syn & _take_flag(_present(cas_key_u), cas_codes)
    by_name = ~has_struct & ~by_syn & ~by_cas & _take_flag(_present(name_par_key_u), name_codes)
    resolved_by = np.where(has_struct, st["structure_from"], None)
    resolved_by[by_syn] = "synonym"
    resolved_by[by_cas] = "cas"
    resolved_by[by_name] = "name"

    inchikey = np.where(has_struct, st["inchikey"], None)
    parent = np.where(has_struct, st["parent_smiles"], None)
    for chosen, key_u, smiles_u, codes in (
        (by_syn, syn_key_u, syn_smiles_u, name_codes),
        (by_cas, cas_key_u, cas_smiles_u, cas_codes),
        (by_name, name_par_key_u, name_par_smiles_u, name_codes),
    ):
        if chosen.any():
            inchikey[chosen] = _take(key_u, codes[chosen])
            parent[chosen] = _take(smiles_u, codes[chosen])
    has_key = has_struct | by_syn | by_cas | by_name

    # formula of the parent: from the structure result or a standardization of the parent SMILES
    formula = np.where(has_struct, st["formula"], None)
    need_formula = ~has_struct & has_key & _present(parent)
    if need_formula.any():
        f_codes, f_texts = pd.factorize(parent[need_formula])
        f_res = _standardize_unique("smiles", pd.Index(f_texts), cache)
        formula[need_formula] = f_res.rows("formula", f_codes)

    # --- database entry of the parent, for a missing CAS or name
    entry = _lookup_rows("inchikey", inchikey, (~cas_ok | (name_codes < 0)) & has_key, cache)
    valid_cas_u = np.where(cas_ok_u, cas_texts, None)
    cas_out = _take(valid_cas_u, cas_codes)
    from_syn = ~cas_ok & by_syn
    cas_out[from_syn] = _take(syn_cas_u, name_codes[from_syn])
    cas_out = _fill(cas_out, entry["db_cas"])
    name_out = _take(names, name_codes)
    name_out[name_codes < 0] = entry["db_name"][name_codes < 0]
    name_out = _fill(name_out, _take(cas_db_u["db_name"], cas_codes))

    # --- stable id and reasons for rows without a structure
    compound_id = inchikey.copy()
    nothing = ~has_key
    error = st["error"]
    if nothing.any():
        unresolved = np.full(int(nothing.sum()), None, dtype=object)
        for prefix, texts, codes in (
            ("unresolved:name:", name_keys, name_codes),
            ("unresolved:cas:", cas_texts, cas_codes),
            ("unresolved:smiles:", smiles_texts, smiles_codes),
            ("unresolved:inchi:", inchi_texts, inchi_codes),
        ):
            todo = ~_present(unresolved) & (codes[nothing] >= 0)
            unresolved[todo] = prefix + _take(texts, codes[nothing][todo])
        compound_id[nothing] = unresolved

        def why(
            head: str, texts: np.ndarray, tail: str, codes: np.ndarray, where: np.ndarray
        ) -> np.ndarray:
            """``head + text + tail`` on the rows ``where`` (which all have a text)."""
            out = np.full(n_rows, None, dtype=object)
            out[where] = head + _take(texts, codes[where]) + tail
            return out

        why_name = why(
            "name '",
            names,
            "' is neither a steward synonym nor in the chemicals database",
            name_codes,
            nothing & (name_codes >= 0),
        )
        why_cas_bad = why(
            "CAS '",
            cas_texts,
            "' fails the CAS check-digit rule",
            cas_codes,
            nothing & ~cas_missing & ~cas_ok,
        )
        why_cas_db = why(
            "CAS '", cas_texts, "' is not in the chemicals database", cas_codes, nothing & cas_ok
        )
        given_any = (name_codes >= 0) | ~cas_missing | (smiles_codes >= 0) | (inchi_codes >= 0)
        why_none = np.where(nothing & ~given_any, "no name, CAS, SMILES or InChI given", None)
        reasons = _join_parts(why_name, why_cas_bad, why_cas_db)
        unfound = np.full(n_rows, None, dtype=object)
        has_reason = _present(reasons)
        unfound[has_reason] = "no structure found: " + reasons[has_reason]
        error = _join_parts(error, unfound, why_none)

    columns = {
        "compound_id": compound_id,
        "inchikey": inchikey,
        "smiles": parent,
        "formula": formula,
        "cas": cas_out,
        "name": name_out,
        "resolved_by": resolved_by,
        "cas_valid": None,
        "cas_given": _take(cas_texts, cas_codes),
        "name_inchikey": _take(name_inchikey_u, name_codes),
        "cas_inchikey": _take(cas_key_u, cas_codes),
        # the species as the row gave it (salt or charged form kept), for CAS comparisons
        "species_smiles": np.where(has_struct, st["input_smiles_canonical"], None),
        "error": error,
    }
    # one object block for the text columns (column-major, so pandas takes it without a copy)
    text_columns = [c for c in columns if c != "cas_valid"]
    block = np.empty((n_rows, len(text_columns)), dtype=object, order="F")
    for j, c in enumerate(text_columns):
        block[:, j] = columns[c]
    out = pd.DataFrame(block, index=index, columns=text_columns, dtype=object, copy=False)
    out.insert(
        list(columns).index("cas_valid"),
        "cas_valid",
        pd.array(np.where(cas_missing, None, cas_ok), dtype="boolean"),
    )
    if cache is not None:
        cache.save()
    return out


# --------------------------------------------------------------------------------------------
# findings
# --------------------------------------------------------------------------------------------


def _list_by_key(long: pd.DataFrame, group: str, item: str) -> pd.Series:
    """'item (sources: a, b), item2 (sources: c)' per group value."""
    per_item = (
        long.groupby([group, item], sort=True)["source"]
        .agg(lambda x: ", ".join(sorted(set(map(str, x)))))
        .reset_index()
    )
    per_item["text"] = per_item[item].astype(str) + " (" + per_item["source"] + ")"
    return per_item.groupby(group)["text"].agg(", ".join)


def _aligned(values: pd.Series, index: pd.Index, label: str) -> pd.Series:
    """``values`` as an object Series on ``index``; refuses a Series that does not align."""
    if not isinstance(values, pd.Series):
        values = pd.Series(list(values), index=index)
    if not values.index.equals(index):
        if (
            len(values) == len(index)
            and values.index.is_unique
            and index.is_unique
            and values.index.isin(index).all()
        ):
            values = values.reindex(index)
        else:
            raise ValueError(
                f"{label} must be aligned with the resolved frame's index "
                f"({len(index)} rows, first labels {list(index[:3])}); got {len(values)} rows, "
                f"first labels {list(values.index[:3])}"
            )
    return pd.Series(values.to_numpy(dtype=object), index=index)


def identity_findings(
    resolved: pd.DataFrame, source_id: pd.Series, value_id: pd.Series
) -> pd.DataFrame:
    """Identity checks over resolved rows, collected into one findings table.

    Rules (severity in :data:`FINDING_RULES`):

    - ``cas_check_digit``: the given CAS fails the format or check-digit rule [1]_.
    - ``cas_structure_conflict``: one valid CAS stands for different parent InChIKeys across
      rows and sources, the database's structure for that CAS counting as one more voice.
      Every row of such a CAS is reported.
    - ``name_structure_mismatch``: the row's name resolves (steward synonyms or database) to
      a parent other than the one of its given SMILES/InChI.
    - ``structure_multiple_cas``: one parent InChIKey is given under several distinct valid
      CAS numbers (often salt or hydrate numbers; information only).
    - ``unresolved_identity``: no structure could be found for the row.

    Parameters
    ----------
    resolved : pandas.DataFrame
        Output of :func:`resolve_identities`.
    source_id, value_id : pandas.Series
        Source and value id per row, aligned with ``resolved``'s index.

    Returns
    -------
    pandas.DataFrame
        Columns ``rule``, ``severity``, ``value_id``, ``message``; rules in the order of
        :data:`FINDING_RULES`, rows in input order within a rule.

    References
    ----------
    .. [1] CAS. Check Digit Verification of CAS Registry Numbers,
           https://www.cas.org/support/documentation/chemical-substances/checkdig

    Examples
    --------
    >>> import pandas as pd
    >>> rows = pd.DataFrame({"name": ["water"], "cas": ["7732-18-6"], "smiles": ["O"], "inchi": [None]})
    >>> f = identity_findings(resolve_identities(rows), pd.Series(["src-a"]), pd.Series(["v1"]))
    >>> f["rule"].tolist()
    ['cas_check_digit']
    """
    # Masks run over all rows as arrays; messages are composed only on the rows a rule reports
    # (a few hundred in a million), with the same pandas expressions row by row.
    index = resolved.index
    n_rows = len(index)
    src = _aligned(source_id, index, "source_id")
    vid = _aligned(value_id, index, "value_id").to_numpy(dtype=object)
    key_present = resolved["inchikey"].notna().to_numpy(dtype=bool)
    cas_codes, cas_texts = _clean_codes(resolved["cas_given"], n_rows)
    valid = resolved["cas_valid"].astype("boolean")
    is_valid = valid.fillna(False).to_numpy(dtype=bool)
    frames: list[pd.DataFrame] = []

    def rows(mask: np.ndarray) -> pd.DataFrame:
        return resolved[mask]

    def cas_given(mask: np.ndarray) -> pd.Series:
        """Clean given CAS text of the rows ``mask`` (string dtype, like ``_clean_text``)."""
        return pd.Series(
            pd.array(_take(cas_texts, cas_codes[mask]), dtype="string"), index=index[mask]
        )

    def add(rule: str, mask: np.ndarray, message: pd.Series) -> None:
        """Report the rows ``mask``; ``message`` holds one text per reported row."""
        frames.append(
            pd.DataFrame(
                {
                    "rule": rule,
                    "severity": FINDING_RULES[rule],
                    "value_id": vid[mask],
                    "message": message.astype(str).to_numpy(),
                }
            )
        )

    # cas_check_digit
    bad = valid.fillna(True).eq(False).to_numpy(dtype=bool)
    if bad.any():
        given = cas_given(bad)
        _, _, formed, expected, _ = _cas_analysis(given)
        last = given.str[-1]
        msg = pd.Series(
            np.where(
                formed,
                "CAS "
                + _quote(given)
                + " fails the check-digit rule (check digit "
                + last.astype("string")
                + ", expected "
                + pd.Series(expected, index=given.index).astype(str)
                + ")",
                "CAS " + _quote(given) + " is not a CAS Registry Number (form: 2-7 digits, "
                "2 digits, 1 check digit, hyphen separated, e.g. 64-19-7)",
            ),
            index=given.index,
        )
        add("cas_check_digit", bad, msg)

    # cas_structure_conflict: the row keys of a valid CAS plus the database's key for it
    use = is_valid & key_present
    if use.any():
        db_key = resolved["cas_inchikey"].to_numpy(dtype=object)[use]
        in_db = pd.notna(db_key)
        cas_of_row = cas_codes[use]
        # the first database key seen per CAS, as drop_duplicates("cas") keeps it
        db_cas, first = np.unique(cas_of_row[in_db], return_index=True)
        key_codes, _ = pd.factorize(
            np.concatenate([resolved["inchikey"].to_numpy(dtype=object)[use], db_key[in_db][first]])
        )
        pair_cas = np.concatenate([cas_of_row, db_cas])
        conflicted = _codes_with_several(pair_cas, key_codes, len(cas_texts))
        mask = use & _take_flag(conflicted, cas_codes)
        if mask.any():
            sub = rows(mask)
            sub_cas = cas_given(mask)
            rows_long = pd.DataFrame({"cas": sub_cas, "key": sub["inchikey"], "source": src[mask]})
            db_keep = _take_flag(conflicted, db_cas)
            db_long = pd.DataFrame(
                {
                    "cas": _take(cas_texts, db_cas[db_keep]),
                    "key": db_key[in_db][first][db_keep],
                    "source": "database",
                }
            )
            long = pd.concat([rows_long, db_long], ignore_index=True)
            n_keys = long.groupby("cas")["key"].nunique()
            listing = _list_by_key(long, "cas", "key")
            msg = (
                "CAS "
                + sub_cas
                + " stands for "
                + sub_cas.map(n_keys).astype("Int64").astype(str)
                + " different structures: "
                + sub_cas.map(listing)
                + "; this row has "
                + sub["inchikey"].astype(str)
            )
            add("cas_structure_conflict", mask, msg)

    # name_structure_mismatch
    structural = resolved["resolved_by"].isin(["smiles", "inchi"]).to_numpy(dtype=bool)
    nk = resolved["name_inchikey"]
    mism = structural & nk.notna().to_numpy(dtype=bool) & key_present
    if mism.any():
        mism[mism] = (nk[mism] != resolved["inchikey"][mism]).to_numpy(dtype=bool)
    if mism.any():
        sub = rows(mism)
        msg = (
            "name "
            + _quote(_clean_text(sub["name"]))
            + " resolves to "
            + sub["name_inchikey"].astype(str)
            + " but the given structure is "
            + sub["inchikey"].astype(str)
            + " ("
            + sub["smiles"].astype(str)
            + ")"
        )
        add("name_structure_mismatch", mism, msg)

    # structure_multiple_cas: compared on the species as given, so that a salt's own CAS
    # (sodium acetate 127-09-3) is not taken for a second CAS of the parent acid
    if "species_smiles" in resolved:
        use_species = use & resolved["species_smiles"].notna().to_numpy(dtype=bool)
    else:
        use_species = np.zeros(n_rows, dtype=bool)
    if use_species.any():
        species_codes = np.full(n_rows, -1, dtype=np.intp)
        species_codes[use_species], species_u = pd.factorize(
            resolved["species_smiles"].to_numpy(dtype=object)[use_species]
        )
        multi = _codes_with_several(
            species_codes[use_species], cas_codes[use_species], len(species_u)
        )
        mask = use_species & _take_flag(multi, species_codes)
        if mask.any():
            species = resolved["species_smiles"][mask]
            rows_long = pd.DataFrame({"key": species, "cas": cas_given(mask), "source": src[mask]})
            n_cas = rows_long.groupby("key")["cas"].nunique()
            listing = _list_by_key(rows_long, "key", "cas")
            msg = (
                "structure "
                + species.astype(str)
                + " is given under "
                + species.map(n_cas).astype("Int64").astype(str)
                + " CAS numbers: "
                + species.map(listing)
            )
            add("structure_multiple_cas", mask, msg)

    # unresolved_identity
    unres = ~key_present
    if unres.any():
        sub = rows(unres)
        what = (
            sub["compound_id"].astype(object).where(sub["compound_id"].notna(), "(nothing given)")
        )
        why = _clean_text(sub["error"]).str.replace("no structure found: ", "", regex=False)
        msg = ("no structure for " + what.astype(str) + ": " + why).fillna(
            "no structure for " + what.astype(str)
        )
        add("unresolved_identity", unres, msg)

    if not frames:
        return pd.DataFrame(
            {c: pd.Series(dtype="object") for c in ("rule", "severity", "value_id", "message")}
        )
    return pd.concat(frames, ignore_index=True)


def _codes_with_several(
    group_codes: np.ndarray, item_codes: np.ndarray, n_groups: int
) -> np.ndarray:
    """Per group code, whether its rows hold more than one distinct item code (-1 = no item)."""
    has_item = item_codes >= 0
    pairs = np.unique(
        np.stack([group_codes[has_item], item_codes[has_item]]).astype(np.int64), axis=1
    )
    return np.bincount(pairs[0], minlength=n_groups) > 1


# --------------------------------------------------------------------------------------------
# dissociation step numbers
# --------------------------------------------------------------------------------------------


def infer_steps(frame: pd.DataFrame) -> pd.DataFrame:
    """Fill missing dissociation-step numbers where the data leave no doubt.

    Step 1 is the loss of the first proton from the most protonated form, so within one
    source, compound and condition pKa1 < pKa2 < ... (common practice; IUPAC numbering of
    successive constants, from memory). A group is the rows sharing ``source_id``,
    ``compound_id``, ``temperature_k`` (rounded to 0.01 K) and ``ionic_strength_molal``
    (rounded to 1e-4 mol/kg); missing condition values form their own group. Rules:

    1. Rows with a step keep it (``step_inferred`` False).
    2. A group of n rows that all lack a step, whose pKa values are all present and distinct,
       gets steps 1..n by ascending pKa, provided the compound appears nowhere (any source or
       condition) with a known step above n or in a group of more than n rows. A lone value
       becomes step 1 only if the compound has no known step and no wider group anywhere.
    3. Exception to 2: a lone value whose compound has exactly one distinct known step
       elsewhere (and no wider group) takes that step (e.g. a source listing only pKa2).
    4. Anything else (mixed known/missing steps in a group, repeated or missing pKa values,
       a lone value where the compound has several known steps, a wider group or higher known
       step elsewhere) stays ``<NA>``, with the reason in ``step_note``.

    Parameters
    ----------
    frame : pandas.DataFrame
        Columns ``compound_id``, ``step`` (Int64, may be NA), ``pka`` [-], ``source_id``,
        ``temperature_k`` [K], ``ionic_strength_molal`` [mol/kg]; any index.

    Returns
    -------
    pandas.DataFrame
        Same index: ``step`` (Int64, filled where inferred), ``step_inferred`` (bool) and
        ``step_note`` (None, or why a missing step was left missing).

    References
    ----------
    .. [1] IUPAC. Compendium of Chemical Terminology (Gold Book), "stepwise stability
           constant" / successive acid dissociation constants, https://goldbook.iupac.org/
           (numbering convention from memory).

    Examples
    --------
    Phosphoric acid from one source at 298.15 K without step numbers (pKa values: IUPAC
    compilations, from memory):

    >>> import pandas as pd
    >>> f = pd.DataFrame({"compound_id": ["P"] * 3, "step": pd.array([None] * 3, dtype="Int64"),
    ...                   "pka": [12.35, 2.148, 7.198], "source_id": ["s"] * 3,
    ...                   "temperature_k": [298.15] * 3, "ionic_strength_molal": [0.0] * 3})
    >>> infer_steps(f)["step"].tolist()
    [3, 1, 2]
    """
    need = ["compound_id", "step", "pka", "source_id", "temperature_k", "ionic_strength_molal"]
    missing_cols = [c for c in need if c not in frame.columns]
    if missing_cols:
        raise ValueError(f"infer_steps: missing column(s) {missing_cols}; required: {need}")
    index = frame.index
    n_rows = len(index)
    step = pd.array(frame["step"], dtype="Int64")
    pka = pd.to_numeric(frame["pka"], errors="coerce").to_numpy(dtype=float)

    # group codes: one integer per (source, compound, T rounded, I rounded), missing values
    # forming their own group (like groupby dropna=False), all by factorizing each key once
    compound = _group_codes(frame["compound_id"].to_numpy(dtype=object))
    group = np.zeros(n_rows, dtype=np.int64)
    span = 1  # number of distinct values ``group`` can take so far
    for codes in (
        _group_codes(frame["source_id"].to_numpy(dtype=object)),
        compound,
        _group_codes(pd.to_numeric(frame["temperature_k"], errors="coerce").round(2).to_numpy()),
        _group_codes(
            pd.to_numeric(frame["ionic_strength_molal"], errors="coerce").round(4).to_numpy()
        ),
    ):
        n_values = int(codes.max(initial=0)) + 1
        if span * n_values >= 2**62:  # keep the combined code inside int64
            group = _group_codes(group)
            span = int(group.max(initial=0)) + 1
        group = group * n_values + codes
        span *= n_values
    group = _group_codes(group)
    n_groups = int(group.max(initial=-1)) + 1

    known = ~step.isna()
    has_pka = ~np.isnan(pka)
    n_rows_g = np.bincount(group, minlength=n_groups)
    n_rows_of = n_rows_g[group]
    n_known = np.bincount(group, weights=known, minlength=n_groups)[group]
    n_pka = np.bincount(group, weights=has_pka, minlength=n_groups)[group]
    # a pKa value met twice in its group
    pair = _group_codes(group * (n_rows + 1) + _group_codes(pka))
    dup = (np.bincount(pair)[pair] > 1) & has_pka
    any_dup = np.bincount(group, weights=dup, minlength=n_groups)[group] > 0

    # known steps per compound: number of distinct steps, highest and lowest
    n_compounds = int(compound.max(initial=-1)) + 1
    k_comp = compound[known]
    k_step = step[known].to_numpy(dtype=np.int64)
    k_order = np.lexsort((k_step, k_comp))
    k_comp, k_step = k_comp[k_order], k_step[k_order]
    new_compound = np.r_[True, k_comp[1:] != k_comp[:-1]] if len(k_comp) else np.zeros(0, bool)
    new_step = (
        new_compound | np.r_[True, k_step[1:] != k_step[:-1]] if len(k_comp) else new_compound
    )
    k_n_c = np.bincount(k_comp, weights=new_step, minlength=n_compounds).astype(int)
    k_max_c = np.full(n_compounds, np.nan)
    k_min_c = np.full(n_compounds, np.nan)
    last_of_compound = np.r_[new_compound[1:], True] if len(k_comp) else new_compound
    k_min_c[k_comp[new_compound]] = k_step[new_compound]
    k_max_c[k_comp[last_of_compound]] = k_step[last_of_compound]
    k_n = k_n_c[compound]
    k_max = k_max_c[compound]
    k_only = k_min_c[compound]

    # largest group of the same compound anywhere: a bigger group elsewhere means this one
    # may be a subset of the steps
    widest_c = np.zeros(n_compounds, dtype=np.int64)
    compound_of_group = np.zeros(n_groups, dtype=np.int64)
    compound_of_group[group] = compound
    np.maximum.at(widest_c, compound_of_group, n_rows_g)
    widest = widest_c[compound]
    all_missing = n_known == 0
    clean = all_missing & (n_pka == n_rows_of) & ~any_dup
    lone = n_rows_of == 1
    # a compound without a known step has k_max NaN: it never limits the group
    covers = (widest <= n_rows_of) & ((k_n == 0) | ~(k_max > n_rows_of))
    rule_rank = clean & ~lone & covers
    rule_lone_free = clean & lone & (k_n == 0) & (widest == 1)
    rule_lone_known = clean & lone & (k_n == 1) & (widest == 1)
    inferred = rule_rank | rule_lone_free | rule_lone_known

    # rank of the pKa within its group (ascending), needed only where rule 2 ranks a group
    # (all its pKa values present and distinct; a lone value has rank 1)
    rank = np.ones(n_rows, dtype=np.int64)
    ranked = np.flatnonzero(rule_rank)
    if len(ranked):
        order = ranked[np.lexsort((pka[ranked], group[ranked]))]
        sorted_group = group[order]
        starts = np.flatnonzero(np.r_[True, sorted_group[1:] != sorted_group[:-1]])
        sizes = np.diff(np.r_[starts, len(order)])
        rank[order] = np.arange(len(order)) - np.repeat(starts, sizes) + 1

    value = np.where(rule_lone_known, np.nan_to_num(k_only), rank)
    filled = step.copy()
    filled[inferred] = value[inferred].astype(np.int64)

    missing_step = ~known
    reason = np.select(
        [
            ~missing_step | inferred,
            ~all_missing,
            ~has_pka | (n_pka != n_rows_of),
            any_dup,
            clean & lone & (k_n > 1),
            clean & (widest > n_rows_of),
        ],
        np.arange(6),
        default=6,
    )
    notes = np.array(
        [
            None,
            "other rows of this source, compound and condition carry steps; a partial set is not completed",
            "a pKa value in this group is missing",
            "repeated pKa values in this group; their order is ambiguous",
            "single value without step; the compound has several known steps elsewhere",
            "another source or condition lists more values for this compound; the group may be a subset",
            "the compound has a higher known step elsewhere than this group holds; the group may be a subset",
        ],
        dtype=object,
    )
    return pd.DataFrame(
        {
            "step": pd.Series(filled, index=index, dtype="Int64"),
            "step_inferred": pd.Series(inferred, index=index, dtype=bool),
            "step_note": pd.Series(notes[reason], index=index, dtype=object),
        },
        index=index,
    )


def _group_codes(values: np.ndarray) -> np.ndarray:
    """Codes 0..k-1 of the distinct values, missing values sharing one code of their own."""
    return pd.factorize(values, use_na_sentinel=False)[0].astype(np.int64, copy=False)
