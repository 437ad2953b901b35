"""Tests for pipeline.parse: cell text -> numbers, units, vocabularies.

Sources the expectations rest on (named again beside the cases that use them):

* [SI]   BIPM, SI Brochure, 9th ed. (2019): §5.4.4 decimal marker (point or comma on
         the line, CGPM 2003 Res. 10) and digit groups of three separated by a space;
         §2.3.1 T/K = t/°C + 273.15.
* [GUM]  JCGM 100:2008, §7.2.2: concise notation "m = 100.021 47(35) g", the number in
         parentheses is the uncertainty referred to the last digits (section number
         from memory).
* [SP811] NIST Special Publication 811 (2008), Appendix B: t/°C = (t/°F − 32)/1.8
         (appendix section from memory).
* [GB]   IUPAC Green Book, 3rd ed. (2007): M = mol dm⁻³ (amount concentration),
         m = mol kg⁻¹ (molality).
* [UCD]  Unicode Character Database (the names are checked with ``unicodedata``).
* "common practice": notations and words with no published rule (e-notation, ``x10^-5``,
  ``*10**-5``, range half-width as uncertainty, missing-value tokens, qualifier words).
"""

from __future__ import annotations

import math
import unicodedata
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.parse import (
    MEDIUM_SOLVENTS,
    QUANTITIES,
    parse_ionic_strength,
    parse_medium,
    parse_quantity,
    parse_temperature,
    parse_values,
)

