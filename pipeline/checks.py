"""Chemistry rules over normalized measurements, collected into ``findings``.

Each rule is a small registered function ``measurements -> (mask or frame of value_id, message)``
with a name, a severity and a one-line description. The engine runs every enabled rule and
collects all failures (it never stops at the first), like a lazy validation. Severity:

- ``error``: the value stays in ``measurements`` (status ``excluded``) but not in ``recommended``;
- ``warning``: the value is used, with the flag (status ``flagged``);
- ``info``: advice.

Rules over *groups* of values (temperature series, ionic-strength series, independent values at
the same conditions) use only aqueous, unbounded values inside the physical bounds; they find
a value that does not fit the others without letting that value hide itself (a median reference,
or a fit that leaves the tested temperature out).

A row may report the same constant twice (descriptor fields ``value_alt`` and
``quantity_alt``, e.g. a Ka column beside the pKa column); normalize converts both, and
``ka_pka_row_mismatch`` flags rows whose two cells disagree beyond their rounding.

References
----------
.. [1] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207-227 (1932) (the Birge ratio).
.. [2] M. G. Cox, "The evaluation of key comparison data", Metrologia 39, 589-595 (2002)
       (normalized differences from a reference value, chi-squared consistency test).
.. [3] E. C. W. Clarke and D. N. Glew, "Evaluation of thermodynamic functions from equilibrium
       constants", Trans. Faraday Soc. 62, 539-547 (1966) (integrated van 't Hoff equation).
.. [4] C. W. Davies, *Ion Association*, Butterworths, London, 1962, p. 41 (Davies equation).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipeline import physchem
from pipeline.schemas.tables import FINDINGS, SEVERITIES

#: pKa of H3O+ and of H2O on the 55.5 mol/L water convention: values outside are levelled by
#: water and cannot be measured there directly (common practice; e.g. Perrin, *Dissociation
#: Constants of Organic Bases in Aqueous Solution*, 1965, introduction).
PKA_LEVELLING_LOW = -1.74
PKA_LEVELLING_HIGH = 15.74
#: Beyond these a pKa is not a physical aqueous value at all (common practice).
PKA_PHYSICAL_LOW = -15.0
PKA_PHYSICAL_HIGH = 35.0


@dataclass(frozen=True)
class RuleResult:
    value_id: pd.Series
    message: pd.Series


RuleFunction = Callable[[pd.DataFrame, dict], RuleResult]


@dataclass(frozen=True)
class Rule:
    name: str
    severity: str
    description: str
    function: RuleFunction = field(repr=False)


RULES: dict[str, Rule] = {}


def rule(name: str, severity: str, description: str) -> Callable[[RuleFunction], RuleFunction]:
    """Register a rule under ``name``."""
    if severity not in SEVERITIES:
        raise ValueError(f"severity {severity!r} is not one of {', '.join(SEVERITIES)}")

    def register(function: RuleFunction) -> RuleFunction:
        RULES[name] = Rule(name, severity, description, function)
        return function

    return register


def _result(
    m: pd.DataFrame,
    mask: pd.Series,
    message: pd.Series | str | Callable[[pd.DataFrame], pd.Series],
) -> RuleResult:
    """Value ids under ``mask`` and their messages.

    ``message`` may be a callable ``rows -> Series``; it is then built only for the rows that
    fail (on a million rows, formatting every row's message would dominate a rule's cost).
    """
    mask = mask.fillna(False).astype(bool)
    if callable(message):
        failing = m.loc[mask[mask].index]
        return RuleResult(failing["value_id"], pd.Series(message(failing), index=failing.index).astype(str))
    if isinstance(message, str):
        message = pd.Series(message, index=m.index)
    return RuleResult(m.loc[mask, "value_id"], message[mask].astype(str))


def _as_text(values: pd.Series | np.ndarray, before: str = "", after: str = "") -> pd.Series:
    """``before + str(value) + after`` per value, aligned with ``values`` (object strings).

    Each distinct value is formatted once: number-to-text is the dearest step of a message column,
    and findings repeat the same few thousand values. Floats are told apart by their bits, so that
    -0.0 keeps its sign as ``str`` gives it.
    """
    array = np.asarray(values)
    keys = array.view(np.int64) if array.dtype == np.float64 else array
    distinct, inverse = np.unique(keys, return_inverse=True)
    if array.dtype == np.float64:
        distinct = distinct.view(np.float64)
    text = (before + pd.Series(distinct, dtype=array.dtype).astype(str).astype(object) + after).to_numpy()
    return pd.Series(text[inverse.reshape(-1)], index=values.index if isinstance(values, pd.Series) else None,
                     dtype=object)


def _fmt(x: pd.Series | np.ndarray, digits: int = 3, before: str = "", after: str = "") -> pd.Series:
    """``x`` rounded to ``digits`` as text, aligned with ``x``; see :func:`_as_text`."""
    rounded = np.round(np.asarray(x, dtype=float), digits)
    return _as_text(pd.Series(rounded, index=x.index) if isinstance(x, pd.Series) else rounded, before, after)


#: Text key columns of the group rules. :func:`run_rules` hands every rule their integer codes in
#: hidden columns (``_code_<name>``), and the :func:`_comparable` mask in ``_comparable``:
#: factorizing a million strings is the dearest step of a group rule, and once per build is enough.
CODED_COLUMNS = ("compound_id", "source_id", "constant_type")
_COMPARABLE = "_comparable"


def _code_column(name: str) -> str:
    return f"_code_{name}"


def with_rule_keys(m: pd.DataFrame) -> pd.DataFrame:
    """``m`` (a shallow copy) with the hidden columns that the rules share (see :data:`CODED_COLUMNS`)."""
    shared = {_code_column(c): pd.factorize(m[c], use_na_sentinel=False)[0] for c in CODED_COLUMNS}
    return m.assign(**shared, **{_COMPARABLE: _comparable(m)})


def _codes(m: pd.DataFrame, name: str) -> np.ndarray:
    """Integer code per row of the text column ``name`` (equal texts, equal codes)."""
    if _code_column(name) in m.columns:
        return m[_code_column(name)].to_numpy()
    return pd.factorize(m[name], use_na_sentinel=False)[0]


def _rows(m: pd.DataFrame, mask: pd.Series | np.ndarray, columns: list[str]) -> pd.DataFrame:
    """The ``columns`` of the rows under ``mask``; a text key column comes as its codes when
    :func:`run_rules` gave them (read it with :func:`_codes`). A group rule reads a few columns, and
    copying all of a million measurement rows, strings included, costs more than the rule."""
    wanted = [_code_column(c) if _code_column(c) in m.columns else c for c in columns]
    return m.loc[np.asarray(mask, dtype=bool), wanted]


def _rounded(x: pd.Series | np.ndarray, digits: int) -> np.ndarray:
    """Key of ``x`` rounded to ``digits``: the integer rint(x·10^digits) (what ``round`` divides by
    10^digits, so equal keys, equal rounded values), or the rounded floats where some are missing."""
    values = np.asarray(x, dtype=float)
    scaled = np.rint(values * 10.0**digits)
    if len(scaled) and np.isfinite(scaled).all() and np.abs(scaled).max() < 2**52:
        return scaled.astype(np.int64)
    return np.round(values, digits)


def _dense(codes: np.ndarray, n_codes: int) -> np.ndarray:
    """Codes 0..n_codes-1 renumbered 0, 1, ... without gaps (by a presence table when it is small,
    which is faster than hashing a million codes)."""
    if n_codes > 8 * len(codes) + 1024:
        return pd.factorize(codes)[0]
    present = np.zeros(n_codes, dtype=bool)
    present[codes] = True
    return (np.cumsum(present, dtype=np.int64) - 1)[codes]


def _key_codes(*columns: pd.Series | np.ndarray) -> np.ndarray:
    """Integer id per row of the distinct combinations of ``columns``, dense from 0; a missing value
    is a key of its own (as ``groupby(dropna=False)``). Integer columns (codes from :func:`_codes`,
    :func:`_rounded`) are used as they are, others factorized."""
    codes, n_codes = np.zeros(len(columns[0]), dtype=np.int64), 1
    for column in columns:
        values = np.asarray(column)
        if values.dtype.kind in "iu" and len(values) and values.max() - values.min() < 8 * len(values) + 1024:
            low = values.min()
            column_codes = _dense(values.astype(np.int64) - low, int(values.max() - low) + 1)
            n_column = int(column_codes.max()) + 1
        else:
            column_codes, uniques = pd.factorize(column, use_na_sentinel=False)
            n_column = max(len(uniques), 1)
        if n_codes * n_column >= 2**62:  # renumber before the mixed-radix code would overflow
            codes = _dense(codes, n_codes)
            n_codes = int(codes.max(initial=0)) + 1
        codes = codes * n_column + column_codes
        n_codes *= n_column
    return _dense(codes, n_codes)


@rule("pka_physical_bounds", "error", "pKa outside any physical aqueous value (-15 to 35)")
def _physical_bounds(m: pd.DataFrame, config: dict) -> RuleResult:
    low = config.get("physical_low", PKA_PHYSICAL_LOW)
    high = config.get("physical_high", PKA_PHYSICAL_HIGH)
    bad = (m["pka"] < low) | (m["pka"] > high)
    return _result(m, bad, lambda r: "pKa " + _fmt(r["pka"]) + f" is outside the physical bounds {low} to {high}")


@rule(
    "pka_outside_water_range",
    "warning",
    "pKa below pKa(H3O+) = -1.74 or above pKa(H2O) = 15.74 cannot be measured in water",
)
def _water_range(m: pd.DataFrame, config: dict) -> RuleResult:
    inside_physical = m["pka"].between(PKA_PHYSICAL_LOW, PKA_PHYSICAL_HIGH)
    bad = inside_physical & ((m["pka"] < PKA_LEVELLING_LOW) | (m["pka"] > PKA_LEVELLING_HIGH))
    return _result(
        m,
        bad,
        lambda r: "pKa " + _fmt(r["pka"]) + " lies outside the range water allows (-1.74 to 15.74); "
        "it must be an extrapolated or non-aqueous value",
    )


@rule("implausible_precision", "warning", "more decimals or a smaller uncertainty than any method gives")
def _precision(m: pd.DataFrame, config: dict) -> RuleResult:
    max_decimals = config.get("max_decimals", 4)
    # digits after the decimal mark of the first number in a pK-type cell, on distinct texts
    codes, uniques = pd.factorize(m["value_reported"].astype(str))
    per_text = pd.Series(uniques).str.extract(r"\d[.,](\d+)", expand=False).str.len().fillna(0).to_numpy()
    decimals = pd.Series(per_text[codes] if len(uniques) else np.zeros(len(m)), index=m.index)
    pk_type = m["quantity_reported"].isin(["pKa", "pKb", "logK"])
    too_many = pk_type & (decimals > max_decimals)
    too_small = m["pka_uncertainty"].notna() & (m["pka_uncertainty"] < config.get("min_uncertainty", 1e-4))

    def message(r: pd.DataFrame) -> pd.Series:
        many = too_many[r.index]
        return ("value '" + r["value_reported"].astype(str) + "' has " + decimals[r.index].astype(int).astype(str)
                + f" decimals; no pKa method resolves more than {max_decimals}").where(
            many, "uncertainty " + r["pka_uncertainty"].astype(str) + " is smaller than any pKa method achieves"
        )

    return _result(m, too_many | too_small, message)


@rule("implausible_uncertainty", "warning", "an uncertainty larger than 1 pK unit says nothing")
def _large_uncertainty(m: pd.DataFrame, config: dict) -> RuleResult:
    limit = config.get("max_uncertainty", 1.0)
    bad = m["pka_uncertainty"] > limit
    return _result(m, bad, lambda r: "uncertainty ± " + _fmt(r["pka_uncertainty"]) + f" pK units exceeds {limit}")


@rule("non_aqueous_solvent", "info", "value measured in a mixed or non-aqueous solvent")
def _non_aqueous(m: pd.DataFrame, config: dict) -> RuleResult:
    bad = m["solvent"] != "water"
    return _result(
        m, bad, lambda r: "solvent is " + r["solvent"].astype(str) + ", not water; kept apart from aqueous values"
    )


@rule("bounded_value", "info", "value reported only as a bound or an approximation")
def _bounded(m: pd.DataFrame, config: dict) -> RuleResult:
    bad = m["qualifier"].notna()
    return _result(m, bad, lambda r: "value is reported as '" + r["qualifier"].astype(str) + " " + _fmt(r["pka"])
                   + "'; bounds are kept but not averaged")


@rule(
    "conditions_outside_model_range",
    "warning",
    "temperature outside 0-100 °C or ionic strength above 0.5 mol/kg (Davies) at which activity and "
    "temperature models are not valid",
)
def _conditions(m: pd.DataFrame, config: dict) -> RuleResult:
    t_bad = ~m["temperature_k"].between(273.15, 373.15)
    i_bad = m["ionic_strength_molal"] > config.get("max_ionic_strength", 0.5)
    return _result(
        m,
        t_bad | i_bad,
        lambda r: "T = " + _fmt(r["temperature_k"], 2) + " K, I = " + _fmt(r["ionic_strength_molal"])
        + " mol/kg lie outside the range of the activity and temperature models",
    )


@rule("polyprotic_order", "warning", "successive pKa steps of one acid must increase (pKa1 < pKa2 < ...)")
def _step_order(m: pd.DataFrame, config: dict) -> RuleResult:
    has_step = (m["step"].notna() & m["qualifier"].isna()).to_numpy()
    sub = _rows(m, has_step, ["compound_id", "source_id", "temperature_k", "ionic_strength_molal", "constant_type", "step", "pka"])
    gid = _key_codes(_codes(sub, "compound_id"), _codes(sub, "source_id"), _rounded(sub["temperature_k"], 1),
                     _rounded(sub["ionic_strength_molal"], 3), _codes(sub, "constant_type"))
    step = sub["step"].to_numpy(dtype="int64")
    pka = sub["pka"].to_numpy(dtype=float)
    order = np.lexsort((step, gid))  # by group, then step
    g, st, p = gid[order], step[order], pka[order]
    same = np.r_[False, g[1:] == g[:-1]]
    prev_p = np.r_[np.nan, p[:-1]]
    prev_st = np.r_[0, st[:-1]]
    # equal step numbers are duplicates, not an order problem; compare successive steps only
    bad_sorted = same & (prev_st < st) & (p <= prev_p)
    rows = sub.index[order[bad_sorted]]
    msg = ("pKa" + pd.Series(st[bad_sorted], index=rows).astype(str) + " = " + _fmt(pd.Series(p[bad_sorted], index=rows))
           + " is not above pKa" + pd.Series(prev_st[bad_sorted], index=rows).astype(str) + " = "
           + _fmt(pd.Series(prev_p[bad_sorted], index=rows)) + " from the same source")
    return RuleResult(m.loc[rows, "value_id"], msg.astype(str))


def pk_rounding(text: pd.Series, quantity: pd.Series) -> pd.Series:
    """Half a unit in the last reported digit, expressed in pK units [pK].

    A pK cell with d decimals is good to 0.5·10^-d; a K cell with s significant digits and
    mantissa m (1 <= m < 10) to log10(1 + 0.5·10^(1-s)/m) in pK (common practice of
    rounding; e.g. Ka "1.8e-5": s = 2, half-width log10(1 + 0.05/1.8) = 0.0119).

    Examples
    --------
    >>> pk_rounding(pd.Series(["4.76", "1.8e-5"]), pd.Series(["pKa", "Ka"])).round(4).tolist()
    [0.005, 0.0119]
    """
    text = text.astype(str)
    number = text.str.extract(r"(\d+(?:[.,]\d*)?)", expand=False).fillna("")
    decimals = number.str.extract(r"[.,](\d*)$", expand=False).str.len().fillna(0)
    digits = number.str.replace(r"[.,]", "", regex=True).str.lstrip("0")
    significant = digits.str.len().clip(lower=1)
    leading = pd.to_numeric(digits.str[:1], errors="coerce").fillna(1).clip(lower=1)
    rest = pd.to_numeric("0." + digits.str[1:], errors="coerce").fillna(0)
    mantissa = leading + rest
    is_k = quantity.isin(["Ka", "Kb"])
    k_half = np.log10(1 + 0.5 * 10.0 ** (1 - significant) / mantissa)
    return pd.Series(np.where(is_k, k_half, 0.5 * 10.0 ** (-decimals)), index=text.index)


@rule(
    "ka_pka_row_mismatch",
    "warning",
    "a row giving the same constant twice (e.g. Ka and pKa) whose two cells disagree beyond rounding",
)
def _ka_pka_row(m: pd.DataFrame, config: dict) -> RuleResult:
    if "pka_alt" not in m or m["pka_alt"].isna().all():
        return _result(m, pd.Series(False, index=m.index), "")
    r = m[m["pka_alt"].notna()]  # rounding and messages only where the row gives the constant twice
    tolerance = (
        pk_rounding(r["value_reported"], r["quantity_reported"])
        + pk_rounding(r["value_alt_reported"].fillna(""), r["quantity_alt_reported"].fillna(""))
        + config.get("extra_tolerance", 1e-9)
    )
    diff = (r["pka"] - r["pka_alt"]).abs()
    bad = diff > tolerance
    r, diff, tolerance = r[bad], diff[bad], tolerance[bad]
    msg = (r["quantity_alt_reported"].astype(str) + " '" + r["value_alt_reported"].astype(str)
           + "' gives pKa " + _fmt(r["pka_alt"]) + " but the row's " + r["quantity_reported"].astype(str)
           + " '" + r["value_reported"].astype(str) + "' gives " + _fmt(r["pka"]) + "; they differ by "
           + _fmt(diff) + ", more than rounding allows (" + _fmt(tolerance, 4) + ")")
    return RuleResult(r["value_id"], msg.astype(str))


@rule("ka_kb_kw", "warning", "a pKa and a pKb of one conjugate pair at the same conditions must sum to pKw")
def _ka_kb_kw(m: pd.DataFrame, config: dict) -> RuleResult:
    """Each pKa converted from a pKb or Kb (through pKw) against the median of the pKa values given
    directly for the same compound, step (none = 0), temperature (0.1 K), ionic strength
    (0.001 mol/kg) and constant type; bounds are left out."""
    unbounded = m["qualifier"].isna().to_numpy()
    from_base = m["quantity_reported"].isin(["pKb", "Kb"]).to_numpy()
    # only the compounds with a value from a base have pairs to check
    compound = _codes(m, "compound_id")
    involved = np.zeros(compound.max(initial=-1) + 1, dtype=bool)
    involved[compound[unbounded & from_base]] = True
    used = unbounded & involved[compound]
    sub = _rows(m, used, ["compound_id", "temperature_k", "ionic_strength_molal", "constant_type", "step", "pka",
                          "pka_uncertainty", "pkw_used"])
    from_base = from_base[used]
    group = _key_codes(_codes(sub, "compound_id"), _rounded(sub["temperature_k"], 1),
                       _rounded(sub["ionic_strength_molal"], 3), _codes(sub, "constant_type"),
                       sub["step"].fillna(0).astype("int64"))
    # only the groups that hold a value from a base need the median of the direct values
    wanted = np.zeros(group.max(initial=-1) + 1, dtype=bool)
    wanted[group[from_base]] = True
    direct_rows = ~from_base & wanted[group]
    direct = pd.DataFrame({"group": group[direct_rows], "pka": sub["pka"].to_numpy()[direct_rows],
                           "u": sub["pka_uncertainty"].to_numpy()[direct_rows]}).groupby("group").agg(
        pka_direct=("pka", "median"), u_direct=("u", "max"))
    pka_direct = np.full(len(wanted), np.nan)
    u_direct = np.full(len(wanted), np.nan)
    has_direct = np.zeros(len(wanted), dtype=bool)
    pka_direct[direct.index], u_direct[direct.index], has_direct[direct.index] = (
        direct["pka_direct"], direct["u_direct"], True)
    via_base = sub[from_base & has_direct[group]]
    g = group[from_base & has_direct[group]]
    pka, pkw_used = via_base["pka"].to_numpy(), via_base["pkw_used"].to_numpy()
    u = np.sqrt(np.nan_to_num(via_base["pka_uncertainty"].to_numpy(), nan=0.02) ** 2
                + np.nan_to_num(u_direct[g], nan=0.02) ** 2)
    tolerance = np.maximum(config.get("min_tolerance", 0.1), 3 * u)
    diff = np.abs(pka - pka_direct[g])
    bad = diff > tolerance
    rows = via_base.index[bad]
    pkb = pkw_used[bad] - pka[bad]
    reference = pka_direct[g][bad]
    msg = ("pKb " + _fmt(pkb) + " + pKa " + _fmt(reference) + " = " + _fmt(pkb + reference)
           + " but pKw = " + _fmt(pkw_used[bad]) + " at these conditions (IAPWS R11-24); "
           "off by " + _fmt(diff[bad]) + ", tolerance " + _fmt(tolerance[bad]))
    return RuleResult(m.loc[rows, "value_id"], pd.Series(msg.to_numpy(), index=rows).astype(str))


#: Uncertainty [pK units] assumed for a value reported without one, where a rule must weigh it
#: (common practice: compiled pKa values given to two or three decimals are good to a few 0.01).
DEFAULT_UNCERTAINTY = 0.02
#: |normalized residual| beyond which a value is discordant (common practice, a 3-sigma rule).
MAX_NORMALIZED_RESIDUAL = 3.0
#: Birge ratio beyond which a group's values disagree beyond their uncertainties (common
#: practice; the same limit decides the Doubtful category in consolidation).
BIRGE_LIMIT = 2.0
#: Consistency factor of the median of n normal values: its standard error is about
#: 1.2533 sigma / sqrt(n) (sqrt(pi/2); e.g. Kendall & Stuart, *The Advanced Theory of
#: Statistics*, vol. 1, from memory).
MEDIAN_SE_FACTOR = 1.2533
#: Activity models the ionic-strength rule can use (they need only charges, not species names).
IONIC_STRENGTH_MODELS = ("davies", "extended_debye_huckel")


def reference_key(reference: pd.Series) -> pd.Series:
    """Primary-reference text reduced for comparison: lower case, runs of other characters to
    one space; ``None`` where no reference is given. Evaluated on the distinct texts.

    Examples
    --------
    >>> reference_key(pd.Series(["Harned & Ehlers 1933, JACS 55, 652", None])).tolist()
    ['harned ehlers 1933 jacs 55 652', None]
    """
    codes, uniques = pd.factorize(reference)
    reduced = (
        pd.Series(uniques, dtype=object).astype(str).str.lower()
        .str.replace(r"[^a-z0-9]+", " ", regex=True).str.strip()
    )
    reduced = np.where(reduced.to_numpy(dtype=object) == "", None, reduced.to_numpy(dtype=object))
    out = np.full(len(reference), None, dtype=object)
    has = codes >= 0
    out[has] = reduced[codes[has]]
    return pd.Series(out, index=reference.index, dtype=object)


def _comparable(m: pd.DataFrame) -> pd.Series:
    """Values a group rule may compare: aqueous, not a bound, inside the physical bounds."""
    if _COMPARABLE in m.columns:
        return m[_COMPARABLE]
    return (m["solvent"] == "water") & m["qualifier"].isna() & m["pka"].between(PKA_PHYSICAL_LOW, PKA_PHYSICAL_HIGH)


def _empty(m: pd.DataFrame) -> RuleResult:
    return RuleResult(m["value_id"].iloc[:0], pd.Series([], dtype=str))


def _u_filled(m: pd.DataFrame, config: dict) -> pd.Series:
    return m["pka_uncertainty"].fillna(config.get("default_uncertainty", DEFAULT_UNCERTAINTY))


def _distinct_per_group(group: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Number of distinct ``values`` in each group (indexed by the dense group id)."""
    pairs = _key_codes(group, values)
    group_of_pair = np.zeros(pairs.max(initial=-1) + 1, dtype=np.int64)
    group_of_pair[pairs] = group
    return np.bincount(group_of_pair, minlength=group.max(initial=-1) + 1)


