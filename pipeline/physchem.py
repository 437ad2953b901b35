"""Physical chemistry of aqueous acid-base equilibria for kaledger.

Numpy arrays in, numpy arrays out: this module knows nothing about tables or
files (the one exception is its shipped SIT coefficient table, read with
:mod:`importlib.resources`). Every public function broadcasts its array
arguments, returns ``numpy.ndarray`` (0-d for scalar input), propagates NaN
(a missing value stays missing) and raises :class:`PhysChemRangeError` for any
finite-or-infinite value outside the documented validity range: nothing is
extrapolated silently.

Water properties come from the ``iapws`` package: density from IAPWS-95,
relative permittivity from IAPWS R8-97 and the ionization constant from
IAPWS R11-24 (the 2024 revision; iapws 1.5.5 implements R11-24, not R11-07).
Scalar iapws routines are evaluated once per *unique* input value and the
results broadcast back, so a column of a million rows at ten temperatures
costs ten iapws calls.

Functions that the pipeline uses to change a stored number
(:func:`pkb_to_pka`, :func:`kb_to_pka`, :func:`convert_constant_type`,
:func:`van_t_hoff`) return a :class:`Conversion`: the converted values plus a
``parameters`` dict naming everything used (pKw, activity model, A(T), ΔH°...),
so every published number can record how it was obtained.

Validity ranges (all enforced):

========================  ==========================================
temperature (default)      273.15-373.15 K, liquid water at 0.101325 MPa
                           (saturated liquid above the boiling point)
Davies                     0 <= I <= 0.5 mol/kg
extended Debye-Hückel      0 <= I <= 0.1 mol/kg
SIT                        0 <= I <= 3.5 mol/kg, 273.15-323.15 K
========================  ==========================================
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from typing import Any, NamedTuple

import iapws
import numpy as np
from iapws import IAPWS95
from iapws._iapws import _Dielectric, _Kw
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import curve_fit

__all__ = [
    "ACTIVITY_MODELS",
    "CONSTANT_TYPES",
    "SIT_MEDIA",
    "ActivityModel",
    "Conversion",
    "PhysChemRangeError",
    "SitCoefficient",
    "VantHoffFit",
    "VantHoffGroupFits",
    "convert_constant_type",
    "debye_huckel_a",
    "debye_huckel_b",
    "dpka_dt",
    "fit_van_t_hoff",
    "fit_van_t_hoff_groups",
    "ka_to_pka",
    "kb_to_pka",
    "log_activity_coefficient",
    "molal_to_molar",
    "molar_to_molal",
    "pka_molal_to_molar",
    "pka_molar_to_molal",
    "pka_to_ka",
    "pkb_to_pka",
    "pkw",
    "pkw_at_ionic_strength",
    "protonation_logk_to_pka",
    "relative_permittivity",
    "sit_coefficients",
    "sit_epsilon",
    "van_t_hoff",
    "water_density",
]

FloatArray = NDArray[np.float64]

#: Molar gas constant [J/(mol K)], CODATA 2018 (exact, N_A k).
GAS_CONSTANT = 8.314462618
LN10 = math.log(10.0)

#: Temperature range [K] for quantities of liquid water at ambient pressure.
T_MIN_K = 273.15
T_MAX_K = 373.15
#: Default pressure [MPa] (1 atm).
P_DEFAULT_MPA = 0.101325
P_MIN_MPA = 0.001
P_MAX_MPA = 100.0
#: Range of IAPWS R11-24 as implemented by iapws when a density is given.
KW_T_RANGE_K = (273.15, 1073.15)
#: The water-ionization release :func:`pkw` implements (through the iapws package).
PKW_RELEASE = "IAPWS R11-24"
KW_RHO_RANGE = (0.0, 1250.0)
#: Range of IAPWS R8-97 (238-873 K) when a density is given.
EPS_T_RANGE_K = (238.0, 873.15)

#: Truesdell & Jones (1974) constants for A [kg^1/2 mol^-1/2] and B
#: [Å^-1 kg^1/2 mol^-1/2] with density in g/cm3.
_TJ_A = 1.82483e6
_TJ_B = 50.2916

_SOURCE_PKW = f"IAPWS R11-24 via iapws {iapws.__version__}"
_SOURCE_RHO = f"IAPWS-95 via iapws {iapws.__version__}"


class PhysChemRangeError(ValueError):
    """A value lies outside the validity range of a formula or model.

    The message names the quantity, echoes (up to five of) the offending
    values and states the valid range.

    Examples
    --------
    >>> try:
    ...     pkw(400.0)
    ... except PhysChemRangeError as err:
    ...     print(str(err).split(";")[0])
    temperature_k out of range: 400 K (1 value)
    """


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------


def _as_float(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


def _fmt(values: FloatArray) -> str:
    return ", ".join(f"{v:.10g}" for v in values)


def _check_range(
    name: str,
    x: FloatArray,
    lo: float,
    hi: float,
    unit: str,
    *,
    lo_open: bool = False,
    context: str = "",
) -> None:
    """Raise PhysChemRangeError for non-NaN values outside [lo, hi] (or (lo, hi])."""
    low_ok = (x > lo) if lo_open else (x >= lo)
    bad = ~np.isnan(x) & ~(low_ok & (x <= hi))
    if np.any(bad):
        offenders = np.unique(x[bad])
        n_bad = int(np.count_nonzero(bad))
        shown = _fmt(offenders[:5]) + (", ..." if offenders.size > 5 else "")
        bracket = "(" if lo_open else "["
        where = f" for {context}" if context else ""
        u = f" {unit}" if unit else ""
        raise PhysChemRangeError(
            f"{name} out of range: {shown}{u} ({n_bad} value{'s' if n_bad != 1 else ''}); "
            f"valid range{where} is {bracket}{lo:g}, {hi:g}]{u}"
        )


def _on_unique(func: Callable[[float], float], x: FloatArray) -> FloatArray:
    """Evaluate a scalar function once per unique non-NaN value of ``x``."""
    flat = x.ravel()
    uniq, inverse = np.unique(flat, return_inverse=True)
    out = np.full(uniq.shape, np.nan)
    ok = ~np.isnan(uniq)
    out[ok] = [func(float(v)) for v in uniq[ok]]
    return out[inverse.reshape(-1)].reshape(x.shape)


def _on_unique_pairs(
    func: Callable[[float, float], float], a: FloatArray, b: FloatArray
) -> FloatArray:
    """Evaluate a scalar function once per unique (a, b) pair without NaN."""
    a, b = np.broadcast_arrays(a, b)
    pairs = np.column_stack([a.ravel(), b.ravel()])
    uniq, inverse = np.unique(pairs, axis=0, return_inverse=True)
    out = np.full(uniq.shape[0], np.nan)
    ok = ~np.isnan(uniq).any(axis=1)
    out[ok] = [func(float(p), float(q)) for p, q in uniq[ok]]
    return out[inverse.reshape(-1)].reshape(a.shape)


def _temperature(temperature_k: ArrayLike, lo: float = T_MIN_K, hi: float = T_MAX_K,
                 context: str = "") -> FloatArray:
    t = _as_float(temperature_k)
    _check_range("temperature_k", t, lo, hi, "K", context=context)
    return t


# ---------------------------------------------------------------------------
# water: density, permittivity, ionization constant
# ---------------------------------------------------------------------------


@lru_cache(maxsize=8192)
def _density_scalar(t_k: float, p_mpa: float) -> float:
    state = IAPWS95(T=t_k, P=p_mpa)
    if state.status != 1:  # pragma: no cover - iapws failed to converge
        raise PhysChemRangeError(
            f"IAPWS-95 did not converge at T = {t_k:g} K, p = {p_mpa:g} MPa; "
            f"valid range is [{T_MIN_K:g}, {T_MAX_K:g}] K, [{P_MIN_MPA:g}, {P_MAX_MPA:g}] MPa"
        )
    if state.x > 0:
        # Liquid would boil at this (T, p): take the saturated liquid, i.e. the
        # liquid at max(p, p_sat(T)) (only 373.124-373.15 K at 0.101325 MPa).
        state = IAPWS95(T=t_k, x=0.0)
    return float(state.rho)


@lru_cache(maxsize=8192)
def _water_scalar(t_k: float) -> tuple[float, float, float]:
    """(density [kg/m3], permittivity [-], pKw [-]) of liquid water at 0.101325 MPa."""
    rho = _density_scalar(t_k, P_DEFAULT_MPA)
    return rho, float(_Dielectric(rho, t_k)), float(_Kw(rho, t_k))


def _water_table(
    t: FloatArray,
) -> tuple[NDArray[np.intp], FloatArray, FloatArray, FloatArray, FloatArray]:
    """Unique temperatures' properties: (inverse index, T, rho, eps, pKw).

    ``t`` must already be range-checked. The four per-unique arrays are indexed
    by ``inverse`` to broadcast back to the shape of ``t``.
    """
    flat = t.ravel()
    uniq, inverse = np.unique(flat, return_inverse=True)
    props = np.full((uniq.size, 3), np.nan)
    ok = ~np.isnan(uniq)
    if np.any(ok):
        props[ok] = np.array([_water_scalar(float(v)) for v in uniq[ok]])
    inv = inverse.reshape(t.shape)
    return inv, uniq, props[:, 0], props[:, 1], props[:, 2]


def water_density(
    temperature_k: ArrayLike, pressure_mpa: ArrayLike = P_DEFAULT_MPA
) -> FloatArray:
    """Density of liquid water from the IAPWS-95 formulation.

    Evaluated with ``iapws.IAPWS95`` once per unique (T, p) pair. Valid for
    liquid water from 273.15 K to 373.15 K. Where liquid water would boil at
    the requested pressure (at 0.101325 MPa only between 373.124 K and
    373.15 K) the saturated liquid is returned, i.e. the liquid at
    max(p, p_sat(T)), the usual convention for "100 °C" tables.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K], 273.15-373.15.
    pressure_mpa : array_like, optional
        Pressure [MPa], 0.001-100; default 0.101325.

    Returns
    -------
    numpy.ndarray
        Density [kg/m3].

    Raises
    ------
    PhysChemRangeError
        If a temperature or pressure lies outside its range.

    References
    ----------
    .. [1] Wagner, W.; Pruß, A. The IAPWS Formulation 1995 for the
       Thermodynamic Properties of Ordinary Water Substance for General and
       Scientific Use. J. Phys. Chem. Ref. Data 2002, 31, 387-535.
       doi:10.1063/1.1461829
    .. [2] IAPWS R6-95(2018), Revised Release on the IAPWS Formulation 1995.

    Examples
    --------
    >>> round(float(water_density(298.15)), 3)
    997.048
    """
    t = _temperature(temperature_k)
    p = _as_float(pressure_mpa)
    _check_range("pressure_mpa", p, P_MIN_MPA, P_MAX_MPA, "MPa")
    if p.ndim == 0 and float(p) == P_DEFAULT_MPA:
        inv, _, rho, _, _ = _water_table(t)
        return np.asarray(rho[inv], dtype=np.float64)
    return _on_unique_pairs(_density_scalar, t, p)


def relative_permittivity(
    temperature_k: ArrayLike, density_kg_m3: ArrayLike | None = None
) -> FloatArray:
    """Static relative permittivity of water, IAPWS R8-97.

    Evaluated with ``iapws._iapws._Dielectric`` once per unique input.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]: 273.15-373.15 when ``density_kg_m3`` is None (liquid at
        0.101325 MPa, density from IAPWS-95); 238-873.15 with a density.
    density_kg_m3 : array_like, optional
        Density [kg/m3], 0-1250.

    Returns
    -------
    numpy.ndarray
        Relative permittivity ε_r [-].

    References
    ----------
    .. [1] IAPWS R8-97, Release on the Static Dielectric Constant of Ordinary
       Water Substance for Temperatures from 238 K to 873 K and Pressures up
       to 1000 MPa (1997).
    .. [2] Fernández, D. P.; Goodwin, A. R. H.; Lemmon, E. W.; Levelt Sengers,
       J. M. H.; Williams, R. C. A Formulation for the Static Permittivity of
       Water and Steam at Temperatures from 238 K to 873 K at Pressures up to
       1200 MPa. J. Phys. Chem. Ref. Data 1997, 26, 1125-1166.
       doi:10.1063/1.555997

    Examples
    --------
    >>> round(float(relative_permittivity(298.15, 999.242866)), 6)  # iapws docstring value
    78.590725
    """
    if density_kg_m3 is None:
        t = _temperature(temperature_k)
        inv, _, _, eps, _ = _water_table(t)
        return np.asarray(eps[inv], dtype=np.float64)
    t = _temperature(temperature_k, *EPS_T_RANGE_K, context="IAPWS R8-97")
    rho = _as_float(density_kg_m3)
    _check_range("density_kg_m3", rho, *KW_RHO_RANGE, "kg/m3", lo_open=True)
    return _on_unique_pairs(lambda tt, rr: float(_Dielectric(rr, tt)), t, rho)


def pkw(temperature_k: ArrayLike, density_kg_m3: ArrayLike | None = None) -> FloatArray:
    """Ionization constant of water, pKw = -log10(Kw / (mol/kg)^2), IAPWS R11-24.

    Evaluated with ``iapws._iapws._Kw(rho, T)`` (iapws 1.5.5 implements the 2024
    revision R11-24; its docstring still quotes the R11-07 value 13.906565 at
    300 K / 1000 kg/m3, but the code returns 13.906672, the R11-24 value).
    Evaluation happens once per unique input rather than through a numpy
    re-implementation of the equation: the pipeline's columns hold few distinct
    temperatures, and calling iapws keeps a single implementation of the
    release (no hand-copied coefficients to drift from it).

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]: 273.15-373.15 without a density (liquid at 0.101325 MPa,
        density from IAPWS-95); 273.15-1073.15 with a density.
    density_kg_m3 : array_like, optional
        Density of water [kg/m3], 0-1250.

    Returns
    -------
    numpy.ndarray
        pKw on the molality scale [-].

    References
    ----------
    .. [1] IAPWS R11-24, Revised Release on the Ionization Constant of H2O
       (2024).
    .. [2] Bandura, A. V.; Lvov, S. N. The Ionization Constant of Water over
       Wide Ranges of Temperature and Density. J. Phys. Chem. Ref. Data 2006,
       35, 15-30. doi:10.1063/1.1928231 (basis of R11-07).

    Examples
    --------
    >>> round(float(pkw(298.15)), 3)
    13.994
    >>> round(float(pkw(300.0, 1000.0)), 6)  # R11-24 verification table
    13.906672
    """
    if density_kg_m3 is None:
        t = _temperature(temperature_k)
        inv, _, _, _, pkw_u = _water_table(t)
        return np.asarray(pkw_u[inv], dtype=np.float64)
    t = _temperature(temperature_k, *KW_T_RANGE_K, context="IAPWS R11-24")
    rho = _as_float(density_kg_m3)
    _check_range("density_kg_m3", rho, *KW_RHO_RANGE, "kg/m3")
    return _on_unique_pairs(lambda tt, rr: float(_Kw(rr, tt)), t, rho)


def _dh_a_from(rho: FloatArray, eps: FloatArray, t: FloatArray) -> FloatArray:
    # rho / 1000: kg/m3 -> g/cm3, as the Truesdell & Jones constants require
    return _TJ_A * np.sqrt(rho / 1000.0) / (eps * t) ** 1.5


def _dh_b_from(rho: FloatArray, eps: FloatArray, t: FloatArray) -> FloatArray:
    # rho / 1000: kg/m3 -> g/cm3
    return _TJ_B * np.sqrt(rho / 1000.0) / np.sqrt(eps * t)


def debye_huckel_a(
    temperature_k: ArrayLike, density_kg_m3: ArrayLike | None = None
) -> FloatArray:
    """Debye-Hückel limiting-law constant A (log10 basis, molality scale).

    A = 1.82483e6 √ρ / (ε_r T)^{3/2}, with ρ in g/cm3, ε_r from IAPWS R8-97 and
    ρ from IAPWS-95 (0.101325 MPa) unless given.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K], 273.15-373.15.
    density_kg_m3 : array_like, optional
        Density of water [kg/m3]; default IAPWS-95 at 0.101325 MPa.

    Returns
    -------
    numpy.ndarray
        A [kg^1/2 mol^-1/2].

    References
    ----------
    .. [1] Truesdell, A. H.; Jones, B. F. WATEQ, a Computer Program for
       Calculating Chemical Equilibria of Natural Waters. J. Res. U.S. Geol.
       Surv. 1974, 2, 233-248.
    .. [2] IAPWS R8-97 (permittivity) and IAPWS-95 (density); see
       :func:`relative_permittivity` and :func:`water_density`.

    Examples
    --------
    >>> round(float(debye_huckel_a(298.15)), 4)
    0.5098
    """
    t = _temperature(temperature_k)
    if density_kg_m3 is None:
        return np.asarray(_dh_a_b_pkw(t)[0], dtype=np.float64)
    rho_a = _as_float(density_kg_m3)
    eps_a = relative_permittivity(t, rho_a)
    return np.asarray(_dh_a_from(rho_a, eps_a, t), dtype=np.float64)


def debye_huckel_b(
    temperature_k: ArrayLike, density_kg_m3: ArrayLike | None = None
) -> FloatArray:
    """Debye-Hückel constant B (molality scale).

    B = 50.2916 √ρ / (ε_r T)^{1/2}, with ρ in g/cm3.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K], 273.15-373.15.
    density_kg_m3 : array_like, optional
        Density of water [kg/m3]; default IAPWS-95 at 0.101325 MPa.

    Returns
    -------
    numpy.ndarray
        B [Å^-1 kg^1/2 mol^-1/2].

    References
    ----------
    .. [1] Truesdell, A. H.; Jones, B. F. J. Res. U.S. Geol. Surv. 1974, 2,
       233-248.

    Examples
    --------
    >>> round(float(debye_huckel_b(298.15)), 4)
    0.3284
    """
    t = _temperature(temperature_k)
    if density_kg_m3 is None:
        return np.asarray(_dh_a_b_pkw(t)[1], dtype=np.float64)
    rho_a = _as_float(density_kg_m3)
    eps_a = relative_permittivity(t, rho_a)
    return np.asarray(_dh_b_from(rho_a, eps_a, t), dtype=np.float64)


def _dh_a_b_pkw(t: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """A, B and pKw broadcast to ``t`` with a single np.unique pass."""
    inv, uniq, rho, eps, pkw_u = _water_table(t)
    return (
        np.asarray(_dh_a_from(rho, eps, uniq)[inv], dtype=np.float64),
        np.asarray(_dh_b_from(rho, eps, uniq)[inv], dtype=np.float64),
        np.asarray(pkw_u[inv], dtype=np.float64),
    )


# ---------------------------------------------------------------------------
# SIT coefficient table
# ---------------------------------------------------------------------------


class SitCoefficient(NamedTuple):
    """One row of ``pipeline/data/sit_epsilon.csv``."""

    species_1: str
    species_2: str
    epsilon_kg_mol: float
    uncertainty_kg_mol: float
    temperature_k: float
    source: str
    reference: str


#: 1:1 background electrolytes known to the "sit" model: name -> (cation, anion).
SIT_MEDIA: Mapping[str, tuple[str, str]] = {
    "HCl": ("H+", "Cl-"),
    "HClO4": ("H+", "ClO4-"),
    "HNO3": ("H+", "NO3-"),
    "LiCl": ("Li+", "Cl-"),
    "LiClO4": ("Li+", "ClO4-"),
    "NaCl": ("Na+", "Cl-"),
    "NaClO4": ("Na+", "ClO4-"),
    "NaNO3": ("Na+", "NO3-"),
    "KCl": ("K+", "Cl-"),
    "KNO3": ("K+", "NO3-"),
    "NH4Cl": ("NH4+", "Cl-"),
    "NH4ClO4": ("NH4+", "ClO4-"),
}


@lru_cache(maxsize=1)
def sit_coefficients() -> tuple[SitCoefficient, ...]:
    """The shipped SIT ε(j,k) table, read from ``pipeline/data/sit_epsilon.csv``.

    Lines starting with ``#`` are the file's citation header.

    Returns
    -------
    tuple of SitCoefficient
        Rows in file order; ε and uncertainty [kg/mol], temperature [K].

    References
    ----------
    .. [1] NEA-TDB Appendix B tables, e.g. Grenthe, I. et al. Chemical
       Thermodynamics of Uranium; NEA/Elsevier, 1992, and Lemire, R. J. et al.
       Chemical Thermodynamics of Iron, Part 1; NEA/OECD, 2013. Values in the
       shipped file were checked against ThermoChimie copies (PHREEQC sit.dat);
       its source column says, per row, what agreed or is "from memory".

    Examples
    --------
    >>> rows = sit_coefficients()
    >>> rows[0].species_1, rows[0].species_2, rows[0].epsilon_kg_mol
    ('H+', 'Cl-', 0.12)
    """
    text = resources.files("pipeline").joinpath("data/sit_epsilon.csv").read_text("utf-8")
    body = "\n".join(line for line in text.splitlines() if not line.startswith("#"))
    rows = []
    for rec in csv.DictReader(io.StringIO(body)):
        rows.append(
            SitCoefficient(
                species_1=rec["species_1"],
                species_2=rec["species_2"],
                epsilon_kg_mol=float(rec["epsilon_kg_mol"]),
                uncertainty_kg_mol=float(rec["uncertainty_kg_mol"]),
                temperature_k=float(rec["temperature_k"]),
                source=rec["source"],
                reference=rec["reference"],
            )
        )
    return tuple(rows)


@lru_cache(maxsize=1)
def _sit_lookup() -> dict[frozenset[str], SitCoefficient]:
    return {frozenset((r.species_1, r.species_2)): r for r in sit_coefficients()}


def sit_epsilon(species_1: str, species_2: str) -> float:
    """SIT interaction coefficient ε(j,k) [kg/mol] from the shipped table (symmetric).

    Parameters
    ----------
    species_1, species_2 : str
        Ion names as in the table, e.g. ``"H+"``, ``"ClO4-"``, ``"HPO4^2-"``.

    Returns
    -------
    float
        ε(j,k) [kg/mol] at 298.15 K.

    Raises
    ------
    KeyError
        If the pair is not tabulated; the message lists the pairs that are.

    References
    ----------
    .. [1] NEA-TDB Appendix B (see :func:`sit_coefficients`).

    Examples
    --------
    >>> sit_epsilon("ClO4-", "H+")
    0.14
    """
    row = _sit_lookup().get(frozenset((species_1, species_2)))
    if row is None:
        known = ", ".join(f"({r.species_1}, {r.species_2})" for r in sit_coefficients())
        raise KeyError(
            f"no SIT coefficient for ({species_1!r}, {species_2!r}); tabulated pairs: {known}"
        )
    return row.epsilon_kg_mol


def _charge_of(species: str) -> int:
    """Charge from a name like 'H+', 'Cl-', 'HPO4^2-', 'Mg^2+'."""
    if species.endswith("+") or species.endswith("-"):
        sign = 1 if species[-1] == "+" else -1
        head = species[:-1]
        if "^" in head:
            return sign * int(head.rsplit("^", 1)[1])
        return sign
    return 0


# ---------------------------------------------------------------------------
# activity models
# ---------------------------------------------------------------------------


def _davies(
    z: FloatArray,
    ionic_strength: FloatArray,
    dh_a: FloatArray,
    dh_b: FloatArray,
    *,
    davies_coefficient: float = 0.3,
) -> FloatArray:
    sqrt_i = np.sqrt(ionic_strength)
    return -dh_a * z**2 * (sqrt_i / (1.0 + sqrt_i) - davies_coefficient * ionic_strength)


def _extended_dh(
    z: FloatArray,
    ionic_strength: FloatArray,
    dh_a: FloatArray,
    dh_b: FloatArray,
    *,
    ion_size_angstrom: float | ArrayLike = 4.5,
) -> FloatArray:
    a = _as_float(ion_size_angstrom)
    _check_range("ion_size_angstrom", a, 0.0, 20.0, "Å", lo_open=True)
    sqrt_i = np.sqrt(ionic_strength)
    return -dh_a * z**2 * sqrt_i / (1.0 + dh_b * a * sqrt_i)


def _sit(
    z: FloatArray,
    ionic_strength: FloatArray,
    dh_a: FloatArray,
    dh_b: FloatArray,
    *,
    ion: str | None = None,
    medium: str | None = None,
    epsilon: float | None = None,
) -> FloatArray:
    if medium not in SIT_MEDIA:
        raise ValueError(
            f"SIT model needs medium= one of {sorted(SIT_MEDIA)}; got {medium!r}"
        )
    cation, anion = SIT_MEDIA[medium]
    charges = np.unique(z[~np.isnan(z)])
    if epsilon is None:
        if charges.size and np.all(charges == 0):
            # uncharged species: ε(n, MX) taken as 0 when not given (common practice)
            eps = 0.0
        else:
            if ion is None:
                raise ValueError(
                    "SIT model needs the name of each charged species (ion= in "
                    "log_activity_coefficient, acid_species=/base_species= in "
                    "convert_constant_type), e.g. 'H+', 'OH-', 'HPO4^2-', or epsilon="
                )
            z_ion = _charge_of(ion)
            if charges.size and not np.all(charges == z_ion):
                raise ValueError(
                    f"charge {_fmt(charges)} does not match ion {ion!r} (charge {z_ion})"
                )
            counter = anion if z_ion > 0 else cation
            eps = sit_epsilon(ion, counter)
    else:
        eps = float(epsilon)
    sqrt_i = np.sqrt(ionic_strength)
    debye = dh_a * sqrt_i / (1.0 + 1.5 * sqrt_i)
    # 1:1 medium: molality of the counter-ion m_k = I [mol/kg]
    return -(z**2) * debye + eps * ionic_strength


@dataclass(frozen=True)
class ActivityModel:
    """An activity-coefficient model selectable by key.

    Attributes
    ----------
    key : str
        Registry key.
    function : callable
        ``f(z, I, A, B, **params) -> log10 γ``.
    max_ionic_strength : float
        Upper validity limit [mol/kg].
    temperature_range_k : tuple of float
        Validity range [K].
    reference : str
        Published source of the equation.
    parameters : str
        Optional keyword parameters and their defaults.
    """

    key: str
    function: Callable[..., FloatArray]
    max_ionic_strength: float
    temperature_range_k: tuple[float, float]
    reference: str
    parameters: str = ""


#: Activity models by key. See :func:`log_activity_coefficient`.
ACTIVITY_MODELS: Mapping[str, ActivityModel] = {
    "davies": ActivityModel(
        key="davies",
        function=_davies,
        max_ionic_strength=0.5,
        temperature_range_k=(T_MIN_K, T_MAX_K),
        reference="Davies, C. W. Ion Association; Butterworths: London, 1962; p 41",
        parameters="davies_coefficient=0.3 (0.2 in Davies 1938)",
    ),
    "extended_debye_huckel": ActivityModel(
        key="extended_debye_huckel",
        function=_extended_dh,
        max_ionic_strength=0.1,
        temperature_range_k=(T_MIN_K, T_MAX_K),
        reference="Debye, P.; Hückel, E. Phys. Z. 1923, 24, 185; B(T) from Truesdell & Jones 1974",
        parameters="ion_size_angstrom=4.5",
    ),
    "sit": ActivityModel(
        key="sit",
        function=_sit,
        max_ionic_strength=3.5,
        temperature_range_k=(273.15, 323.15),
        reference=(
            "Grenthe, I.; Plyasunov, A. V.; Spahiu, K. in Modelling in Aquatic Chemistry; "
            "NEA/OECD, 1997; ch. IX (NEA-TDB SIT)"
        ),
        parameters="medium (required), ion (charged species), epsilon (override)",
    ),
}


def _get_model(model: str) -> ActivityModel:
    try:
        return ACTIVITY_MODELS[model]
    except KeyError:
        raise ValueError(
            f"unknown activity model {model!r}; valid keys: {', '.join(ACTIVITY_MODELS)}"
        ) from None


def _log_gamma(
    model: ActivityModel,
    z: FloatArray,
    ionic_strength: FloatArray,
    dh_a: FloatArray,
    dh_b: FloatArray,
    params: Mapping[str, Any],
) -> FloatArray:
    try:
        return model.function(z, ionic_strength, dh_a, dh_b, **params)
    except TypeError as err:
        raise ValueError(
            f"bad parameters {sorted(params)} for activity model {model.key!r}; "
            f"accepted: {model.parameters or 'none'} ({err})"
        ) from None


def _check_ionic_strength(model: ActivityModel, ionic_strength: FloatArray) -> None:
    _check_range(
        "ionic_strength",
        ionic_strength,
        0.0,
        model.max_ionic_strength,
        "mol/kg",
        context=f"activity model {model.key!r}",
    )


def log_activity_coefficient(
    charge: ArrayLike,
    ionic_strength: ArrayLike,
    temperature_k: ArrayLike = 298.15,
    model: str = "davies",
    *,
    dh_a: ArrayLike | None = None,
    dh_b: ArrayLike | None = None,
    **params: Any,
) -> FloatArray:
    """Single-ion activity coefficient log10 γ (molality scale).

    Models (key: equation, validity):

    * ``"davies"``: log γ = -A z² (√I/(1+√I) - 0.3 I), I <= 0.5 mol/kg [1]_.
      Parameter ``davies_coefficient`` (default 0.3; 0.2 in Davies 1938).
    * ``"extended_debye_huckel"``: log γ = -A z² √I / (1 + B å √I),
      I <= 0.1 mol/kg [2]_. Parameter ``ion_size_angstrom`` å [Å], default 4.5
      (common practice: B å ≈ 1.5 kg^1/2 mol^-1/2 at 25 °C, the
      Bates-Guggenheim value, and within Kielland's 1937 range for small ions).
    * ``"sit"``: log γ_j = -z_j² D + Σ_k ε(j,k) m_k, D = A √I / (1 + 1.5 √I),
      I <= 3.5 mol/kg, 273.15-323.15 K (ε tabulated at 298.15 K and treated as
      temperature independent within ±25 K) [3]_. Parameters: ``medium``, a 1:1
      background electrolyte from :data:`SIT_MEDIA` (its counter-ion molality
      m_k = I); ``ion``, the species name (ε(ion, counter-ion) read from
      ``sit_epsilon.csv``); or ``epsilon`` [kg/mol] to override the table.
      Uncharged species get ε = 0 unless ``epsilon`` is given.

    Parameters
    ----------
    charge : array_like
        Ion charge number z [-].
    ionic_strength : array_like
        Ionic strength I [mol/kg], >= 0 and within the model's limit.
    temperature_k : array_like, optional
        Temperature [K], default 298.15; sets A(T) and B(T).
    model : str, optional
        A key of :data:`ACTIVITY_MODELS`; default ``"davies"``.
    dh_a, dh_b : array_like, optional
        Override A [kg^1/2 mol^-1/2] and B [Å^-1 kg^1/2 mol^-1/2] (e.g. the
        NEA-TDB rounded 0.509); default from :func:`debye_huckel_a` /
        :func:`debye_huckel_b`.
    **params
        Model parameters listed above.

    Returns
    -------
    numpy.ndarray
        log10 γ [-].

    Raises
    ------
    ValueError
        Unknown model key (the message lists the valid keys) or bad parameters.
    PhysChemRangeError
        Ionic strength or temperature outside the model's validity.

    References
    ----------
    .. [1] Davies, C. W. Ion Association; Butterworths: London, 1962; p 41.
    .. [2] Debye, P.; Hückel, E. Zur Theorie der Elektrolyte. Phys. Z. 1923,
       24, 185-206; A, B from Truesdell & Jones, J. Res. U.S. Geol. Surv.
       1974, 2, 233.
    .. [3] Grenthe, I.; Plyasunov, A. V.; Spahiu, K. Estimations of Medium
       Effects on Thermodynamic Data. In Modelling in Aquatic Chemistry;
       NEA/OECD: Paris, 1997; ch. IX.
    .. [4] Kielland, J. Individual Activity Coefficients of Ions in Aqueous
       Solutions. J. Am. Chem. Soc. 1937, 59, 1675-1678 (ion-size parameters).

    Examples
    --------
    >>> round(float(log_activity_coefficient(1, 0.1, dh_a=0.509)), 5)
    -0.10702
    >>> round(float(log_activity_coefficient(2, 0.1, dh_a=0.509)), 5)
    -0.42808
    """
    m = _get_model(model)
    z = _as_float(charge)
    i = _as_float(ionic_strength)
    _check_ionic_strength(m, i)
    t = _temperature(temperature_k, *m.temperature_range_k, context=f"activity model {m.key!r}")
    if dh_a is None or (dh_b is None and m.key == "extended_debye_huckel"):
        a_t, b_t, _ = _dh_a_b_pkw(t)
    else:
        a_t = b_t = np.full(t.shape, np.nan)
    a_used = a_t if dh_a is None else _as_float(dh_a)
    b_used = b_t if dh_b is None else _as_float(dh_b)
    out = _log_gamma(m, z, i, a_used, b_used, params)
    return np.asarray(np.broadcast_to(out, np.broadcast_shapes(z.shape, i.shape, t.shape)),
                      dtype=np.float64)


def pkw_at_ionic_strength(
    temperature_k: ArrayLike,
    ionic_strength: ArrayLike,
    model: str = "davies",
    **params: Any,
) -> FloatArray:
    """Concentration (stoichiometric) ionization constant of water at ionic strength I.

    Kw = a_H a_OH = γ_H γ_OH [H+][OH-], so Kw_c = [H+][OH-] = Kw / (γ_H γ_OH) and
    pKw_c = pKw + log10 γ_H + log10 γ_OH. Since log γ < 0 in the models' ranges,
    pKw_c < pKw.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K], 273.15-373.15 (SIT: 273.15-323.15).
    ionic_strength : array_like
        Ionic strength [mol/kg].
    model : str, optional
        Activity model key (see :func:`log_activity_coefficient`).
    **params
        Model parameters; for ``"sit"`` give ``medium=`` (``ion`` is set to
        ``"H+"`` and ``"OH-"``).

    Returns
    -------
    numpy.ndarray
        pKw_c [-] (molality scale).

    References
    ----------
    .. [1] IAPWS R11-24 for pKw (see :func:`pkw`).
    .. [2] Davies 1962 / Debye-Hückel / NEA-TDB SIT for γ (see
       :func:`log_activity_coefficient`).

    Examples
    --------
    >>> round(float(pkw_at_ionic_strength(298.15, 0.1)), 3)  # Davies
    13.78
    """
    m = _get_model(model)
    t = _temperature(temperature_k, *m.temperature_range_k, context=f"activity model {m.key!r}")
    i = _as_float(ionic_strength)
    _check_ionic_strength(m, i)
    a_t, b_t, pkw_t = _dh_a_b_pkw(t)
    lg_h, lg_oh = _lg_h_oh(m, i, a_t, b_t, params)
    return np.asarray(pkw_t + lg_h + lg_oh, dtype=np.float64)


def _lg_h_oh(
    m: ActivityModel, i: FloatArray, a_t: FloatArray, b_t: FloatArray, params: Mapping[str, Any]
) -> tuple[FloatArray, FloatArray]:
    if m.key == "sit":
        base = {k: v for k, v in params.items() if k not in ("ion", "epsilon")}
        lg_h = _log_gamma(m, np.asarray(1.0), i, a_t, b_t, {**base, "ion": "H+"})
        lg_oh = _log_gamma(m, np.asarray(-1.0), i, a_t, b_t, {**base, "ion": "OH-"})
        return lg_h, lg_oh
    # z = +1 and z = -1 give the same γ in charge-symmetric models
    lg = _log_gamma(m, np.asarray(1.0), i, a_t, b_t, params)
    return lg, lg


# ---------------------------------------------------------------------------
# results that carry their parameters
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Conversion:
    """A converted value and the parameters used to obtain it.

    Attributes
    ----------
    value : numpy.ndarray
        The converted quantity (e.g. pKa).
    parameters : dict
        Name -> ndarray (broadcast to ``value`` or scalar) or str: the activity
        model, pKw, A(T), ΔH°, sources... Stored beside the number by the
        pipeline (invariant 5: every conversion records its parameters).

    Examples
    --------
    >>> c = pkb_to_pka(4.75, 298.15)
    >>> round(float(c.value), 3), c.parameters["pkw_source"].split(" via")[0]
    (9.244, 'IAPWS R11-24')
    >>> round(float(np.asarray(c)), 3)
    9.244
    """

    value: FloatArray
    parameters: dict[str, FloatArray | str | float] = field(default_factory=dict)

    def __array__(self, dtype: Any = None, copy: bool | None = None) -> FloatArray:
        return np.asarray(self.value, dtype=dtype)


# ---------------------------------------------------------------------------
# conversions between quantities
# ---------------------------------------------------------------------------


def ka_to_pka(ka: ArrayLike) -> FloatArray:
    """pKa = -log10 Ka.

    Parameters
    ----------
    ka : array_like
        Dissociation constant Ka [-] (standard-state ratio), > 0.

    Returns
    -------
    numpy.ndarray
        pKa [-].

    Raises
    ------
    PhysChemRangeError
        If any Ka <= 0 or infinite.

    References
    ----------
    .. [1] McNaught, A. D.; Wilkinson, A. IUPAC Compendium of Chemical
       Terminology (the "Gold Book"), 2nd ed.; Blackwell, 1997: "pK".

    Examples
    --------
    >>> float(ka_to_pka(1e-5))
    5.0
    """
    k = _as_float(ka)
    _check_range("Ka", k, 0.0, float(np.finfo(np.float64).max), "", lo_open=True)
    return np.asarray(-np.log10(k), dtype=np.float64)


def pka_to_ka(pka: ArrayLike) -> FloatArray:
    """Ka = 10^-pKa.

    Parameters
    ----------
    pka : array_like
        pKa [-], finite.

    Returns
    -------
    numpy.ndarray
        Ka [-].

    References
    ----------
    .. [1] IUPAC Gold Book, "pK" (see :func:`ka_to_pka`).

    Examples
    --------
    >>> float(pka_to_ka(3.0))
    0.001
    """
    p = _as_float(pka)
    _check_range("pKa", p, -1.0e300, 1.0e300, "")
    return np.asarray(10.0 ** (-p), dtype=np.float64)


def protonation_logk_to_pka(log_k: ArrayLike) -> FloatArray:
    """pKa from a protonation constant: for H+ + A- ⇌ HA, log K = pKa.

    The protonation (association) constant K = [HA]/([H+][A-]) is 1/Ka, so
    log10 K = -log10 Ka = pKa. For a stepwise constant K_n of
    H+ + H_{n-1}A ⇌ H_nA this gives the pKa of H_nA.

    Parameters
    ----------
    log_k : array_like
        log10 of the protonation constant [-].

    Returns
    -------
    numpy.ndarray
        pKa [-].

    References
    ----------
    .. [1] Martell, A. E.; Motekaitis, R. J. Determination and Use of
       Stability Constants, 2nd ed.; VCH, 1992 (protonation vs dissociation).

    Examples
    --------
    >>> float(protonation_logk_to_pka(9.25))
    9.25
    """
    return np.asarray(_as_float(log_k) * 1.0, dtype=np.float64)


def pkb_to_pka(
    pkb: ArrayLike,
    temperature_k: ArrayLike,
    ionic_strength: ArrayLike = 0.0,
    model: str = "davies",
    **params: Any,
) -> Conversion:
    """Conjugate-acid pKa from a base's pKb: pKa = pKw(T, I) - pKb.

    Ka Kb = Kw at the same temperature. At I = 0 both constants are
    thermodynamic and pKw is IAPWS R11-24. At I > 0 the constants are taken as
    concentration constants, for which Ka_c Kb_c = [H+][OH-] = Kw_c, with
    pKw_c from :func:`pkw_at_ionic_strength`.

    Parameters
    ----------
    pkb : array_like
        pKb of the base [-].
    temperature_k : array_like
        Temperature [K], 273.15-373.15.
    ionic_strength : array_like, optional
        Ionic strength [mol/kg], default 0.
    model : str, optional
        Activity model key for pKw_c, default ``"davies"``.
    **params
        Model parameters (see :func:`log_activity_coefficient`).

    Returns
    -------
    Conversion
        ``value`` = pKa [-]; ``parameters``: ``pkw`` (pKw used, with the ionic
        strength correction), ``pkw_thermodynamic``, ``log_gamma_h``,
        ``log_gamma_oh``, ``dh_a``, ``activity_model``, ``pkw_source``,
        ``relation``.

    References
    ----------
    .. [1] IAPWS R11-24, Revised Release on the Ionization Constant of H2O (2024).
    .. [2] Bates, R. G. Determination of pH: Theory and Practice, 2nd ed.;
       Wiley: New York, 1973 (Ka Kb = Kw for a conjugate acid-base pair).

    Examples
    --------
    >>> round(float(pkb_to_pka(4.755, 298.15).value), 3)  # ammonia
    9.239
    """
    m = _get_model(model)
    b = _as_float(pkb)
    t = _temperature(temperature_k, *m.temperature_range_k, context=f"activity model {m.key!r}")
    i = _as_float(ionic_strength)
    _check_ionic_strength(m, i)
    a_t, b_t, pkw_t = _dh_a_b_pkw(t)
    lg_h, lg_oh = _lg_h_oh(m, i, a_t, b_t, params)
    pkw_c = pkw_t + lg_h + lg_oh
    value = np.asarray(pkw_c - b, dtype=np.float64)
    return Conversion(
        value=value,
        parameters={
            "relation": "pKa = pKw_c(T, I) - pKb",
            "activity_model": m.key,
            "pkw": np.asarray(pkw_c, dtype=np.float64),
            "pkw_thermodynamic": pkw_t,
            "log_gamma_h": np.asarray(lg_h, dtype=np.float64),
            "log_gamma_oh": np.asarray(lg_oh, dtype=np.float64),
            "dh_a": a_t,
            "pkw_source": _SOURCE_PKW,
        },
    )


def kb_to_pka(
    kb: ArrayLike,
    temperature_k: ArrayLike,
    ionic_strength: ArrayLike = 0.0,
    model: str = "davies",
    **params: Any,
) -> Conversion:
    """Conjugate-acid pKa from a base constant Kb: pKa = pKw(T, I) + log10 Kb.

    Parameters
    ----------
    kb : array_like
        Kb [-], > 0.
    temperature_k : array_like
        Temperature [K], 273.15-373.15.
    ionic_strength : array_like, optional
        Ionic strength [mol/kg], default 0.
    model : str, optional
        Activity model key, default ``"davies"``.
    **params
        Model parameters.

    Returns
    -------
    Conversion
        As :func:`pkb_to_pka`.

    References
    ----------
    .. [1] IAPWS R11-24 (pKw); Ka Kb = Kw (see :func:`pkb_to_pka`).

    Examples
    --------
    >>> round(float(kb_to_pka(1.0e-5, 298.15).value), 3)
    8.994
    """
    k = _as_float(kb)
    try:
        pkb = ka_to_pka(k)
    except PhysChemRangeError as err:
        raise PhysChemRangeError(str(err).replace("Ka", "Kb")) from None
    return pkb_to_pka(pkb, temperature_k, ionic_strength, model, **params)


def _solution_density_kg_l(
    temperature_k: ArrayLike, solution_density_kg_m3: ArrayLike | None
) -> FloatArray:
    if solution_density_kg_m3 is None:
        # kg/m3 -> kg/L
        return water_density(temperature_k) / 1000.0
    rho = _as_float(solution_density_kg_m3)
    _check_range("solution_density_kg_m3", rho, 500.0, 3000.0, "kg/m3")
    return rho / 1000.0  # kg/m3 -> kg/L


def molal_to_molar(
    molality: ArrayLike,
    temperature_k: ArrayLike = 298.15,
    solution_density_kg_m3: ArrayLike | None = None,
    solute_molar_mass_kg_mol: ArrayLike = 0.0,
) -> FloatArray:
    """Amount concentration from molality (also for ionic strength).

    c = b ρ / (1 + b M), with ρ the solution density [kg/L] and M the molar
    mass of the solute [kg/mol]. The defaults (ρ = ρ_water(T) from IAPWS-95,
    M = 0) give the dilute-water approximation c ≈ b ρ_w, which is what the
    pipeline uses for ionic strengths: I_c = I_b ρ_w.

    Parameters
    ----------
    molality : array_like
        Molality b [mol/kg], >= 0.
    temperature_k : array_like, optional
        Temperature [K] for ρ_w, default 298.15.
    solution_density_kg_m3 : array_like, optional
        Solution density [kg/m3] (500-3000); default pure water at T.
    solute_molar_mass_kg_mol : array_like, optional
        Solute molar mass [kg/mol], default 0 (dilute limit).

    Returns
    -------
    numpy.ndarray
        Concentration c [mol/L].

    References
    ----------
    .. [1] Cohen, E. R. et al. Quantities, Units and Symbols in Physical
       Chemistry (IUPAC Green Book), 3rd ed.; RSC: Cambridge, 2007; definitions
       of molality and amount concentration (c = n/V, b = n/m_solvent).

    Examples
    --------
    >>> round(float(molal_to_molar(0.1)), 5)
    0.0997
    """
    b = _as_float(molality)
    _check_range("molality", b, 0.0, 30.0, "mol/kg")
    mm = _as_float(solute_molar_mass_kg_mol)
    _check_range("solute_molar_mass_kg_mol", mm, 0.0, 10.0, "kg/mol")
    rho = _solution_density_kg_l(temperature_k, solution_density_kg_m3)
    return np.asarray(b * rho / (1.0 + b * mm), dtype=np.float64)


def molar_to_molal(
    concentration: ArrayLike,
    temperature_k: ArrayLike = 298.15,
    solution_density_kg_m3: ArrayLike | None = None,
    solute_molar_mass_kg_mol: ArrayLike = 0.0,
) -> FloatArray:
    """Molality from amount concentration (inverse of :func:`molal_to_molar`).

    b = c / (ρ - c M), ρ [kg/L]; dilute water default b ≈ c / ρ_w.

    Parameters
    ----------
    concentration : array_like
        Concentration c [mol/L], >= 0 and < ρ/M.
    temperature_k : array_like, optional
        Temperature [K] for ρ_w, default 298.15.
    solution_density_kg_m3 : array_like, optional
        Solution density [kg/m3]; default pure water at T.
    solute_molar_mass_kg_mol : array_like, optional
        Solute molar mass [kg/mol], default 0.

    Returns
    -------
    numpy.ndarray
        Molality b [mol/kg].

    References
    ----------
    .. [1] IUPAC Green Book, 3rd ed., 2007 (see :func:`molal_to_molar`).

    Examples
    --------
    >>> round(float(molar_to_molal(0.0997047)), 5)
    0.1
    """
    c = _as_float(concentration)
    _check_range("concentration", c, 0.0, 30.0, "mol/L")
    mm = _as_float(solute_molar_mass_kg_mol)
    _check_range("solute_molar_mass_kg_mol", mm, 0.0, 10.0, "kg/mol")
    rho = _solution_density_kg_l(temperature_k, solution_density_kg_m3)
    solvent = rho - c * mm  # kg of solvent per litre of solution
    _check_range("solvent mass per litre (rho - c*M)", np.asarray(solvent), 0.0, math.inf,
                 "kg/L", lo_open=True)
    return np.asarray(c / solvent, dtype=np.float64)


def pka_molal_to_molar(
    pka_molal: ArrayLike, temperature_k: ArrayLike = 298.15, delta_n: ArrayLike = 1
) -> FloatArray:
    """Shift a pK from the molality to the amount-concentration scale.

    With c_i = b_i ρ_w (dilute limit) each concentration factor contributes one
    ρ_w: K_c = Π c_i^ν_i = K_b ρ_w^Δn, Δn = Σ ν_i (products minus reactants;
    Δn = 1 for HA ⇌ H+ + A-). Hence pK_c = pK_b - Δn log10(ρ_w [kg/L]); at
    25 °C a 1:1 acid's pKa rises by 0.00128.

    Parameters
    ----------
    pka_molal : array_like
        pK on the molality scale [-].
    temperature_k : array_like, optional
        Temperature [K], default 298.15.
    delta_n : array_like, optional
        Δn of the reaction, default 1.

    Returns
    -------
    numpy.ndarray
        pK on the molarity scale [-].

    References
    ----------
    .. [1] IUPAC Green Book, 3rd ed., 2007 (molality and concentration);
       the relation follows from c = b ρ_w as derived above.

    Examples
    --------
    >>> round(float(pka_molal_to_molar(4.756)), 5)
    4.75728
    """
    p = _as_float(pka_molal)
    rho_kg_l = water_density(temperature_k) / 1000.0  # kg/m3 -> kg/L
    return np.asarray(p - _as_float(delta_n) * np.log10(rho_kg_l), dtype=np.float64)


def pka_molar_to_molal(
    pka_molar: ArrayLike, temperature_k: ArrayLike = 298.15, delta_n: ArrayLike = 1
) -> FloatArray:
    """Shift a pK from the amount-concentration to the molality scale.

    pK_b = pK_c + Δn log10(ρ_w [kg/L]) (inverse of :func:`pka_molal_to_molar`).

    Parameters
    ----------
    pka_molar : array_like
        pK on the molarity scale [-].
    temperature_k : array_like, optional
        Temperature [K], default 298.15.
    delta_n : array_like, optional
        Δn of the reaction, default 1.

    Returns
    -------
    numpy.ndarray
        pK on the molality scale [-].

    References
    ----------
    .. [1] IUPAC Green Book, 3rd ed., 2007 (see :func:`pka_molal_to_molar`).

    Examples
    --------
    >>> round(float(pka_molar_to_molal(4.75728)), 5)
    4.756
    """
    return pka_molal_to_molar(pka_molar, temperature_k, -_as_float(delta_n))


#: Constant types stored by kaledger.
CONSTANT_TYPES: tuple[str, ...] = ("thermodynamic", "concentration", "mixed")


def convert_constant_type(
    pka: ArrayLike,
    from_type: str,
    to_type: str,
    ionic_strength: ArrayLike,
    z_acid: ArrayLike,
    temperature_k: ArrayLike = 298.15,
    model: str = "davies",
    *,
    acid_species: str | None = None,
    base_species: str | None = None,
    **params: Any,
) -> Conversion:
    """Convert a pKa between thermodynamic, concentration and mixed constants.

    For HA^z ⇌ H+ + A^(z-1) (z = ``z_acid``):

    * thermodynamic K = a_H a_A / a_HA
    * concentration K_c = [H+][A]/[HA]
    * mixed (Brønsted) K_m = a_H [A]/[HA]

    so pK = pK_c - log γ_H - log γ_A + log γ_HA and pK_m = pK_c - log γ_H.

    Parameters
    ----------
    pka : array_like
        pKa of type ``from_type`` [-].
    from_type, to_type : str
        One of ``"thermodynamic"``, ``"concentration"``, ``"mixed"``.
    ionic_strength : array_like
        Ionic strength [mol/kg].
    z_acid : array_like
        Charge of the acid form HA [-] (the base form has z_acid - 1).
    temperature_k : array_like, optional
        Temperature [K], default 298.15.
    model : str, optional
        Activity model key, default ``"davies"``.
    acid_species, base_species : str, optional
        Species names for the ``"sit"`` model (ε lookup).
    **params
        Further model parameters (``medium`` for SIT, ``ion_size_angstrom``...).

    Returns
    -------
    Conversion
        ``value`` = pKa of ``to_type``; ``parameters``: ``activity_model``,
        ``from_type``, ``to_type``, ``dh_a``, ``log_gamma_h``,
        ``log_gamma_acid``, ``log_gamma_base``.

    Raises
    ------
    ValueError
        Unknown constant type or model (valid choices listed).

    References
    ----------
    .. [1] Harris, D. C. Quantitative Chemical Analysis, 8th ed.; Freeman,
       2010 (activity-based equilibrium constants).
    .. [2] Bates, R. G. Determination of pH: Theory and Practice, 2nd ed.;
       Wiley, 1973 (mixed constants).

    Examples
    --------
    >>> c = convert_constant_type(7.198, "thermodynamic", "concentration", 0.1, -1)
    >>> round(float(c.value), 3)  # phosphoric acid pK2, Davies
    6.769
    """
    for name, kind in (("from_type", from_type), ("to_type", to_type)):
        if kind not in CONSTANT_TYPES:
            raise ValueError(f"unknown {name} {kind!r}; valid choices: {', '.join(CONSTANT_TYPES)}")
    m = _get_model(model)
    p = _as_float(pka)
    i = _as_float(ionic_strength)
    _check_ionic_strength(m, i)
    t = _temperature(temperature_k, *m.temperature_range_k, context=f"activity model {m.key!r}")
    z_ha = _as_float(z_acid)
    z_a = z_ha - 1.0
    a_t, b_t, _ = _dh_a_b_pkw(t)

    def lg(z: FloatArray, species: str | None) -> FloatArray:
        extra = dict(params)
        if m.key == "sit":
            extra["ion"] = species
        return _log_gamma(m, z, i, a_t, b_t, extra)

    lg_h = lg(np.asarray(1.0), "H+")
    lg_ha = lg(z_ha, acid_species)
    lg_a = lg(z_a, base_species)
    # offset of each type relative to the concentration constant: pK_type = pK_c + offset
    offsets = {
        "thermodynamic": -lg_h - lg_a + lg_ha,
        "concentration": np.zeros_like(lg_h),
        "mixed": -lg_h,
    }
    value = p - offsets[from_type] + offsets[to_type]
    return Conversion(
        value=np.asarray(value, dtype=np.float64),
        parameters={
            "activity_model": m.key,
            "from_type": from_type,
            "to_type": to_type,
            "dh_a": a_t,
            "log_gamma_h": np.asarray(lg_h, dtype=np.float64),
            "log_gamma_acid": np.asarray(lg_ha, dtype=np.float64),
            "log_gamma_base": np.asarray(lg_a, dtype=np.float64),
        },
    )


# ---------------------------------------------------------------------------
# temperature transfer
# ---------------------------------------------------------------------------


def van_t_hoff_coefficients(t: FloatArray, t_ref: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Coefficients of ΔH° and ΔCp° in pKa(T) - pKa(θ) (integrated van 't Hoff, constant ΔCp°).

    pKa(T) - pKa(θ) = x_h ΔH° + x_cp ΔCp°, with x_h = (1/T - 1/θ)/(R ln10) and
    x_cp = -(θ/T - 1 + ln(T/θ))/(R ln10); :func:`van_t_hoff` and the fits are built on it.

    Parameters
    ----------
    t, t_ref : numpy.ndarray
        Temperature T and reference temperature θ [K].

    Returns
    -------
    tuple of numpy.ndarray
        x_h [mol/J] and x_cp [mol K/J].

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Evaluation of Thermodynamic Functions
       from Equilibrium Constants. Trans. Faraday Soc. 1966, 62, 539-547.
       doi:10.1039/TF9666200539

    Examples
    --------
    From 25 °C to 37 °C a ΔH° of 47.45 kJ/mol (Tris) lowers the pKa by 0.3216:

    >>> x_h, x_cp = van_t_hoff_coefficients(np.asarray(310.15), np.asarray(298.15))
    >>> round(float(x_h * 47450.0), 4), f"{float(x_cp):.4e}"
    (-0.3216, '-4.0135e-05')
    """
    x_h = (1.0 / t - 1.0 / t_ref) / (GAS_CONSTANT * LN10)
    x_cp = -(t_ref / t - 1.0 + np.log(t / t_ref)) / (GAS_CONSTANT * LN10)
    return x_h, x_cp