NAN = float("nan")
MINUS = "\u2212"  # [UCD] MINUS SIGN
EN, EM = "\u2013", "\u2014"  # [UCD] EN DASH, EM DASH
THIN, NBSP, NNBSP = "\u2009", "\u00a0", "\u202f"  # [UCD] THIN SPACE, NO-BREAK SPACE, NARROW NO-BREAK SPACE
SUP = str.maketrans("0123456789-+", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺")


@pytest.mark.parametrize(
    ("char", "name"),
    [
        (MINUS, "MINUS SIGN"),
        (EN, "EN DASH"),
        (EM, "EM DASH"),
        (THIN, "THIN SPACE"),
        (NBSP, "NO-BREAK SPACE"),
        (NNBSP, "NARROW NO-BREAK SPACE"),
        ("⁻", "SUPERSCRIPT MINUS"),
        ("⁵", "SUPERSCRIPT FIVE"),
        ("×", "MULTIPLICATION SIGN"),
        ("\u212a", "KELVIN SIGN"),
        ("℃", "DEGREE CELSIUS"),
    ],
)
def test_corpus_characters_are_what_the_comments_say(char: str, name: str) -> None:
    """[UCD] the look-alike characters in the corpus below are the intended code points."""
    assert unicodedata.name(char) == name


# --------------------------------------------------------------------------
# parse_values corpus
# --------------------------------------------------------------------------
def V(value: float, unc: float = NAN, qual: str | None = None, low: float = NAN, high: float = NAN) -> dict[str, Any]:
    return {"value": value, "uncertainty": unc, "qualifier": qual, "low": low, "high": high,
            "missing": False, "error": None}  # fmt: skip


def R(low: float, high: float, qual: str | None = None) -> dict[str, Any]:
    """A range: midpoint and half-width (common practice)."""
    return V((low + high) / 2, (high - low) / 2, qual, low, high)


MISSING: dict[str, Any] = {"value": NAN, "uncertainty": NAN, "qualifier": None, "low": NAN,
                           "high": NAN, "missing": True, "error": None}  # fmt: skip


def E(fragment: str) -> dict[str, Any]:
    return {"value": NAN, "missing": False, "error": fragment}


VALUE_CORPUS: list[tuple[str, str, dict[str, Any]]] = [
    # plain decimals
    ("4.76", ".", V(4.76)),
    ("  4.76  ", ".", V(4.76)),
    ("+4.76", ".", V(4.76)),
    ("-1.7", ".", V(-1.7)),  # negative pKa of a strong acid
    (f"{MINUS}1.7", ".", V(-1.7)),  # [UCD] U+2212 read as minus
    (".5", ".", V(0.5)),
    ("5.", ".", V(5.0)),
    (f"1{THIN}234.5", ".", V(1234.5)),  # [SI] §5.4.4 digit groups
    (f"0.000{THIN}018", ".", V(1.8e-5)),  # [SI] §5.4.4, groups after the marker too
    (f"1{NNBSP}234.5", ".", V(1234.5)),
    # powers of ten (common practice)
    ("1.8E-5", ".", V(1.8e-5)),
    ("1.8e-5", ".", V(1.8e-5)),
    ("1.8 × 10⁻⁵", ".", V(1.8e-5)),
    ("1.8×10⁻⁵", ".", V(1.8e-5)),
    ("1.8x10^-5", ".", V(1.8e-5)),
    ("1.8X10^-5", ".", V(1.8e-5)),
    ("1.8*10**-5", ".", V(1.8e-5)),
    ("1.8 x 10-5", ".", V(1.8e-5)),
    (f"1.8 × 10{MINUS}5", ".", V(1.8e-5)),
    ("1.8 · 10⁻⁵", ".", V(1.8e-5)),
    ("1.8 × 10^(-5)", ".", V(1.8e-5)),
    ("6.3 × 10⁵", ".", V(6.3e5)),
    ("1.75 × 10⁻¹²", ".", V(1.75e-12)),
    ("10⁻⁵", ".", V(1e-5)),
    ("10^-4.76", ".", V(10**-4.76)),
    ("1.8 x 105", ".", E("value '1.8 x 105' is not a number")),  # unsigned: reads as a product
    # ranges: midpoint, half-width (common practice)
    (f"4.7{EN}4.8", ".", R(4.7, 4.8)),
    (f"4.7{EM}4.8", ".", R(4.7, 4.8)),
    ("4.7-4.8", ".", R(4.7, 4.8)),
    ("4.7 - 4.8", ".", R(4.7, 4.8)),
    ("4.7 to 4.8", ".", R(4.7, 4.8)),
    ("-1.2--0.5", ".", R(-1.2, -0.5)),  # negative ends, not a minus sign of the range
    ("-0.5-1.5", ".", R(-0.5, 1.5)),
    ("1.0e-5-2.0e-5", ".", R(1e-5, 2e-5)),  # exponent signs are not range dashes
    (f"1.2 × 10⁻⁵ {EN} 1.5 × 10⁻⁵", ".", R(1.2e-5, 1.5e-5)),
    (f"(1.2{EN}1.5) × 10⁻⁵", ".", R(1.2e-5, 1.5e-5)),
    (f"1.2{EN}1.5 × 10⁻⁵", ".", E("is ambiguous")),
    (f"4.8{EN}4.7", ".", E("runs from high to low")),
    # plus-minus
    ("4.76 ± 0.02", ".", V(4.76, 0.02)),
    ("4.76±0.02", ".", V(4.76, 0.02)),
    ("4.76 +/- 0.02", ".", V(4.76, 0.02)),
    ("4.76 +- 0.02", ".", V(4.76, 0.02)),
    ("4.76 (±0.02)", ".", V(4.76, 0.02)),
    (f"4.76{NBSP}±{NBSP}0.02", ".", V(4.76, 0.02)),
    (f"4.76{THIN}±{THIN}0.02", ".", V(4.76, 0.02)),
    ("(1.8 ± 0.2) × 10⁻⁵", ".", V(1.8e-5, 2e-6)),
    ("1.8 × 10⁻⁵ ± 0.2 × 10⁻⁵", ".", V(1.8e-5, 2e-6)),
    ("1.8E-5 ± 2E-6", ".", V(1.8e-5, 2e-6)),
    ("1.8 ± 0.2 × 10⁻⁵", ".", E("is ambiguous")),
    ("1.8 × 10⁻⁵ ± 0.2", ".", E("is ambiguous")),
    ("4.76 ± -0.02", ".", E("is not a number")),
    # last-digit uncertainty [GUM] §7.2.2
    ("4.76(2)", ".", V(4.76, 0.02)),
    ("1.234(15)", ".", V(1.234, 0.015)),
    ("4.7(12)", ".", V(4.7, 1.2)),
    ("476(3)", ".", V(476.0, 3.0)),
    ("1.8(2) × 10⁻⁵", ".", V(1.8e-5, 2e-6)),
    ("1.8(2)e-5", ".", V(1.8e-5, 2e-6)),
    ("4.76(2) ± 0.01", ".", E("gives two uncertainties")),
    ("4.76 (2)", ".", E("is not a number")),  # a space: more likely a footnote
    # qualifiers (common practice)
    ("< 3", ".", V(3.0, qual="<")),
    ("<3", ".", V(3.0, qual="<")),
    ("> 12", ".", V(12.0, qual=">")),
    ("≤ 2.5", ".", V(2.5, qual="<=")),
    ("≥ 12.5", ".", V(12.5, qual=">=")),
    ("<= 2.5", ".", V(2.5, qual="<=")),
    (">=12.5", ".", V(12.5, qual=">=")),
    ("~4.7", ".", V(4.7, qual="~")),
    ("≈ 4.7", ".", V(4.7, qual="~")),
    ("ca. 4.7", ".", V(4.7, qual="~")),
    ("Ca. 4.7", ".", V(4.7, qual="~")),
    ("approx. 4.7", ".", V(4.7, qual="~")),
    ("about 4.7", ".", V(4.7, qual="~")),
    ("< 1 × 10⁻⁵", ".", V(1e-5, qual="<")),
    ("~4.76 ± 0.05", ".", V(4.76, 0.05, qual="~")),
    # missing is not an error (common practice tokens)
    ("", ".", MISSING),
    ("   ", ".", MISSING),
    ("n/a", ".", MISSING),
    ("N/A", ".", MISSING),
    ("na", ".", MISSING),
    ("-", ".", MISSING),
    (EM, ".", MISSING),
    (EN, ".", MISSING),
    ("nd", ".", MISSING),
    ("n.d.", ".", MISSING),
    ("ND", ".", MISSING),
    ("nan", ".", MISSING),
    ("not determined", ".", MISSING),
    # malformed
    ("4,7,6", ".", E("value '4,7,6' is not a number")),
    ("4,76", ".", E("it has a decimal comma, but this column is read with decimal '.'")),
    ("abc", ".", E("value 'abc' is not a number")),
    ("4.76a", ".", E("value '4.76a' is not a number")),
    ("4 76", ".", E("is not a number")),  # an ordinary space is not a digit group separator
    ("4.7.1", ".", E("is not a number")),
    ("1e999", ".", E("too large")),
    ("inf", ".", E("is not a number")),
    ("1.8e-5(2)", ".", E("is not a number")),
    # comma decimal [SI] §5.4.4
    ("4,76", ",", V(4.76)),
    ("4,76 ± 0,02", ",", V(4.76, 0.02)),
    (f"4,7{EN}4,8", ",", R(4.7, 4.8)),
    ("1,8 × 10⁻⁵", ",", V(1.8e-5)),
    ("4,76(2)", ",", V(4.76, 0.02)),
    (f"1{THIN}234,5", ",", V(1234.5)),
    ("< 0,1", ",", V(0.1, qual="<")),
    ("4.76", ",", E("it has a decimal point, but this column is read with decimal ','")),
]


def _check_row(row: pd.Series, want: dict[str, Any]) -> None:
    for key, expected in want.items():
        got = row[key]
        if key == "error":
            if expected is None:
                assert got is None, got
            else:
                assert isinstance(got, str) and expected in got, got
        elif key in ("qualifier",):
            assert got == expected if expected is not None else got is None, got
        elif key == "missing":
            assert bool(got) is expected
        elif isinstance(expected, float) and math.isnan(expected):
            assert math.isnan(got), (key, got)
        else:
            assert got == pytest.approx(expected, rel=1e-12, abs=0.0), (key, got, expected)


@pytest.mark.parametrize(("text", "decimal", "want"), VALUE_CORPUS, ids=[repr(c[0]) + c[1] for c in VALUE_CORPUS])
def test_value_corpus(text: str, decimal: str, want: dict[str, Any]) -> None:
    row = parse_values(pd.Series([text]), decimal=decimal).iloc[0]
    _check_row(row, want)


def test_value_corpus_size() -> None:
    assert len(VALUE_CORPUS) >= 60


def test_value_corpus_as_one_column_matches_cell_by_cell() -> None:
    """The vectorized paths (plain, lean grammar, full grammar, distinct values) agree."""
    for decimal in (".", ","):
        cells = [c[0] for c in VALUE_CORPUS if c[1] == decimal]
        column = pd.Series(cells * 2, index=np.arange(len(cells) * 2)[::-1])
        batch = parse_values(column, decimal=decimal)
        assert list(batch.index) == list(column.index)
        for (_, cell), (_, row) in zip(column.items(), batch.iterrows(), strict=True):
            single = parse_values(pd.Series([cell]), decimal=decimal).iloc[0]
            pd.testing.assert_series_equal(row, single, check_names=False)


def test_values_columns_dtypes_and_index() -> None:
    idx = pd.Index(["r1", "r2", "r2", "r4"], name="row")
    out = parse_values(pd.Series(["4.76", None, "4,7,6", "< 3"], index=idx))
    assert list(out.columns) == ["value", "uncertainty", "qualifier", "low", "high", "missing", "error"]
    assert out.index.equals(idx)
    assert [str(t) for t in out.dtypes] == ["float64", "float64", "object", "float64", "float64", "bool", "object"]
    assert out["missing"].tolist() == [False, True, False, False]  # NA cell is missing
    assert out["error"].tolist()[:2] == [None, None]
    assert out["qualifier"].tolist() == [None, None, None, "<"]


def test_values_accepts_str_dtype_and_numbers_from_spreadsheets() -> None:
    out = parse_values(pd.Series(["4.76", "5"], dtype="str"))
    assert out["value"].tolist() == [4.76, 5.0]
    out = parse_values(pd.Series([4.76, "4.8", np.nan], dtype=object))
    assert out["value"].tolist()[:2] == [4.76, 4.8] and bool(out["missing"].iloc[2])


def test_values_empty_column() -> None:
    out = parse_values(pd.Series([], dtype=object))
    assert out.shape == (0, 7)


def test_values_bad_arguments() -> None:
    with pytest.raises(ValueError, match=r"decimal must be one of \['\.', ','\], got ';'"):
        parse_values(pd.Series(["1"]), decimal=";")
    with pytest.raises(TypeError, match="expects a pandas Series"):
        parse_values(["4.76"])  # type: ignore[arg-type]


def test_long_cell_is_shortened_in_the_reason() -> None:
    reason = parse_values(pd.Series(["x" * 500])).loc[0, "error"]
    assert reason.startswith("value 'xxx") and "…" in reason and len(reason) < 150


# --------------------------------------------------------------------------
# property tests: round trips (hypothesis)
# --------------------------------------------------------------------------
finite = st.floats(allow_nan=False, allow_infinity=False)
moderate = st.floats(min_value=-1e300, max_value=1e300, allow_nan=False, allow_infinity=False)
PROPS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _values(cells: list[str], decimal: str = ".") -> pd.DataFrame:
    out = parse_values(pd.Series(cells, dtype=object), decimal=decimal)
    assert out["error"].isna().all(), out["error"].dropna().tolist()
    return out


def _sci(x: float) -> tuple[str, int]:
    mant, exp = f"{x:.16e}".split("e")  # 17 significant digits: exact round trip
    return mant, int(exp)


@PROPS
@given(st.lists(finite, min_size=1, max_size=30))
def test_repr_round_trips_exactly(xs: list[float]) -> None:
    out = _values([repr(x) for x in xs])
    assert out["value"].tolist() == xs


@PROPS
@given(st.lists(finite, min_size=1, max_size=30))
def test_unicode_minus_round_trips_exactly(xs: list[float]) -> None:
    out = _values([repr(x).replace("-", MINUS) for x in xs])
    assert out["value"].tolist() == xs


@PROPS
@given(st.lists(moderate, min_size=1, max_size=30))  # %.3e of 1.7975e308 rounds past the largest double
def test_percent_e_and_g_formats(xs: list[float]) -> None:
    # format -> relative rounding of the written decimal (half a unit in the last digit kept)
    for fmt, rel in (("%e", 5e-7), ("%.6g", 5e-6), ("%E", 5e-7), ("%.3e", 5e-4)):
        cells = [fmt % x for x in xs]
        out = _values(cells)
        # the parse is exactly the double nearest the written decimal
        assert out["value"].tolist() == [float(c) for c in cells]
        for x, v in zip(xs, out["value"], strict=True):
            if abs(x) > 1e-300:  # subnormals keep fewer significant digits
                assert v == pytest.approx(x, rel=rel * (1 + 1e-9))


@PROPS
@given(st.lists(finite.filter(lambda x: x != 0), min_size=1, max_size=30))
def test_times_ten_notations_round_trip(xs: list[float]) -> None:
    parts = [_sci(x) for x in xs]
    forms = {
        "× 10 superscript": [f"{m} × 10{str(e).translate(SUP)}" for m, e in parts],
        "×10^": [f"{m}×10^{e}" for m, e in parts],
        "x10^": [f"{m}x10^{e}" for m, e in parts],
        "*10**": [f"{m}*10**{e}" for m, e in parts],
        "E": [f"{m}E{e}" for m, e in parts],
    }
    for name, cells in forms.items():
        out = _values(cells)
        assert out["value"].tolist() == xs, name
    negative = [(m, e) for m, e in parts if e < 0]
    if negative:  # "x 10-5": the sign tells the exponent from a product
        cells = [f"{m} x 10-{-e}" for m, e in negative]
        assert _values(cells)["value"].tolist() == [float(f"{m}e{e}") for m, e in negative]


@PROPS
@given(st.lists(finite, min_size=1, max_size=30))
def test_comma_decimal_round_trips(xs: list[float]) -> None:
    """[SI] §5.4.4: the comma on the line is a decimal marker."""
    out = _values([repr(x).replace(".", ",") for x in xs], decimal=",")
    assert out["value"].tolist() == xs


@PROPS
@given(st.lists(st.tuples(moderate, moderate.map(abs)), min_size=1, max_size=30))
def test_plus_minus_round_trips(pairs: list[tuple[float, float]]) -> None:
    out = _values([f"{x!r} ± {u!r}" for x, u in pairs] + [f"{x!r} +/- {u!r}" for x, u in pairs])
    assert out["value"].tolist() == [x for x, _ in pairs] * 2
    assert out["uncertainty"].tolist() == [u for _, u in pairs] * 2


@PROPS
@given(st.lists(st.tuples(moderate, moderate), min_size=1, max_size=30))
def test_ranges_round_trip(pairs: list[tuple[float, float]]) -> None:
    ends = [(min(a, b), max(a, b)) for a, b in pairs]
    out = _values([f"{lo!r}{EN}{hi!r}" for lo, hi in ends] + [f"{lo!r} to {hi!r}" for lo, hi in ends])
    assert out["low"].tolist() == [lo for lo, _ in ends] * 2
    assert out["high"].tolist() == [hi for _, hi in ends] * 2
    assert out["value"].tolist() == [(lo + hi) / 2 for lo, hi in ends] * 2


@PROPS
@given(
    st.lists(
        st.tuples(st.integers(0, 10**6), st.text("0123456789", min_size=1, max_size=6), st.integers(1, 99)),
        min_size=1,
        max_size=30,
    )
)
def test_last_digit_uncertainty_round_trips(items: list[tuple[int, str, int]]) -> None:
    """[GUM] §7.2.2: '(15)' after 1.234 means ±0.015."""
    cells = [f"{i}.{f}({d})" for i, f, d in items]
    out = _values(cells)
    assert out["value"].tolist() == [float(f"{i}.{f}") for i, f, _ in items]
    assert out["uncertainty"].tolist() == [float(f"{d}e-{len(f)}") for _, f, d in items]


# --------------------------------------------------------------------------
# fuzz: no input string crashes any parser
# --------------------------------------------------------------------------
FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
fuzz_text = st.one_of(
    st.text(max_size=25),
    st.text(alphabet="0123456789.,-+eE×x^*⁻⁵()±/<>~ \u2009–—Kk°CmMol", max_size=25),
)


@FUZZ
@given(st.lists(fuzz_text, max_size=12))
def test_no_string_crashes_any_parser(cells: list[str]) -> None:
    s = pd.Series(cells, dtype=object)
    for decimal in (".", ","):
        v = parse_values(s, decimal=decimal)
        err = v["error"].notna()
        has_value = v["value"].notna()
        # each cell is exactly one of: a value, missing, or a reason
        assert ((err.astype(int) + v["missing"].astype(int) + has_value.astype(int)) == 1).all()
        assert np.isfinite(v.loc[has_value, "value"]).all()
        assert v["error"].map(lambda r: r is None or isinstance(r, str)).all()
    t = parse_temperature(s)
    assert ((t["error"].notna().astype(int) + t["missing"].astype(int) + t["kelvin"].notna().astype(int)) == 1).all()
    assert (t["kelvin"].dropna() >= 0).all()
    i = parse_ionic_strength(s)
    assert ((i["error"].notna().astype(int) + i["missing"].astype(int) + i["value"].notna().astype(int)) == 1).all()
    assert (i["value"].dropna() >= 0).all()
    m = parse_medium(s)
    assert m["solvent"].dropna().isin(MEDIUM_SOLVENTS).all()
    assert (m["solvent"].isna() == m["error"].notna()).all()
    q = parse_quantity(s)
    assert q["quantity"].dropna().isin(QUANTITIES).all()
    assert (q["quantity"].isna() == q["error"].notna()).all()


# --------------------------------------------------------------------------
# temperature
# --------------------------------------------------------------------------
TEMPERATURES: list[tuple[str, float]] = [
    ("25 °C", 298.15),  # [SI] §2.3.1
    ("25°C", 298.15),
    ("25 C", 298.15),
    ("25 oC", 298.15),
    ("25 deg C", 298.15),
    ("25 degC", 298.15),
    ("25 ℃", 298.15),
    ("25 ºC", 298.15),  # masculine ordinal typed for the degree sign
    ("0 °C", 273.15),
    (f"{MINUS}10 °C", 263.15),
    ("ca. 25 °C", 298.15),  # approximate temperature taken as given
    ("25 ± 0.1 °C", 298.15),  # uncertainty dropped
    ("298.15 K", 298.15),
    ("298 K", 298.0),
    ("298 \u212a", 298.0),  # [UCD] KELVIN SIGN
    ("77 °F", 298.15),  # [SP811] (77 − 32)/1.8 = 25 °C
    ("212 °F", 373.15),  # [SP811] (212 − 32)/1.8 = 100 °C
    ("-40 °F", 233.15),  # [SP811] −40 °F = −40 °C
]


@pytest.mark.parametrize(("text", "kelvin"), TEMPERATURES)
def test_temperature_to_kelvin(text: str, kelvin: float) -> None:
    out = parse_temperature(pd.Series([text]))
    assert out.loc[0, "error"] is None
    np.testing.assert_allclose(out.loc[0, "kelvin"], kelvin, rtol=0, atol=1e-9)


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("25", "temperature '25' has no unit; write °C or K"),
        ("300 Q", "temperature '300 Q' has unknown unit 'Q'; use °C, K or °F"),
        ("25 °", "temperature '25 °' has unknown unit '°'; use °C, K or °F"),
        ("rt", "temperature 'rt' is room temperature"),
        ("room temperature", "is room temperature"),
        ("R.T.", "is room temperature"),
        ("-300 °C", "temperature '-300 °C' is below absolute zero (-26.85 K)"),
        ("-1 K", "is below absolute zero"),
        (f"20{EN}25 °C", "is a range; give one temperature"),
        ("< 30 °C", "is a bound, not a temperature"),
        ("abc °C", "temperature 'abc °C' is not a number"),
        ("warm", "temperature 'warm' is not a number"),
    ],
)
def test_temperature_reasons(text: str, reason: str) -> None:
    out = parse_temperature(pd.Series([text]))
    assert reason in out.loc[0, "error"]
    assert math.isnan(out.loc[0, "kelvin"]) and not out.loc[0, "missing"]


