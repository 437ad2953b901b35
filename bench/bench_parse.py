"""Benchmark: parse 1,000,000 mixed value strings with ``pipeline.parse.parse_values``.

Prints wall-clock seconds and the ratio to a floor measured in the same run:
``pandas.to_numeric`` on 1,000,000 plain decimal strings (the cheapest possible
text-to-float conversion of a column of the same length).

Two columns are timed:

* ``table-like``: values written as sources write them (pKa to two decimals,
  Ka to two or three significant figures), so texts repeat as in real tables.
* ``all-distinct``: every cell text is different (worst case for the
  distinct-value step of the parser).

Both mix the supported notations in the same shares:
45 % plain decimals, 10 % e-notation, 5 % ``× 10⁻ⁿ`` with superscripts,
3 % ``x10^-n``, 12 % ``±``, 5 % last-digit ``4.76(2)``, 5 % ranges,
5 % qualifiers, 5 % missing tokens, 5 % malformed cells.

Run: ``.venv/bin/python bench/bench_parse.py [n]``.  Not part of the test suite.
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

from pipeline.parse import parse_values

_SUPER = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")


def _fmt(x: np.ndarray, decimals: int) -> pd.Series:
    return pd.Series(np.round(x, decimals)).map(f"{{:.{decimals}f}}".format)


def make_column(n: int, distinct: bool, seed: int = 0) -> pd.Series:
    """A column of ``n`` value strings in the benchmark's mix of notations."""
    rng = np.random.default_rng(seed)
    dec = 6 if distinct else 2
    pka = rng.uniform(-1.0, 14.0, n)
    unc = rng.uniform(0.01, 0.09, n)
    mant = rng.uniform(1.0, 9.99, n)
    expo = pd.Series(-rng.integers(1, 12, n)).astype(str)
    m_txt = _fmt(mant, 6 if distinct else 2)
    p_txt = _fmt(pka, dec)
    u_txt = _fmt(unc, 4 if distinct else 2)
    hi_txt = _fmt(pka + 0.1, dec)
    ld_txt = pd.Series(rng.integers(1, 30, n)).astype(str)
    forms = {
        "plain": (0.45, p_txt),
        "e": (0.10, m_txt + "E" + expo),
        "super": (0.05, m_txt + " × 10" + expo.str.translate(_SUPER)),
        "caret": (0.03, m_txt + "x10^" + expo),
        "pm": (0.12, p_txt + " ± " + u_txt),
        "ld": (0.05, p_txt + "(" + ld_txt + ")"),
        "range": (0.05, p_txt + "–" + hi_txt),
        "qual": (0.05, pd.Series(np.where(rng.random(n) < 0.5, "< ", "ca. ")) + p_txt),
        "missing": (0.05, pd.Series(rng.choice(["", "n/a", "nd", "—", "-"], n))),
        "bad": (0.05, pd.Series(np.where(rng.random(n) < 0.5, "4,7,", "?x")) + p_txt),
    }
    share = np.array([w for w, _ in forms.values()])
    pick = rng.choice(len(forms), size=n, p=share / share.sum())
    out = pd.Series(np.empty(n, dtype=object), dtype=object)
    for k, (_, col) in enumerate(forms.values()):
        sel = pick == k
        out[sel] = col[sel].to_numpy(dtype=object)
    return out


def _best_of(fn, repeat: int = 3) -> float:  # type: ignore[no-untyped-def]
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(n: int = 1_000_000) -> None:
    rng = np.random.default_rng(1)
    plain = pd.Series(np.round(rng.uniform(-1, 14, n), 3)).map("{:.3f}".format).astype(object)
    floor = _best_of(lambda: pd.to_numeric(plain))
    print(f"floor: pd.to_numeric on {n:,} plain decimal strings: {floor:.3f} s")
    for label, distinct in (("table-like", False), ("all-distinct", True)):
        col = make_column(n, distinct)
        n_unique = col.nunique(dropna=False)
        secs = _best_of(lambda col=col: parse_values(col))
        res = parse_values(col)
        print(
            f"{label:>12}: parse_values on {n:,} strings ({n_unique:,} distinct): "
            f"{secs:.3f} s  = {secs / floor:.1f} x floor  "
            f"[{int(res['value'].notna().sum()):,} values, {int(res['missing'].sum()):,} missing, "
            f"{int(res['error'].notna().sum()):,} errors]"
        )


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000)
