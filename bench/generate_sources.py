"""Generate synthetic kaledger sources at any scale, for the build benchmark.

Writes ``<out>/<source-id>/source.toml`` plus one data file per source (a ``raw/``-style folder,
never the repository's own ``raw/``). The sources mimic what stewards receive:

- about ``--distinct`` (default 10 %) distinct compounds, identified by real SMILES: the
  structures of the ``chemicals`` package's offline PubChem table (about 71,000), topped up,
  when more are needed, with homologues made by lengthening the carbon chain in front of a
  real structure (``C`` * k + SMILES), so RDKit has real standardization work on every one;
- a mix of quantities: pKa, Ka in scientific notation (``1.75e-05``, ``1.75E-5``,
  ``1.75 × 10^-5``), pKb of amines, protonation log K;
- temperatures in °C and K (mostly 25 °C, some 15 to 50 °C), ionic strengths ``0``,
  ``0.1 M KCl``, ``0.15 mol/kg NaCl``, ``0.3 M KNO3`` with matching constant types;
- CSV and TSV, a decimal-comma table, a table with descriptor defaults instead of columns;
- about ``--bad`` (default 1 %) bad rows of known kinds (empty or unreadable values, unknown
  units and quantities, Ka <= 0, unparsable SMILES, ragged rows), each of which the build must
  put into ``rejects`` with a reason.

The values are synthetic (a random pKa per compound plus noise); they are not data.

Usage::

    .venv/bin/python bench/generate_sources.py --rows 1M --out /tmp/bench-raw
"""

from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path

import numpy as np
import pandas as pd

CHUNK = 1_000_000  # rows generated and written at a time (bounds memory at 10M rows)

#: Table layouts, cycled over the sources: (format, decimal, kind, description).
LAYOUTS = (
    ("csv", ".", "experimental", "pKa with conditions per row"),
    ("csv", ".", "compilation", "mixed quantities (pKa, Ka, pKb, logK) in a Quantity column"),
    ("tsv", ",", "critical_review", "Ka in scientific notation, decimal comma, T in kelvin"),
    ("csv", ".", "estimated", "pKb of bases, conditions from [defaults]"),
)

_TOML = """\
# Synthetic benchmark source written by bench/generate_sources.py (not real data).
[source]
id = "{id}"
title = "Synthetic benchmark table {n}: {description}"
citation = "Synthetic data generated for the kaledger build benchmark (seed {seed})."
license = "CC0-1.0"
kind = "{kind}"

[table]
file = "{file}"
format = "{format}"
encoding = "utf-8"
decimal = "{decimal}"

[columns]
{columns}

[defaults]
{defaults}
"""

_COLUMNS = (
    'name = "Compound"\nsmiles = "SMILES"\nstep = "Step"\nvalue = "pKa"\nuncertainty = "u(pKa)"\n'
    'temperature = "T"\nionic_strength = "I"\nconstant_type = "Constant type"\nmethod = "Method"',
    'smiles = "SMILES"\nquantity = "Quantity"\nvalue = "Value"\ntemperature = "T"\n'
    'ionic_strength = "I"\nconstant_type = "Type"\nreference = "Ref"',
    'smiles = "SMILES"\nvalue = "Ka"\ntemperature = "T"\nionic_strength = "I"\n'
    'constant_type = "Type"',
    'name = "Compound"\nsmiles = "SMILES"\nvalue = "pKb"',
)
_DEFAULTS = (
    'quantity = "pKa"\nmedium = "water"',
    'medium = "water"',
    'quantity = "Ka"',
    'quantity = "pKb"\ntemperature = "25 °C"\nionic_strength = "0"\nconstant_type = "thermodynamic"',
)
_HEADERS = (
    ["Compound", "SMILES", "Step", "pKa", "u(pKa)", "T", "I", "Constant type", "Method"],
    ["SMILES", "Quantity", "Value", "T", "I", "Type", "Ref"],
    ["SMILES", "Ka", "T", "I", "Type"],
    ["Compound", "SMILES", "pKb"],
)

_IONIC = np.array(["0", "0.1 M KCl", "0.15 mol/kg NaCl", "0.3 M KNO3"], dtype=object)
_IONIC_P = [0.7, 0.15, 0.1, 0.05]
_METHODS = np.array(
    ["potentiometric titration", "UV-vis spectrophotometry", '"titration, glass electrode"',
     "NMR titration", "capillary electrophoresis"],
    dtype=object,
)


def parse_rows(text: str) -> int:
    """``10k``, ``1M``, ``1.5M`` or ``2500`` -> a row count."""
    t = text.strip().lower().replace("_", "")
    scale = {"k": 1_000, "m": 1_000_000}.get(t[-1:], 1)
    number = t[:-1] if t[-1:] in "km" else t
    try:
        rows = int(float(number) * scale)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"--rows {text!r} is not a row count; use e.g. 10k, 100k, 1M, 10M or 2500"
        ) from None
    if rows < 1:
        raise argparse.ArgumentTypeError(f"--rows {text!r} must be at least 1")
    return rows