def test_temperature_missing_bare_unit_and_room_temperature() -> None:
    out = parse_temperature(pd.Series(["", "n/a", None]))
    assert out["missing"].all() and out["error"].isna().all()
    out = parse_temperature(pd.Series(["25", "rt", "298.15 K"]), bare_unit="°C", room_temperature_k=295.0)
    np.testing.assert_allclose(out["kelvin"], [298.15, 295.0, 298.15])
    assert parse_temperature(pd.Series(["298.15"]), bare_unit="K").loc[0, "kelvin"] == 298.15
    assert parse_temperature(pd.Series(["25,0 °C"]), decimal=",").loc[0, "kelvin"] == pytest.approx(298.15)
    with pytest.raises(ValueError, match=r"bare_unit must be one of '°C', 'K', '°F' or None, got 'R'"):
        parse_temperature(pd.Series(["25"]), bare_unit="R")
    with pytest.raises(ValueError, match="room_temperature_k must be a temperature above 0 K"):
        parse_temperature(pd.Series(["rt"]), room_temperature_k=-5.0)


def test_temperature_columns() -> None:
    out = parse_temperature(pd.Series(["25 °C"], index=[7]))
    assert list(out.columns) == ["kelvin", "missing", "error"] and list(out.index) == [7]


# --------------------------------------------------------------------------
# ionic strength
# --------------------------------------------------------------------------
IONIC: list[tuple[str, float, str | None, str | None]] = [
    ("0", 0.0, None, None),
    ("0.1", 0.1, None, None),  # bare number: unit left to the caller
    ("0.1 M", 0.1, "mol/L", None),  # [GB] M = mol dm⁻³
    ("0.1 M KCl", 0.1, "mol/L", "KCl"),
    ("0.1M KCl", 0.1, "mol/L", "KCl"),
    ("0.1 mol/L", 0.1, "mol/L", None),
    ("0.1 mol dm-3", 0.1, "mol/L", None),
    ("0.1 mol dm⁻³", 0.1, "mol/L", None),
    (f"0.1 mol dm{MINUS}3", 0.1, "mol/L", None),
    ("0.1 mol·L⁻¹", 0.1, "mol/L", None),
    ("0.1 mol/kg", 0.1, "mol/kg", None),
    ("0.1 mol kg-1", 0.1, "mol/kg", None),
    ("0.1 m", 0.1, "mol/kg", None),  # [GB] m = mol kg⁻¹
    ("0.1 m NaCl", 0.1, "mol/kg", "NaCl"),
    ("100 mM", 0.1, "mol/L", None),
    ("I = 0.15 mol/kg (NaCl)", 0.15, "mol/kg", "NaCl"),
    ("0.5 M NaClO4", 0.5, "mol/L", "NaClO4"),
    ("0.1 M KNO₃", 0.1, "mol/L", "KNO3"),
    ("0.1 (KCl)", 0.1, None, "KCl"),
    ("0.1 KCl", 0.1, None, "KCl"),
    ("0.1 Mg(NO3)2", 0.1, None, "Mg(NO3)2"),
    ("0.1 M (CH3)4NCl", 0.1, "mol/L", "(CH3)4NCl"),
    ("→ 0", 0.0, None, None),
    ("-> 0", 0.0, None, None),
    ("I → 0", 0.0, None, None),
    ("0 (extrapolated)", 0.0, None, None),
    ("infinite dilution", 0.0, None, None),
    ("Infinite dilution", 0.0, None, None),
]


