"""Parsers for the text of data cells: values, temperatures, ionic strengths, media, quantities.

Every parser takes a :class:`pandas.Series` of cell text and returns a
:class:`pandas.DataFrame` with the same index.  A cell never raises: it parses
to a value, is marked missing, or carries a reason in plain words in the
``error`` column (the reason quotes the cell, so a data steward can find it).
Only bad *arguments* (an unknown ``decimal`` or ``bare_unit``) raise
:class:`ValueError`.

How the work is vectorized
--------------------------
1. The column is factorized (:func:`pandas.factorize`); only distinct cell
   texts are parsed and the result is gathered back with one ``take``.  Data
   columns repeat a lot (the same ``25 °C`` in every row of a table).
2. Value cells go through three tiers, cheapest first: :func:`pandas.to_numeric`
   takes the plain numbers; a lean regular expression (few capture groups)
   takes the common written forms (qualifier, ``±``, power of ten, range,
   last-digit uncertainty, missing tokens); the full grammar takes the rest.
3. Each grammar is one compiled regular expression, run once over the
   distinct texts joined by NUL characters: ``re.findall`` walks the joined
   text in C and returns one tuple of groups per cell.  That is several times
   faster than ``Series.str.extract`` on the same pattern, which calls back
   into Python for every row.  A cell that itself contains NUL is detected by
   counting the matches and is treated as not a number.
4. Numbers, powers of ten and qualifiers are converted column-wise with
   :func:`pandas.to_numeric` and ``Series.map``.  Power-of-ten notation is
   rebuilt as e-notation text (``1.8 × 10⁻⁵`` -> ``1.8e-5``) before conversion,
   so the result is the correctly rounded double of the written decimal.

``bench/bench_parse.py`` times one million cells against ``pandas.to_numeric``.

Conventions (sources)
---------------------
* Decimal marker: point or comma on the line; digits may be grouped in threes
  by a (thin) space, never by a dot or comma (SI Brochure, 9th ed., 2019,
  §5.4.4, following CGPM 2003 Resolution 10).  Only thin, narrow no-break,
  figure and no-break spaces (U+2009, U+202F, U+2007, U+00A0) are read as digit
  group separators; an ordinary space between digits is an error, because in
  hand-typed tables it is more often a typing slip than a grouping.
* Concise uncertainty notation ``4.76(2)`` = 4.76 ± 0.02: the number in
  parentheses is the uncertainty referred to the last digits of the value
  (JCGM 100:2008, GUM, §7.2.2; section number from memory).
* Power of ten written ``× 10⁻⁵``, ``x10^-5``, ``*10**-5`` or ``x 10-5``, and
  e-notation ``1.8E-5``: common practice (typeset, spreadsheet and programming
  forms).  ``x 10-5`` (no caret, no superscript) requires the minus sign, since
  ``1.8 x 105`` would read as a product.
* Range ``4.7–4.8`` (en dash, em dash, hyphen or "to"): reported as the
  midpoint with the half-width as uncertainty, which covers the whole range;
  common practice.
* Qualifier words (ca., approx., about, ≈) all map to ``"~"``; missing-value
  tokens (n/a, nd, n.d., -, —, ...) are common practice.

References
----------
.. [1] BIPM, "The International System of Units (SI Brochure)", 9th ed.,
       2019, §5.4.4 (decimal marker, digit grouping) and §2.3.1 (Celsius
       temperature, t/°C = T/K − 273.15).
.. [2] JCGM 100:2008, "Evaluation of measurement data - Guide to the
       expression of uncertainty in measurement" (GUM), §7.2.2.
.. [3] A. Thompson and B. N. Taylor, "Guide for the Use of the International
       System of Units (SI)", NIST Special Publication 811, 2008, Appendix B
       (t/°C = (t/°F − 32)/1.8).
.. [4] E. R. Cohen et al., "Quantities, Units and Symbols in Physical
       Chemistry" (IUPAC Green Book), 3rd ed., RSC, 2007: amount concentration
       [mol dm⁻³] (symbol M), molality [mol kg⁻¹] (symbol m).

Examples
--------
>>> import pandas as pd
>>> out = parse_values(pd.Series(["4.76(2)", "1.8 × 10⁻⁵", "4.7–4.8", "n/a"]))
>>> out["value"].tolist()
[4.76, 1.8e-05, 4.75, nan]
>>> out["uncertainty"].round(6).tolist(), out["missing"].tolist()
([0.02, nan, 0.05, nan], [False, False, False, True])
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "MEDIUM_SOLVENTS",
    "QUANTITIES",
    "parse_ionic_strength",
    "parse_medium",
    "parse_quantity",
    "parse_temperature",
    "parse_values",
]

#: Controlled vocabulary of ``parse_medium(...)["solvent"]``.
MEDIUM_SOLVENTS: tuple[str, ...] = (
    "water",
    "water-dioxane",
    "water-methanol",
    "water-ethanol",
    "water-dmso",
    "water-acetonitrile",
    "other",
)

#: Controlled vocabulary of ``parse_quantity(...)["quantity"]``.
QUANTITIES: tuple[str, ...] = ("pKa", "Ka", "pKb", "Kb", "logK")

_DECIMALS = (".", ",")
_SEP = "\x00"  # joins distinct cells for one regex pass; never valid in a number
_MAX_ECHO = 80  # longest cell text quoted in a reason

# --------------------------------------------------------------------------
# Shared regular-expression pieces
# --------------------------------------------------------------------------
_GROUP_SPACE = "\u2009\u202f\u2007\u00a0"  # thin, narrow no-break, figure, no-break space
_SUP_DIGITS = "⁰¹²³⁴⁵⁶⁷⁸⁹"
_SUB_DIGITS = "₀₁₂₃₄₅₆₇₈₉"
_SIGN = "[-+\u2212]"  # U+2212 MINUS SIGN is read as a hyphen-minus
_EXPE = rf"[eE]{_SIGN}?[0-9]+"
_SUP = rf"[⁻⁺]?[{_SUP_DIGITS}]+"
_POW = (
    rf"(?:\^|\*\*)\s*(?:\(\s*{_SIGN}?[0-9]+(?:\.[0-9]+)?\s*\)|{_SIGN}?[0-9]+(?:\.[0-9]+)?)"
)
_TEN_ALONE = rf"10\s*(?:{_POW}|{_SUP})"  # "10⁻⁵", "10^-4.76": mantissa 1
_TEN = rf"10\s*(?:{_POW}|{_SUP}|[-\u2212][0-9]+)"  # after a times sign
_TIMES = r"\s*[×xX*·⋅∙]\s*"
_XP = rf"(?:{_TIMES}{_TEN}|{_EXPE})"
_PM = r"(?:±|\+\s*/\s*[-\u2212]|\+[-\u2212])"
_RSEP = r"\s*(?:[-\u2212–—‒]|to)\s*"
_QUAL = r"[<>]=?|=<|=>|[≤≥⩽⩾≦≧~≈∼≃]|ca\.?|c\.|circa|approx\.?|approximately|about"
_MISSING = (
    r"n\s*/\s*a|n\.\s*a\.?|na|nd|n\.\s*d\.?|-{1,3}|[–—‒\u2212]|nan|none|null|\?+|…|\.{2,3}"
    r"|not\s+(?:determined|measured|available|reported|given)|unknown"
)
_QUAL_CANON = {
    "<": "<", ">": ">", "<=": "<=", "=<": "<=", "≤": "<=", "⩽": "<=", "≦": "<=",
    ">=": ">=", "=>": ">=", "≥": ">=", "⩾": ">=", "≧": ">=",
    "~": "~", "≈": "~", "∼": "~", "≃": "~", "ca.": "~", "ca": "~", "c.": "~",
    "circa": "~", "approx.": "~", "approx": "~", "approximately": "~", "about": "~",
}  # fmt: skip
_SUPER_TO_ASCII = str.maketrans(_SUP_DIGITS + "⁻⁺\u2212", "0123456789-+-")


def _num(decimal: str, name: str, signed: bool = True) -> str:
    """Regex group ``name`` for a mantissa (no e-part) with the given decimal marker."""
    d = re.escape(decimal)
    dig = rf"[0-9]+(?:[{_GROUP_SPACE}][0-9]+)*"
    unum = rf"(?:{dig}(?:{d}(?:{dig})?)?|{d}{dig})"
    sign = f"{_SIGN}?" if signed else ""
    return rf"(?P<{name}>{sign}{unum})"


@lru_cache(maxsize=8)
def _value_regex(decimal: str, full: bool) -> re.Pattern[str]:
    """The value grammar; every match consumes exactly one cell and its NUL.

    Python's regex engine spends much of its time per cell on capture groups,
    even unmatched ones.  So a lean form (``full=False``: no parentheses, no
    bare ``10ⁿ``, no power of ten on the second number, lower-case words, no
    digit grouping, no catch-all group) runs first on every cell, and the full
    grammar only on the cells the lean form leaves.  Both give the same
    groups the same meaning.
    """
    tx = rf"{_TIMES}{_TEN}"
    if not full:
        d = re.escape(decimal)
        unum = rf"(?:[0-9]+(?:{d}[0-9]*)?|{d}[0-9]+)"
        return re.compile(
            rf"""(?:\s*(?:
                (?P<miss>{_MISSING})
              | (?:(?P<q>[<>]=?|[≤≥~≈]|ca\.|approx\.|about)\s*)?
                (?P<a>[-+]?{unum})(?:\((?P<ld>[0-9]+)\))?(?P<ae>{_EXPE})?(?P<ax>{tx})?
                (?:\s*(?:±|\+/-|\+-)\s*(?P<u>{unum})(?P<ue>{_EXPE})?
                  | \s*[-–—]\s*(?P<b>[-+]?{unum})(?P<be>{_EXPE})?)?
            )\s*(?={_SEP})|[^{_SEP}]*){_SEP}""",
            re.VERBOSE,
        )
    body = rf"""
        \s*(?:
            (?P<miss>{_MISSING})
          |
            (?:(?P<q>{_QUAL})\s*)?
            (?P<lp>\(\s*)?
            (?:{_num(decimal, "a")}(?:\((?P<ld>[0-9]+)\))?(?P<ae>{_EXPE})?(?P<ax>{tx})?
              |(?P<ten>{_TEN_ALONE}))
            (?:
                \s*(?P<op>\(\s*)?{_PM}\s*{_num(decimal, "u", signed=False)}(?P<ue>{_EXPE})?(?P<ux>{tx})?
                (?(op)\s*\))
              | {_RSEP}{_num(decimal, "b")}(?P<be>{_EXPE})?(?P<bx>{tx})?
            )?
            (?(lp)\s*\)(?P<px>{tx}|{_EXPE})?)
        )\s*(?={_SEP})
    """
    pattern = rf"(?:{body}|\s*(?P<bad>[^{_SEP}]*?)\s*){_SEP}"
    return re.compile(pattern, re.VERBOSE | re.IGNORECASE)


# --------------------------------------------------------------------------
# Helpers: distinct values, one-pass extraction, reasons, gathering back
# --------------------------------------------------------------------------
def _check_series(text: Any, who: str) -> pd.Series:
    if not isinstance(text, pd.Series):
        raise TypeError(f"{who} expects a pandas Series of cell text, got {type(text).__name__}")
    return text


def _check_decimal(decimal: str) -> None:
    if decimal not in _DECIMALS:
        raise ValueError(f"decimal must be one of {list(_DECIMALS)}, got {decimal!r}")


def _distinct(text: pd.Series) -> tuple[np.ndarray | None, pd.Series]:
    """Codes (-1 for NA cells) and the distinct cell texts as an object Series of str."""
    codes, uniques = pd.factorize(text, use_na_sentinel=True)
    u = pd.Series(np.asarray(uniques, dtype=object), dtype=object)
    if len(u) and pd.api.types.infer_dtype(u, skipna=False) != "string":
        u = pd.Series(u.astype(str).to_numpy(dtype=object), dtype=object)  # numbers from spreadsheets
    return np.asarray(codes), u


def _frame(cols: dict[str, Any], index: pd.Index | None = None) -> pd.DataFrame:
    """DataFrame that keeps object columns as object (None stays None, no string inference)."""
    out: dict[str, Any] = {}
    for name, col in cols.items():
        if isinstance(col, np.ndarray) and col.dtype == object:
            out[name] = pd.Series(col, index=index, dtype=object)
        else:
            out[name] = pd.Series(col, index=index)
    return pd.DataFrame(out, index=index)


def _gather(
    frame: pd.DataFrame | dict[str, np.ndarray],
    codes: np.ndarray | None,
    index: pd.Index,
    na_row: dict[str, Any],
) -> pd.DataFrame:
    """Expand per-distinct-text results to the full column; NA cells get ``na_row``."""
    cols = dict(frame.items())
    if codes is None:  # every cell parsed on its own
        return _frame(cols, index)
    size = len(next(iter(cols.values()))) if cols else 0
    take = np.where(codes < 0, size, codes)
    out: dict[str, Any] = {}
    for name, col in cols.items():
        if isinstance(col.dtype, pd.Int64Dtype):
            ext = pd.array(list(col.array) + [na_row[name]], dtype="Int64")
            out[name] = ext.take(take)
            continue
        arr = np.asarray(col)
        filler = np.array([na_row[name]], dtype=arr.dtype)
        out[name] = np.concatenate([arr, filler])[take]
    return _frame(out, index)


def _findall(u: pd.Series, rx: re.Pattern[str]) -> tuple[dict[str, np.ndarray], str]:
    """Run ``rx`` over every cell in one pass.

    Returns named group -> object array of str ('' = group absent), and the
    joined text (handy for cheap "does any cell contain ..." tests).
    """
    n = len(u)
    if n == 0:
        return {k: np.empty(0, dtype=object) for k in rx.groupindex}, ""
    cells = u.tolist()
    joined = _SEP.join(cells) + _SEP
    rows = rx.findall(joined)
    if len(rows) != n:  # some cell holds a NUL itself: make it unparseable, keep alignment
        cells = u.str.replace(_SEP, "\ufffd", regex=False).tolist()
        joined = _SEP.join(cells) + _SEP
        rows = rx.findall(joined)
    arr = np.array(rows, dtype=object).reshape(n, rx.groups)
    return {k: arr[:, i - 1] for k, i in rx.groupindex.items()}, joined


def _echo(raw: np.ndarray) -> np.ndarray:
    """Cell text as quoted in a reason (stripped, shortened) [object array]."""
    s = pd.Series(raw, dtype=object).str.strip()
    long = (s.str.len() > _MAX_ECHO).to_numpy(bool)
    out = s.to_numpy(dtype=object, copy=True)
    if long.any():
        out[long] = s[long].str.slice(0, _MAX_ECHO).to_numpy(dtype=object) + "…"
    return out


class _Cell:
    """Marker: in a reason, quote the cell text here."""


_CELL = _Cell()


class _Reasons:
    """Collects the first reason per cell; messages are built only for flagged cells."""

    def __init__(self, raw: np.ndarray) -> None:
        self.raw = raw
        self.out = np.full(len(raw), None, dtype=object)

    def add(self, mask: Any, *parts: str | _Cell | np.ndarray | pd.Series) -> None:
        m = np.asarray(mask, dtype=bool)
        if not m.any():
            return
        m = m & pd.isna(self.out)
        if not m.any():
            return
        msg = np.full(int(m.sum()), "", dtype=object)
        for p in parts:
            if isinstance(p, _Cell):
                msg = msg + _echo(self.raw[m])
            elif isinstance(p, str):
                msg = msg + p
            else:
                msg = msg + np.asarray(p, dtype=object)[m]
        self.out[m] = msg

    @property
    def set(self) -> np.ndarray:
        return pd.notna(self.out)


def _exponents(xp: np.ndarray, has: np.ndarray) -> np.ndarray:
    """Power of ten written in a ``×10…``, ``10^…`` or ``e…`` group (absent -> 0) [dimensionless]."""
    out = np.zeros(len(xp), dtype=float)
    if not has.any():
        return out
    codes, uniq = pd.factorize(xp[has])
    u = pd.Series(np.asarray(uniq, dtype=object), dtype=object)
    digits = u.str.extract(
        r"^\s*(?:[eE]|(?:[×xX*·⋅∙]\s*)?10\s*(?:\^|\*\*)?)\s*\(?\s*(\S+?)\s*\)?\s*$", expand=False
    )
    exps = pd.to_numeric(digits.str.translate(_SUPER_TO_ASCII), errors="coerce").to_numpy(float)
    out[has] = exps[codes]
    return out


def _clean_numbers(s: np.ndarray, decimal: str, joined: str) -> pd.Series:
    """Mantissa texts ready for :func:`pandas.to_numeric` (grouping removed, '.' decimal)."""
    out = pd.Series(s, dtype=object)
    if any(c in joined for c in _GROUP_SPACE):
        out = out.str.replace(f"[{_GROUP_SPACE}]", "", regex=True)
    if "\u2212" in joined:
        out = out.str.replace("\u2212", "-", regex=False)
    if decimal != ".":
        out = out.str.replace(decimal, ".", regex=False)
    return out


def _scaled(mantissa: pd.Series, exp: np.ndarray) -> np.ndarray:
    """``mantissa × 10**exp``, correctly rounded when ``exp`` is an integer.

    Integer powers are appended as e-notation text, so ``1.8 × 10⁻⁵`` converts
    as the decimal ``1.8e-5``, not as ``1.8 * 10.0**-5`` (two roundings).
    ``mantissa`` holds no e-part (the grammar captures it separately).
    """
    exp = np.asarray(exp, dtype=float)
    text = mantissa
    shift = exp != 0
    integral = shift & np.isfinite(exp) & (exp == np.round(exp)) & (np.abs(exp) < 100_000)
    if integral.any():
        text = mantissa.copy()
        ints = pd.Series(exp[integral].astype(np.int64)).astype(str).to_numpy(dtype=object)
        text[integral] = mantissa[integral].to_numpy(dtype=object) + "e" + ints
    with np.errstate(over="ignore", invalid="ignore"):
        val = pd.to_numeric(text, errors="coerce").to_numpy(float, copy=True)
        rest = shift & ~integral
        if rest.any():
            val[rest] = val[rest] * np.power(10.0, exp[rest])
    return val


def _qualifiers(q: np.ndarray, has: np.ndarray) -> np.ndarray:
    """Canonical qualifier per written one (absent -> None)."""
    out = np.full(len(q), None, dtype=object)
    if has.any():
        codes, uq = pd.factorize(q[has])
        canon = pd.Series(np.asarray(uq, dtype=object), dtype=object).str.lower().map(_QUAL_CANON)
        out[has] = canon.to_numpy(dtype=object)[codes]
    return out


# --------------------------------------------------------------------------
# Values
# --------------------------------------------------------------------------
_VALUE_GROUPS = ("miss", "q", "lp", "a", "ld", "ae", "ax", "ten", "op", "u", "ue", "ux", "b", "be", "bx", "px", "bad")


def _parse_value_texts(u: pd.Series, decimal: str) -> dict[str, np.ndarray]:
    """Parse distinct value texts (object Series of str); column name -> array.

    Plain numbers go through :func:`pandas.to_numeric` alone (it accepts
    exactly the plain decimal and e-notation forms of the grammar, plus
    inf/nan words, which are sent on to the grammar); only the other cells
    are matched by the regular expressions.
    """
    if decimal == "." and len(u):
        with np.errstate(over="ignore"):
            num = pd.to_numeric(u, errors="coerce").to_numpy(float, copy=True)
        plain = np.isfinite(num)
        if plain.any():
            n = len(u)
            out = {
                "value": num, "uncertainty": np.full(n, np.nan),
                "qualifier": np.full(n, None, dtype=object), "low": np.full(n, np.nan),
                "high": np.full(n, np.nan), "missing": np.zeros(n, dtype=bool),
                "error": np.full(n, None, dtype=object),
            }  # fmt: skip
            if not plain.all():
                rest = _parse_cells(pd.Series(u.to_numpy(dtype=object)[~plain], dtype=object), decimal)
                for name, col in out.items():
                    col[~plain] = rest[name]
            return out
    return _parse_cells(u, decimal)


def _parse_cells(u: pd.Series, decimal: str) -> dict[str, np.ndarray]:
    """Lean grammar on every cell, full grammar on the cells the lean one leaves."""
    raw = u.to_numpy(dtype=object)
    g, joined = _findall(u, _value_regex(decimal, full=False))
    done = (g["a"] != "") | (g["miss"] != "")
    if done.all():
        return _assemble(g, raw, decimal, joined)
    lean = _assemble({k: v[done] for k, v in g.items()}, raw[done], decimal, joined)
    g_full, joined_full = _findall(pd.Series(raw[~done], dtype=object), _value_regex(decimal, full=True))
    rest = _assemble(g_full, raw[~done], decimal, joined_full)
    out: dict[str, np.ndarray] = {}
    for name, col in lean.items():
        merged = np.empty(len(raw), dtype=col.dtype)
        merged[done] = col
        merged[~done] = rest[name]
        out[name] = merged
    return out


def _value_frame(u: pd.Series, decimal: str) -> pd.DataFrame:
    """:func:`_parse_value_texts` as a DataFrame (for the unit parsers)."""
    return _frame(_parse_value_texts(u, decimal))


def _assemble(g: dict[str, np.ndarray], raw: np.ndarray, decimal: str, joined: str) -> dict[str, np.ndarray]:
    """Numbers, uncertainty, range and reasons from the grammar's groups (absent group = '')."""
    n = len(raw)
    no = np.zeros(n, dtype=bool)
    empty = np.full(n, "", dtype=object)
    has = {k: (g[k] != "") if k in g else no for k in _VALUE_GROUPS}
    txt = {k: g.get(k, empty) for k in _VALUE_GROUPS}
    why = _Reasons(raw)

    ok = has["a"] | has["ten"]
    bad = ~ok & ~has["miss"] & has["bad"]
    missing = ~ok & ~bad
    two = has["u"] | has["b"]

    # first number (mantissa 1 for "10⁻⁵")
    e_px = _exponents(txt["px"], has["px"])
    e_a = (
        _exponents(txt["ae"], has["ae"]) + _exponents(txt["ax"], has["ax"])
        + _exponents(txt["ten"], has["ten"]) + e_px
    )
    a_val = np.full(n, np.nan)
    a_txt = np.where(has["ten"], "1", txt["a"]) if has["ten"].any() else txt["a"]
    a_val[ok] = _scaled(_clean_numbers(a_txt[ok], decimal, joined), e_a[ok])

    # second number: uncertainty after ± or the upper end of a range
    s_val = np.full(n, np.nan)
    s_has_e = np.where(has["u"], has["ue"], has["be"])
    s_has_x = np.where(has["u"], has["ux"], has["bx"])
    if two.any():
        s_txt = np.where(has["u"], txt["u"], txt["b"])[two]
        s_e = np.where(has["u"], txt["ue"], txt["be"])[two]
        s_x = np.where(has["u"], txt["ux"], txt["bx"])[two]
        e_s = _exponents(s_e, s_has_e[two]) + _exponents(s_x, s_has_x[two]) + e_px[two]
        s_val[two] = _scaled(_clean_numbers(s_txt, decimal, joined), e_s)

    # last-digit uncertainty: "4.76(2)" -> 2 × 10^-(decimals) × 10^power
    ld_val = np.full(n, np.nan)
    if has["ld"].any():
        mant = _clean_numbers(txt["a"][has["ld"]], decimal, joined)
        dot = mant.str.find(".").to_numpy()
        ndec = np.where(dot < 0, 0, mant.str.len().to_numpy() - dot - 1)
        ld_val[has["ld"]] = _scaled(pd.Series(txt["ld"][has["ld"]], dtype=object), e_a[has["ld"]] - ndec)

    # well-formed but contradictory cells
    p_a = has["ax"] | has["ae"] | has["ten"]
    p_s = s_has_x | s_has_e
    why.add(
        ok & has["px"] & (p_a | p_s) | ok & has["ax"] & has["ae"],
        "value '", _CELL, "' gives the power of ten twice",
    )
    why.add(
        ok & two & ~has["px"] & ((has["ax"] & ~p_s) | (s_has_x & ~p_a)),
        "value '", _CELL, "' is ambiguous: only one of its two numbers carries the power of ten;"
        " write '(a ± u) × 10^n' or give the power on both numbers",
    )
    why.add(ok & has["ld"] & two, "value '", _CELL, "' gives two uncertainties")
    why.add(
        ok & has["b"] & (s_val < a_val),
        "range '", _CELL, "' runs from high to low; write the lower end first",
    )
    v = np.where(has["b"], (a_val + s_val) / 2, a_val)
    w = np.where(has["b"], (s_val - a_val) / 2, np.where(has["u"], s_val, ld_val))
    with np.errstate(invalid="ignore"):
        finite = np.isfinite(v) & (np.isfinite(w) | ~(two | has["ld"]))
    why.add(ok & ~finite, "value '", _CELL, "' is too large to store as a number")

    # malformed cells; hint when the other decimal marker would have worked
    if bad.any():
        other = "," if decimal == "." else "."
        name = {",": "comma", ".": "point"}[other]
        looks = np.zeros(n, dtype=bool)
        looks[bad] = (
            pd.Series(raw[bad], dtype=object)
            .str.fullmatch(rf"\s*[-+]?[0-9]+{re.escape(other)}[0-9]+\s*")
            .to_numpy(bool)
        )
        why.add(
            bad & looks, "value '", _CELL,
            f"' is not a number: it has a decimal {name}, but this column is read with decimal '{decimal}'",
        )
        why.add(bad, "value '", _CELL, "' is not a number")

    good = ok & ~why.set
    rng = good & has["b"]
    return {
        "value": np.where(good, v, np.nan),
        "uncertainty": np.where(good, w, np.nan),
        "qualifier": _qualifiers(txt["q"], good & has["q"]),
        "low": np.where(rng, a_val, np.nan),
        "high": np.where(rng, s_val, np.nan),
        "missing": missing,
        "error": why.out,
    }