def van_t_hoff(
    pka_ref: ArrayLike,
    t_ref_k: ArrayLike,
    t_k: ArrayLike,
    delta_h_j_mol: ArrayLike,
    delta_cp_j_mol_k: ArrayLike = 0.0,
) -> Conversion:
    """Transfer a pKa to another temperature (integrated van 't Hoff, constant ΔCp°).

    pKa(T) = pKa(θ) + ΔH°/(R ln10) (1/T - 1/θ)
             - ΔCp°/(R ln10) (θ/T - 1 + ln(T/θ)),

    with ΔH° the standard enthalpy of dissociation at θ and ΔCp° taken as
    constant.

    Parameters
    ----------
    pka_ref : array_like
        pKa at the reference temperature [-].
    t_ref_k : array_like
        Reference temperature θ [K], 273.15-373.15.
    t_k : array_like
        Target temperature T [K], 273.15-373.15.
    delta_h_j_mol : array_like
        ΔH° of dissociation at θ [J/mol].
    delta_cp_j_mol_k : array_like, optional
        ΔCp° of dissociation [J/(K mol)], default 0.

    Returns
    -------
    Conversion
        ``value`` = pKa(T); ``parameters``: ``delta_h_j_mol``,
        ``delta_cp_j_mol_k``, ``t_ref_k``, ``pka_ref``, ``equation``.

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Evaluation of Thermodynamic Functions
       from Equilibrium Constants. Trans. Faraday Soc. 1966, 62, 539-547.
       doi:10.1039/TF9666200539
    .. [2] Goldberg, R. N.; Kishore, N.; Lennen, R. M. Thermodynamic Quantities
       for the Ionization Reactions of Buffers. J. Phys. Chem. Ref. Data 2002,
       31, 231-370. doi:10.1063/1.1416902

    Examples
    --------
    >>> round(float(van_t_hoff(8.072, 298.15, 310.15, 47450.0, -59.0).value), 3)  # Tris
    7.753
    """
    t = _temperature(t_k)
    theta = _temperature(t_ref_k)
    p0 = _as_float(pka_ref)
    dh = _as_float(delta_h_j_mol)
    dcp = _as_float(delta_cp_j_mol_k)
    x_h, x_cp = van_t_hoff_coefficients(t, theta)
    value = p0 + dh * x_h + dcp * x_cp
    return Conversion(
        value=np.asarray(value, dtype=np.float64),
        parameters={
            "equation": "integrated van 't Hoff, constant dCp (Clarke & Glew 1966)",
            "pka_ref": p0,
            "t_ref_k": theta,
            "delta_h_j_mol": dh,
            "delta_cp_j_mol_k": dcp,
        },
    )