@pytest.mark.parametrize(("text", "value", "unit", "medium"), IONIC)
def test_ionic_strength(text: str, value: float, unit: str | None, medium: str | None) -> None:
    row = parse_ionic_strength(pd.Series([text])).iloc[0]
    assert row["error"] is None
    assert row["value"] == pytest.approx(value, rel=1e-12)
    assert row["unit"] == unit and row["medium"] == medium


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("-0.1", "ionic strength '-0.1' is negative"),
        ("0.1 N", "ionic strength '0.1 N' has unknown unit or medium 'N'; write M or mol/L"),
        ("0.1 mol/dm", "has unknown unit 'mol/dm'"),
        ("0.1-0.2 M", "is a range; give one value"),
        ("< 0.01 M", "is a bound, not a value"),
        ("→ 0.1", "is marked as extrapolated, but to a value that is not zero"),
        ("high", "ionic strength 'high' is not a number"),
        ("0,1 M", "is not a number"),
    ],
)
def test_ionic_strength_reasons(text: str, reason: str) -> None:
    row = parse_ionic_strength(pd.Series([text])).iloc[0]
    assert reason in row["error"]
    assert math.isnan(row["value"]) and row["unit"] is None and not row["missing"]


def test_ionic_strength_bare_unit_missing_and_arguments() -> None:
    out = parse_ionic_strength(pd.Series(["0.1", "0.1 m", "", "n/a", None]), bare_unit="mol/L")
    assert out["unit"].tolist()[:2] == ["mol/L", "mol/kg"]
    assert out["missing"].tolist() == [False, False, True, True, True]
    assert parse_ionic_strength(pd.Series(["0,1 M"]), decimal=",").loc[0, "value"] == pytest.approx(0.1)
    assert list(out.columns) == ["value", "unit", "medium", "missing", "error"]
    with pytest.raises(ValueError, match=r"bare_unit must be one of 'mol/L', 'mol/kg' or None, got 'M'"):
        parse_ionic_strength(pd.Series(["0.1"]), bare_unit="M")