_VALUE_NA_ROW: dict[str, Any] = {
    "value": np.nan, "uncertainty": np.nan, "qualifier": None, "low": np.nan,
    "high": np.nan, "missing": True, "error": None,
}  # fmt: skip


def parse_values(text: pd.Series, decimal: str = ".") -> pd.DataFrame:
    """Parse reported numbers (pKa, Ka, ...) with their uncertainty, range and qualifier.

    Parameters
    ----------
    text : pandas.Series
        Cell text, one reported value per cell.  NA cells are missing.
    decimal : {".", ","}
        Decimal marker of the source ([1]_ §5.4.4).  With ``","`` a point is
        not accepted as decimal marker (it would be read as a grouping dot).

    Returns
    -------
    pandas.DataFrame
        Same index as ``text``, columns:

        ``value`` (float)
            The number; the midpoint for a range.
        ``uncertainty`` (float)
            From ``±``, ``+/-``, ``4.76(2)`` ([2]_ §7.2.2), or a range's
            half-width; NaN if none given.
        ``qualifier`` (object)
            None or one of ``"<"``, ``">"``, ``"<="``, ``">="``, ``"~"``.
        ``low``, ``high`` (float)
            Range ends, NaN unless the cell is a range.
        ``missing`` (bool)
            Blank or a missing-value token (``n/a``, ``nd``, ``-``, ``—`` ...).
            Missing is not an error.
        ``error`` (object)
            None, or a reason quoting the cell.  Rejected on purpose:
            ``1.8 x 105`` (reads as a product; write ``10^5`` or ``10⁵``),
            ``1.8 ± 0.2 × 10⁻⁵`` (power of ten on one number only), ranges
            written high to low, ``inf``, values beyond the double range.

    Raises
    ------
    ValueError
        If ``decimal`` is not ``"."`` or ``","``.
    TypeError
        If ``text`` is not a Series.

    References
    ----------
    .. [1] BIPM, SI Brochure, 9th ed., 2019, §5.4.4.
    .. [2] JCGM 100:2008 (GUM), §7.2.2.

    Examples
    --------
    >>> import pandas as pd
    >>> out = parse_values(pd.Series(["1.234(15)", "< 0.1", "ca. 4.7", "4,7,6"]))
    >>> float(out.loc[0, "uncertainty"]), out.loc[1, "qualifier"], out.loc[2, "qualifier"]
    (0.015, '<', '~')
    >>> out.loc[3, "error"]
    "value '4,7,6' is not a number"
    >>> parse_values(pd.Series(["4,76 ± 0,02"]), decimal=",")[["value", "uncertainty"]].values.tolist()
    [[4.76, 0.02]]
    """
    text = _check_series(text, "parse_values")
    _check_decimal(decimal)
    codes, u = _distinct(text)
    return _gather(_parse_value_texts(u, decimal), codes, text.index, _VALUE_NA_ROW)