def dpka_dt(
    t_k: ArrayLike,
    delta_h_j_mol: ArrayLike,
    delta_cp_j_mol_k: ArrayLike = 0.0,
    t_ref_k: ArrayLike = 298.15,
) -> FloatArray:
    """Temperature coefficient dpKa/dT = -ΔH°(T) / (R ln10 T²), ΔH°(T) = ΔH° + ΔCp°(T - θ).

    Parameters
    ----------
    t_k : array_like
        Temperature [K], 273.15-373.15.
    delta_h_j_mol : array_like
        ΔH° at θ [J/mol].
    delta_cp_j_mol_k : array_like, optional
        ΔCp° [J/(K mol)], default 0.
    t_ref_k : array_like, optional
        θ [K], default 298.15.

    Returns
    -------
    numpy.ndarray
        dpKa/dT [1/K].

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Trans. Faraday Soc. 1966, 62, 539
       (derivative of the integrated van 't Hoff equation).

    Examples
    --------
    >>> round(float(dpka_dt(298.15, 47450.0)), 4)  # Tris
    -0.0279
    """
    t = _temperature(t_k)
    theta = _temperature(t_ref_k)
    dh_t = _as_float(delta_h_j_mol) + _as_float(delta_cp_j_mol_k) * (t - theta)
    return np.asarray(-dh_t / (GAS_CONSTANT * LN10 * t**2), dtype=np.float64)