# --------------------------------------------------------------------------
# medium
# --------------------------------------------------------------------------
MEDIA: list[tuple[str, str, bool, str | None]] = [
    ("water", "water", True, None),
    ("Water", "water", True, None),
    ("H2O", "water", True, None),
    ("H₂O", "water", True, None),
    ("aq", "water", True, None),
    ("aq.", "water", True, None),
    ("aqueous", "water", True, None),
    ("water, 0.1 M KCl", "water", True, "water, 0.1 M KCl"),
    ("50% v/v dioxane", "water-dioxane", False, "50% v/v dioxane"),
    ("water-dioxane", "water-dioxane", False, "water-dioxane"),
    ("dioxane-water (50% v/v)", "water-dioxane", False, "dioxane-water (50% v/v)"),
    ("MeOH/H2O 80:20", "water-methanol", False, "MeOH/H2O 80:20"),
    ("20% methanol", "water-methanol", False, "20% methanol"),
    ("aqueous ethanol", "water-ethanol", False, "aqueous ethanol"),
    ("DMSO-water", "water-dmso", False, "DMSO-water"),
    ("water-acetonitrile", "water-acetonitrile", False, "water-acetonitrile"),
    ("30 % MeCN", "water-acetonitrile", False, "30 % MeCN"),
    ("ethanol", "other", False, "ethanol"),
    ("D2O", "other", False, "D2O"),
    ("heavy water", "other", False, "heavy water"),
    ("water/methanol/dioxane", "other", False, "water/methanol/dioxane"),
]