# --------------------------------------------------------------------------
# Temperature
# --------------------------------------------------------------------------
_T_UNITS: dict[str, str] = {
    **dict.fromkeys(
        ["°c", "ºc", "˚c", "c", "oc", "degc", "degreec", "degreesc", "celsius",
         "degcelsius", "degreescelsius", "°celsius", "℃"], "C"),
    **dict.fromkeys(["k", "°k", "ºk", "degk", "kelvin", "kelvins", "\u212a"], "K"),
    **dict.fromkeys(
        ["°f", "ºf", "˚f", "f", "of", "degf", "degreef", "degreesf", "fahrenheit",
         "degfahrenheit", "degreesfahrenheit", "℉"], "F"),
}  # fmt: skip
_ROOM = {
    "rt", "roomtemperature", "roomtemp", "room", "ambient", "ambienttemperature",
    "labtemperature", "laboratorytemperature",
}  # fmt: skip
_BARE_T_CHOICES = "'°C', 'K', '°F' or None"


def _unit_key(s: pd.Series) -> pd.Series:
    return s.str.lower().str.replace(r"[\s.]", "", regex=True)


def _to_kelvin(x: np.ndarray, unit: np.ndarray) -> np.ndarray:
    """Temperature in kelvin from a number in °C, K or °F.

    T/K = t/°C + 273.15 ([1]_ §2.3.1); t/°C = (t/°F − 32)/1.8 ([2]_ App. B).

    References
    ----------
    .. [1] BIPM, SI Brochure, 9th ed., 2019, §2.3.1.
    .. [2] NIST Special Publication 811, 2008, Appendix B (section from memory).

    Examples
    --------
    >>> _to_kelvin(np.array([25.0, 298.15, 77.0]), np.array(["C", "K", "F"], dtype=object))
    array([298.15, 298.15, 298.15])
    """
    c_to_k = x + 273.15  # °C -> K
    f_to_k = (x - 32.0) / 1.8 + 273.15  # °F -> °C -> K
    return np.where(unit == "K", x, np.where(unit == "F", f_to_k, c_to_k))


