"""Stage 4, consolidate: copies to one measurement, groups to one recommended value.

1. **Copies.** The same value of the same constant, citing the same primary reference, that
   reached us through several compilations is one measurement: the copy keeps its row (and
   its provenance) and points at the original with ``copy_of``.
2. **Status.** A value with an ``error`` finding is ``excluded``; one with a ``warning`` is
   ``flagged`` but used.
3. **Groups.** Independent, unbounded, aqueous values are grouped by compound, step and
   conditions (T to 0.01 K, I to 0.001 mol/kg, constant type). Each group gives one
   recommended value: the uncertainty-weighted mean when every member has an uncertainty
   (its uncertainty scaled by the Birge ratio when that exceeds 1), otherwise the median with
   the scaled median absolute deviation; gross outliers (robust z above 3.5) are left out and
   flagged.
4. **Category.** IUPAC evaluation categories: *Recommended* (two or more sources that agree),
   *Tentative* (one source, or no uncertainties), *Doubtful* (sources disagree beyond their
   uncertainties, or all members were flagged).

References
----------
.. [1] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932) (the Birge ratio).
.. [2] P. J. Rousseeuw and C. Croux, "Alternatives to the median absolute deviation",
       J. Am. Stat. Assoc. 88, 1273 (1993) (MAD scaled by 1.4826 for normal data).
.. [3] IUPAC evaluation categories as used in the IUPAC stability-constant evaluations
       (e.g. Pettit & Powell, Pure Appl. Chem. 1980s series): Recommended, Tentative, Doubtful.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.checks import attach_locations
from pipeline.schemas.tables import LINEAGE, RECOMMENDED

SOURCE_KIND_RANK = {"experimental": 0, "critical_review": 1, "compilation": 2, "estimated": 3}
MAD_TO_SIGMA = 1.4826  # consistency factor of the MAD for normal data, ref. [2]
OUTLIER_Z = 3.5  # robust z beyond which a member is an outlier (common practice)
BIRGE_DISCORDANT = 2.0  # Birge ratio above which the members disagree (common practice)
DEFAULT_SPREAD = 0.02  # pK units assumed when a group's values are identical (from memory)


@dataclass(frozen=True)
class ConsolidateResult:
    measurements: pd.DataFrame
    recommended: pd.DataFrame
    lineage: pd.DataFrame
    findings: pd.DataFrame


def _group_keys(m: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "compound_id": m["compound_id"],
            "step": m["step"].astype("Int64").fillna(0).astype("int64"),
            "t": m["temperature_k"].round(2),
            "i": m["ionic_strength_molal"].round(3),
            "constant_type": m["constant_type"],
        },
        index=m.index,
    )


def mark_copies(m: pd.DataFrame, source_kind: pd.Series) -> pd.Series:
    """``copy_of`` for each measurement: the value id of the original, or None.

    Original = the member from the highest-ranked source kind (experimental first), then the
    lowest source id and row.
    """
    ref = m["reference"].astype(str).str.lower().str.replace(r"[^a-z0-9]+", " ", regex=True).str.strip()
    has_ref = m["reference"].notna() & (ref != "") & (ref != "nan")
    key = _group_keys(m)
    key["ref"] = ref
    key["pka3"] = m["pka"].round(3)
    key["rank"] = m["source_id"].map(source_kind).map(SOURCE_KIND_RANK).fillna(9)
    key["source_id"] = m["source_id"]
    key["source_row"] = m["source_row"]
    key["value_id"] = m["value_id"]
    keyed = key[has_ref].sort_values(["rank", "source_id", "source_row"])
    group = ["compound_id", "step", "t", "i", "constant_type", "ref", "pka3"]
    first = keyed.groupby(group)["value_id"].transform("first")
    copy_of = pd.Series(None, index=m.index, dtype=object)
    is_copy = first != keyed["value_id"]
    copy_of[is_copy[is_copy].index] = first[is_copy]
    return copy_of


def _recommendation_ids(keys: pd.DataFrame) -> list[str]:
    text = (keys["compound_id"] + "|" + keys["step"].astype(str) + "|" + keys["t"].map("{:.2f}".format)
            + "|" + keys["i"].map("{:.3f}".format) + "|" + keys["constant_type"])
    return ["kr-" + hashlib.sha256(s.encode()).hexdigest()[:16] for s in text]


def consensus(members: pd.DataFrame) -> tuple[pd.DataFrame, pd.Series]:
    """Recommended value per group and the outlier mask over members.

    ``members`` has columns ``group`` (any hashable key), ``pka``, ``pka_uncertainty``,
    ``source_id``, ``flagged``. Returns one row per group (``pka``, ``pka_uncertainty``,
    ``n_values``, ``n_sources``, ``method``, ``birge_ratio``, ``category``, ``reason``) and a
    boolean Series, True for members left out as outliers.

    Examples
    --------
    Three agreeing values and one gross outlier: the outlier is left out.

    >>> frame = pd.DataFrame({"group": 1, "pka": [4.75, 4.76, 4.77, 5.60],
    ...                       "pka_uncertainty": [0.01, 0.01, 0.01, 0.01],
    ...                       "source_id": ["a", "b", "c", "d"], "flagged": False})
    >>> table, outlier = consensus(frame)
    >>> round(float(table["pka"].iloc[0]), 3), outlier.tolist()
    (4.76, [False, False, False, True])
    """
    g = members.groupby("group", sort=False)
    median = g["pka"].transform("median")
    mad = (members["pka"] - median).abs().groupby(members["group"]).transform("median")
    scale = np.maximum(MAD_TO_SIGMA * mad, DEFAULT_SPREAD)
    n_all = g["pka"].transform("size")
    robust_z = (members["pka"] - median).abs() / scale
    outlier = (n_all >= 3) & (robust_z > OUTLIER_Z)
    kept = members[~outlier].copy()
    u = kept["pka_uncertainty"]
    kept["w"] = 1.0 / u.where(u > 0) ** 2
    kept["wx"] = kept["w"] * kept["pka"]
    kg = kept.groupby("group", sort=False)
    out = pd.DataFrame(
        {
            "n_values": kg["pka"].size(),
            "n_sources": kg["source_id"].nunique(),
            "all_u": kg["w"].count() == kg["pka"].size(),
            "sum_w": kg["w"].sum(),
            "sum_wx": kg["wx"].sum(),
            "median": kg["pka"].median(),
            "mean": kg["pka"].mean(),
            "min": kg["pka"].min(),
            "max": kg["pka"].max(),
            "u_single": kg["pka_uncertainty"].first(),
            "all_flagged": kg["flagged"].all(),
        }
    )
    weighted_mean = out["sum_wx"] / out["sum_w"]
    kept["wmean"] = kept["group"].map(weighted_mean)
    chi2 = (kept["w"] * (kept["pka"] - kept["wmean"]) ** 2).groupby(kept["group"], sort=False).sum()
    n = out["n_values"]
    birge = np.sqrt(chi2 / (n - 1)).where(out["all_u"] & (n > 1))
    internal_u = 1.0 / np.sqrt(out["sum_w"])
    kept_mad = (kept["pka"] - kept["group"].map(out["median"])).abs().groupby(kept["group"], sort=False).median()
    robust_u = np.maximum(MAD_TO_SIGMA * kept_mad, (out["max"] - out["min"]) / 2) / np.sqrt(n)

    single = n == 1
    use_weighted = ~single & out["all_u"]
    out["method"] = np.where(single, "single", np.where(use_weighted, "weighted_mean", "median_mad"))
    out["pka"] = np.where(single, out["median"], np.where(use_weighted, weighted_mean, out["median"]))
    out["pka_uncertainty"] = np.where(
        single, out["u_single"], np.where(use_weighted, internal_u * np.maximum(1.0, birge.fillna(1.0)), robust_u)
    )
    out["birge_ratio"] = birge
    discordant = birge > BIRGE_DISCORDANT
    n_outliers = outlier.groupby(members["group"], sort=False).sum().reindex(out.index).fillna(0)
    out["category"] = np.select(
        [discordant | out["all_flagged"], (out["n_sources"] >= 2) & (use_weighted | ~out["all_u"])],
        ["Doubtful", "Recommended"],
        "Tentative",
    )
    # without uncertainties, agreement of several sources is still only Tentative
    out.loc[(out["category"] == "Recommended") & ~out["all_u"], "category"] = "Tentative"
    reason = np.select(
        [
            discordant,
            out["all_flagged"],
            single,
            ~out["all_u"],
        ],
        [
            "sources disagree beyond their uncertainties (Birge ratio " + birge.round(2).astype(str) + ")",
            "every member carries a warning finding",
            "one measurement only",
            "uncertainties missing: median of " + n.astype(str) + " values",
        ],
        "",
    )
    reason = pd.Series(reason, index=out.index).where(
        pd.Series(reason, index=out.index) != "",
        out["n_sources"].astype(str) + " sources agree within their uncertainties",
    )
    reason = reason.where(n_outliers == 0, reason + "; " + n_outliers.astype(int).astype(str) + " outlier(s) left out")
    out["reason"] = reason
    return out, outlier


def consolidate(
    measurements: pd.DataFrame,
    findings: pd.DataFrame,
    sources: pd.DataFrame,
    lineage: pd.DataFrame,
) -> ConsolidateResult:
    """Mark copies and status, compute recommended values, and extend the lineage.

    ``lineage`` holds the measurements' steps so far; the result adds a step to each copy and
    one ``consensus`` step to each recommended value.
    """
    m = measurements.copy()
    kind = sources.set_index("source_id")["kind"]
    m["copy_of"] = mark_copies(m, kind)
    severity = findings.dropna(subset=["value_id"]).groupby("value_id")["severity"]
    worst = severity.agg(lambda s: "error" if (s == "error").any() else ("warning" if (s == "warning").any() else "info"))
    sev = m["value_id"].map(worst)
    m["status"] = np.where(sev.eq("error"), "excluded", np.where(sev.eq("warning"), "flagged", "ok"))

    usable = m["copy_of"].isna() & (m["status"] != "excluded") & m["qualifier"].isna() & (m["solvent"] == "water")
    members = m[usable].copy()
    keys = _group_keys(members)
    members["group"] = pd.MultiIndex.from_frame(keys).to_flat_index()
    members["flagged"] = members["status"] == "flagged"
    table, outlier = consensus(members[["group", "pka", "pka_uncertainty", "source_id", "flagged"]])

    key_frame = pd.DataFrame(table.index.tolist(), columns=["compound_id", "step", "t", "i", "constant_type"])
    rec_ids = _recommendation_ids(key_frame)
    rec = pd.DataFrame(
        {
            "recommendation_id": rec_ids,
            "compound_id": key_frame["compound_id"],
            "step": key_frame["step"].replace(0, pd.NA).astype("Int64"),
            "temperature_k": key_frame["t"],
            "ionic_strength_molal": key_frame["i"],
            "constant_type": key_frame["constant_type"],
            "pka": table["pka"].to_numpy(),
            "pka_uncertainty": table["pka_uncertainty"].to_numpy(),
            "n_values": table["n_values"].to_numpy().astype("int64"),
            "n_sources": table["n_sources"].to_numpy().astype("int64"),
            "method": table["method"].to_numpy(),
            "birge_ratio": table["birge_ratio"].to_numpy(),
            "category": table["category"].to_numpy(),
            "reason": table["reason"].to_numpy(),
        }
    )
    rec = RECOMMENDED.validate(rec.sort_values("recommendation_id").reset_index(drop=True))

    outliers = members[outlier.to_numpy()]
    new_findings = pd.DataFrame(
        {
            "rule": "consensus_outlier",
            "severity": "warning",
            "value_id": outliers["value_id"],
            "message": "pKa " + outliers["pka"].round(3).astype(str)
            + " is a gross outlier among independent values at the same conditions; left out of the recommended value",
        }
    )
    m.loc[outliers.index, "status"] = "flagged"
    all_findings = attach_locations(pd.concat([findings, new_findings], ignore_index=True), m)

    # lineage of each recommended value: its members (outliers excluded) and the method
    kept = members[~outlier.to_numpy()]
    inputs = kept.groupby("group", sort=False)["value_id"].agg(lambda s: '["' + '","'.join(sorted(s)) + '"]')
    rec_lineage = pd.DataFrame(
        {
            "target_id": rec_ids,
            "step_no": 1,
            "operation": "consensus",
            "parameters": [
                f'{{"method":"{mt}","n_values":{nv},"birge_ratio":{"null" if pd.isna(b) else round(float(b), 4)},'
                f'"category":"{c}"}}'
                for mt, nv, b, c in zip(table["method"], table["n_values"], table["birge_ratio"], table["category"], strict=True)
            ],
            "inputs": inputs.reindex(table.index).to_numpy(),
        }
    )
    copies = m[m["copy_of"].notna()]
    last_step = lineage.groupby("target_id")["step_no"].max()
    copy_lineage = pd.DataFrame(
        {
            "target_id": copies["value_id"],
            "step_no": copies["value_id"].map(last_step).fillna(0).astype("int64") + 1,
            "operation": "recognised_as_copy",
            "parameters": '{"rule":"same compound, step, conditions, primary reference and value"}',
            "inputs": '["' + copies["copy_of"] + '"]',
        }
    )
    return ConsolidateResult(
        measurements=m,
        recommended=rec,
        lineage=LINEAGE.validate(
            pd.concat([lineage, copy_lineage, rec_lineage], ignore_index=True)
            .sort_values(["target_id", "step_no"])
            .reset_index(drop=True)
        ),
        findings=all_findings,
    )