@pytest.mark.parametrize(("text", "solvent", "aqueous", "composition"), MEDIA)
def test_medium(text: str, solvent: str, aqueous: bool, composition: str | None) -> None:
    row = parse_medium(pd.Series([text])).iloc[0]
    assert row["error"] is None
    assert (row["solvent"], bool(row["aqueous"]), row["composition"]) == (solvent, aqueous, composition)


def test_medium_blank_and_default() -> None:
    out = parse_medium(pd.Series(["", None, "4.76"]))
    assert out["solvent"].isna().all()
    assert "medium is blank" in out.loc[0, "error"] and "medium is blank" in out.loc[1, "error"]
    assert out.loc[2, "error"] == "medium '4.76' names no solvent"
    out = parse_medium(pd.Series(["", None, "H2O"]), default="water")
    assert out["solvent"].tolist() == ["water"] * 3 and out["error"].isna().all()
    assert list(out.columns) == ["solvent", "aqueous", "composition", "error"]


# --------------------------------------------------------------------------
# quantity
# --------------------------------------------------------------------------
QUANTITY_CASES: list[tuple[str, str, int | None]] = [
    ("pKa", "pKa", None),
    ("pka", "pKa", None),
    ("PKA", "pKa", None),
    ("pK_a", "pKa", None),
    ("pKₐ", "pKa", None),
    ("p K a", "pKa", None),
    ("pKa1", "pKa", 1),
    ("pKa 2", "pKa", 2),
    ("pK_a2", "pKa", 2),
    ("pKa(3)", "pKa", 3),
    ("pKa₂", "pKa", 2),
    ("pK", "pKa", None),
    ("pK2", "pKa", 2),
    ("Ka", "Ka", None),
    ("K_a1", "Ka", 1),
    ("pKb", "pKb", None),
    ("Kb", "Kb", None),
    ("log K", "logK", None),
    ("logK", "logK", None),
    ("lg K", "logK", None),
    ("log K1", "logK", 1),
    ("log₁₀ K2", "logK", 2),
    ("log10K", "logK", None),
]


