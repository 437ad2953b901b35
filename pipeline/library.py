"""Read-only API over a published kaledger database: find compounds, pKa at the user's conditions.

>>> from pipeline import Library                                   # doctest: +SKIP
>>> with Library.open("build/kaledger.duckdb") as lib:              # doctest: +SKIP
...     r = lib.pka("Tris", temperature="37 °C", ionic_strength=0.15)
...     r.pka, r.uncertainty, r.model, r.value_ids

Finding a compound
------------------
:meth:`Library.find` takes a name, CAS Registry Number, SMILES or InChIKey. The kind is
recognised from the text (InChIKey pattern, CAS pattern, else a name, else a SMILES) or forced
with ``by=``. A name matches ``compounds.name`` first; only when none matches are the names the
sources used (``measurements.name_reported``) searched, leaving out rows whose name and structure
disagree (``name_structure_mismatch`` findings). A CAS matches ``compounds.cas`` first, then the
CAS numbers the sources gave (salts carry their own). A SMILES is standardized to its parent with
:func:`pipeline.identity.standardize_structures` and matched by InChIKey. Several matches raise
:class:`AmbiguousCompoundError` listing the candidates; none raises
:class:`UnknownCompoundError`. Every query passes the user's text as a SQL parameter.

Value at the requested conditions
---------------------------------
:meth:`Library.pka` picks one ``recommended`` row (the *anchor*) for the compound and step, in
this order of preference: not *Doubtful*; same temperature (within 0.05 K), ionic strength
(within 0.001 mol/kg) and constant type as asked; thermodynamic at I = 0; nearest temperature;
nearest ionic strength. It then

1. converts the anchor to a thermodynamic constant at its own ionic strength
   (:func:`pipeline.physchem.convert_constant_type`, Davies by default, charge of the acid form
   from the library's measurements),
2. transfers it in temperature with the integrated van 't Hoff equation
   (:func:`pipeline.physchem.van_t_hoff`). ΔH° (and ΔCp°) come from a fit of the library's own
   thermodynamic I = 0 values of that equilibrium (:func:`pipeline.physchem.fit_van_t_hoff`) when
   they span at least 3 temperatures (ΔCp° is fitted as well from 5 temperatures and kept when it
   exceeds twice its standard error; one point whose residual exceeds 3 residual standard
   deviations of the refit without it, floor 0.002, is left out and named), else from the
   shipped table ``pipeline/data/enthalpies.csv`` (Goldberg et al. 2002 and published pKa(T)
   equations, each row with its source and status), else the transfer is refused,
3. converts to the requested constant type at the requested ionic strength.

Uncertainty rule (standard uncertainty, k = 1), u² = u_anchor² + u_T² + u_I²:

* u_anchor: the recommended value's ``pka_uncertainty``; 0.02 when missing (common practice).
* u_T = |x_H| u(ΔH°) ⊕ |x_Cp| u(ΔCp°), x_H and x_Cp the coefficients of ΔH° and ΔCp° in the van
  't Hoff equation; from the fit's covariance when fitted; u(ΔCp°) = 150 J/(K mol) around an
  assumed ΔCp° = 0 when ΔCp° is not known (common practice: the size of ΔCp° of carboxylic
  acids). **Extrapolation:** when the target temperature lies outside the span of the library's
  own temperatures for the equilibrium (always so when it holds one temperature), u_T is
  doubled.
* u_I = f |Δ_act|, Δ_act the total activity correction applied, f = 0.1 up to 0.1 mol/kg and
  0.25 above (the Davies equation is an approximation beyond 0.1 mol/kg; common practice).

Valid conditions: 273.15-373.15 K (liquid water, IAPWS) and 0-0.5 mol/kg (Davies); outside
raises :class:`ConditionsOutOfRangeError`.

References
----------
.. [1] Clarke, E. C. W.; Glew, D. N. Evaluation of Thermodynamic Functions from Equilibrium
   Constants. Trans. Faraday Soc. 1966, 62, 539-547. doi:10.1039/TF9666200539
.. [2] Goldberg, R. N.; Kishore, N.; Lennen, R. M. Thermodynamic Quantities for the Ionization
   Reactions of Buffers. J. Phys. Chem. Ref. Data 2002, 31, 231-370. doi:10.1063/1.1416902
.. [3] Davies, C. W. Ion Association; Butterworths: London, 1962; p 41.
.. [4] JCGM 100:2008, Evaluation of measurement data - Guide to the expression of uncertainty in
   measurement (GUM), §5.1 (propagation of uncertainty, uncorrelated inputs).
"""

from __future__ import annotations

import csv
import difflib
import io
import json
import math
import re
from collections.abc import Iterable
from dataclasses import asdict, dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from pipeline import physchem

__all__ = [
    "DEFAULT_UNCERTAINTY",
    "AmbiguousCompoundError",
    "Compound",
    "ConditionsOutOfRangeError",
    "EnthalpyRow",
    "Library",
    "LibraryLookupError",
    "PkaResult",
    "StepError",
    "UnknownCompoundError",
    "activity_uncertainty",
    "enthalpy_table",
    "temperature_uncertainty",
]

