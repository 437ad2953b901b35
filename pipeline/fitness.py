"""Fitness for use: recompute reference solutions from a built library and fail on drift.

Each :class:`FitnessCase` is a solution whose pH the field's standards (or plain chemistry)
fix. :func:`run_fitness` takes every constant it needs from the library
(:func:`pipeline.equilibrium.system_from_library`, thermodynamic pKa at 25 °C, I = 0), solves
the solution with :func:`pipeline.equilibrium.solve` and compares with the published value.
``kaledger check --fitness`` prints the table and exits 1 when a case fails.

Activity model and honest tolerance
-----------------------------------
The pH(S) values of the IUPAC primary standards [1]_ rest on the Bates-Guggenheim convention
for γ(Cl-). The suite computes the conventional pH = -log10(γ_H m_H) with the same
Bates-Guggenheim form for every ion (``"bates_guggenheim"``), and reports the Davies result
beside it. With the demo library's recommended constants (phthalic 2.950 / 5.4095,
phosphoric 2.149 / 7.199 / 12.35, boric 9.2385, carbonic 6.3505 / 10.3295) the computed values
differ from pH(S) by (Bates-Guggenheim / Davies): phthalate +0.008 / +0.008, phosphate +0.006 /
+0.012, borax -0.002 / -0.002, carbonate -0.015 / -0.008. Ion pairing (K+, Na+ with the buffer anions) and the
single-ion convention are not modelled, so about 0.015 is the model's own floor: a tolerance of
0.02, as the issue asks, is honest but tight; 0.01 would fail the standards for reasons of the
model, not of the data. A 0.1 change of a controlling constant (phthalic pK1 or pK2,
phosphoric pK2, boric pKa, carbonic pK2) moves the pH by 0.05-0.1 and fails the case.

References
----------
.. [1] Buck, R. P.; Rondinini, S.; Covington, A. K.; et al. Measurement of pH. Definition,
   Standards, and Procedures (IUPAC Recommendations 2002). Pure Appl. Chem. 2002, 74,
   2169-2200. doi:10.1351/pac200274112169
.. [2] Hamer, W. J.; Pinching, G. D.; Acree, S. F. J. Res. Natl. Bur. Stand. 1946, 36, 47
   (potassium hydrogen phthalate).
.. [3] Bates, R. G. Revised standard values for pH measurements from 0 to 95 °C.
   J. Res. Natl. Bur. Stand. 1962, 66A, 179; Bates, R. G. Determination of pH, 2nd ed.;
   Wiley, 1973 (borax, carbonate).
.. [4] Harris, D. C. Quantitative Chemical Analysis, 8th ed.; Freeman, 2010, §11 (the
   equivalence point of a weak acid titrated with a strong base lies above pH 7).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from pipeline import equilibrium as eq
from pipeline.library import ConditionsOutOfRangeError, Library, LibraryLookupError
from pipeline.physchem import PhysChemRangeError

__all__ = [
    "CASES",
    "CaseResult",
    "Component",
    "FitnessCase",
    "FitnessReport",
    "run_fitness",
]

PHTHALIC = "XNGIFLGASWRNHJ-UHFFFAOYSA-N"
PHOSPHORIC = "NBIIXXVUZAFLBC-UHFFFAOYSA-N"
BORIC = "KGBXLFKZBHKPEV-UHFFFAOYSA-N"
CARBONIC = "BVKZGUZCCUSVTD-UHFFFAOYSA-N"
ACETIC = "QTBSBXVTEAMEQO-UHFFFAOYSA-N"


@dataclass(frozen=True)
class Component:
    """A weak acid-base system of a case, taken from the library by InChIKey."""

    inchikey: str
    label: str
    total_molal: float


@dataclass(frozen=True)
class FitnessCase:
    """A reference solution and the pH it must have.

    ``comparison`` is ``"within"`` (|got - expected| <= tolerance) or ``"above"``
    (got > expected). ``required`` cases fail when the library lacks a constant; the others are
    skipped.
    """

    key: str
    description: str
    components: tuple[Component, ...]
    ions: tuple[eq.Ion, ...]
    expected: float
    tolerance: float
    source: str
    status: str
    comparison: str = "within"
    activity_model: str = "bates_guggenheim"
    temperature_k: float = 298.15
    required: bool = True


#: The suite. Sources and status words as in REFERENCE-VALUES.md (C confirmed, M from memory,
#: K computed).
CASES: tuple[FitnessCase, ...] = (
    FitnessCase(
        key="phthalate",
        description="potassium hydrogen phthalate 0.05 mol/kg, 25 °C",
        components=(Component(PHTHALIC, "phthalic acid", 0.05),),
        ions=(eq.Ion("K+", 1, 0.05),),
        expected=4.005,
        tolerance=0.02,
        source="IUPAC primary pH standard, Buck et al., Pure Appl. Chem. 74 (2002) 2169; "
        "Hamer, Pinching & Acree 1946 [C]",
        status="C",
    ),
    FitnessCase(
        key="phosphate",
        description="KH2PO4 0.025 + Na2HPO4 0.025 mol/kg, 25 °C",
        components=(Component(PHOSPHORIC, "phosphoric acid", 0.05),),
        ions=(eq.Ion("K+", 1, 0.025), eq.Ion("Na+", 1, 0.05)),
        expected=6.865,
        tolerance=0.02,
        source="IUPAC primary pH standard, Buck et al., Pure Appl. Chem. 74 (2002) 2169 "
        "[M, from memory; 6.86 in JIS Z 8802, C]",
        status="M",
    ),
    FitnessCase(
        key="borax",
        description="sodium tetraborate (borax) 0.01 mol/kg, 25 °C",
        # Na2B4O7 + 7 H2O -> 2 B(OH)3 + 2 B(OH)4- + 2 Na+: 0.04 mol/kg boron, 0.02 Na+
        components=(Component(BORIC, "boric acid", 0.04),),
        ions=(eq.Ion("Na+", 1, 0.02),),
        expected=9.180,
        tolerance=0.02,
        source="IUPAC primary pH standard, Buck et al., Pure Appl. Chem. 74 (2002) 2169; "
        "Bates 1969 [C]",
        status="C",
        required=False,
    ),
    FitnessCase(
        key="carbonate",
        description="NaHCO3 0.025 + Na2CO3 0.025 mol/kg, 25 °C",
        components=(Component(CARBONIC, "carbonic acid", 0.05),),
        ions=(eq.Ion("Na+", 1, 0.075),),
        expected=10.012,
        tolerance=0.02,
        source="IUPAC primary pH standard, Buck et al., Pure Appl. Chem. 74 (2002) 2169; "
        "Bates 1969 [C]",
        status="C",
        required=False,
    ),
    FitnessCase(
        key="weak-acid",
        description="acetic acid 0.01 mol/kg, 25 °C, ideal solution",
        components=(Component(ACETIC, "acetic acid", 0.01),),
        ions=(),
        expected=round(eq.exact_weak_acid_ph(4.756, 0.01), 4),
        tolerance=0.02,
        source="exact quadratic [H+] = (-Ka + sqrt(Ka^2 + 4 Ka C))/2 (arithmetic, K) with pKa "
        "4.756 (Harned & Ehlers 1933, from memory, M)",
        status="K from M",
        activity_model="ideal",
    ),
    FitnessCase(
        key="equivalence",
        description="acetic acid 0.1 mol/kg titrated to its equivalence point with NaOH, 25 °C",
        components=(Component(ACETIC, "acetic acid", 0.1),),
        ions=(eq.strong_base(0.1),),
        expected=7.0,
        tolerance=0.0,
        source="the conjugate base of a weak acid is a base: equivalence pH > 7 "
        "(Harris, Quantitative Chemical Analysis, 8th ed., 2010, ch. 11)",
        status="C",
        comparison="above",
        activity_model="davies",
    ),
)


@dataclass(frozen=True)
class CaseResult:
    """Outcome of one case: ``outcome`` is "pass", "fail" or "skip"."""

    case: FitnessCase
    outcome: str
    got: float | None
    message: str
    constants: tuple[str, ...] = ()
    other_models: dict[str, float] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.outcome != "fail"


@dataclass(frozen=True)
class FitnessReport:
    """All case results; ``ok`` when none failed."""

    results: tuple[CaseResult, ...]

    @property
    def ok(self) -> bool:
        return all(r.passed for r in self.results)

    @property
    def failures(self) -> tuple[CaseResult, ...]:
        return tuple(r for r in self.results if r.outcome == "fail")

    def lines(self) -> list[str]:
        """Human-readable table and one message per case."""
        out = [f"{'outcome':7} {'case':12} {'expected':>12} {'got':>8}  model"]
        for r in self.results:
            c = r.case
            exp = (f"> {c.expected:.3f}" if c.comparison == "above"
                   else f"{c.expected:.3f}±{c.tolerance:g}")
            got = "-" if r.got is None else f"{r.got:.3f}"
            out.append(f"{r.outcome.upper():7} {c.key:12} {exp:>12} {got:>8}  {c.activity_model}")
        out.append("")
        out.extend(r.message for r in self.results)
        return out


def _describe(system: eq.AcidBase) -> str:
    pk = ", ".join(f"{p:.4g}" for p in system.pka)
    ids = ", ".join(system.value_ids[:6]) + (", ..." if len(system.value_ids) > 6 else "")
    return f"{system.name} pKa {pk} ({ids})"


def _run_case(lib: Library, case: FitnessCase) -> CaseResult:
    head = f"{case.key}: {case.description}"
    try:
        systems = [eq.system_from_library(lib, c.inchikey, c.total_molal, case.temperature_k)
                   for c in case.components]
    except (LibraryLookupError, ConditionsOutOfRangeError, ValueError) as exc:
        needed = ", ".join(f"{c.label} ({c.inchikey})" for c in case.components)
        outcome = "fail" if case.required else "skip"
        return CaseResult(case, outcome, None,
                          f"{outcome.upper()} {head}: needs {needed}; {exc}; source: {case.source}")
    constants = tuple(_describe(s) for s in systems)
    try:
        sol = eq.solve(systems, case.ions, case.temperature_k, case.activity_model)
        others = {}
        for m in eq.SOLVER_ACTIVITY_MODELS:
            if m != case.activity_model and m != "ideal":
                try:
                    others[m] = eq.solve(systems, case.ions, case.temperature_k, m).ph
                except PhysChemRangeError:
                    continue
    except (PhysChemRangeError, ValueError) as exc:
        return CaseResult(case, "fail", None, f"FAIL {head}: the solver failed: {exc}", constants)
    got = sol.ph
    if case.comparison == "above":
        ok = got > case.expected
        rule = f"expected pH above {case.expected:.3f}"
    else:
        ok = abs(got - case.expected) <= case.tolerance
        rule = f"expected pH {case.expected:.3f} ± {case.tolerance:g}"
    off = got - case.expected
    other = "; ".join(f"{m}: {v:.3f}" for m, v in others.items())
    msg = (f"{'PASS' if ok else 'FAIL'} {head}: {rule}, got {got:.3f} (off by {off:+.3f}, "
           f"{case.activity_model}{'; ' + other if other else ''}); source: {case.source}; "
           f"constants: {'; '.join(constants)}")
    return CaseResult(case, "pass" if ok else "fail", got, msg, constants, others)


def run_fitness(
    library: Library | Path | str, cases: Sequence[FitnessCase] = CASES
) -> FitnessReport:
    """Run the fitness-for-use cases against a library.

    Parameters
    ----------
    library : Library or path
        An open :class:`~pipeline.library.Library` or the path of a built database.
    cases : sequence of FitnessCase
        Default :data:`CASES`.

    Returns
    -------
    FitnessReport

    Examples
    --------
    The cases and their published values (Buck et al. 2002):

    >>> [(c.key, c.expected) for c in CASES][:4]
    [('phthalate', 4.005), ('phosphate', 6.865), ('borax', 9.18), ('carbonate', 10.012)]
    """
    if isinstance(library, Library):
        return FitnessReport(tuple(_run_case(library, c) for c in cases))
    with Library.open(library) as lib:
        return FitnessReport(tuple(_run_case(lib, c) for c in cases))