@pytest.mark.parametrize(("text", "quantity", "step"), QUANTITY_CASES)
def test_quantity(text: str, quantity: str, step: int | None) -> None:
    row = parse_quantity(pd.Series([text])).iloc[0]
    assert row["error"] is None and row["quantity"] == quantity
    assert (row["step"] is pd.NA) if step is None else (row["step"] == step)


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("logβ", "is a cumulative (overall) constant"),
        ("log β2", "quantity 'log β2' is a cumulative (overall) constant"),
        ("log beta", "is a cumulative (overall) constant"),
        ("K", "quantity 'K' is not one of pKa, Ka, pKb, Kb or logK"),
        ("pKa'", "is not one of pKa, Ka, pKb, Kb or logK"),
        ("pH", "is not one of pKa, Ka, pKb, Kb or logK"),
        ("pKa0", "has step 0; steps count from 1"),
        ("", "quantity is blank; write one of pKa, Ka, pKb, Kb or logK"),
    ],
)
def test_quantity_reasons(text: str, reason: str) -> None:
    row = parse_quantity(pd.Series([text])).iloc[0]
    assert reason in row["error"] and row["quantity"] is None and row["step"] is pd.NA


def test_quantity_columns_and_dtypes() -> None:
    out = parse_quantity(pd.Series(["pKa2", None, "Kb"]))
    assert list(out.columns) == ["quantity", "step", "error"]
    assert str(out["step"].dtype) == "Int64"
    assert out["step"].tolist()[0] == 2 and out["step"].isna().tolist() == [False, True, True]
    assert "blank" in out.loc[1, "error"]
