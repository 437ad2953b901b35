"""Benchmark: standardize N distinct SMILES cold, then from a warm identity cache.

Inputs are real structures: the SMILES column of the ``chemicals`` offline PubChem table
(about 71,000 compounds), topped up with hydrochloride / hydrate / sodium-salt variants and,
if still short, enumerated alkyl acids, until N distinct strings exist.

Floor: plain RDKit parse + InChIKey of the same inputs on one process, measured on a sample
in the same run, so the cold ratio tells how much standardization and bookkeeping cost.

Targets (not asserted; this script only prints): cold < 60 s on 2 cores for N = 100,000,
warm < 5 s.

Usage::

    .venv/bin/python bench/bench_identity.py --n 100000 --jobs 2
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import pandas as pd  # noqa: E402
from chemicals import identifiers as chem_ids  # noqa: E402
from rdkit import Chem, rdBase  # noqa: E402

from pipeline.identity import IdentityCache, standardize_structures  # noqa: E402

FLOOR_SAMPLE = 3_000


def database_smiles() -> list[str]:
    """SMILES column (5th field) of the chemicals package's large PubChem table."""
    path = Path(chem_ids.folder) / "chemical identifiers pubchem large.tsv"
    with path.open(encoding="utf-8") as fh:
        return [f[4] for f in (line.rstrip("\n").split("\t") for line in fh) if len(f) > 4 and f[4]]


def make_inputs(n: int) -> list[str]:
    """N distinct SMILES strings (real structures first, then salt variants, then enumerated)."""
    base = list(dict.fromkeys(database_smiles()))
    seen = dict.fromkeys(base[:n])
    for suffix in (".Cl", ".O", ".[Na+].[Cl-]"):
        for s in base:
            if len(seen) >= n:
                break
            seen.setdefault(s + suffix)
    k = 1
    while len(seen) < n:  # enumerated acids: C_k chain with a hydroxy group walking along
        for j in range(k):
            seen.setdefault("C" * j + "C(O)" + "C" * (k - j - 1) + "C(=O)O")
        k += 1
    return list(seen)[:n]


def floor_per_mol(smiles: list[str]) -> float:
    """Seconds per molecule for bare MolFromSmiles + MolToInchiKey on one process."""
    sample = smiles[:FLOOR_SAMPLE]
    t0 = time.perf_counter()
    with rdBase.BlockLogs():
        for s in sample:
            mol = Chem.MolFromSmiles(s)
            if mol is not None:
                Chem.MolToInchiKey(mol)
    return (time.perf_counter() - t0) / len(sample)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=100_000, help="distinct SMILES (default 100000)")
    parser.add_argument("--jobs", type=int, default=os.cpu_count() or 1, help="worker processes")
    parser.add_argument(
        "--cache", type=Path, default=None, help="cache file (default: a temporary one)"
    )
    args = parser.parse_args(argv)

    t0 = time.perf_counter()
    smiles = make_inputs(args.n)
    print(f"inputs: {len(smiles)} distinct SMILES built in {time.perf_counter() - t0:.1f} s")
    series = pd.Series(smiles)

    floor = floor_per_mol(smiles)
    print(
        f"floor: bare RDKit parse + InChIKey {floor * 1e3:.3f} ms/mol on 1 process "
        f"(sample {min(FLOOR_SAMPLE, len(smiles))}) -> {floor * len(smiles):.1f} s for all"
    )

    with tempfile.TemporaryDirectory() as tmp:
        path = args.cache or Path(tmp) / "identity.parquet"
        if path.exists():
            path.unlink()
        t0 = time.perf_counter()
        cold = standardize_structures(series, None, cache=IdentityCache(path), n_jobs=args.jobs)
        t_cold = time.perf_counter() - t0
        n_err = int(cold["error"].notna().sum())
        size_mb = path.stat().st_size / 1e6
        print(
            f"cold: {t_cold:.1f} s with {args.jobs} process(es) "
            f"({t_cold / len(smiles) * 1e3:.3f} ms/mol; {n_err} inputs with an error; "
            f"cache {size_mb:.1f} MB)  target < 60 s for 100,000 on 2 cores"
        )
        print(f"cold / single-process floor: {t_cold / (floor * len(smiles)):.2f}")

        t0 = time.perf_counter()
        cache = IdentityCache(path)
        t_load = time.perf_counter() - t0
        warm = standardize_structures(series, None, cache=cache)
        t_warm = time.perf_counter() - t0
        print(
            f"warm: {t_warm:.2f} s (cache load {t_load:.2f} s; hits {cache.hits}, "
            f"misses {cache.misses})  target < 5 s"
        )
        print(f"warm / cold: {t_warm / t_cold:.3f}")
        same = cold.equals(warm)
        print(f"warm result identical to cold: {same}")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
