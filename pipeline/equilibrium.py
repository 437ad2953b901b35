"""Acid-base equilibrium solver: pH and species distribution of a solution, from the library.

A solution is a set of weak acid-base systems (:class:`AcidBase`: stepwise thermodynamic pKa
values, total molality, charge of the most protonated form) and fully dissociated ions
(:class:`Ion`: the counter-ions of strong acids, strong bases and salts). :func:`solve` finds
the free hydrogen-ion molality m_H from the charge balance

    m_H + Σ_ions z m - Kw'/m_H + Σ_systems C Σ_j z_j α_j(m_H) = 0,

exactly (no square-root shortcut), with brentq [1]_ in log10 m_H. The distribution fractions of
a system H_nA are α_j = β'_j m_H^-j / Σ_k β'_k m_H^-k, β'_j = Π_{k<=j} K'_k [2]_, with the
concentration constants K'_k = K_k γ(H_{n-k+1}A) / (γ_H γ(H_{n-k}A)) and Kw' = Kw/(γ_H γ_OH);
the γ come from the activity model at the solution's own ionic strength I = ½ Σ z² m, which is
iterated to self-consistency (fixed point, |ΔI| <= 1e-12 + 1e-9 I). pKw is IAPWS R11-24
(:func:`pipeline.physchem.pkw`). Work is on the molality scale [mol/kg], the scale of the
library's thermodynamic pKa values. The inner function is numpy over all species at once (per
system reductions with ``numpy.ufunc.reduceat``).

pH is the conventional pH = -log10(γ_H m_H) [3]_. Activity models: ``"davies"`` (Davies 1962,
I <= 0.5 mol/kg), ``"bates_guggenheim"`` (log γ = -A z² √I/(1 + 1.5 √I) for every ion, the
form the IUPAC pH(S) convention fixes for chloride, I <= 0.1 mol/kg) and ``"ideal"`` (γ = 1).

For a lone weak acid the result also says how far the square-root shortcut
pH = -log10 √(Ka C) falls from the exact value, flagged beyond 0.02.

References
----------
.. [1] Brent, R. P. Algorithms for Minimization without Derivatives; Prentice-Hall, 1973, ch. 4
   (``scipy.optimize.brentq``).
.. [2] Butler, J. N. Ionic Equilibrium: Solubility and pH Calculations; Wiley, 1998, ch. 3-4
   (charge balance, distribution fractions of polyprotic acids).
.. [3] Buck, R. P. et al. Measurement of pH. Definition, Standards, and Procedures (IUPAC
   Recommendations 2002). Pure Appl. Chem. 2002, 74, 2169-2200. doi:10.1351/pac200274112169
.. [4] Davies, C. W. Ion Association; Butterworths: London, 1962; p 41.
.. [5] Bates, R. G.; Guggenheim, E. A. Report on the Standardization of pH and Related
   Terminology. Pure Appl. Chem. 1960, 1, 163-168; IUPAC, Pure Appl. Chem. 1984, 56, 567.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import brentq

from pipeline import physchem

if TYPE_CHECKING:
    from pipeline.library import Compound, Library

__all__ = [
    "BATES_GUGGENHEIM_MAX_I",
    "SHORTCUT_TOLERANCE",
    "SOLVER_ACTIVITY_MODELS",
    "AcidBase",
    "Ion",
    "ShortcutCheck",
    "Solution",
    "bates_guggenheim_log_gamma",
    "exact_weak_acid_ph",
    "shortcut_weak_acid_ph",
    "solve",
    "strong_acid",
    "strong_base",
    "system_from_library",
]

FloatArray = NDArray[np.float64]

SOLVER_ACTIVITY_MODELS: tuple[str, ...] = ("davies", "bates_guggenheim", "ideal")
#: |pH(shortcut) - pH(exact)| above which the shortcut is flagged.
SHORTCUT_TOLERANCE = 0.02
#: Upper ionic strength of the Bates-Guggenheim convention [mol/kg] (IUPAC 1984); a computed
#: I that exceeds it by no more than 1e-4 (the rounding of the stated limit) is accepted, so
#: the 0.025/0.025 mol/kg phosphate standard, whose I is 0.1 by construction, stays inside.
BATES_GUGGENHEIM_MAX_I = 0.1
_BG_SLACK = 1e-4
_X_BRACKET = (-16.0, 2.0)  # log10 m_H search interval [log10 mol/kg]


# ---------------------------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class AcidBase:
    """A weak acid-base system H_nA^z in solution.

    Attributes
    ----------
    name : str
        Label.
    pka : tuple of float
        Stepwise thermodynamic pKa values at the solution temperature, step 1 first [-].
    total_molal : float
        Total molality of all its forms [mol/kg].
    z_acid : int
        Charge of the most protonated form H_nA (0 for phthalic or phosphoric acid, +1 for
        ammonium or Tris-H+).
    value_ids : tuple of str
        Library value ids behind the constants (provenance only).
    """

    name: str
    pka: tuple[float, ...]
    total_molal: float
    z_acid: int = 0
    value_ids: tuple[str, ...] = field(default=(), compare=False)

    def __post_init__(self) -> None:
        pka = tuple(float(p) for p in self.pka)
        object.__setattr__(self, "pka", pka)
        if not pka or not all(math.isfinite(p) for p in pka):
            raise ValueError(f"{self.name}: pka must be one or more finite numbers, got {self.pka!r}")
        if not (math.isfinite(self.total_molal) and self.total_molal >= 0.0):
            raise ValueError(f"{self.name}: total_molal must be >= 0 mol/kg, got {self.total_molal!r}")


@dataclass(frozen=True)
class Ion:
    """A fully dissociated ion (a strong electrolyte's counter-ion), e.g. Na+ or Cl-."""

    name: str
    charge: int
    molal: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.molal) and self.molal >= 0.0):
            raise ValueError(f"ion {self.name}: molal must be >= 0 mol/kg, got {self.molal!r}")
        if int(self.charge) != self.charge or self.charge == 0:
            raise ValueError(f"ion {self.name}: charge must be a non-zero integer, got {self.charge!r}")