def parse_temperature(
    text: pd.Series,
    bare_unit: str | None = None,
    room_temperature_k: float | None = None,
    decimal: str = ".",
) -> pd.DataFrame:
    """Parse a temperature cell to kelvin.

    Accepted: ``25 °C``, ``25°C``, ``25 C``, ``25 oC``, ``25 deg C``, ``25 ℃``,
    ``298.15 K``, ``77 °F``, ``ca. 25 °C`` (an approximate temperature is taken
    as given), ``25 ± 0.1 °C`` (the uncertainty is dropped).  Rejected with a
    reason: no unit (unless ``bare_unit``), unknown unit, ranges, bounds
    (``< 30 °C``), room temperature (unless ``room_temperature_k``), and
    anything below absolute zero.

    Parameters
    ----------
    text : pandas.Series
        Cell text.
    bare_unit : {None, "°C", "K", "°F"}
        Unit for a bare number such as ``25``; None (default) makes a bare
        number an error.
    room_temperature_k : float, optional
        Temperature [K] that "rt" / "room temperature" stands for in this
        source (the source descriptor may define it); None makes it an error.
    decimal : {".", ","}
        Decimal marker of the source.

    Returns
    -------
    pandas.DataFrame
        ``kelvin`` (float) temperature [K], ``missing`` (bool), ``error`` (object).

    References
    ----------
    .. [1] BIPM, SI Brochure, 9th ed., 2019, §2.3.1 (T/K = t/°C + 273.15).
    .. [2] NIST Special Publication 811, 2008, Appendix B (°F to °C).

    Examples
    --------
    >>> import pandas as pd
    >>> out = parse_temperature(pd.Series(["25 °C", "298.15 K", "77 °F", "25", "300 Q"]))
    >>> out["kelvin"].round(2).tolist()[:3]
    [298.15, 298.15, 298.15]
    >>> out.loc[3, "error"]
    "temperature '25' has no unit; write °C or K"
    >>> out.loc[4, "error"]
    "temperature '300 Q' has unknown unit 'Q'; use °C, K or °F"
    """
    text = _check_series(text, "parse_temperature")
    _check_decimal(decimal)
    bare: str | None = None
    if bare_unit is not None:
        bare = _T_UNITS.get(str(bare_unit).lower().replace(" ", "").replace(".", ""))
        if bare is None:
            raise ValueError(f"bare_unit must be one of {_BARE_T_CHOICES}, got {bare_unit!r}")
    if room_temperature_k is not None and not (
        np.isfinite(room_temperature_k) and room_temperature_k > 0
    ):
        raise ValueError(f"room_temperature_k must be a temperature above 0 K, got {room_temperature_k!r}")

    codes, u = _distinct(text)
    raw = u.to_numpy(dtype=object)
    why = _Reasons(raw)
    parts = u.str.extract(r"(?s)^\s*(?P<num>.*[0-9)])\s*(?P<unit>[^0-9)]*?)\s*$")
    matched = parts["num"].notna().to_numpy(bool)
    num = np.where(matched, parts["num"].to_numpy(dtype=object), raw)
    unit_txt = parts["unit"].fillna("").astype(object)
    nums = _value_frame(pd.Series(num, dtype=object), decimal)
    key = _unit_key(unit_txt)
    unit = key.map(_T_UNITS).to_numpy(dtype=object, copy=True)
    no_unit = matched & (key == "").to_numpy(bool)
    if bare is not None:
        unit[no_unit] = bare

    whole_missing = ~matched & nums["missing"].to_numpy(bool)
    room = ~matched & _unit_key(u).isin(_ROOM).to_numpy(bool)
    if room_temperature_k is None:
        why.add(
            room, "temperature '", _CELL, "' is room temperature, which has no agreed value;"
            " give the temperature, or set room_temperature_k for this source",
        )
    why.add(~matched & ~whole_missing & ~room, "temperature '", _CELL, "' is not a number")
    why.add(matched & nums["error"].notna().to_numpy(bool), "temperature '", _CELL, "' is not a number")
    why.add(no_unit & (bare is None), "temperature '", _CELL, "' has no unit; write °C or K")
    why.add(
        matched & ~no_unit & pd.isna(unit),
        "temperature '", _CELL, "' has unknown unit '", unit_txt.str.strip(), "'; use °C, K or °F",
    )
    why.add(matched & nums["low"].notna().to_numpy(bool), "temperature '", _CELL, "' is a range; give one temperature")
    bound = nums["qualifier"].isin(["<", ">", "<=", ">="]).to_numpy(bool)
    why.add(matched & bound, "temperature '", _CELL, "' is a bound, not a temperature")
    k = _to_kelvin(nums["value"].to_numpy(float), unit)
    below = matched & (k < 0)
    k_txt = pd.Series(np.round(k, 2)).astype(str)
    why.add(below, "temperature '", _CELL, "' is below absolute zero (", k_txt, " K)")

    kelvin = np.where(matched & ~why.set, k, np.nan)
    if room_temperature_k is not None:
        kelvin[room] = float(room_temperature_k)
    frame = _frame({"kelvin": kelvin, "missing": whole_missing, "error": why.out})
    return _gather(frame, codes, text.index, {"kelvin": np.nan, "missing": True, "error": None})