#: pKa standard uncertainty assumed when the library gives none (common practice).
DEFAULT_UNCERTAINTY = 0.02
#: u(ΔCp°) [J/(K mol)] around an assumed ΔCp° = 0 (common practice, carboxylic-acid size).
DEFAULT_U_DELTA_CP = 150.0
#: Factor on u_T outside the span of the library's own temperatures.
EXTRAPOLATION_FACTOR = 2.0
#: Fraction of the activity correction taken as its uncertainty (<= / > 0.1 mol/kg).
ACTIVITY_FRACTION_LOW = 0.1
ACTIVITY_FRACTION_HIGH = 0.25
#: Same-condition tolerances: temperature [K], ionic strength [mol/kg].
T_MATCH_K = 0.05
I_MATCH = 1e-3
#: Valid target conditions.
T_RANGE_K = (physchem.T_MIN_K, physchem.T_MAX_K)
LOOKUP_KINDS: tuple[str, ...] = ("name", "cas", "smiles", "inchikey")
CONSTANT_TYPES = physchem.CONSTANT_TYPES
#: Activity models usable for a lookup (SIT needs named species and a medium).
LOOKUP_ACTIVITY_MODELS: tuple[str, ...] = ("davies", "extended_debye_huckel")

_INCHIKEY = re.compile(r"^[A-Z]{14}-[A-Z]{10}-[A-Z]$")
_CAS = re.compile(r"^\d{2,7}-\d{2}-\d$")
_NORM_SQL = "lower(trim(regexp_replace({col}, '\\s+', ' ', 'g')))"


# ---------------------------------------------------------------------------------------------
# errors
# ---------------------------------------------------------------------------------------------


class LibraryLookupError(LookupError):
    """Base of the lookup errors of :class:`Library` (a :class:`LookupError`)."""


class UnknownCompoundError(LibraryLookupError):
    """No compound in the library matches the query; ``suggestions`` lists close names."""

    def __init__(self, message: str, query: str = "", suggestions: Iterable[str] = ()) -> None:
        super().__init__(message)
        self.query = query
        self.suggestions = tuple(suggestions)


class AmbiguousCompoundError(LibraryLookupError):
    """Several compounds match; ``candidates`` holds (compound_id, name) pairs."""

    def __init__(self, message: str, query: str = "",
                 candidates: Iterable[tuple[str, str | None]] = ()) -> None:
        super().__init__(message)
        self.query = query
        self.candidates = tuple(candidates)


class StepError(LibraryLookupError):
    """The step asked for is not in the library, or a step is needed and none was given."""


class ConditionsOutOfRangeError(ValueError):
    """Requested conditions lie outside the range the transfer models cover."""


# ---------------------------------------------------------------------------------------------
# records
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Compound:
    """A compound of the library (one row of ``compounds`` plus the names sources used)."""

    compound_id: str
    name: str | None
    inchikey: str | None
    smiles: str | None
    cas: str | None
    formula: str | None
    synonyms: tuple[str, ...] = ()