@dataclass(frozen=True)
class VantHoffFit:
    """Result of :func:`fit_van_t_hoff`.

    Attributes
    ----------
    pka_ref : float
        Fitted pKa at ``t_ref_k`` [-].
    delta_h : float
        ΔH° at ``t_ref_k`` [J/mol].
    delta_cp : float
        ΔCp° [J/(K mol)]; 0.0 when not fitted.
    t_ref_k : float
        Reference temperature [K].
    with_heat_capacity : bool
        Whether ΔCp° was a fitted parameter.
    covariance : numpy.ndarray
        Covariance of (pka_ref, delta_h[, delta_cp]).
    residuals : numpy.ndarray
        Observed minus fitted pKa [-].
    normalized_residuals : numpy.ndarray
        Residuals divided by their standard uncertainty (1/√weight when weights
        are given, else the residual standard deviation).
    """

    pka_ref: float
    delta_h: float
    delta_cp: float
    t_ref_k: float
    with_heat_capacity: bool
    covariance: FloatArray
    residuals: FloatArray
    normalized_residuals: FloatArray

    @property
    def standard_errors(self) -> FloatArray:
        """Standard errors of the fitted parameters (√ diagonal of the covariance)."""
        return np.sqrt(np.diag(self.covariance))


def fit_van_t_hoff(
    t_k: ArrayLike,
    pka: ArrayLike,
    weights: ArrayLike | None = None,
    with_heat_capacity: bool = False,
    t_ref_k: float = 298.15,
) -> VantHoffFit:
    """Fit pKa(T) data with the integrated van 't Hoff equation.

    Least squares (``scipy.optimize.curve_fit``) of the model in
    :func:`van_t_hoff` for pKa(θ), ΔH° and optionally ΔCp°.

    Parameters
    ----------
    t_k : array_like
        Temperatures [K], 273.15-373.15.
    pka : array_like
        pKa values [-].
    weights : array_like, optional
        Statistical weights 1/u² [-] (u the standard uncertainty of each pKa).
        With weights the covariance is absolute; without, it is scaled by the
        residual variance.
    with_heat_capacity : bool, optional
        Fit ΔCp° as well (needs >= 4 points); default False (>= 3 points).
    t_ref_k : float, optional
        Reference temperature θ [K], default 298.15.

    Returns
    -------
    VantHoffFit

    Raises
    ------
    ValueError
        Too few points, mismatched lengths, NaN or non-positive weights.

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Trans. Faraday Soc. 1966, 62, 539-547.
       doi:10.1039/TF9666200539
    .. [2] Goldberg, R. N.; Kishore, N.; Lennen, R. M. J. Phys. Chem. Ref.
       Data 2002, 31, 231-370. doi:10.1063/1.1416902

    Examples
    --------
    >>> t = np.array([278.15, 288.15, 298.15, 308.15, 318.15])
    >>> p = van_t_hoff(8.072, 298.15, t, 47450.0).value
    >>> round(fit_van_t_hoff(t, p).delta_h)
    47450
    """
    t = _temperature(t_k)
    y = _as_float(pka)
    theta = float(_temperature(t_ref_k))
    if t.ndim != 1 or t.shape != y.shape:
        raise ValueError(
            f"t_k and pka must be 1-D arrays of equal length; got shapes {t.shape} and {y.shape}"
        )
    if np.isnan(t).any() or np.isnan(y).any():
        raise ValueError("t_k and pka must not contain NaN; drop missing points before fitting")
    n_par = 3 if with_heat_capacity else 2
    if t.size <= n_par:
        raise ValueError(
            f"{t.size} points given; fitting {n_par} parameters needs at least {n_par + 1}"
        )
    if weights is None:
        sigma = None
    else:
        w = _as_float(weights)
        if w.shape != t.shape or not np.all(np.isfinite(w)) or np.any(w <= 0):
            raise ValueError(
                f"weights must be finite, > 0 and of shape {t.shape}; got {w!r}"
            )
        sigma = 1.0 / np.sqrt(w)
    x_h, x_cp = van_t_hoff_coefficients(t, np.asarray(theta))

    def model(_x: FloatArray, p0: float, dh: float, dcp: float = 0.0) -> FloatArray:
        return p0 + dh * x_h + dcp * x_cp

    # linear in its parameters: the unweighted linear solution is an exact start
    design = np.column_stack([np.ones_like(t), x_h, x_cp][:n_par])
    start = np.linalg.lstsq(design, y, rcond=None)[0]
    popt, pcov = curve_fit(
        model, t, y, p0=start, sigma=sigma, absolute_sigma=sigma is not None
    )
    fitted = model(t, *popt)
    resid = y - fitted
    if sigma is not None:
        norm = resid / sigma
    else:
        s = math.sqrt(float(np.sum(resid**2)) / (t.size - n_par))
        norm = resid / s if s > 0 else np.zeros_like(resid)
    return VantHoffFit(
        pka_ref=float(popt[0]),
        delta_h=float(popt[1]),
        delta_cp=float(popt[2]) if with_heat_capacity else 0.0,
        t_ref_k=theta,
        with_heat_capacity=with_heat_capacity,
        covariance=np.asarray(pcov, dtype=np.float64),
        residuals=np.asarray(resid, dtype=np.float64),
        normalized_residuals=np.asarray(norm, dtype=np.float64),
    )