# --------------------------------------------------------------------------
# Ionic strength
# --------------------------------------------------------------------------
# unit text with spaces, "/", "·", "^" and "." removed -> (unit, factor to mol)
_I_UNITS: dict[str, tuple[str, float]] = {
    **dict.fromkeys(["m", "molkg", "molkg-1", "molal"], ("mol/kg", 1.0)),
    **dict.fromkeys(["mmolkg", "mmolkg-1"], ("mol/kg", 1e-3)),
    **dict.fromkeys(
        ["M", "molL", "moll", "molL-1", "moll-1", "moldm3", "moldm-3", "molar",
         "mollitre", "molliter", "mollitre-1", "molliter-1"], ("mol/L", 1.0)),
    **dict.fromkeys(
        ["mM", "mmolL", "mmoll", "mmolL-1", "mmoll-1", "mmoldm3", "mmoldm-3"], ("mol/L", 1e-3)),
}  # fmt: skip
_I_UNIT_NAME = {k: v[0] for k, v in _I_UNITS.items()}
_I_FACTOR = {k: v[1] for k, v in _I_UNITS.items()}
_I_TRANSLATE = str.maketrans(_SUB_DIGITS + "⁻³¹\u2212·⋅", "0123456789-31-  ")
_FORMULA = r"(?:\(?[A-Z][a-z]?[0-9]*\)?[0-9]*){2,}"
_I_BARE_CHOICES = "'mol/L', 'mol/kg' or None"
_I_UNIT_HELP = "write M or mol/L (amount concentration), m or mol/kg (molality)"
_I_REGEX = re.compile(
    rf"""^\s*
    (?:(?:I|μ|µ|(?i:ionic\s+strength))\s*(?:=|:)?\s*)?
    (?:(?P<arrow>→|->|=>)\s*)?
    (?:(?P<inf>(?i:infinite\s+dilution|extrapolated\s+to\s+(?:zero|I\s*=\s*0|0)|zero))
      |(?P<num>(?:(?:[<>]=?|[≤≥~≈]|ca\.)\s*)?{_SIGN}?[0-9.,]+(?:[eE]{_SIGN}?[0-9]+)?(?:\s*[-–—]\s*[0-9.,]+)?))
    (?:\s*(?P<unit>m?mol\s*(?:/|\s|\.|\*)?\s*(?:kg|dm|[Ll]|litre|liter)(?:\s*\^?\s*-?\s*[13])?
        |mM|M|m|(?i:molar|molal))(?![A-Za-z]))?
    (?:\s*\(\s*(?P<med1>{_FORMULA})\s*\)|\s+(?:in\s+)?(?P<med2>{_FORMULA}))?
    \s*(?P<ext>\(\s*(?i:extrap(?:olated|\.)?(?:\s+to\s+(?:zero|0|I\s*=\s*0))?)\s*\)
        |,?\s*(?i:extrapolated))?
    \s*$""",
    re.VERBOSE,
)