def database_structures() -> tuple[np.ndarray, np.ndarray]:
    """(SMILES, common name) of the ``chemicals`` offline PubChem table, single-fragment,
    neutral, starting with an aliphatic carbon (so a carbon chain can be put in front)."""
    from chemicals import identifiers as chem_ids

    path = Path(chem_ids.folder) / "chemical identifiers pubchem large.tsv"
    table = pd.read_csv(
        path, sep="\t", header=None, usecols=[4, 7], names=["smiles", "name"],
        dtype=str, quoting=3, on_bad_lines="skip", keep_default_na=False,
    )
    s = table["smiles"]
    keep = (
        s.str.startswith("C") & ~s.str.contains(r"[.+\-]", regex=True) & (s.str.len() <= 60)
        & ~s.str.contains("Cl", regex=False)  # keep 'C' + smiles unambiguous
    )
    table = table[keep].drop_duplicates("smiles")
    return table["smiles"].to_numpy(dtype=object), table["name"].to_numpy(dtype=object)


def compound_pool(n: int, rng: np.random.Generator) -> pd.DataFrame:
    """``n`` distinct structures: real ones first, then chain-lengthened homologues."""
    smiles, names = database_structures()
    order = rng.permutation(len(smiles))
    smiles, names = smiles[order], names[order]
    parts_s, parts_n = [smiles[:n]], [names[:n]]
    k, have = 1, min(n, len(smiles))
    while have < n:  # homologue k: k more carbons in front of the same real structure
        take = min(n - have, len(smiles))
        parts_s.append(("C" * k) + smiles[:take].astype(str))
        parts_n.append(np.full(take, "", dtype=object))  # a homologue has no common name
        have += take
        k += 1
    pool = pd.DataFrame(
        {"smiles": np.concatenate(parts_s)[:n], "name": np.concatenate(parts_n)[:n]}
    )
    pool["pka"] = rng.uniform(1.0, 12.0, size=n).round(3)  # synthetic, not data
    return pool


def _fmt(x: np.ndarray, digits: int) -> pd.Series:
    return pd.Series(np.round(x, digits)).map(f"{{:.{digits}f}}".format)


def _sci(k: np.ndarray, rng: np.random.Generator, decimal: str) -> pd.Series:
    """Ka values written three ways: 1.75e-05, 1.75E-5, 1.75 × 10^-5."""
    exp = np.floor(np.log10(k)).astype(int)
    mant = k / 10.0**exp
    m = pd.Series(np.round(mant, 3)).map("{:.3f}".format)
    e = pd.Series(exp).astype(str)
    style = rng.integers(0, 3, size=len(k))
    out = np.where(style == 0, m + "e" + e, np.where(style == 1, m + "E" + e, m + " × 10^" + e))
    out = pd.Series(out, dtype=object)
    return out.str.replace(".", decimal, regex=False) if decimal != "." else out