@dataclass(frozen=True)
class PkaResult:
    """A pKa at the requested conditions with its uncertainty, model and provenance.

    Attributes
    ----------
    pka : float
        pKa [-] of ``constant_type`` at ``temperature_k`` [K] and ``ionic_strength_molal``
        [mol/kg].
    uncertainty : float
        Standard uncertainty [pK units] by the rule in the module docstring.
    model : str
        The steps applied, in words.
    value_ids : tuple of str
        Measurements behind the anchor (and behind the temperature fit, when one was used).
    """

    compound_id: str
    name: str | None
    step: int
    pka: float
    uncertainty: float
    temperature_k: float
    ionic_strength_molal: float
    constant_type: str
    model: str
    category: str
    extrapolated: bool
    anchor_pka: float
    anchor_temperature_k: float
    anchor_ionic_strength_molal: float
    anchor_constant_type: str
    charge: int
    charge_source: str
    activity_model: str | None
    delta_h_j_mol: float | None
    delta_cp_j_mol_k: float | None
    enthalpy_source: str | None
    recommendation_ids: tuple[str, ...]
    value_ids: tuple[str, ...]
    uncertainty_parts: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON dictionary of every field."""
        d = asdict(self)
        d["recommendation_ids"] = list(self.recommendation_ids)
        d["value_ids"] = list(self.value_ids)
        return d


@dataclass(frozen=True)
class EnthalpyRow:
    """One row of ``pipeline/data/enthalpies.csv`` (ΔH° [J/mol], ΔCp° [J/(K mol)])."""

    inchikey: str
    name: str
    step: int
    delta_h_j_mol: float
    u_delta_h_j_mol: float
    delta_cp_j_mol_k: float | None
    u_delta_cp_j_mol_k: float | None
    status: str
    source: str


def _opt_float(text: str) -> float | None:
    return float(text) if text.strip() else None


@lru_cache(maxsize=1)
def enthalpy_table() -> dict[tuple[str, int], EnthalpyRow]:
    """The shipped ΔH°/ΔCp° table keyed by (InChIKey, step).

    Returns
    -------
    dict
        (inchikey, step) -> :class:`EnthalpyRow`; ΔH° [J/mol], ΔCp° [J/(K mol)] at 298.15 K.

    References
    ----------
    .. [1] Goldberg, R. N.; Kishore, N.; Lennen, R. M. J. Phys. Chem. Ref. Data 2002, 31,
       231-370. doi:10.1063/1.1416902 (Tris, HEPES, MES, MOPS); other rows are computed from
       the pKa(T) equation their ``source`` names.

    Examples
    --------
    >>> enthalpy_table()[("LENZDBCJOHFCAS-UHFFFAOYSA-N", 1)].delta_h_j_mol  # Tris, Goldberg 2002
    47450.0
    """
    text = resources.files("pipeline").joinpath("data/enthalpies.csv").read_text("utf-8")
    body = "\n".join(line for line in text.splitlines() if not line.startswith("#"))
    out: dict[tuple[str, int], EnthalpyRow] = {}
    for rec in csv.DictReader(io.StringIO(body)):
        row = EnthalpyRow(
            inchikey=rec["inchikey"],
            name=rec["name"],
            step=int(rec["step"]),
            delta_h_j_mol=float(rec["delta_h_j_mol"]),
            u_delta_h_j_mol=float(rec["u_delta_h_j_mol"]),
            delta_cp_j_mol_k=_opt_float(rec["delta_cp_j_mol_k"]),
            u_delta_cp_j_mol_k=_opt_float(rec["u_delta_cp_j_mol_k"]),
            status=rec["status"],
            source=rec["source"],
        )
        out[(row.inchikey, row.step)] = row
    return out


# ---------------------------------------------------------------------------------------------
# uncertainty rule
# ---------------------------------------------------------------------------------------------


def temperature_uncertainty(
    t_k: float, t_ref_k: float, covariance: np.ndarray, extrapolated: bool = False
) -> float:
    """Standard uncertainty of a van 't Hoff transfer from θ to T.

    u_T² = J Σ Jᵀ with J = (x_H, x_Cp), x_H = (1/T - 1/θ)/(R ln10) and
    x_Cp = -(θ/T - 1 + ln(T/θ))/(R ln10) the sensitivities of pKa(T) to ΔH° and ΔCp° in the
    integrated van 't Hoff equation [1]_ and Σ the covariance of (ΔH°, ΔCp°), propagated by the
    GUM law [2]_; multiplied by ``EXTRAPOLATION_FACTOR`` (2) outside the span of the library's
    own temperatures (kaledger's rule, common practice).

    Parameters
    ----------
    t_k, t_ref_k : float
        Target T and anchor θ temperature [K].
    covariance : numpy.ndarray
        2×2 covariance of (ΔH° [J/mol], ΔCp° [J/(K mol)]).
    extrapolated : bool
        Whether T lies outside the library's temperature span.

    Returns
    -------
    float
        u_T [pK units].

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Trans. Faraday Soc. 1966, 62, 539-547.
       doi:10.1039/TF9666200539
    .. [2] JCGM 100:2008 (GUM), §5.1.

    Examples
    --------
    Tris 25 → 37 °C with u(ΔH°) = 500 J/mol and u(ΔCp°) = 30 J/(K mol):

    >>> round(temperature_uncertainty(310.15, 298.15, np.diag([500.0**2, 30.0**2])), 4)
    0.0036
    """
    x_h, x_cp = physchem.van_t_hoff_coefficients(np.asarray(float(t_k)), np.asarray(float(t_ref_k)))
    jac = np.array([float(x_h), float(x_cp)])
    u = math.sqrt(max(float(jac @ np.asarray(covariance) @ jac), 0.0))
    return u * (EXTRAPOLATION_FACTOR if extrapolated else 1.0)


def activity_uncertainty(correction: float, ionic_strength: float) -> float:
    """Standard uncertainty of an activity correction: a fixed fraction of its size.

    u_I = f |Δ|, f = 0.1 up to 0.1 mol/kg and 0.25 above, where the Davies equation [1]_ is
    only an approximation (kaledger's rule, common practice).

    Parameters
    ----------
    correction : float
        Total activity correction applied to the pKa [pK units].
    ionic_strength : float
        Largest ionic strength involved [mol/kg].

    Returns
    -------
    float
        u_I [pK units].

    References
    ----------
    .. [1] Davies, C. W. Ion Association; Butterworths: London, 1962; p 41.

    Examples
    --------
    >>> activity_uncertainty(-0.2, 0.05), activity_uncertainty(-0.2, 0.15)
    (0.02, 0.05)
    """
    frac = ACTIVITY_FRACTION_LOW if ionic_strength <= 0.1 else ACTIVITY_FRACTION_HIGH
    return round(frac * abs(float(correction)), 15)


# ---------------------------------------------------------------------------------------------
# per-compound data held after the first query
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Rec:
    recommendation_id: str
    step: int
    temperature_k: float
    ionic_strength_molal: float
    constant_type: str
    pka: float
    pka_uncertainty: float
    category: str
    value_ids: tuple[str, ...]


@dataclass(frozen=True)
class _Temperature:
    """How to move one equilibrium in temperature."""

    delta_h: float
    delta_cp: float
    cov: np.ndarray  # covariance of (ΔH, ΔCp) [J/mol, J/(K mol)]
    cp_known: bool
    source: str
    t_span: tuple[float, float]
    rec_ids: tuple[str, ...]
    value_ids: tuple[str, ...]


@dataclass
class _Data:
    compound: Compound
    recs: dict[int, list[_Rec]]
    charges: dict[int, int]
    temperature: dict[int, _Temperature | None] = field(default_factory=dict)


def _norm(text: str) -> str:
    return " ".join(str(text).split()).lower()


def _fmt_t(t: float) -> str:
    return f"{t:.2f} K"


_T_FAST = re.compile(r"^\s*([+-]?\d+(?:\.\d*)?)\s*(°\s*C|℃|C|K)\s*$")


def _parse_temperature(temperature: float | str) -> float:
    """Temperature [K] from a number [K] or text with a unit (``pipeline.parse`` rules).

    The common spellings ``37C``, ``37 °C``, ``310.15 K`` take a regular-expression fast path
    (T/K = t/°C + 273.15, SI Brochure §2.3.1); anything else goes to
    :func:`pipeline.parse.parse_temperature`.

    Examples
    --------
    >>> _parse_temperature("37C"), _parse_temperature("310.15 K"), _parse_temperature(300.0)
    (310.15, 310.15, 300.0)
    """
    if isinstance(temperature, str):
        m = _T_FAST.match(temperature)
        if m:
            value = float(m.group(1))
            return round(value + 273.15, 10) if m.group(2) != "K" else value
        from pipeline.parse import parse_temperature

        out = parse_temperature(pd.Series([temperature]))
        err = out.loc[0, "error"]
        if err:
            raise ConditionsOutOfRangeError(f"{err}; e.g. '37 °C' or '310.15 K'")
        return float(out.loc[0, "kelvin"])
    return float(temperature)


def _parse_ionic_strength(ionic_strength: float | str) -> float:
    """Ionic strength [mol/kg] from a number or text (a bare number is mol/kg).

    Examples
    --------
    >>> _parse_ionic_strength("0.15"), _parse_ionic_strength("0.15 mol/kg")
    (0.15, 0.15)
    """
    if isinstance(ionic_strength, str):
        try:
            return float(ionic_strength)
        except ValueError:
            pass
        from pipeline.parse import parse_ionic_strength

        out = parse_ionic_strength(pd.Series([ionic_strength]), bare_unit="mol/kg")
        err = out.loc[0, "error"]
        if err:
            raise ConditionsOutOfRangeError(f"{err}; give the ionic strength in mol/kg")
        if out.loc[0, "unit"] == "mol/L" and float(out.loc[0, "value"]) != 0.0:
            raise ConditionsOutOfRangeError(
                f"ionic strength {ionic_strength!r} is in mol/L; the library works in mol/kg "
                "(give e.g. '0.15 mol/kg' or 0.15)"
            )
        return float(out.loc[0, "value"])
    return float(ionic_strength)


# ---------------------------------------------------------------------------------------------
# the library
# ---------------------------------------------------------------------------------------------


_COMPOUND_COLS = "c.compound_id, c.name, c.inchikey, c.smiles, c.cas, c.formula"
_SQL_BY_NAME = (
    f"SELECT {_COMPOUND_COLS} FROM compounds c "
    f"WHERE {_NORM_SQL.format(col='c.name')} = ? ORDER BY c.compound_id"
)
_SQL_BY_SYNONYM = (
    f"SELECT {_COMPOUND_COLS} FROM compounds c WHERE c.compound_id IN ("
    f"SELECT m.compound_id FROM measurements m WHERE {_NORM_SQL.format(col='m.name_reported')} = ? "
    "AND m.value_id NOT IN (SELECT f.value_id FROM findings f "
    "WHERE f.rule = 'name_structure_mismatch' AND f.value_id IS NOT NULL)) "
    "ORDER BY c.compound_id"
)
_SQL_BY_CAS = f"SELECT {_COMPOUND_COLS} FROM compounds c WHERE c.cas = ? ORDER BY c.compound_id"
_SQL_BY_CAS_REPORTED = (
    f"SELECT {_COMPOUND_COLS} FROM compounds c WHERE c.compound_id IN ("
    "SELECT m.compound_id FROM measurements m WHERE m.cas_reported = ?) ORDER BY c.compound_id"
)
_SQL_BY_KEY = (
    f"SELECT {_COMPOUND_COLS} FROM compounds c WHERE c.inchikey = ? OR c.compound_id = ? "
    "ORDER BY c.compound_id"
)
_SQL_MEASURED = (
    "SELECT coalesce(step, 0), charge, name_reported, status FROM measurements "
    "WHERE compound_id = ?"
)
_SQL_RECOMMENDED = """
SELECT r.recommendation_id, coalesce(r.step, 0), r.temperature_k, r.ionic_strength_molal,
       r.constant_type, r.pka, r.pka_uncertainty, r.category, l.inputs
FROM recommended r
LEFT JOIN lineage l ON l.target_id = r.recommendation_id AND l.operation = 'consensus'
WHERE r.compound_id = ?
ORDER BY 2, r.temperature_k, r.ionic_strength_molal, r.constant_type
"""
_SQL_ALL_NAMES = "SELECT name FROM compounds WHERE name IS NOT NULL"


class Library:
    """Read-only view of a published kaledger database.

    Open with :meth:`open`; use as a context manager or call :meth:`close`. Compound
    resolutions and each compound's recommended rows are kept after their first query (the
    file is opened read-only and does not change under the open connection).
    """

    def __init__(self, connection: duckdb.DuckDBPyConnection, path: Path) -> None:
        self._con = connection
        self.path = path
        self._resolved: dict[tuple[str, str], str] = {}
        self._data: dict[str, _Data] = {}
        self._compound_rows: dict[str, tuple[Any, ...]] = {}

    # -- life cycle ---------------------------------------------------------------------------

    @classmethod
    def open(cls, path: Path | str) -> Library:
        """Open a published database read-only.

        Raises
        ------
        FileNotFoundError
            No file at ``path`` (the message says to run ``kaledger build``).
        """
        p = Path(path)
        if not p.is_file():
            raise FileNotFoundError(f"{p}: no kaledger database here; run 'kaledger build' first")
        return cls(duckdb.connect(str(p), read_only=True), p)

    _shared: dict[str, tuple[tuple[int, int, int], Library]] = {}

    @classmethod
    def shared(cls, path: Path | str) -> Library:
        """A process-wide open library for ``path``, reopened when the file is replaced.

        For callers that look up repeatedly in one process (the ``lookup`` command called
        in-process, a service): the connection and the rows already read are kept while the
        file's identity (inode, size, modification time) is unchanged; a new build publishes a
        new file (atomic replace), which is then opened afresh. Do not close the result.
        """
        p = Path(path)
        try:
            st = p.stat()
        except FileNotFoundError:
            raise FileNotFoundError(f"{p}: no kaledger database here; run 'kaledger build' first") from None
        ident = (st.st_ino, st.st_size, st.st_mtime_ns)
        key = str(p.resolve())
        held = cls._shared.get(key)
        if held is not None and held[0] == ident:
            return held[1]
        if held is not None:
            # close first: DuckDB shares one instance per path within a process, so a
            # connection left open would serve the replaced file's contents
            del cls._shared[key]
            held[1].close()
        lib = cls.open(p)
        cls._shared[key] = (ident, lib)
        return lib

    def close(self) -> None:
        """Close the connection."""
        self._con.close()

    def __enter__(self) -> Library:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- finding compounds --------------------------------------------------------------------

    def _rows(self, sql: str, params: list[Any]) -> list[tuple[Any, ...]]:
        return self._con.execute(sql, params).fetchall()

    @staticmethod
    def _kind_of(text: str) -> str:
        if _INCHIKEY.match(text):
            return "inchikey"
        if _CAS.match(text):
            return "cas"
        return "name"

    def find(self, query: str | Compound, by: str | None = None) -> Compound:
        """Find one compound by name, CAS Registry Number, SMILES or InChIKey.

        Parameters
        ----------
        query : str or Compound
            The text to look up (a :class:`Compound` is returned as found).
        by : {None, "name", "cas", "smiles", "inchikey"}
            Kind of ``query``; None recognises it (InChIKey, CAS, name, then SMILES).

        Raises
        ------
        UnknownCompoundError, AmbiguousCompoundError
            No match / several matches (the candidates are listed).
        """
        if isinstance(query, Compound):
            return query
        text = str(query).strip()
        if by is not None and by not in LOOKUP_KINDS:
            raise ValueError(f"unknown lookup kind by={by!r}; valid choices: {', '.join(LOOKUP_KINDS)}")
        if not text:
            raise UnknownCompoundError("empty compound query; give a name, CAS, SMILES or InChIKey")
        kind = by or self._kind_of(text)
        key = (kind if by else "auto", text)
        cid = self._resolved.get(key)
        if cid is None:
            cid = self._resolve(text, kind, auto=by is None)
            self._resolved[key] = cid
        return self._compound_data(cid).compound

    def _pick(self, rows: list[tuple[Any, ...]], query: str, how: str) -> str | None:
        ids = sorted({r[0] for r in rows})
        if not ids:
            return None
        if len(ids) > 1:
            cands = [(r[0], r[1]) for r in rows]
            listed = "; ".join(f"{name or '?'} ({cid})" for cid, name in cands)
            raise AmbiguousCompoundError(
                f"{query!r} matches {len(ids)} compounds by {how}: {listed}; "
                "look up one of them by its InChIKey",
                query,
                cands,
            )
        self._compound_rows[str(ids[0])] = rows[0]
        return str(ids[0])

    def _resolve(self, text: str, kind: str, *, auto: bool) -> str:
        if kind == "inchikey":
            cid = self._pick(self._rows(_SQL_BY_KEY, [text, text]), text, "InChIKey")
        elif kind == "cas":
            from pipeline.identity import cas_check_digit_ok

            if not bool(cas_check_digit_ok(pd.Series([text]))[0]):
                raise UnknownCompoundError(
                    f"CAS {text!r} fails the check-digit rule; check the number", text
                )
            cid = self._pick(self._rows(_SQL_BY_CAS, [text]), text, "CAS")
            if cid is None:
                cid = self._pick(
                    self._rows(_SQL_BY_CAS_REPORTED, [text]), text, "CAS given by the sources"
                )
        elif kind == "smiles":
            cid = self._by_smiles(text)
        else:
            norm = _norm(text)
            cid = self._pick(self._rows(_SQL_BY_NAME, [norm]), text, "name")
            if cid is None:
                cid = self._pick(self._rows(_SQL_BY_SYNONYM, [norm]), text, "source name")
            if cid is None and auto:
                try:
                    cid = self._by_smiles(text, quiet=True)
                except UnknownCompoundError:
                    cid = None
        if cid is None:
            names = [r[0] for r in self._rows(_SQL_ALL_NAMES, [])]
            close = difflib.get_close_matches(text.lower(), [n.lower() for n in names], n=5)
            hint = f"; close names: {', '.join(close)}" if close else ""
            raise UnknownCompoundError(
                f"no compound {text!r} in {self.path.name} (searched by {kind}"
                f"{', then as SMILES' if auto and kind == 'name' else ''}){hint}",
                text,
                close,
            )
        return cid

    def _by_smiles(self, text: str, *, quiet: bool = False) -> str | None:
        from rdkit import Chem, rdBase

        from pipeline.identity import standardize_structures

        with rdBase.BlockLogs():
            if Chem.MolFromSmiles(text) is None:
                if quiet:
                    return None
                raise UnknownCompoundError(f"SMILES {text!r} could not be parsed", text)
        out = standardize_structures(pd.Series([text]), None, n_jobs=1)
        key = out.loc[0, "inchikey"]
        if not key:
            raise UnknownCompoundError(f"SMILES {text!r}: {out.loc[0, 'error']}", text)
        return self._pick(self._rows(_SQL_BY_KEY, [key, key]), text, f"structure ({key})")

    # -- per-compound data --------------------------------------------------------------------

    def _compound_data(self, compound_id: str) -> _Data:
        data = self._data.get(compound_id)
        if data is not None:
            return data
        row = self._compound_rows.get(compound_id)
        if row is None:
            found = self._rows(_SQL_BY_KEY, [compound_id, compound_id])
            if not found:
                raise UnknownCompoundError(
                    f"no compound {compound_id!r} in {self.path.name}", compound_id
                )
            row = found[0]
        measured = self._rows(_SQL_MEASURED, [compound_id])
        synonyms = tuple(sorted({r[2] for r in measured if r[2] is not None}))
        compound = Compound(*row, synonyms=synonyms)  # type: ignore[arg-type]
        recs: dict[int, list[_Rec]] = {}
        for rid, step, t, i, ctype, pka, u, cat, inputs in self._rows(_SQL_RECOMMENDED, [compound_id]):
            ids = tuple(json.loads(inputs)) if inputs else ()
            u_f = float(u) if u is not None and math.isfinite(float(u)) else math.nan
            recs.setdefault(int(step), []).append(
                _Rec(rid, int(step), float(t), float(i), ctype, float(pka), u_f, cat, ids)
            )
        counts: dict[int, dict[int, int]] = {}
        for step, charge, _name, status in measured:
            if charge is not None and status != "excluded":
                per = counts.setdefault(int(step), {})
                per[int(charge)] = per.get(int(charge), 0) + 1
        # most frequent charge per step (ties: the lower charge)
        charges = {st: min(per, key=lambda z, per=per: (-per[z], z)) for st, per in counts.items()}
        data = _Data(compound, recs, charges)
        self._data[compound_id] = data
        return data

    def steps(self, compound: str | Compound) -> tuple[int, ...]:
        """Dissociation steps the library holds for ``compound`` (0 = step not given)."""
        c = self.find(compound)
        return tuple(sorted(self._compound_data(c.compound_id).recs))

    def _charge(self, data: _Data, step: int) -> tuple[int, str]:
        if step in data.charges:
            return data.charges[step], "measurements"
        known = sorted(data.charges)
        if known:
            s0 = known[0]
            return data.charges[s0] - (step - s0), f"measurements (step {s0}, one proton per step)"
        return -(max(step, 1) - 1), "assumed: neutral parent acid"

    def _temperature_model(self, data: _Data, step: int) -> _Temperature | None:
        if step in data.temperature:
            return data.temperature[step]
        recs = [r for r in data.recs.get(step, [])
                if r.constant_type == "thermodynamic" and r.ionic_strength_molal <= I_MATCH
                and r.category != "Doubtful"]
        all_t = [r.temperature_k for r in data.recs.get(step, [])]
        span = (min(all_t), max(all_t)) if all_t else (math.nan, math.nan)
        model: _Temperature | None = None
        if len({round(r.temperature_k, 2) for r in recs}) >= 3:
            model = _fit_series(recs, span)
        if model is None:
            row = enthalpy_table().get((data.compound.inchikey or data.compound.compound_id, step))
            if row is not None:
                cp_known = row.delta_cp_j_mol_k is not None
                u_cp = row.u_delta_cp_j_mol_k if cp_known else DEFAULT_U_DELTA_CP
                model = _Temperature(
                    delta_h=row.delta_h_j_mol,
                    delta_cp=row.delta_cp_j_mol_k or 0.0,
                    cov=np.diag([row.u_delta_h_j_mol**2, (u_cp or 0.0) ** 2]),
                    cp_known=cp_known,
                    source=f"enthalpies.csv: {row.source} [{row.status}]",
                    t_span=span,
                    rec_ids=(),
                    value_ids=(),
                )
        data.temperature[step] = model
        return model

    # -- pKa ----------------------------------------------------------------------------------

    def pka(
        self,
        compound: str | Compound,
        step: int | None = None,
        temperature: float | str = 298.15,
        ionic_strength: float | str = 0.0,
        constant_type: str = "thermodynamic",
        activity_model: str = "davies",
    ) -> PkaResult:
        """pKa of one step of ``compound`` transferred to the requested conditions.

        Parameters
        ----------
        compound : str or Compound
            Name, CAS, SMILES or InChIKey (see :meth:`find`).
        step : int, optional
            Dissociation step (1 = the most protonated form loses its first proton). May be
            omitted when the library holds one step only.
        temperature : float or str
            Temperature [K] as a number, or text with a unit ("37 °C", "310.15 K").
        ionic_strength : float or str
            Ionic strength [mol/kg], 0-0.5.
        constant_type : {"thermodynamic", "concentration", "mixed"}
            Kind of constant wanted.
        activity_model : {"davies", "extended_debye_huckel"}
            Activity model of the ionic-strength conversion.

        Returns
        -------
        PkaResult

        Raises
        ------
        UnknownCompoundError, AmbiguousCompoundError, StepError
            Compound or step not found (candidates / valid steps listed).
        ConditionsOutOfRangeError
            Temperature or ionic strength outside the valid range, or no ΔH° known for a
            needed temperature transfer.
        """
        c = self.find(compound)
        data = self._compound_data(c.compound_id)
        steps = sorted(data.recs)
        if not steps:
            raise StepError(f"{c.name} ({c.compound_id}) has no recommended pKa in the library")
        if step is None:
            if len(steps) > 1:
                raise StepError(
                    f"{c.name} has {len(steps)} dissociation steps in the library; "
                    f"give step= one of {', '.join(map(str, steps))}"
                )
            step = steps[0]
        if step not in data.recs:
            raise StepError(
                f"step {step!r} of {c.name} is not in the library; valid steps: "
                f"{', '.join(map(str, steps))}"
            )
        t = _parse_temperature(temperature)
        i = _parse_ionic_strength(ionic_strength)
        if constant_type not in CONSTANT_TYPES:
            raise ValueError(
                f"unknown constant_type {constant_type!r}; valid choices: {', '.join(CONSTANT_TYPES)}"
            )
        if activity_model not in LOOKUP_ACTIVITY_MODELS:
            raise ValueError(
                f"unknown activity_model {activity_model!r}; valid choices: "
                f"{', '.join(LOOKUP_ACTIVITY_MODELS)}"
            )
        i_max = physchem.ACTIVITY_MODELS[activity_model].max_ionic_strength
        if not (math.isfinite(t) and T_RANGE_K[0] <= t <= T_RANGE_K[1]):
            raise ConditionsOutOfRangeError(
                f"temperature {t:g} K is outside the valid range "
                f"{T_RANGE_K[0]:g}-{T_RANGE_K[1]:g} K (liquid water at 0.1 MPa)"
            )
        if not (math.isfinite(i) and 0.0 <= i <= i_max):
            raise ConditionsOutOfRangeError(
                f"ionic strength {i:g} mol/kg is outside the valid range 0-{i_max:g} mol/kg "
                f"of the {activity_model!r} activity model"
            )
        return self._transfer(data, step, t, i, constant_type, activity_model)

    def pkas(
        self,
        compound: str | Compound,
        temperature: float | str = 298.15,
        ionic_strength: float | str = 0.0,
        constant_type: str = "thermodynamic",
        activity_model: str = "davies",
    ) -> list[PkaResult]:
        """:meth:`pka` for every step the library holds, in step order."""
        c = self.find(compound)
        return [
            self.pka(c, s, temperature, ionic_strength, constant_type, activity_model)
            for s in self.steps(c)
        ]

    def _transfer(self, data: _Data, step: int, t: float, i: float, ctype: str,
                  model: str) -> PkaResult:
        recs = data.recs[step]

        def rank(r: _Rec) -> tuple[bool, bool, bool, float, float]:
            same = (abs(r.temperature_k - t) <= T_MATCH_K
                    and abs(r.ionic_strength_molal - i) <= I_MATCH and r.constant_type == ctype)
            infinite = r.constant_type == "thermodynamic" and r.ionic_strength_molal <= I_MATCH
            return (r.category == "Doubtful", not same, not infinite,
                    abs(r.temperature_k - t), abs(r.ionic_strength_molal - i))

        a = min(recs, key=rank)
        z, z_source = self._charge(data, step)
        p = a.pka
        steps_done: list[str] = []
        rec_ids = [a.recommendation_id]
        value_ids = list(a.value_ids)
        act = 0.0
        u_anchor = a.pka_uncertainty if math.isfinite(a.pka_uncertainty) else DEFAULT_UNCERTAINTY
        u_t = 0.0
        extrapolated = False
        dh: float | None = None
        dcp: float | None = None
        h_source: str | None = None
        used_model: str | None = None
        steps_done.append(
            f"recommended {a.constant_type} pKa {a.pka:.4g} at {_fmt_t(a.temperature_k)}, "
            f"I = {a.ionic_strength_molal:g} mol/kg ({a.category})"
        )
        exact = (abs(a.temperature_k - t) <= T_MATCH_K and abs(a.ionic_strength_molal - i) <= I_MATCH
                 and a.constant_type == ctype)
        # 1. to thermodynamic at the anchor's ionic strength
        if not exact and a.constant_type != "thermodynamic" and a.ionic_strength_molal > 0.0:
            conv = physchem.convert_constant_type(
                p, a.constant_type, "thermodynamic", a.ionic_strength_molal, z, a.temperature_k, model
            )
            act += float(conv.value) - p
            p = float(conv.value)
            used_model = model
            steps_done.append(f"to thermodynamic ({model}, z_acid = {z:+d})")
        # 2. temperature
        if not exact and abs(a.temperature_k - t) > T_MATCH_K:
            tm = self._temperature_model(data, step)
            if tm is None:
                temps = sorted({r.temperature_k for r in recs})
                raise ConditionsOutOfRangeError(
                    f"cannot transfer {data.compound.name} step {step} to {_fmt_t(t)}: no ΔH° "
                    "(the library holds fewer than 3 temperatures and enthalpies.csv has no "
                    f"row); valid temperatures: {', '.join(_fmt_t(x) for x in temps)}"
                )
            conv = physchem.van_t_hoff(p, a.temperature_k, t, tm.delta_h, tm.delta_cp)
            lo, hi = tm.t_span
            extrapolated = not (lo - T_MATCH_K <= t <= hi + T_MATCH_K) or hi - lo < T_MATCH_K
            u_t = temperature_uncertainty(t, a.temperature_k, tm.cov, extrapolated)
            p = float(conv.value)
            dh, dcp, h_source = tm.delta_h, tm.delta_cp, tm.source
            cp_txt = f", ΔCp° = {tm.delta_cp:.4g} J/(K mol)" if tm.cp_known else ", ΔCp° = 0 assumed"
            steps_done.append(
                f"van 't Hoff to {_fmt_t(t)} (ΔH° = {tm.delta_h / 1000:.4g} kJ/mol{cp_txt}; "
                f"{tm.source}){'; extrapolated' if extrapolated else ''}"
            )
            rec_ids += [r for r in tm.rec_ids if r not in rec_ids]
            value_ids += [v for v in tm.value_ids if v not in value_ids]
        # 3. to the requested constant type and ionic strength
        if not exact and ctype != "thermodynamic" and i > 0.0:
            conv = physchem.convert_constant_type(p, "thermodynamic", ctype, i, z, t, model)
            act += float(conv.value) - p
            p = float(conv.value)
            used_model = model
            steps_done.append(f"to {ctype} at I = {i:g} mol/kg ({model}, z_acid = {z:+d})")
        elif not exact and ctype != "thermodynamic":
            steps_done.append(f"{ctype} = thermodynamic at I = 0")
        elif not exact and i > 0.0:
            steps_done.append("a thermodynamic constant does not depend on I")
        if exact:
            steps_done.append("as published")
        u_i = activity_uncertainty(act, max(i, a.ionic_strength_molal))
        u = math.sqrt(u_anchor**2 + u_t**2 + u_i**2)
        return PkaResult(
            compound_id=data.compound.compound_id,
            name=data.compound.name,
            step=step,
            pka=p,
            uncertainty=u,
            temperature_k=t,
            ionic_strength_molal=i,
            constant_type=ctype,
            model="; ".join(steps_done),
            category=a.category,
            extrapolated=extrapolated,
            anchor_pka=a.pka,
            anchor_temperature_k=a.temperature_k,
            anchor_ionic_strength_molal=a.ionic_strength_molal,
            anchor_constant_type=a.constant_type,
            charge=z,
            charge_source=z_source,
            activity_model=used_model,
            delta_h_j_mol=dh,
            delta_cp_j_mol_k=dcp,
            enthalpy_source=h_source,
            recommendation_ids=tuple(rec_ids),
            value_ids=tuple(value_ids),
            uncertainty_parts={"anchor": u_anchor, "temperature": u_t, "ionic_strength": u_i},
        )


# ---------------------------------------------------------------------------------------------
# temperature series fit
# ---------------------------------------------------------------------------------------------

#: Residual scale floor [pK units] for the series outlier test (3-decimal rounding).
SERIES_SCALE_FLOOR = 0.002
SERIES_OUTLIER_SIGMA = 3.0


def _fit(t: np.ndarray, p: np.ndarray) -> physchem.VantHoffFit:
    fit = physchem.fit_van_t_hoff(t, p)
    if t.size >= 5:
        fit_cp = physchem.fit_van_t_hoff(t, p, with_heat_capacity=True)
        se = fit_cp.standard_errors
        if abs(fit_cp.delta_cp) > 2.0 * se[2]:
            return fit_cp
    return fit


def _fit_series(recs: list[_Rec], span: tuple[float, float]) -> _Temperature | None:
    """Fit ΔH° (and ΔCp°) to the library's own I = 0 temperature series of one equilibrium.

    One point is left out when, refitted without it, its residual exceeds
    ``SERIES_OUTLIER_SIGMA`` times the residual standard deviation of the rest (floor
    ``SERIES_SCALE_FLOOR``) and at least 3 temperatures remain (common practice: 3σ test).
    """
    recs = sorted(recs, key=lambda r: r.temperature_k)
    t = np.array([r.temperature_k for r in recs])
    p = np.array([r.pka for r in recs])
    keep = np.ones(t.size, dtype=bool)
    dropped = ""
    fit = _fit(t, p)
    if t.size >= 4:
        worst = int(np.argmax(np.abs(fit.residuals)))
        keep[worst] = False
        refit = _fit(t[keep], p[keep])
        x_h, x_cp = physchem.van_t_hoff_coefficients(np.asarray(t[worst]), np.asarray(refit.t_ref_k))
        pred = refit.pka_ref + refit.delta_h * float(x_h) + refit.delta_cp * float(x_cp)
        n_par = 3 if refit.with_heat_capacity else 2
        dof = max(int(keep.sum()) - n_par, 1)
        scale = max(math.sqrt(float(np.sum(refit.residuals**2)) / dof), SERIES_SCALE_FLOOR)
        if abs(p[worst] - pred) > SERIES_OUTLIER_SIGMA * scale:
            fit = refit
            dropped = (f"; left out {recs[worst].recommendation_id} ({_fmt_t(t[worst])}, "
                       f"pKa {p[worst]:.4g}) as a series outlier")
        else:
            keep[worst] = True
    cov = np.asarray(fit.covariance)
    cov2 = np.zeros((2, 2))
    cov2[0, 0] = cov[1, 1]
    if fit.with_heat_capacity:
        cov2[0, 1] = cov2[1, 0] = cov[1, 2]
        cov2[1, 1] = cov[2, 2]
    else:
        cov2[1, 1] = DEFAULT_U_DELTA_CP**2
    used = [r for r, k in zip(recs, keep, strict=True) if k]
    return _Temperature(
        delta_h=fit.delta_h,
        delta_cp=fit.delta_cp,
        cov=cov2,
        cp_known=fit.with_heat_capacity,
        source=f"fit of the library's {len(used)} temperatures{dropped}",
        t_span=span,
        rec_ids=tuple(r.recommendation_id for r in used),
        value_ids=tuple(v for r in used for v in r.value_ids),
    )