_I_LEAD = re.compile(
    r"^\s*(?:(?:I|μ|µ|(?i:ionic\s+strength))\s*(?:=|:)?\s*)?[-+]?[0-9][0-9.,]*\s*(?P<rest>.*?)\s*$"
)


def parse_ionic_strength(
    text: pd.Series, bare_unit: str | None = None, decimal: str = "."
) -> pd.DataFrame:
    """Parse an ionic-strength cell: number, concentration scale and background electrolyte.

    Accepted: ``0.1``, ``0.1 M``, ``0.1 M KCl``, ``0.1 mol/L``, ``0.1 mol dm-3``,
    ``0.1 mol/kg``, ``0.1 m``, ``100 mM``, ``I = 0.15 mol/kg (NaCl)``,
    ``→ 0``, ``-> 0``, ``0 (extrapolated)``, ``infinite dilution``.  ``M`` and
    ``m`` are case-sensitive: M = mol dm⁻³ (amount concentration), m = mol kg⁻¹
    (molality) ([1]_).  Millimolar units are converted to mol/L or mol/kg.

    A number written without a unit gets ``bare_unit``.  The default is None:
    the parser does not guess the scale; the normalize stage applies the unit
    the source descriptor declares.  Zero (including ``→ 0`` and infinite
    dilution) is the same on both scales, so a None unit there is harmless.

    Parameters
    ----------
    text : pandas.Series
        Cell text.
    bare_unit : {None, "mol/L", "mol/kg"}
        Unit for a number written without one.
    decimal : {".", ","}
        Decimal marker of the source.

    Returns
    -------
    pandas.DataFrame
        ``value`` (float) ionic strength [unit of ``unit``], ``unit`` (object,
        "mol/L", "mol/kg" or None), ``medium`` (object, electrolyte formula as
        written, subscript digits made plain, or None), ``missing`` (bool),
        ``error`` (object).

    References
    ----------
    .. [1] IUPAC Green Book, 3rd ed., 2007 (symbols M and m).

    Examples
    --------
    >>> import pandas as pd
    >>> out = parse_ionic_strength(pd.Series(["0.1 M KCl", "I = 0.15 mol/kg (NaCl)", "→ 0", "-0.1"]))
    >>> out[["value", "unit", "medium"]].values.tolist()
    [[0.1, 'mol/L', 'KCl'], [0.15, 'mol/kg', 'NaCl'], [0.0, None, None], [nan, None, None]]
    >>> out.loc[3, "error"]
    "ionic strength '-0.1' is negative"
    """
    text = _check_series(text, "parse_ionic_strength")
    _check_decimal(decimal)
    if bare_unit not in (None, "mol/L", "mol/kg"):
        raise ValueError(f"bare_unit must be one of {_I_BARE_CHOICES}, got {bare_unit!r}")
    codes, u = _distinct(text)
    raw = u.to_numpy(dtype=object)
    why = _Reasons(raw)
    t = u.str.translate(_I_TRANSLATE)
    m = t.str.extract(_I_REGEX)
    matched = (m["num"].notna() | m["inf"].notna()).to_numpy(bool)
    num_txt = np.where(m["num"].notna(), m["num"].to_numpy(dtype=object), "0")
    nums = _value_frame(pd.Series(num_txt, dtype=object), decimal)
    whole = _value_frame(u, decimal)
    missing = ~matched & whole["missing"].to_numpy(bool)

    lead = t.str.extract(_I_LEAD)["rest"].fillna("")
    why.add(
        ~matched & ~missing & (lead != "").to_numpy(bool),
        "ionic strength '", _CELL, "' has unknown unit or medium '", lead, "'; ", _I_UNIT_HELP,
        ", optionally followed by the electrolyte, e.g. '0.1 M KCl'",
    )
    why.add(~matched & ~missing, "ionic strength '", _CELL, "' is not a number")
    why.add(matched & nums["error"].notna().to_numpy(bool), "ionic strength '", _CELL, "' is not a number")
    unit_written = m["unit"].fillna("")
    unit_key = unit_written.str.replace(r"[\s/.*^]", "", regex=True)
    unit_key = unit_key.where(~unit_key.str.fullmatch(r"(?i)molar|molal"), unit_key.str.lower())
    unit = unit_key.map(_I_UNIT_NAME).to_numpy(dtype=object, copy=True)
    factor = unit_key.map(_I_FACTOR).fillna(1.0).to_numpy(float)
    has_unit = (unit_key != "").to_numpy(bool)
    why.add(
        matched & has_unit & pd.isna(unit),
        "ionic strength '", _CELL, "' has unknown unit '", unit_written, "'; ", _I_UNIT_HELP,
    )
    unit[~has_unit] = bare_unit
    why.add(matched & nums["low"].notna().to_numpy(bool), "ionic strength '", _CELL, "' is a range; give one value")
    why.add(
        matched & nums["qualifier"].isin(["<", ">", "<=", ">="]).to_numpy(bool),
        "ionic strength '", _CELL, "' is a bound, not a value",
    )
    val = nums["value"].to_numpy(float)
    why.add(matched & (val < 0), "ionic strength '", _CELL, "' is negative")
    zero_mark = (m["arrow"].notna() | m["ext"].notna()).to_numpy(bool)
    why.add(
        matched & zero_mark & (val != 0),
        "ionic strength '", _CELL, "' is marked as extrapolated, but to a value that is not zero",
    )
    ok = matched & ~why.set
    medium = m["med1"].fillna(m["med2"]).to_numpy(dtype=object)
    frame = _frame(
        {
            "value": np.where(ok, val * factor, np.nan),  # mmol -> mol where the unit says so
            "unit": np.where(ok, unit, None),
            "medium": np.where(ok & pd.notna(medium), medium, None),
            "missing": missing,
            "error": why.out,
        }
    )
    na_row = {"value": np.nan, "unit": None, "medium": None, "missing": True, "error": None}
    return _gather(frame, codes, text.index, na_row)