def strong_acid(molal: float, anion: str = "Cl-") -> Ion:
    """The anion of a fully dissociated monoprotic strong acid (its H+ is solved for).

    Examples
    --------
    >>> strong_acid(0.01)
    Ion(name='Cl-', charge=-1, molal=0.01)
    """
    return Ion(anion, -1, molal)


def strong_base(molal: float, cation: str = "Na+") -> Ion:
    """The cation of a fully dissociated strong base such as NaOH (its OH- is solved for).

    Examples
    --------
    >>> strong_base(0.1)
    Ion(name='Na+', charge=1, molal=0.1)
    """
    return Ion(cation, 1, molal)


# ---------------------------------------------------------------------------------------------
# activity
# ---------------------------------------------------------------------------------------------


def bates_guggenheim_log_gamma(
    charge: ArrayLike, ionic_strength: float, temperature_k: float = 298.15
) -> FloatArray:
    """Single-ion log10 γ in the Bates-Guggenheim form, log γ = -A z² √I / (1 + 1.5 √I).

    The IUPAC pH(S) convention fixes this expression for γ(Cl-) [1]_ [2]_; applied here to
    every ion (the extended Debye-Hückel equation with B å = 1.5 kg^1/2 mol^-1/2). A(T) from
    :func:`pipeline.physchem.debye_huckel_a` (IAPWS water).

    Parameters
    ----------
    charge : array_like
        Charge numbers z [-].
    ionic_strength : float
        Ionic strength [mol/kg], 0-0.1.
    temperature_k : float
        Temperature [K].

    Returns
    -------
    numpy.ndarray
        log10 γ [-].

    Raises
    ------
    pipeline.physchem.PhysChemRangeError
        I above 0.1 mol/kg (beyond 1e-4 of slack).

    References
    ----------
    .. [1] Bates, R. G.; Guggenheim, E. A. Pure Appl. Chem. 1960, 1, 163-168.
    .. [2] Covington, A. K.; Bates, R. G.; Durst, R. A. Definition of pH Scales, Standard
       Reference Values, Measurement of pH and Related Terminology (IUPAC Recommendations
       1984). Pure Appl. Chem. 1985, 57, 531-542 (and Pure Appl. Chem. 1984, 56, 567).

    Examples
    --------
    >>> round(float(bates_guggenheim_log_gamma(-1, 0.1)), 4)  # chloride at I = 0.1, 25 °C
    -0.1093
    """
    i = float(ionic_strength)
    if not (0.0 <= i <= BATES_GUGGENHEIM_MAX_I + _BG_SLACK):
        raise physchem.PhysChemRangeError(
            f"ionic_strength out of range: {i:.10g} mol/kg; valid range for the "
            f"Bates-Guggenheim convention is [0, {BATES_GUGGENHEIM_MAX_I:g}] mol/kg"
        )
    a = float(physchem.debye_huckel_a(temperature_k))
    z = np.asarray(charge, dtype=np.float64)
    s = math.sqrt(i)
    return np.asarray(-a * z**2 * s / (1.0 + 1.5 * s), dtype=np.float64)