@dataclass(frozen=True)
class VantHoffGroupFits:
    """Result of :func:`fit_van_t_hoff_groups`: one entry per group.

    Attributes
    ----------
    pka_ref : numpy.ndarray
        Fitted pKa at each group's reference temperature [-].
    delta_h : numpy.ndarray
        ΔH° at the reference temperature [J/mol].
    delta_cp : numpy.ndarray
        ΔCp° [J/(K mol)]; 0.0 where not fitted.
    t_ref_k : numpy.ndarray
        Reference temperatures [K].
    with_heat_capacity : numpy.ndarray
        Whether ΔCp° was a fitted parameter (bool).
    covariance : numpy.ndarray
        Covariance of (pka_ref, delta_h, delta_cp), shape (groups, 3, 3); the ΔCp° row and
        column are 0 where ΔCp° is not fitted.
    chi_squared : numpy.ndarray
        Sum of (weighted) squared residuals [-].
    dof : numpy.ndarray
        Degrees of freedom: points minus fitted parameters (int).
    """

    pka_ref: FloatArray
    delta_h: FloatArray
    delta_cp: FloatArray
    t_ref_k: FloatArray
    with_heat_capacity: NDArray[np.bool_]
    covariance: FloatArray
    chi_squared: FloatArray
    dof: NDArray[np.int64]