# --------------------------------------------------------------------------
# Medium (solvent)
# --------------------------------------------------------------------------
_WATER_EXACT = {
    "water", "h2o", "aq", "aq.", "aqueous", "aqueous solution", "aq. solution", "aq. soln.",
    "aqueous soln.", "aqueous soln", "pure water", "deionized water", "deionised water",
    "distilled water", "water (pure)", "in water", "aqueous medium",
}  # fmt: skip
_COSOLVENTS: dict[str, str] = {
    "water-dioxane": r"dioxane|\bdiox\b",
    "water-methanol": r"methanol|\bmeoh\b|\bch3oh\b",
    "water-ethanol": r"(?<![a-z])ethanol|\betoh\b|\bc2h5oh\b",
    "water-dmso": r"\bdmso\b|dimethyl\s*sul(?:f|ph)oxide",
    "water-acetonitrile": r"acetonitrile|\bmecn\b|\bch3cn\b|\bacn\b",
}
_WATER_WORD = r"water|\bh2o\b|\baq\b|aqueous"
_HEAVY = r"\bd2o\b|heavy\s+water|deuterium\s+oxide"
_COMPOSITION = r"[0-9]\s*%|[0-9]\s*:\s*[0-9]|\b[vw]\s*/\s*[vw]\b|mole?\s+fraction|\bvol\b|\bwt\b"
_WATER_WITH_SALT = (
    rf"(?i:water|h2o|aqueous|aq\.?|solution|soln\.?|in|with|containing|and)"
    rf"|{_FORMULA}|[0-9.,]+|(?i:mol\s*/?\s*(?:l|kg|dm-?3))|mM|M|m|[\s,;:+()\[\]/-]"
)


_BLANK_MEDIUM = "medium is blank; name the solvent (e.g. 'water'), or give the source a default medium"


