"""Benchmark: every registered rule and the consensus on 1,000,000 synthetic measurements.

The frame is valid against ``pipeline.schemas.tables.MEASUREMENTS``: 200,000 compounds with one
to three steps, mostly at 25 °C and I = 0; 5 % concentration constants at I = 0.1 mol/kg; 400
temperature series of 6 temperatures (5-50 °C), the only groups the van 't Hoff rule fits (one
scipy fit per left-out temperature); references drawn from 50,000 strings (so copies occur);
uncertainties on 60 % of the rows; a sprinkling of pKb rows, bounds, non-aqueous values, gross
outliers and out-of-range values so that every rule has work to do.

Timed: ``checks.run_rules`` (all rules) and ``consolidate.consensus`` over the groups that
consolidation forms (key building included). Floor, measured in the same run: a pandas
groupby-mean of pKa over the same condition keys. Target: rules + consensus < 30 s.

Run: .venv/bin/python bench/bench_rules.py [n]
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd
from pipeline.schemas.tables import MEASUREMENTS

from pipeline import checks, consolidate, physchem

TARGET_S = 30.0
N_SERIES = 400
SERIES_T = np.array([278.15, 288.15, 298.15, 308.15, 313.15, 323.15])


def synthetic(n: int, seed: int = 20260601) -> pd.DataFrame:
    """A MEASUREMENTS-valid frame of ``n`` rows (see module docstring)."""
    rng = np.random.default_rng(seed)
    n_compounds = max(n // 5, 10)
    compound = rng.integers(0, n_compounds, size=n)
    step = rng.choice([1, 1, 1, 2, 3], size=n)
    true_pka = (compound % 900) / 100.0 + 1.0 + 2.0 * (step - 1)  # 1-14 [-]
    pka = true_pka + rng.normal(0.0, 0.01, size=n)
    temperature = np.full(n, 298.15)
    ionic = np.zeros(n)
    ctype = np.full(n, "thermodynamic", dtype=object)
    charge = np.where(rng.random(n) < 0.9, 0, -1).astype(float)

    # temperature series: N_SERIES compounds x 6 temperatures, ΔH° 30 kJ/mol, one outlier in ten
    series_rows = rng.choice(n, size=min(N_SERIES * len(SERIES_T) * 2, n // 2), replace=False)
    series_compound = n_compounds + (np.arange(series_rows.size) // (2 * len(SERIES_T))) % N_SERIES
    compound[series_rows] = series_compound
    step[series_rows] = 1
    temperature[series_rows] = SERIES_T[np.arange(series_rows.size) % len(SERIES_T)]
    base = 7.0 + (series_compound % 50) / 10.0
    pka[series_rows] = physchem.van_t_hoff(base, 298.15, temperature[series_rows], 30000.0).value + rng.normal(
        0, 0.005, series_rows.size
    )
    outliers = series_rows[(np.arange(series_rows.size) % (10 * len(SERIES_T))) == 1]
    pka[outliers] += 0.3

    rest = np.setdiff1d(np.arange(n), series_rows)
    conc = rest[rng.random(rest.size) < 0.05]
    ionic[conc] = 0.1
    ctype[conc] = "concentration"
    z = charge[conc]
    pka[conc] = physchem.convert_constant_type(pka[conc], "thermodynamic", "concentration", 0.1, z).value

    quantity = np.full(n, "pKa", dtype=object)
    pkw_used = np.full(n, np.nan)
    pkb_rows = rest[rng.random(rest.size) < 0.03]
    quantity[pkb_rows] = "pKb"
    pkw_used[pkb_rows] = float(physchem.pkw(298.15))
    gross = rng.choice(rest, size=n // 500, replace=False)
    pka[gross] += rng.choice([-1.0, 1.0], size=gross.size) * 0.8
    odd = rng.choice(rest, size=n // 2000, replace=False)
    pka[odd[: odd.size // 2]] = 40.0
    temperature[odd[odd.size // 2:]] = 393.15

    qualifier = np.where(rng.random(n) < 0.002, "<", None)
    solvent = np.where(rng.random(n) < 0.01, "water-dioxane", "water")
    u = np.where(rng.random(n) < 0.6, rng.choice([0.002, 0.005, 0.01, 0.02], size=n), np.nan)
    u[rng.choice(n, size=n // 5000, replace=False)] = 5.0
    refs = np.array([f"Author {k} et al. {1930 + k % 90}, J. Chem. {k % 200}, {k % 997}" for k in range(50_000)],
                    dtype=object)
    reference = refs[rng.integers(0, refs.size, size=n)]
    value_reported = pd.Series(np.round(pka, 3)).astype(str).to_numpy(dtype=object)
    long = rng.choice(n, size=n // 5000, replace=False)
    value_reported[long] = pd.Series(pka[long]).map("{:.10f}".format).to_numpy(dtype=object)

    frame = pd.DataFrame(
        {
            "value_id": [f"kv-{k:016x}" for k in range(n)],
            "compound_id": pd.Series(compound).map("C{:07d}".format),
            "step": pd.array(step, dtype="Int64"),
            "step_inferred": False,
            "pka": pka,
            "pka_uncertainty": u,
            "qualifier": qualifier,
            "temperature_k": temperature,
            "ionic_strength_molal": ionic,
            "medium": "water",
            "solvent": solvent,
            "constant_type": ctype,
            "charge": pd.array(charge.astype(int), dtype="Int64"),
            "quantity_reported": quantity,
            "value_reported": value_reported,
            "pkw_used": pkw_used,
            "quantity_alt_reported": None,
            "value_alt_reported": None,
            "pka_alt": np.nan,
            "name_reported": None,
            "cas_reported": None,
            "smiles_reported": None,
            "species_smiles": None,
            "method": None,
            "reference": reference,
            "source_id": rng.choice(["lab-a", "lab-b", "review-c", "compilation-d"], size=n),
            "source_row": np.arange(2, n + 2),
            "copy_of": None,
            "status": "ok",
        }
    )
    return MEASUREMENTS.validate(frame)


def consensus_members(m: pd.DataFrame) -> pd.DataFrame:
    """The members frame consolidation hands to :func:`consolidate.consensus`."""
    usable = m["qualifier"].isna() & (m["solvent"] == "water")
    members = m[usable]
    keys = consolidate._group_keys(members)
    return pd.DataFrame(
        {
            "group": keys.groupby(list(keys.columns), sort=False, dropna=False).ngroup().to_numpy(),
            "pka": members["pka"],
            "pka_uncertainty": members["pka_uncertainty"],
            "source_id": members["source_id"],
            "flagged": False,
        },
        index=members.index,
    )


def main(n: int = 1_000_000) -> int:
    start = time.perf_counter()
    m = synthetic(n)
    built = time.perf_counter() - start
    in_range = m[m["temperature_k"].lt(373.15)]
    n_t = in_range.groupby(["compound_id", "step", "ionic_strength_molal", "constant_type"])["temperature_k"].nunique()
    n_series = int((n_t >= 4).sum())
    n_fits = int(n_t[n_t >= 4].sum())  # one fit per left-out temperature

    start = time.perf_counter()
    floor_result = m.groupby(["compound_id", "step", "temperature_k", "ionic_strength_molal", "constant_type"])[
        "pka"
    ].mean()
    floor = time.perf_counter() - start

    timings: dict[str, float] = {}
    findings_by_rule: dict[str, int] = {}
    for name, r in checks.RULES.items():
        start = time.perf_counter()
        result = r.function(m, {})
        timings[name] = time.perf_counter() - start
        findings_by_rule[name] = len(result.value_id)

    start = time.perf_counter()
    findings = checks.run_rules(m)
    rules_s = time.perf_counter() - start

    start = time.perf_counter()
    table, outlier = consolidate.consensus(consensus_members(m))
    consensus_s = time.perf_counter() - start

    total = rules_s + consensus_s
    print(f"n = {n:,} measurements (built and validated in {built:.1f} s), {floor_result.size:,} condition groups")
    print(f"temperature series with >= 4 temperatures: {n_series} (about {n_fits} van 't Hoff fits, more where an"
          " outlier is set aside and the series re-tested)")
    for name, seconds in sorted(timings.items(), key=lambda kv: -kv[1]):
        print(f"  {name:32} {seconds:7.2f} s  {findings_by_rule[name]:>8,} findings")
    print(f"run_rules (all rules, findings table)  : {rules_s:.2f} s, {len(findings):,} findings")
    print(f"consensus ({len(table):,} groups, {int(outlier.sum()):,} outliers): {consensus_s:.2f} s")
    print(f"floor: pandas groupby-mean, same keys  : {floor:.3f} s")
    print(f"ratio (rules + consensus) / floor      : {total / floor:.0f}x")
    print(f"target rules + consensus < {TARGET_S:.0f} s     : {'met' if total < TARGET_S else 'MISSED'} ({total:.1f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000))