def _log_gamma(model: str, z: FloatArray, i: float, t: float) -> FloatArray:
    if model == "ideal":
        return np.zeros_like(z)
    if model == "bates_guggenheim":
        return bates_guggenheim_log_gamma(z, i, t)
    return np.asarray(physchem.log_activity_coefficient(z, i, t, "davies"), dtype=np.float64)


# ---------------------------------------------------------------------------------------------
# shortcut and exact single-acid formulas
# ---------------------------------------------------------------------------------------------


def shortcut_weak_acid_ph(pka: float, total_molal: float) -> float:
    """Square-root shortcut for a weak acid alone, pH = -log10 √(Ka C) = ½ (pKa - log10 C).

    Neglects the dissociated fraction against C and water's protons [1]_.

    Parameters
    ----------
    pka : float
        pKa [-].
    total_molal : float
        Acid molality C [mol/kg].

    Returns
    -------
    float
        pH [-].

    References
    ----------
    .. [1] Harris, D. C. Quantitative Chemical Analysis, 8th ed.; Freeman, 2010, §9-2.

    Examples
    --------
    >>> round(shortcut_weak_acid_ph(4.756, 0.1), 3)
    2.878
    """
    return 0.5 * (pka - math.log10(total_molal))


def exact_weak_acid_ph(pka: float, total_molal: float) -> float:
    """Exact pH of a monoprotic weak acid alone, water neglected, ideal solution.

    [H+] = (-Ka + √(Ka² + 4 Ka C)) / 2, the positive root of [H+]² + Ka [H+] - Ka C = 0 [1]_.

    Parameters
    ----------
    pka : float
        pKa [-].
    total_molal : float
        Acid molality C [mol/kg].

    Returns
    -------
    float
        pH [-].

    References
    ----------
    .. [1] Harris, D. C. Quantitative Chemical Analysis, 8th ed.; Freeman, 2010, §9-2.

    Examples
    --------
    >>> round(exact_weak_acid_ph(4.756, 0.1), 4)
    2.8809
    """
    ka = 10.0**-pka
    h = (-ka + math.sqrt(ka * ka + 4.0 * ka * total_molal)) / 2.0
    return -math.log10(h)


# ---------------------------------------------------------------------------------------------
# solver
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ShortcutCheck:
    """How far the square-root shortcut falls from the exact pH for a lone weak acid."""

    system: str
    ph_shortcut: float
    ph_exact: float
    error: float
    flagged: bool


@dataclass(frozen=True)
class Solution:
    """Result of :func:`solve`.

    Attributes
    ----------
    ph : float
        Conventional pH = -log10(γ_H m_H) [-].
    ph_free : float
        -log10 m_H [-] (free hydrogen-ion molality).
    ionic_strength : float
        Self-consistent ionic strength [mol/kg].
    species : pandas.DataFrame
        One row per species: ``system, species, charge, molal, fraction, log_gamma``
        (``fraction`` of its system's total; NaN for H+, OH- and strong ions).
    shortcut : ShortcutCheck or None
        For a solution of one weak acid and nothing else.
    """

    ph: float
    ph_free: float
    ionic_strength: float
    temperature_k: float
    activity_model: str
    pkw: float
    log_gamma_h: float
    species: pd.DataFrame
    iterations: int
    shortcut: ShortcutCheck | None


def _species_labels(n: int, z_acid: int) -> list[str]:
    out = []
    for j in range(n + 1):
        h = n - j
        z = z_acid - j
        hs = "" if h == 0 else ("H" if h == 1 else f"H{h}")
        zs = "" if z == 0 else (("+" if z > 0 else "-") if abs(z) == 1 else f"{abs(z)}{'+' if z > 0 else '-'}")
        out.append(f"{hs}A{zs}")
    return out