def parse_medium(text: pd.Series, default: str | None = None) -> pd.DataFrame:
    """Classify the solvent of a measurement into a controlled vocabulary.

    ``water``, ``H2O``, ``aq``, ``aqueous`` -> ``"water"`` (``aqueous`` True).
    Water with one named co-solvent (dioxane, methanol, ethanol, DMSO,
    acetonitrile), or a co-solvent with a stated percentage or ratio, ->
    ``"water-<co-solvent>"`` with ``aqueous`` False and the cell text kept in
    ``composition`` (e.g. ``"50% v/v dioxane"``).  Water with only a background
    electrolyte (``"water, 0.1 M KCl"``) stays ``"water"`` with the text kept.
    Anything else (a pure organic solvent, D₂O, two co-solvents) is
    ``"other"`` with the text kept; common practice.

    Parameters
    ----------
    text : pandas.Series
        Cell text.
    default : str, optional
        Medium text for blank cells (a source descriptor may say "water" for
        the whole source).  None makes a blank cell an error.

    Returns
    -------
    pandas.DataFrame
        ``solvent`` (object, one of :data:`MEDIUM_SOLVENTS`, None on error),
        ``aqueous`` (bool), ``composition`` (object), ``error`` (object).

    Examples
    --------
    >>> import pandas as pd
    >>> parse_medium(pd.Series(["H2O", "50% v/v dioxane", "methanol"])).values.tolist()
    [['water', True, None, None], ['water-dioxane', False, '50% v/v dioxane', None], ['other', False, 'methanol', None]]
    """
    text = _check_series(text, "parse_medium")
    codes, u = _distinct(text.astype(object).where(text.notna(), ""))  # NA cell = blank cell
    stripped = u.str.strip().str.replace(r"\s+", " ", regex=True)
    blank = (stripped == "").to_numpy(bool)
    if default is not None:
        stripped = stripped.where(~blank, str(default).strip())
    t = stripped.str.translate(str.maketrans(_SUB_DIGITS, "0123456789"))
    low = t.str.lower()
    n = len(u)

    exact = low.isin(_WATER_EXACT).to_numpy(bool)
    flags = np.zeros((n, len(_COSOLVENTS)), dtype=bool)
    for j, pat in enumerate(_COSOLVENTS.values()):  # five fixed patterns, each vectorized
        flags[:, j] = low.str.contains(pat, regex=True).to_numpy(bool)
    n_co = flags.sum(axis=1)
    first = np.array(list(_COSOLVENTS), dtype=object)[flags.argmax(axis=1)]
    water = low.str.contains(_WATER_WORD, regex=True).to_numpy(bool)
    heavy = low.str.contains(_HEAVY, regex=True).to_numpy(bool)
    compo = low.str.contains(_COMPOSITION, regex=True).to_numpy(bool)
    rest = t.str.replace(_WATER_WITH_SALT, "", regex=True).str.len().to_numpy()
    salt_only = (rest == 0) & water & (n_co == 0) & ~heavy & ~exact
    letters = t.str.contains(r"[^\W\d_]", regex=True).to_numpy(bool)

    mixed = (n_co == 1) & (water | compo) & ~heavy
    aqueous = exact | salt_only
    solvent = np.where(aqueous, "water", np.where(mixed, first, "other")).astype(object)
    composition = np.where(exact, None, stripped.to_numpy(dtype=object))
    why = _Reasons(u.to_numpy(dtype=object))
    if default is None:
        why.add(blank, _BLANK_MEDIUM)
    why.add(~letters & ~blank, "medium '", _CELL, "' names no solvent")
    bad = why.set
    solvent[bad] = None
    composition[bad] = None
    frame = _frame(
        {"solvent": solvent, "aqueous": aqueous & ~bad, "composition": composition, "error": why.out}
    )
    na_row = {"solvent": None, "aqueous": False, "composition": None, "error": _BLANK_MEDIUM}  # NA became ""
    return _gather(frame, codes, text.index, na_row)


# --------------------------------------------------------------------------
# Quantity
# --------------------------------------------------------------------------
_Q_CANON = {
    "pka": "pKa", "pk": "pKa", "pkb": "pKb", "ka": "Ka", "kb": "Kb",
    "logk": "logK", "lgk": "logK", "log10k": "logK", "logkh": "logK", "lgkh": "logK",
    "log10kh": "logK",
}  # fmt: skip
_Q_TRANSLATE = str.maketrans(_SUB_DIGITS + "ₐᵦ", "0123456789ab")
_Q_CHOICES = "pKa, Ka, pKb, Kb or logK"


def parse_quantity(text: pd.Series) -> pd.DataFrame:
    """Name the reported quantity and its dissociation step.

    Case and spacing tolerant: ``pKa``, ``pK_a``, ``pKₐ``, ``pKa 2``, ``pK2``
    (pK alone is read as pKa), ``Ka1``, ``pKb``, ``log K``, ``lg K``,
    ``log₁₀ K1``.  Cumulative constants (``log β``) are rejected: they are not
    stepwise constants.  pKa = −log₁₀ Ka (IUPAC Gold Book, "acid dissociation
    constant"; from memory).

    Parameters
    ----------
    text : pandas.Series
        Cell text.

    Returns
    -------
    pandas.DataFrame
        ``quantity`` (object, one of :data:`QUANTITIES` or None), ``step``
        (Int64, dissociation step counted from 1, or <NA>), ``error`` (object).

    Examples
    --------
    >>> import pandas as pd
    >>> parse_quantity(pd.Series(["pK_a 2", "log K1", "Ka", "log β2"]))[["quantity", "step"]]
      quantity  step
    0      pKa     2
    1     logK     1
    2       Ka  <NA>
    3     None  <NA>
    """
    text = _check_series(text, "parse_quantity")
    codes, u = _distinct(text.astype(object).where(text.notna(), ""))  # NA cell = blank cell
    why = _Reasons(u.to_numpy(dtype=object))
    key = (
        u.str.translate(_Q_TRANSLATE)
        .str.lower()
        .str.replace(r"[\s_{}\-(),.]", "", regex=True)
    )
    m = key.str.extract(r"^(?P<q>pka|pkb|pk|ka|kb|log10kh?|logkh?|lgkh?)(?P<step>[0-9]+)?$")
    quantity = m["q"].map(_Q_CANON).to_numpy(dtype=object, copy=True)
    step_num = pd.to_numeric(m["step"], errors="coerce").to_numpy(float)
    why.add((key == "").to_numpy(bool), f"quantity is blank; write one of {_Q_CHOICES}")
    why.add(
        key.str.contains("β|beta", regex=True).to_numpy(bool),
        "quantity '", _CELL, "' is a cumulative (overall) constant; give stepwise constants"
        f" as {_Q_CHOICES}",
    )
    why.add(
        pd.isna(quantity),
        "quantity '", _CELL, f"' is not one of {_Q_CHOICES} (a step number may follow, e.g. pKa2)",
    )
    why.add(step_num == 0, "quantity '", _CELL, "' has step 0; steps count from 1")
    bad = why.set
    quantity[bad] = None
    step = pd.array(np.where(bad, np.nan, step_num), dtype="Float64").astype("Int64")
    frame = _frame({"quantity": quantity, "step": step, "error": why.out})
    na_row = {"quantity": None, "step": pd.NA, "error": f"quantity is blank; write one of {_Q_CHOICES}"}
    return _gather(frame, codes, text.index, na_row)