def _first_per_group(group: np.ndarray, *keys: np.ndarray) -> np.ndarray:
    """Position of the first row of each group after sorting by ``keys`` (the first key decides
    first); ties keep the original order. Groups come out in ascending id order."""
    order = np.lexsort((np.arange(len(group)), *reversed(keys), group))
    head = np.r_[True, group[order][1:] != group[order][:-1]]
    return order[head]


def _leave_one_out_fits(
    series: np.ndarray, t: np.ndarray, pka: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each node, the van 't Hoff fit through the *other* nodes of its series, with the node's
    temperature as reference temperature: (prediction, u²(prediction) + s², number of other nodes).

    ``series`` must be sorted (the nodes of a series contiguous). ΔCp° is fitted when five or more
    other nodes remain (:func:`pipeline.physchem.fit_van_t_hoff_groups`, one pass for all fits).
    """
    starts, sizes = np.unique(series, return_index=True, return_counts=True)[1:]
    node = np.arange(len(series))
    size = np.repeat(sizes, sizes)  # per node: nodes in its series
    first = np.repeat(starts, sizes)  # per node: position of its series' first node
    # every (left-out node, other node) pair of a series: size² pairs per series, self-pairs dropped
    left_out = np.repeat(node, size)
    other = np.repeat(first, size) + np.arange(len(left_out)) - np.repeat(np.cumsum(size) - size, size)
    keep = other != left_out
    left_out, other = left_out[keep], other[keep]
    n_other = size - 1
    fit = physchem.fit_van_t_hoff_groups(left_out, t[other], pka[other], t, n_other >= 5)
    spread = fit.covariance[:, 0, 0] + fit.chi_squared / fit.dof
    # other nodes of one pKa: fit_van_t_hoff (curve_fit) reports an infinite covariance there
    # (ΔH° ~ 0 leaves its finite-difference Jacobian column zero), so such a node is not judged
    bounds = np.r_[0, np.cumsum(n_other)[:-1]]
    flat = np.maximum.reduceat(pka[other], bounds) == np.minimum.reduceat(pka[other], bounds)
    spread[flat] = np.inf
    return fit.pka_ref, spread, n_other


@rule(
    "van_t_hoff_outlier",
    "warning",
    "a value of a temperature series (>= 4 temperatures) lies off the van 't Hoff curve through the other "
    "temperatures",
)
def _van_t_hoff(m: pd.DataFrame, config: dict) -> RuleResult:
    """Temperature-series outliers by leave-one-temperature-out van 't Hoff fits.

    A series is one compound, step, ionic strength [mol/kg] and constant type with values at
    ``min_temperatures`` (default 4) or more temperatures [K] (rounded to 0.1 K) inside
    273.15-373.15 K. Each temperature is a node: the median of its values (so one wrong value
    among several at one temperature does not move the curve; that case is
    ``source_disagreement``'s). For each node the integrated van 't Hoff equation
    (least squares as :func:`pipeline.physchem.fit_van_t_hoff`, ref. [3]; all fits of a round in one
    pass of :func:`pipeline.physchem.fit_van_t_hoff_groups`) is fitted to the *other* nodes, with
    the left-out temperature as reference temperature, so the fitted pKa(θ) is the prediction
    and its variance the covariance's first element. A node whose other nodes all have one pKa is
    not judged (``fit_van_t_hoff`` finds no covariance for such a flat curve). ΔCp° is fitted when
    five or more nodes remain, else ΔH° is taken as constant (four points do not pin a curvature).
    The normalized
    residual is (observed − predicted) / √(u² + u²(predicted) + s²), with u the value's
    uncertainty (``default_uncertainty`` when missing) and s the residual standard deviation of
    the fit. A node whose |normalized residual| exceeds ``max_normalized_residual`` (default 3)
    is set aside (the worst first, then the others are tested again while ``min_temperatures``
    remain); a value at a set-aside node is flagged when its own |normalized residual| exceeds
    the limit too. Leaving the tested temperature out keeps an outlier
    from pulling the curve towards itself and hiding; setting the worst node aside before testing
    the others again keeps it from bending the curve away from a good end point.
    """
    limit = config.get("max_normalized_residual", MAX_NORMALIZED_RESIDUAL)
    min_t = config.get("min_temperatures", 4)
    ok = (_comparable(m) & m["temperature_k"].between(physchem.T_MIN_K, physchem.T_MAX_K)).to_numpy(copy=True)
    # a series needs min_t temperatures, and so does its compound: a cheap first cut
    compound = _codes(m, "compound_id")[ok]
    ok[ok] = _distinct_per_group(compound, _rounded(m["temperature_k"].to_numpy()[ok], 1))[compound] >= min_t
    sub = _rows(m, ok, ["compound_id", "step", "ionic_strength_molal", "constant_type", "temperature_k", "pka",
                        "pka_uncertainty"])
    series_of_row = _key_codes(_codes(sub, "compound_id"), sub["step"].fillna(0).astype("int64"),
                               _rounded(sub["ionic_strength_molal"], 3), _codes(sub, "constant_type"))
    t_of_row = sub["temperature_k"].round(1).to_numpy()
    # series with >= min_t temperatures; only their rows form nodes
    in_series = _distinct_per_group(series_of_row, _rounded(t_of_row, 1))[series_of_row] >= min_t
    if not in_series.any():
        return _empty(m)
    rows = pd.DataFrame({"series": series_of_row[in_series], "t": t_of_row[in_series],
                         "pka": sub["pka"].to_numpy()[in_series],
                         "u": _u_filled(sub, config).to_numpy()[in_series]},
                        index=sub.index[in_series])
    rows["node"] = _key_codes(rows["series"], _rounded(rows["t"], 1))
    # a node is the median of the values at one temperature; nodes sorted by series, then temperature
    nodes = rows.groupby("node").agg(series=("series", "first"), t=("t", "first"),
                                     pka=("pka", "median"), u=("u", "median"))
    nodes = nodes.sort_values(["series", "t"])
    node_position = np.empty(len(nodes), dtype=np.int64)
    node_position[nodes.index.to_numpy()] = np.arange(len(nodes))
    rows["node"] = node_position[rows["node"].to_numpy()]
    series, t_all, p_all, u_all = (nodes[c].to_numpy() for c in ("series", "t", "pka", "u"))
    predicted = np.full(len(nodes), np.nan)
    spread = np.full(len(nodes), np.nan)  # u²(predicted) + s² [pK units²]
    n_fit = np.zeros(len(nodes), dtype=np.int64)
    z_node = np.zeros(len(nodes))
    set_aside = np.zeros(len(nodes), dtype=bool)
    # rounds over all series at once: test every active node against the others; in each series whose
    # worst node is beyond the limit, set that node aside and test the rest again in the next round
    active = np.arange(len(nodes))
    while len(active):
        predicted[active], spread[active], n_fit[active] = _leave_one_out_fits(
            series[active], t_all[active], p_all[active])
        z_node[active] = (p_all[active] - predicted[active]) / np.sqrt(u_all[active] ** 2 + spread[active])
        z = np.abs(z_node[active])
        # the worst node of each series as np.argmax takes it: NaN first, then the largest, the first of ties
        worst = active[_first_per_group(series[active], ~np.isnan(z), -np.nan_to_num(z, nan=0.0))]
        beyond = worst[~(np.abs(z_node[worst]) <= limit)]
        set_aside[beyond] = True
        still = np.isin(series[active], series[beyond]) & ~set_aside[active]
        active = active[still]
        active = active[np.bincount(series[active], minlength=series.max() + 1)[series[active]] >= min_t]
    flagged_node = set_aside[rows["node"].to_numpy()]
    points = rows[flagged_node]
    node = points["node"].to_numpy()
    points = points.assign(predicted=predicted[node], n_fit=n_fit[node])
    points["z"] = (points["pka"] - points["predicted"]) / np.sqrt(points["u"] ** 2 + spread[node])
    bad_rows = points[points["z"].abs() > limit].sort_index()
    message = (
        "pKa " + _fmt(bad_rows["pka"]) + " at " + _fmt(m.loc[bad_rows.index, "temperature_k"], 2) + " K is "
        + (bad_rows["pka"] - bad_rows["predicted"]).map("{:+.3f}".format)
        + " off the van 't Hoff curve through the other " + bad_rows["n_fit"].astype(str)
        + " temperatures of the series (predicted " + _fmt(bad_rows["predicted"]) + "; normalized residual "
        + bad_rows["z"].round(1).astype(str) + f", limit {limit:g}; "
        + np.where(bad_rows["n_fit"] >= 5, "constant-ΔCp° fit)", "constant-ΔH° fit)")
    )
    return RuleResult(m.loc[bad_rows.index, "value_id"], message.astype(str))


@rule(
    "ionic_strength_inconsistent",
    "warning",
    "a concentration or mixed constant at I > 0 disagrees with the thermodynamic value of the same "
    "equilibrium carried to that ionic strength by the activity model",
)
def _ionic_strength(m: pd.DataFrame, config: dict) -> RuleResult:
    """Concentration and mixed constants against the activity model.

    For each concentration or mixed pKa at I > 0 [mol/kg], the thermodynamic pKa of the same
    compound and step at the same temperature [K] (rounded to 0.1 K; the median when there are
    several) is converted to the row's constant type at the row's ionic strength with
    :func:`pipeline.physchem.convert_constant_type` (``activity_model``, default ``"davies"``,
    ref. [4]), using the row's ``charge`` as the charge of the acid form. The row is flagged when
    it is off by more than max(``tolerance`` (default 0.05 pK units, common practice for the
    Davies equation at I <= 0.1 mol/kg), 3 √(u² + u_ref²)).

    Skipped, so never flagged here: rows with no ``charge`` (the activity correction depends on
    it and guessing it would invent a finding), rows above the model's ionic-strength limit or
    outside its temperature range (``conditions_outside_model_range`` reports those), and rows
    with no thermodynamic value of the same equilibrium at the same temperature.
    """
    model_key = config.get("activity_model", "davies")
    if model_key not in IONIC_STRENGTH_MODELS:
        raise ValueError(
            f"activity_model {model_key!r} is not usable by ionic_strength_inconsistent; "
            f"valid choices: {', '.join(IONIC_STRENGTH_MODELS)}"
        )
    model = physchem.ACTIVITY_MODELS[model_key]
    tolerance = config.get("tolerance", 0.05)
    t_lo, t_hi = model.temperature_range_k
    in_range = _comparable(m) & m["temperature_k"].between(t_lo, t_hi)
    i = m["ionic_strength_molal"]
    thermodynamic = m["constant_type"] == "thermodynamic"
    candidate = (in_range & ~thermodynamic & (i > 0) & (i <= model.max_ionic_strength)
                 & m["charge"].notna()).to_numpy()
    if not candidate.any():
        return _empty(m)
    reference = (in_range & thermodynamic).to_numpy()
    f = _rows(m, candidate | reference, ["compound_id", "step", "temperature_k", "pka", "pka_uncertainty"])
    key = _key_codes(_codes(f, "compound_id"), f["step"].fillna(0).astype("int64"), _rounded(f["temperature_k"], 1))
    is_candidate, is_reference = candidate[candidate | reference], reference[candidate | reference]
    u = _u_filled(f, config).to_numpy()
    # the thermodynamic medians of the keys that have a candidate row
    wanted = np.zeros(key.max() + 1, dtype=bool)
    wanted[key[is_candidate]] = True
    ref_rows = is_reference & wanted[key]
    thermo = pd.DataFrame({"key": key[ref_rows], "pka": f["pka"].to_numpy()[ref_rows], "u": u[ref_rows]}).groupby(
        "key").agg(ref=("pka", "median"), u_ref=("u", "median"))
    with_ref = is_candidate & np.isin(key, thermo.index.to_numpy())
    if not with_ref.any():
        return _empty(m)
    index = f.index[with_ref]
    rows = pd.DataFrame({"ctype": m.loc[index, "constant_type"], "t": f.loc[index, "temperature_k"].round(1),
                         "pka": f.loc[index, "pka"], "u": u[with_ref]}, index=index)
    rows = rows.join(thermo.reindex(key[with_ref]).set_axis(index))
    expected = pd.Series(np.nan, index=rows.index)
    for ctype in rows["ctype"].unique():  # at most two: concentration, mixed
        sel = rows["ctype"] == ctype
        conversion = physchem.convert_constant_type(
            rows.loc[sel, "ref"].to_numpy(), "thermodynamic", str(ctype),
            i[rows.index[sel]].to_numpy(), m["charge"][rows.index[sel]].astype(float).to_numpy(),
            rows.loc[sel, "t"].to_numpy(), model=model_key,
        )
        expected[sel] = conversion.value
    diff = rows["pka"] - expected
    limit = np.maximum(tolerance, 3 * np.sqrt(rows["u"] ** 2 + rows["u_ref"] ** 2))
    bad = diff.abs() > limit
    r = rows[bad]
    message = (
        r["ctype"] + " pKa " + _fmt(r["pka"]) + " at I = " + _fmt(i[r.index]) + " mol/kg, but the thermodynamic pKa "
        + _fmt(r["ref"]) + " gives " + _fmt(expected[r.index]) + " there by the "
        + model_key + " model (z(acid) = " + m["charge"][r.index].astype(str) + ", "
        + m.loc[r.index, "temperature_k"].round(2).astype(str) + " K); off by "
        + _fmt(diff[r.index].abs()) + ", tolerance " + _fmt(limit[r.index])
    )
    return RuleResult(m.loc[r.index, "value_id"], message.astype(str))

@rule(
    "source_disagreement",
    "warning",
    "independent values at the same conditions disagree beyond their uncertainties (normalized residual "
    "and Birge ratio)",
)
def _source_disagreement(m: pd.DataFrame, config: dict) -> RuleResult:
    """Discordant members of groups of independent values at the same conditions.

    A group is one compound, step, temperature (0.01 K), ionic strength (0.001 mol/kg) and
    constant type, as in consolidation. Copies (same primary reference and value to 0.001) count
    once. Each member has its uncertainty u (``default_uncertainty``, 0.02, when missing).

    - Birge ratio R_B = √(χ²/(n − 1)), χ² = Σ (x − x̄_w)²/u², x̄_w the weighted mean (ref. [1]).
    - Normalized residual of a member against a robust reference (ref. [2]): the group median
      for n >= 3 (standard uncertainty 1.2533 · median(u)/√n), the other value for n = 2:
      z = (x − x_ref)/√(u² + u_ref²). The median is not pulled by the outlier, so the outlier
      cannot hide itself and does not drag the good values out with it.

    A member is flagged when R_B > ``birge_limit`` (default 2) and |z| >
    ``max_normalized_residual`` (default 3). In a discordant pair both members are flagged:
    two values cannot say which is right.
    """
    z_limit = config.get("max_normalized_residual", MAX_NORMALIZED_RESIDUAL)
    birge_limit = config.get("birge_limit", BIRGE_LIMIT)
    f = _rows(m, _comparable(m), ["compound_id", "step", "temperature_k", "ionic_strength_molal", "constant_type",
                                  "pka", "pka_uncertainty", "reference"])
    group = _key_codes(_codes(f, "compound_id"), f["step"].fillna(0).astype("int64"), _rounded(f["temperature_k"], 2),
                       _rounded(f["ionic_strength_molal"], 3), _codes(f, "constant_type"))
    # copies: a repeat of (group, primary reference, pKa to 0.001); references reduced on distinct texts
    text_codes, texts = pd.factorize(f["reference"])
    reduced_codes = pd.factorize(reference_key(pd.Series(texts, dtype=object)))[0]
    reference = np.full(len(f), -1)  # -1: no reference
    reference[text_codes >= 0] = reduced_codes[text_codes[text_codes >= 0]]
    x_all = f["pka"].to_numpy()
    cited = reference >= 0
    copies = np.zeros(len(f), dtype=bool)
    copies[cited] = pd.Series(_key_codes(group[cited], reference[cited], _rounded(x_all[cited], 3))).duplicated()
    size = np.bincount(group[~copies]) if len(group) else np.zeros(0, dtype=np.int64)
    member = ~copies & (size[group] >= 2 if len(group) else np.zeros(0, dtype=bool))
    if not member.any():
        return _empty(m)
    gid = pd.factorize(group[member])[0]  # dense again after the filter
    x = x_all[member]
    u = _u_filled(f, config).clip(lower=1e-6).to_numpy()[member]

    def per_group_sum(values: np.ndarray) -> np.ndarray:
        return np.bincount(gid, weights=np.asarray(values, dtype=float))[gid]

    n = per_group_sum(np.ones(len(x)))
    w = 1.0 / u**2
    wmean = per_group_sum(w * x) / per_group_sum(w)
    birge = np.sqrt(per_group_sum(w * (x - wmean) ** 2) / (n - 1))
    pair = n == 2
    # medians are needed for groups of three or more only: one groupby for both columns
    medians = pd.DataFrame({"x": x[~pair], "u": u[~pair]}).groupby(gid[~pair]).median()
    median_row = np.zeros(gid.max() + 1, dtype=np.int64)
    median_row[medians.index.to_numpy()] = np.arange(len(medians))
    x_median, u_median = np.full(len(x), np.nan), np.full(len(x), np.nan)
    x_median[~pair] = medians["x"].to_numpy()[median_row[gid[~pair]]]
    u_median[~pair] = medians["u"].to_numpy()[median_row[gid[~pair]]]
    x_ref = np.where(pair, per_group_sum(x) - x, x_median)
    u_ref = np.where(pair, np.sqrt((per_group_sum(u**2) - u**2).clip(min=0)),
                     MEDIAN_SE_FACTOR * u_median / np.sqrt(n))
    z = (x - x_ref) / np.sqrt(u**2 + u_ref**2)
    bad = (birge > birge_limit) & (np.abs(z) > z_limit)
    rows = f.index[member][bad]
    assumed = m.loc[rows, "pka_uncertainty"].isna().to_numpy()
    compared_with = np.where(pair[bad], "other value ",
                             _as_text(n[bad].astype(int), "median of the ", " independent values ").to_numpy())
    # few pieces, each formatted on distinct values: every "+" walks all the failing rows again
    message = (
        _fmt(x[bad], before="pKa ").to_numpy() + _fmt(u[bad], before=" ± ").to_numpy()
        + np.where(assumed, " (uncertainty assumed) disagrees with the ", " disagrees with the ").astype(object)
        + compared_with.astype(object)
        + _fmt(x_ref[bad], after=" at the same conditions: normalized residual ").to_numpy()
        + _fmt(z[bad], 1, after=f" (limit {z_limit:g}), Birge ratio ").to_numpy()
        + _fmt(birge[bad], 2, after=f" (limit {birge_limit:g})").to_numpy()
    )
    return RuleResult(m.loc[rows, "value_id"], pd.Series(message, index=rows, dtype=object).astype(str))


def run_rules(measurements: pd.DataFrame, config: dict | None = None) -> pd.DataFrame:
    """Run every enabled rule; return all findings (schema ``FINDINGS``).

    ``config`` maps a rule name to its settings; ``{"enabled": False}`` switches a rule off and
    other keys set its tolerances.
    """
    config = config or {}
    m = with_rule_keys(measurements)
    frames: list[pd.DataFrame] = []
    for name, r in RULES.items():
        settings = config.get(name, {})
        if not settings.get("enabled", True):
            continue
        result = r.function(m, settings)
        frames.append(pd.DataFrame({"rule": name, "severity": settings.get("severity", r.severity),
                                    "value_id": result.value_id, "message": result.message}))
    findings = pd.concat(frames)
    # a rule returns its value ids under the measurement rows' labels: locate them by position
    # (looking a million value ids up again would cost more than most rules), checked below
    positions = (measurements.index.get_indexer(findings.index) if measurements.index.is_unique
                 else np.full(len(findings), -1))
    return attach_locations(findings.reset_index(drop=True), measurements, positions)


#: Columns of a finding that locate its value.
_LOCATION_COLUMNS = ["compound_id", "source_id", "source_row"]


def attach_locations(
    findings: pd.DataFrame, measurements: pd.DataFrame, positions: np.ndarray | None = None
) -> pd.DataFrame:
    """Add compound, source and row of each finding's value; order columns as the schema.

    ``positions`` (optional) are the measurement rows of the findings' value ids, as far as known;
    they are used where the value id there matches, the rest is looked up by value id.
    """
    value_ids = findings["value_id"].to_numpy(dtype=object)
    measured_ids = measurements["value_id"].to_numpy(dtype=object)
    if positions is None:
        positions = np.full(len(findings), -1)
    positions = np.asarray(positions, dtype=np.int64)
    known = positions >= 0
    known[known] = measured_ids[positions[known]] == value_ids[known]
    if not known.all():
        if not measurements["value_id"].is_unique:
            raise ValueError("measurements must have unique value ids to locate findings")
        positions = np.where(known, positions, pd.Index(measured_ids).get_indexer(value_ids))
    located = findings.drop(columns=[c for c in _LOCATION_COLUMNS if c in findings.columns])
    for column in _LOCATION_COLUMNS:
        values = measurements[column].array
        located[column] = values.take(positions, allow_fill=True) if len(values) else pd.array(
            [None] * len(positions), dtype=values.dtype)
    if "compound_id" in findings.columns:
        located["compound_id"] = located["compound_id"].fillna(findings["compound_id"])
    located = located.reindex(columns=list(FINDINGS.columns))
    return FINDINGS.validate(located.sort_values(["rule", "value_id"], kind="stable").reset_index(drop=True))