def solve(
    acids: Sequence[AcidBase] = (),
    ions: Sequence[Ion] = (),
    temperature_k: float = 298.15,
    activity_model: str = "davies",
    *,
    max_iterations: int = 200,
) -> Solution:
    """pH and species distribution of an aqueous solution, exact and self-consistent in I.

    See the module docstring for the equations. Each weak system contributes n + 1 forms
    H_{n-j}A^(z_acid - j); strong ions only their charge; H+ and OH- are solved for.

    Parameters
    ----------
    acids : sequence of AcidBase
        Weak acid-base systems with thermodynamic pKa values at ``temperature_k``.
    ions : sequence of Ion
        Fully dissociated ions [mol/kg].
    temperature_k : float
        Temperature [K], 273.15-373.15 (sets pKw and A).
    activity_model : {"davies", "bates_guggenheim", "ideal"}
        Single-ion activity model.
    max_iterations : int
        Limit of the ionic-strength iteration.

    Returns
    -------
    Solution

    Raises
    ------
    ValueError
        Unknown activity model (choices listed), no root in the bracket, no convergence.
    pipeline.physchem.PhysChemRangeError
        Ionic strength or temperature outside the activity model's range.

    References
    ----------
    .. [1] Butler, J. N. Ionic Equilibrium: Solubility and pH Calculations; Wiley, 1998.
    .. [2] Buck, R. P. et al. Pure Appl. Chem. 2002, 74, 2169-2200 (conventional pH).

    Examples
    --------
    0.01 mol/kg HCl, ideal: pH = -log10 0.01 = 2.

    >>> round(solve(ions=[strong_acid(0.01)], activity_model="ideal").ph, 4)
    2.0
    >>> s = solve([AcidBase("acetic acid", (4.756,), 0.1)], [strong_base(0.1)])
    >>> s.ph > 7  # weak acid at its equivalence point with NaOH
    True
    """
    if activity_model not in SOLVER_ACTIVITY_MODELS:
        raise ValueError(
            f"unknown activity_model {activity_model!r}; valid choices: "
            f"{', '.join(SOLVER_ACTIVITY_MODELS)}"
        )
    t = float(temperature_k)
    pkw = float(physchem.pkw(t))
    # --- static arrays over all forms of all systems ------------------------------------------
    n_forms = [len(a.pka) + 1 for a in acids]
    sys_idx = np.repeat(np.arange(len(acids)), n_forms)
    starts = np.concatenate([[0], np.cumsum(n_forms)[:-1]]).astype(np.intp) if acids else np.zeros(0, np.intp)
    jj = (np.arange(sys_idx.size) - starts[sys_idx]).astype(np.float64) if acids else np.zeros(0)
    lbeta = (np.concatenate([np.concatenate([[0.0], -np.cumsum(a.pka)]) for a in acids])
             if acids else np.zeros(0))
    z_forms = (np.array([a.z_acid for a in acids], dtype=np.float64)[sys_idx] - jj
               if acids else np.zeros(0))
    tot_forms = np.array([a.total_molal for a in acids], dtype=np.float64)[sys_idx] if acids else np.zeros(0)
    z_ion = np.array([float(x.charge) for x in ions])
    m_ion = np.array([float(x.molal) for x in ions])
    s_ion = float(np.dot(z_ion, m_ion)) if ions else 0.0
    i_ion = 0.5 * float(np.dot(z_ion**2, m_ion)) if ions else 0.0
    ztz = tot_forms * z_forms
    z_all = np.concatenate([z_forms, [1.0, -1.0]])

    def fractions(x: float, lbc: FloatArray) -> FloatArray:
        lb = lbc - jj * x
        top = np.maximum.reduceat(lb, starts)[sys_idx]
        e = 10.0 ** (lb - top)
        return e / np.add.reduceat(e, starts)[sys_idx]

    ionic = i_ion
    x = -7.0
    lg = np.zeros(z_all.size)
    n_iter = 0
    for n_iter in range(1, max_iterations + 1):  # noqa: B007 - n_iter is reported below
        lg = _log_gamma(activity_model, z_all, ionic, t)
        lg_forms, lg_h, lg_oh = lg[:-2], float(lg[-2]), float(lg[-1])
        # log10 β'_j = log10 β_j + log γ(H_nA) - log γ(form j) - j log γ_H (telescoped product)
        lbc = lbeta + lg_forms[starts][sys_idx] - lg_forms - jj * lg_h if acids else lbeta
        pkw_c = pkw + lg_h + lg_oh

        def balance(xx: float, lbc: FloatArray = lbc, pkw_c: float = pkw_c) -> float:
            acid_charge = float(np.dot(ztz, fractions(xx, lbc))) if acids else 0.0
            return 10.0**xx - 10.0 ** (-pkw_c - xx) + s_ion + acid_charge

        lo, hi = _X_BRACKET
        f_lo, f_hi = balance(lo), balance(hi)
        if not (f_lo < 0.0 < f_hi):
            raise ValueError(
                f"charge balance has no root for log10 m_H in [{lo:g}, {hi:g}] "
                f"(residuals {f_lo:.3g}, {f_hi:.3g}); the solution is outside the solver's range"
            )
        x = float(brentq(balance, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps, maxiter=200))
        frac = fractions(x, lbc) if acids else np.zeros(0)
        m_forms = tot_forms * frac
        m_h = 10.0**x
        m_oh = 10.0 ** (-pkw_c - x)
        new_i = i_ion + 0.5 * (float(np.dot(z_forms**2, m_forms)) + m_h + m_oh)
        if activity_model == "ideal" or abs(new_i - ionic) <= 1e-12 + 1e-9 * ionic:
            ionic = new_i
            break
        ionic = new_i
    else:
        raise ValueError(
            f"ionic strength did not converge in {max_iterations} iterations "
            f"(last I = {ionic:.6g} mol/kg)"
        )
    lg = _log_gamma(activity_model, z_all, ionic, t)
    lg_h = float(lg[-2])
    ph = -(x + lg_h)
    labels = [lab for a in acids for lab in _species_labels(len(a.pka), a.z_acid)]
    species = pd.DataFrame(
        {
            "system": [a.name for a in acids for _ in range(len(a.pka) + 1)] + ["water", "water"]
            + ["strong ion"] * len(ions),
            "species": labels + ["H+", "OH-"] + [x_.name for x_ in ions],
            "charge": np.concatenate([z_forms, [1.0, -1.0], z_ion]).astype(int),
            "molal": np.concatenate([m_forms, [m_h, m_oh], m_ion]),
            "fraction": np.concatenate([frac, [np.nan, np.nan], np.full(len(ions), np.nan)]),
            "log_gamma": np.concatenate([lg[:-2], lg[-2:], _log_gamma(activity_model, z_ion, ionic, t)
                                         if ions else np.zeros(0)]),
        }
    )
    shortcut = None
    if len(acids) == 1 and not ions and acids[0].total_molal > 0:
        a = acids[0]
        ph_sc = shortcut_weak_acid_ph(a.pka[0], a.total_molal)
        err = ph_sc - ph
        shortcut = ShortcutCheck(a.name, ph_sc, ph, err, abs(err) > SHORTCUT_TOLERANCE)
    return Solution(
        ph=ph,
        ph_free=-x,
        ionic_strength=ionic,
        temperature_k=t,
        activity_model=activity_model,
        pkw=pkw,
        log_gamma_h=lg_h,
        species=species,
        iterations=n_iter,
        shortcut=shortcut,
    )