def fit_van_t_hoff_groups(
    group: ArrayLike,
    t_k: ArrayLike,
    pka: ArrayLike,
    t_ref_k: ArrayLike,
    with_heat_capacity: ArrayLike,
    weights: ArrayLike | None = None,
) -> VantHoffGroupFits:
    """Fit many pKa(T) data sets at once with the integrated van 't Hoff equation.

    The same least-squares fit as :func:`fit_van_t_hoff`, for every group of points in one pass:
    the model of :func:`van_t_hoff` is linear in pKa(θ), ΔH° and ΔCp°, so each group's fit has
    the closed form of linear regression (normal equations on group-centred terms, ref. [3]),
    evaluated from per-group sums with ``numpy.bincount``, no loop over groups.

    Parameters
    ----------
    group : array_like of int
        Group of each point, 0 to G - 1 (every group must have points).
    t_k : array_like
        Temperatures [K], 273.15-373.15.
    pka : array_like
        pKa values [-].
    t_ref_k : array_like
        Reference temperature θ of each group [K], shape (G,).
    with_heat_capacity : array_like of bool
        Whether to fit ΔCp° in each group, shape (G,) (needs >= 4 points there, else >= 3).
    weights : array_like, optional
        Statistical weights 1/u² [-] of the points. With weights the covariance is absolute;
        without, it is scaled by each group's residual variance (as :func:`fit_van_t_hoff`).

    Returns
    -------
    VantHoffGroupFits

    Raises
    ------
    ValueError
        Too few points in a group, mismatched lengths, NaN or non-positive weights.

    References
    ----------
    .. [1] Clarke, E. C. W.; Glew, D. N. Trans. Faraday Soc. 1966, 62, 539-547.
       doi:10.1039/TF9666200539
    .. [2] Goldberg, R. N.; Kishore, N.; Lennen, R. M. J. Phys. Chem. Ref.
       Data 2002, 31, 231-370. doi:10.1063/1.1416902
    .. [3] Draper, N. R.; Smith, H. *Applied Regression Analysis*, 3rd ed.; Wiley: New York,
       1998; ch. 5 (least squares in matrix form, centred regressors).

    Examples
    --------
    >>> t = np.array([278.15, 288.15, 298.15, 308.15, 318.15])
    >>> p = van_t_hoff(8.072, 298.15, t, 47450.0).value
    >>> fits = fit_van_t_hoff_groups(np.zeros(5, dtype=int), t, p, [298.15], [False])
    >>> round(float(fits.delta_h[0])), round(float(fits.pka_ref[0]), 3)
    (47450, 8.072)
    """
    g = np.asarray(group, dtype=np.int64)
    t = _temperature(t_k)
    y = _as_float(pka)
    theta = _temperature(t_ref_k)
    cp = np.asarray(with_heat_capacity, dtype=bool)
    if t.ndim != 1 or t.shape != y.shape or g.shape != t.shape:
        raise ValueError(
            "group, t_k and pka must be 1-D arrays of equal length; got shapes "
            f"{g.shape}, {t.shape} and {y.shape}"
        )
    if theta.ndim != 1 or cp.shape != theta.shape:
        raise ValueError(
            f"t_ref_k and with_heat_capacity need one entry per group; got shapes {theta.shape} and {cp.shape}"
        )
    if np.isnan(t).any() or np.isnan(y).any():
        raise ValueError("t_k and pka must not contain NaN; drop missing points before fitting")
    n_groups = theta.size
    if g.size and (g.min() < 0 or g.max() >= n_groups):
        raise ValueError(f"group ids must lie in 0..{n_groups - 1}; got {g.min()}..{g.max()}")
    n_points = np.bincount(g, minlength=n_groups)
    n_par = np.where(cp, 3, 2)
    short = n_points <= n_par
    if short.any():
        k = int(np.argmax(short))
        raise ValueError(
            f"{n_points[k]} points given in group {k}; fitting {n_par[k]} parameters needs at least {n_par[k] + 1}"
        )
    if weights is None:
        w = np.ones_like(y)
    else:
        w = _as_float(weights)
        if w.shape != t.shape or not np.all(np.isfinite(w)) or np.any(w <= 0):
            raise ValueError(f"weights must be finite, > 0 and of shape {t.shape}; got {w!r}")

    def group_sum(x: FloatArray) -> FloatArray:
        return np.bincount(g, weights=x, minlength=n_groups)

    x_h, x_cp = van_t_hoff_coefficients(t, theta[g])
    x_cp = np.where(cp[g], x_cp, 0.0)  # a group without ΔCp° has only the ΔH° term
    w_sum = group_sum(w)
    mean_h, mean_cp, mean_y = (group_sum(w * x) / w_sum for x in (x_h, x_cp, y))
    # centring on the group means separates the intercept and keeps the 2x2 system well conditioned
    c_h, c_cp, c_y = x_h - mean_h[g], x_cp - mean_cp[g], y - mean_y[g]
    s_hh, s_hc, s_cc = group_sum(w * c_h * c_h), group_sum(w * c_h * c_cp), group_sum(w * c_cp * c_cp)
    s_hy, s_cy = group_sum(w * c_h * c_y), group_sum(w * c_cp * c_y)
    # inverse of the centred normal matrix [[s_hh, s_hc], [s_hc, s_cc]]; 1/s_hh alone without ΔCp°
    det = np.where(cp, s_hh * s_cc - s_hc**2, 1.0)
    inv_hh = np.where(cp, s_cc / det, 1.0 / s_hh)
    inv_hc = np.where(cp, -s_hc / det, 0.0)
    inv_cc = np.where(cp, s_hh / det, 0.0)
    delta_h = inv_hh * s_hy + inv_hc * s_cy
    delta_cp = inv_hc * s_hy + inv_cc * s_cy
    pka_ref = mean_y - delta_h * mean_h - delta_cp * mean_cp  # the terms vanish at θ
    resid = c_y - delta_h[g] * c_h - delta_cp[g] * c_cp
    chi_squared = group_sum(w * resid**2)
    dof = n_points - n_par
    scale = np.ones(n_groups) if weights is not None else chi_squared / dof
    slopes = scale[:, None, None] * np.stack([np.stack([inv_hh, inv_hc], -1), np.stack([inv_hc, inv_cc], -1)], -2)
    means = np.stack([mean_h, mean_cp], -1)
    cov_slopes_means = np.einsum("gij,gj->gi", slopes, means)
    covariance = np.zeros((n_groups, 3, 3))
    covariance[:, 1:, 1:] = slopes
    covariance[:, 0, 1:] = covariance[:, 1:, 0] = -cov_slopes_means
    covariance[:, 0, 0] = scale / w_sum + np.einsum("gi,gi->g", means, cov_slopes_means)
    return VantHoffGroupFits(
        pka_ref=pka_ref,
        delta_h=delta_h,
        delta_cp=np.where(cp, delta_cp, 0.0),
        t_ref_k=theta,
        with_heat_capacity=cp,
        covariance=covariance,
        chi_squared=chi_squared,
        dof=dof,
    )