def _conditions(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(temperature in °C, ionic-strength text, constant type) per row."""
    t = np.where(rng.random(n) < 0.75, 25.0, rng.choice([15.0, 20.0, 30.0, 37.0, 50.0], size=n))
    ionic = rng.choice(_IONIC, size=n, p=_IONIC_P)
    ctype = np.where(ionic == "0", "thermodynamic", "concentration").astype(object)
    return t, ionic, ctype


_BAD_KINDS = ("empty", "unreadable", "unit", "quantity", "nonpositive", "smiles", "ragged")


def _rows(layout: int, idx: np.ndarray, pool: pd.DataFrame, rng: np.random.Generator,
          bad_fraction: float) -> tuple[list[str], pd.Series]:
    """Header and data lines of one chunk of a table; returns (header, lines)."""
    n = len(idx)
    smiles = pd.Series(pool["smiles"].to_numpy()[idx], dtype=object)
    name = pd.Series(pool["name"].to_numpy()[idx], dtype=object).str.replace(",", " ", regex=False)
    pka = pool["pka"].to_numpy()[idx] + rng.normal(0.0, 0.02, size=n)
    t_c, ionic, ctype = _conditions(n, rng)
    pka = pka - 0.1 * (ionic != "0")  # a salt lowers a concentration pKa a little (synthetic)
    sep = "\t" if layout == 2 else ","
    decimal = "," if layout == 2 else "."
    bad = rng.random(n) < bad_fraction
    kind = rng.integers(0, len(_BAD_KINDS), size=n)
    if layout == 0:
        step = np.where(rng.random(n) < 0.1, 2, 1)
        value = _fmt(pka + 3.0 * (step == 2), 3)
        cols = [name, smiles, pd.Series(step).astype(str), value, _fmt(rng.uniform(0.002, 0.05, n), 3),
                pd.Series(t_c).map("{:g} °C".format), pd.Series(ionic), pd.Series(ctype),
                pd.Series(rng.choice(_METHODS, size=n))]
        vcol, tcol, scol = 3, 5, 1
    elif layout == 1:
        q = rng.choice(np.array(["pKa", "Ka", "pKb", "logK"], dtype=object), size=n, p=[0.5, 0.25, 0.1, 0.15])
        value = np.where(q == "Ka", _sci(10.0 ** -pka, rng, "."), np.where(q == "pKb", _fmt(14.0 - pka, 2), _fmt(pka, 2)))
        cols = [smiles, pd.Series(q), pd.Series(value, dtype=object), pd.Series(t_c + 273.15).map("{:.2f} K".format),
                pd.Series(ionic), pd.Series(ctype), "Synthetic ref. " + pd.Series(idx % 97).astype(str)]
        vcol, tcol, scol = 2, 3, 0
    elif layout == 2:
        cols = [smiles, _sci(10.0 ** -pka, rng, ","),
                pd.Series(t_c + 273.15).map("{:.2f} K".format).str.replace(".", ",", regex=False),
                pd.Series(ionic).str.replace(".", ",", regex=False), pd.Series(ctype)]
        vcol, tcol, scol = 1, 2, 0
    else:
        cols = [name, smiles, _fmt(14.0 - pka, 2)]
        vcol, tcol, scol = 2, None, 1
    cols = [c if isinstance(c, pd.Series) else pd.Series(c, dtype=object) for c in cols]
    # known bad rows (about bad_fraction of them), each a kind the build must reject with a reason
    for k, what in enumerate(_BAD_KINDS):
        m = pd.Series(bad & (kind == k))
        if not m.any():
            continue
        if what == "empty":
            cols[vcol] = cols[vcol].mask(m, "")
        elif what == "unreadable":
            cols[vcol] = cols[vcol].mask(m, "4" + decimal + "7" + decimal + "6")
        elif what == "unit" and tcol is not None:
            cols[tcol] = cols[tcol].mask(m, "300 Q")
        elif what == "quantity" and layout == 1:
            cols[1] = cols[1].mask(m, "pKz")
        elif what == "nonpositive" and layout in (1, 2):
            cols[vcol] = cols[vcol].mask(m & (cols[1] == "Ka") if layout == 1 else m, "0")
        elif what == "smiles":
            cols[scol] = cols[scol].mask(m, "C1CC(")
    line = cols[0].astype(str)
    for c in cols[1:]:
        line = line + sep + c.astype(str)
    ragged = bad & (kind == _BAD_KINDS.index("ragged"))
    line = line.mask(pd.Series(ragged), line + sep + "stray cell")
    return _HEADERS[layout], line


def generate(rows: int, out: Path, sources: int = 8, distinct: float = 0.1, bad: float = 0.01,
             seed: int = 20261014) -> list[Path]:
    """Write ``sources`` synthetic sources holding ``rows`` data rows in all into ``out``.

    Returns the source folders. ``out`` is emptied first; it must not be a repository's raw/.
    """
    out = Path(out)
    if (out / "synonyms.csv").exists() or (out / "README.md").exists():
        raise SystemExit(f"{out} looks like a real raw/ folder (synonyms.csv/README.md); refusing")
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    pool = compound_pool(max(1, int(rows * distinct)), rng)
    sizes = np.full(sources, rows // sources)
    sizes[: rows % sources] += 1
    folders = []
    for i, size in enumerate(sizes):
        layout = i % len(LAYOUTS)
        fmt, decimal, kind, description = LAYOUTS[layout]
        source_id = f"bench-{i + 1:02d}"
        folder = out / source_id
        folder.mkdir()
        file = f"table.{fmt}"
        (folder / "source.toml").write_text(
            _TOML.format(id=source_id, n=i + 1, description=description, seed=seed, kind=kind,
                         file=file, format=fmt, decimal=decimal, columns=_COLUMNS[layout],
                         defaults=_DEFAULTS[layout]),
            encoding="utf-8",
        )
        sep = "\t" if fmt == "tsv" else ","
        with (folder / file).open("w", encoding="utf-8", newline="\n") as fh:
            fh.write(sep.join(_HEADERS[layout]) + "\n")
            for start in range(0, int(size), CHUNK):
                n = min(CHUNK, int(size) - start)
                idx = rng.integers(0, len(pool), size=n)
                _, lines = _rows(layout, idx, pool, rng, bad)
                fh.write("\n".join(lines.tolist()) + "\n")
        folders.append(folder)
    return folders


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=parse_rows, default=parse_rows("100k"), help="10k, 100k, 1M, 10M, ...")
    p.add_argument("--out", type=Path, required=True, help="folder to write (emptied first)")
    p.add_argument("--sources", type=int, default=8)
    p.add_argument("--distinct", type=float, default=0.1, help="distinct compounds / rows")
    p.add_argument("--bad", type=float, default=0.01, help="fraction of bad rows")
    p.add_argument("--seed", type=int, default=20261014)
    args = p.parse_args(argv)
    repo_raw = (Path(__file__).resolve().parents[1] / "raw").resolve()
    if args.out.resolve() == repo_raw:
        p.error(f"--out {args.out} is the repository's raw/; pass another folder, e.g. /tmp/bench-raw")
    folders = generate(args.rows, args.out, args.sources, args.distinct, args.bad, args.seed)
    print(f"wrote {args.rows} rows in {len(folders)} sources to {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