def system_from_library(
    library: Library,
    compound: str | Compound,
    total_molal: float,
    temperature_k: float = 298.15,
) -> AcidBase:
    """An :class:`AcidBase` with every step's thermodynamic pKa from the library at T.

    Parameters
    ----------
    library : pipeline.library.Library
        Open library.
    compound : str or Compound
        Name, CAS, SMILES or InChIKey.
    total_molal : float
        Total molality [mol/kg].
    temperature_k : float
        Temperature [K]; values are transferred by :meth:`Library.pka`.

    Returns
    -------
    AcidBase
        ``z_acid`` is the library's charge of the step-1 acid form; ``value_ids`` the values
        behind the constants.

    Raises
    ------
    ValueError
        The library's steps are not 1, 2, ..., n.
    """
    results = library.pkas(compound, temperature=temperature_k)
    steps = [r.step for r in results]
    if len(results) > 1 and steps != list(range(1, len(results) + 1)):
        raise ValueError(
            f"{results[0].name}: steps {steps} are not consecutive from 1; "
            "the solver needs every step of the system"
        )
    return AcidBase(
        name=results[0].name or results[0].compound_id,
        pka=tuple(r.pka for r in results),
        total_molal=total_molal,
        z_acid=results[0].charge,
        value_ids=tuple(v for r in results for v in r.value_ids),
    )
