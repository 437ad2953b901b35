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
5. **Reference state (optional).** With ``reference_state=(T, I)`` every member is first
   carried to T [K] and I [mol/kg] with :mod:`pipeline.physchem` (see
   :func:`transfer_to_reference_state`), so values measured at different conditions form one
   group. A member that cannot be carried (no ΔH° known, no charge, outside a model's range)
   keeps its own conditions and the recommended value's reason says why. Without
   ``reference_state`` (the default) nothing is transferred.

References
----------
.. [1] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932) (the Birge ratio).
.. [2] P. J. Rousseeuw and C. Croux, "Alternatives to the median absolute deviation",
       J. Am. Stat. Assoc. 88, 1273 (1993) (MAD scaled by 1.4826 for normal data).
.. [3] IUPAC evaluation categories as used in the IUPAC stability-constant evaluations
       (e.g. Pettit & Powell, Pure Appl. Chem. 1980s series): Recommended, Tentative, Doubtful.
.. [4] E. C. W. Clarke and D. N. Glew, "Evaluation of thermodynamic functions from equilibrium
       constants", Trans. Faraday Soc. 62, 539-547 (1966) (integrated van 't Hoff equation).
.. [5] C. W. Davies, *Ion Association*, Butterworths, London, 1962, p. 41 (Davies equation).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass

import duckdb
import numpy as np
import pandas as pd

from pipeline import physchem
from pipeline.checks import attach_locations, reference_key
from pipeline.schemas.tables import LINEAGE, RECOMMENDED

SOURCE_KIND_RANK = {"experimental": 0, "critical_review": 1, "compilation": 2, "estimated": 3}
MAD_TO_SIGMA = 1.4826  # consistency factor of the MAD for normal data, ref. [2]
OUTLIER_Z = 3.5  # robust z beyond which a member is an outlier (common practice)
BIRGE_DISCORDANT = 2.0  # Birge ratio above which the members disagree (common practice)
DEFAULT_SPREAD = 0.02  # customary reproducibility of a pKa [pK units] (common practice)
MEDIAN_EFFICIENCY = 1.2533  # sqrt(pi/2): standard error of the median over that of the mean


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
    ref = reference_key(m["reference"])
    has_ref = ref.notna()
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
    # work on integer group codes (grouping by tuples of keys is slow on a million rows)
    codes, uniques = pd.factorize(members["group"])
    members = members.assign(group=codes)
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
    # the median's standard uncertainty is sqrt(pi/2)·sigma/sqrt(n) for normal data; it is never
    # taken below what the members state themselves (their combined uncertainty) nor below the
    # customary pKa reproducibility over sqrt(n), so identical values do not give u = 0
    stated_u = 1.0 / np.sqrt(out["sum_w"].where(out["sum_w"] > 0))
    robust_u = np.fmax(
        np.maximum.reduce(
            [
                MEDIAN_EFFICIENCY * MAD_TO_SIGMA * kept_mad / np.sqrt(n),
                (out["max"] - out["min"]) / (2 * np.sqrt(n)),
                DEFAULT_SPREAD / np.sqrt(n),
            ]
        ),
        stated_u,
    )

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
    out.index = pd.Index(uniques, tupleize_cols=False)[out.index.to_numpy()]
    out.index.name = "group"
    return out, outlier


#: Columns of the optional ΔH° table for :func:`transfer_to_reference_state`.
ENTHALPY_COLUMNS = ("compound_id", "step", "delta_h_j_mol", "delta_cp_j_mol_k", "source")
#: Temperatures [K] closer than this count as equal (the 0.01 K grouping of consolidation).
SAME_TEMPERATURE_K = 0.005
#: Fewest distinct temperatures of one compound and step for a ΔH° fitted to the data.
MIN_TEMPERATURES_FOR_DELTA_H = 3


def _fitted_enthalpies(frame: pd.DataFrame, excluded_ids: set[str]) -> pd.DataFrame:
    """ΔH° (and ΔCp° with >= 5 temperatures) of each compound and step fitted to its own values.

    ``frame`` holds ``compound_id, step, t, pka, value_id`` of thermodynamic values at I = 0
    (after the ionic-strength transfer). Each temperature (0.1 K) counts once, as the median of
    its values; values in ``excluded_ids`` (van 't Hoff outliers) are left out. One fit per
    compound and step with >= 3 temperatures (a loop over those few series).
    """
    use = frame[~frame["value_id"].isin(excluded_ids)]
    nodes = use.assign(t=use["t"].round(1)).groupby(["compound_id", "step", "t"])["pka"].median().reset_index()
    counts = nodes.groupby(["compound_id", "step"])["t"].transform("size")
    nodes = nodes[counts >= MIN_TEMPERATURES_FOR_DELTA_H]
    rows = []
    for (compound_id, step), series in nodes.groupby(["compound_id", "step"], sort=True):
        with_cp = len(series) >= 5
        fit = physchem.fit_van_t_hoff(series["t"].to_numpy(), series["pka"].to_numpy(), with_heat_capacity=with_cp)
        rows.append((compound_id, step, fit.delta_h, fit.delta_cp,
                     f"fitted to {len(series)} temperatures of the data, "
                     + ("ΔH° and ΔCp°" if with_cp else "constant ΔH°")))
    return pd.DataFrame(rows, columns=list(ENTHALPY_COLUMNS)).astype({"step": "int64"})


def transfer_to_reference_state(
    members: pd.DataFrame,
    reference_state: tuple[float, float],
    enthalpies: pd.DataFrame | None = None,
    excluded_from_fits: set[str] | None = None,
    activity_model: str = "davies",
) -> pd.DataFrame:
    """Carry each member's pKa to the reference temperature [K] and ionic strength [mol/kg].

    Three steps, each with :mod:`pipeline.physchem`:

    1. to a thermodynamic constant (I -> 0) at the member's own temperature:
       :func:`~pipeline.physchem.convert_constant_type` from a ``concentration`` or ``mixed``
       constant with the member's ``charge`` (charge of the acid form) and ``activity_model``
       (Davies by default, ref. [5]); a thermodynamic constant needs nothing;
    2. to the reference temperature with the integrated van 't Hoff equation (ref. [4],
       :func:`~pipeline.physchem.van_t_hoff`). ΔH° (and ΔCp°) come from ``enthalpies``
       (columns ``compound_id, step, delta_h_j_mol, delta_cp_j_mol_k, source``, ΔH° at
       298.15 K [J/mol], ΔCp° [J/(K mol)]; ``step`` may be missing for single-step acids) or, for
       a compound and step with values at >= 3 temperatures, from a van 't Hoff fit to those
       values (:func:`~pipeline.physchem.fit_van_t_hoff`); otherwise no ΔH° is known and the
       member is *not* transferred;
    3. for a reference ionic strength I > 0, back to a concentration constant at I.

    A member is transferred completely or not at all: when a step is impossible (no ΔH°, no
    charge, a condition outside a model's range) it keeps its value and conditions and
    ``note`` says why. The transfer does not add its own uncertainty to ``pka_uncertainty``.

    Parameters
    ----------
    members : pandas.DataFrame
        ``value_id, compound_id, step, pka, pka_uncertainty, temperature_k [K],
        ionic_strength_molal [mol/kg], constant_type, charge``.
    reference_state : tuple of float
        (temperature [K], 273.15-373.15; ionic strength [mol/kg], 0 to the model's limit).
    enthalpies : pandas.DataFrame, optional
        Known ΔH° values (see step 2); they win over fitted ones.
    excluded_from_fits : set of str, optional
        Value ids left out of the ΔH° fits (e.g. ``van_t_hoff_outlier`` findings).
    activity_model : str
        ``"davies"`` or ``"extended_debye_huckel"``.

    Returns
    -------
    pandas.DataFrame
        Same index as ``members``: ``pka``, ``temperature_k``, ``ionic_strength_molal``,
        ``constant_type`` after transfer, ``transferred`` (bool: conditions changed),
        ``note`` (why not, or ""), ``delta_h_j_mol``, ``delta_cp_j_mol_k``, ``delta_h_source``.

    Raises
    ------
    ValueError
        Reference state outside the models' ranges, unknown activity model, or an
        ``enthalpies`` table without the needed columns (the message lists them).

    References
    ----------
    .. [4] E. C. W. Clarke and D. N. Glew, Trans. Faraday Soc. 62, 539-547 (1966).
    .. [5] C. W. Davies, *Ion Association*, Butterworths, London, 1962, p. 41.

    Examples
    --------
    Tris at 37 °C carried to 25 °C with ΔH° 47.45 kJ/mol and ΔCp° -59 J/(K mol) (Goldberg et al.
    2002, J. Phys. Chem. Ref. Data 31, 231):

    >>> one = pd.DataFrame({"value_id": ["kv-0000000000000001"], "compound_id": ["tris"],
    ...                     "step": [1], "pka": [7.753], "pka_uncertainty": [None],
    ...                     "temperature_k": [310.15], "ionic_strength_molal": [0.0],
    ...                     "constant_type": ["thermodynamic"], "charge": [1]})
    >>> dh = pd.DataFrame({"compound_id": ["tris"], "step": [1], "delta_h_j_mol": [47450.0],
    ...                    "delta_cp_j_mol_k": [-59.0], "source": ["Goldberg et al. 2002"]})
    >>> out = transfer_to_reference_state(one, (298.15, 0.0), dh)
    >>> round(float(out["pka"].iloc[0]), 3), bool(out["transferred"].iloc[0])
    (8.072, True)
    """
    if activity_model not in ("davies", "extended_debye_huckel"):
        raise ValueError(
            f"activity_model {activity_model!r} cannot be used for the transfer; valid choices: "
            "davies, extended_debye_huckel"
        )
    model = physchem.ACTIVITY_MODELS[activity_model]
    t_ref, i_ref = float(reference_state[0]), float(reference_state[1])
    if not physchem.T_MIN_K <= t_ref <= physchem.T_MAX_K:
        raise ValueError(f"reference temperature {t_ref} K is outside {physchem.T_MIN_K}-{physchem.T_MAX_K} K")
    if not 0.0 <= i_ref <= model.max_ionic_strength:
        raise ValueError(
            f"reference ionic strength {i_ref} mol/kg is outside 0-{model.max_ionic_strength} mol/kg "
            f"(activity model {activity_model!r})"
        )
    target_type = "thermodynamic" if i_ref == 0 else "concentration"
    idx = members.index
    step = members["step"].astype("Int64").fillna(0).astype("int64")
    t = members["temperature_k"].astype(float)
    i = members["ionic_strength_molal"].astype(float)
    ctype = members["constant_type"].astype(str)
    charge = members["charge"].astype("Float64")
    pka = members["pka"].astype(float).to_numpy().copy()
    note = pd.Series("", index=idx, dtype=object)
    t_lo, t_hi = model.temperature_range_k

    def fail(mask: pd.Series, why: pd.Series | str) -> None:
        # record the first reason only
        first = mask & (note == "")
        note[first] = why[first] if isinstance(why, pd.Series) else why

    # 1. to a thermodynamic constant at the member's own temperature
    needs_i = (ctype != "thermodynamic") & (i > 0)
    fail(needs_i & charge.isna().to_numpy(dtype=bool, na_value=True), "no charge of the acid form given")
    fail(needs_i & (i > model.max_ionic_strength),
         "I = " + i.round(3).astype(str) + f" mol/kg is above the {activity_model} model's limit "
         f"{model.max_ionic_strength} mol/kg")
    fail(needs_i & ~t.between(t_lo, t_hi), "T = " + t.round(2).astype(str) + " K is outside the activity model's range")
    do_i = needs_i & (note == "")
    for kind in ctype[do_i].unique():  # at most two: concentration, mixed
        sel = (do_i & (ctype == kind)).to_numpy()
        pka[sel] = physchem.convert_constant_type(
            pka[sel], str(kind), "thermodynamic", i.to_numpy()[sel], charge.to_numpy(dtype=float)[sel],
            t.to_numpy()[sel], model=activity_model,
        ).value

    # 2. to the reference temperature
    given = pd.DataFrame(columns=list(ENTHALPY_COLUMNS))
    if enthalpies is not None:
        missing = [c for c in ("compound_id", "delta_h_j_mol") if c not in enthalpies.columns]
        if missing:
            raise ValueError(
                f"enthalpies table lacks column(s) {', '.join(missing)}; columns: {', '.join(ENTHALPY_COLUMNS)}"
            )
        given = enthalpies.reindex(columns=list(ENTHALPY_COLUMNS)).copy()
        given["step"] = given["step"].astype("Int64").fillna(0).astype("int64")
        given["delta_cp_j_mol_k"] = given["delta_cp_j_mol_k"].astype(float).fillna(0.0)
        given["source"] = given["source"].fillna("given")
    ok_so_far = (note == "") & t.between(physchem.T_MIN_K, physchem.T_MAX_K)
    fit_input = pd.DataFrame(
        {"compound_id": members["compound_id"], "step": step, "t": t, "pka": pka, "value_id": members["value_id"]},
        index=idx,
    )[ok_so_far & ((ctype == "thermodynamic") | needs_i)]
    fitted = _fitted_enthalpies(fit_input, excluded_from_fits or set())
    table = pd.concat([given, fitted], ignore_index=True).drop_duplicates(["compound_id", "step"], keep="first")
    table = table.set_index(["compound_id", "step"])
    key = pd.MultiIndex.from_arrays([members["compound_id"], step])
    dh = pd.Series(table["delta_h_j_mol"].reindex(key).to_numpy(dtype=float), index=idx)
    dcp = pd.Series(table["delta_cp_j_mol_k"].reindex(key).to_numpy(dtype=float), index=idx)
    dh_source = pd.Series(table["source"].reindex(key).to_numpy(dtype=object), index=idx)
    needs_t = (t - t_ref).abs() > SAME_TEMPERATURE_K
    fail(needs_t & ~t.between(physchem.T_MIN_K, physchem.T_MAX_K),
         "T = " + t.round(2).astype(str) + " K is outside the van 't Hoff range")
    fail(needs_t & dh.isna(), "no ΔH° known for this compound and step (none given, fewer than "
         f"{MIN_TEMPERATURES_FOR_DELTA_H} temperatures to fit)")
    do_t = (needs_t & (note == "")).to_numpy()
    if do_t.any():
        # pKa(T_ref) = pKa(T) + g(T_ref) - g(T), g(x) = pKa(x) - pKa(298.15 K) for this ΔH°, ΔCp°
        shift = (physchem.van_t_hoff(0.0, 298.15, t_ref, dh[do_t].to_numpy(), dcp[do_t].to_numpy()).value
                 - physchem.van_t_hoff(0.0, 298.15, t.to_numpy()[do_t], dh[do_t].to_numpy(), dcp[do_t].to_numpy()).value)
        pka[do_t] = pka[do_t] + shift

    # 3. to a concentration constant at a reference ionic strength above zero
    if i_ref > 0:
        fail(charge.isna().to_numpy(dtype=bool, na_value=True), "no charge of the acid form given")
        do_c = (note == "").to_numpy()
        if do_c.any():
            pka[do_c] = physchem.convert_constant_type(
                pka[do_c], "thermodynamic", "concentration", i_ref, charge.to_numpy(dtype=float)[do_c], t_ref,
                model=activity_model,
            ).value

    done = note == ""
    changed = done & (needs_t | (i.round(3) != round(i_ref, 3)) | (ctype != target_type))
    return pd.DataFrame(
        {
            "pka": np.where(done, pka, members["pka"].astype(float)),
            "temperature_k": t.where(~done, t_ref),
            "ionic_strength_molal": i.where(~done, i_ref),
            "constant_type": ctype.where(~done, target_type),
            "transferred": changed,
            "note": note,
            "delta_h_j_mol": dh.where(do_t, np.nan),
            "delta_cp_j_mol_k": dcp.where(do_t, np.nan),
            "delta_h_source": dh_source.where(do_t, None),
        },
        index=idx,
    )


def _worst_severity(findings: pd.DataFrame) -> pd.Series:
    """Worst severity per value id (error > warning > info)."""
    rank = {"info": 0, "warning": 1, "error": 2}
    f = findings.dropna(subset=["value_id"])
    worst = f["severity"].map(rank).groupby(f["value_id"]).max()
    return worst.map({v: k for k, v in rank.items()})


def _json_list(values: pd.Series) -> str:
    return json.dumps(sorted(values.tolist()), separators=(",", ":"))


def _member_lists(group: pd.Series, value_id: pd.Series) -> pd.Series:
    """Per group, the JSON array of its members' value ids, sorted (DuckDB string_agg).

    Examples
    --------
    >>> _member_lists(pd.Series(["g", "g", "h"]), pd.Series(["kv-b", "kv-a", "kv-c"])).to_dict()
    {'g': '["kv-a","kv-b"]', 'h': '["kv-c"]'}
    """
    codes, uniques = pd.factorize(group)
    ids = pd.DataFrame({"code": codes, "value_id": value_id.to_numpy()})  # noqa: F841 (read by DuckDB)
    agg = duckdb.sql(
        """SELECT code, '["' || string_agg(value_id, '","' ORDER BY value_id) || '"]' AS members
           FROM ids GROUP BY code ORDER BY code"""
    ).df()
    index = pd.Index(np.asarray(uniques, dtype=object)[agg["code"].to_numpy()], tupleize_cols=False)
    return pd.Series(agg["members"].to_numpy(), index=index)


def consolidate(
    measurements: pd.DataFrame,
    findings: pd.DataFrame,
    sources: pd.DataFrame,
    lineage: pd.DataFrame,
    reference_state: tuple[float, float] | None = None,
    enthalpies: pd.DataFrame | None = None,
    activity_model: str = "davies",
) -> ConsolidateResult:
    """Mark copies and status, compute recommended values, and extend the lineage.

    ``lineage`` holds the measurements' steps so far; the result adds a step to each copy and
    one ``consensus`` step to each recommended value.

    ``reference_state`` = (temperature [K], ionic strength [mol/kg]), e.g. ``(298.15, 0.0)``,
    carries every usable member there first (:func:`transfer_to_reference_state`, with the
    optional ``enthalpies`` table of ΔH° and the ``activity_model``); each recommended value
    with transferred members then gets a ``transfer_to_reference_state`` lineage step (every
    member's measured and transferred pKa, ΔH°, ΔCp° and where they came from) before its
    ``consensus`` step, and its reason says how many members were carried, or why not. The
    stored ``measurements`` keep the measured values. ``None`` (the default) transfers nothing.
    """
    m = measurements.copy()
    kind = sources.set_index("source_id")["kind"]
    m["copy_of"] = mark_copies(m, kind)
    sev = m["value_id"].map(_worst_severity(findings))
    m["status"] = np.where(sev.eq("error"), "excluded", np.where(sev.eq("warning"), "flagged", "ok"))

    usable = m["copy_of"].isna() & (m["status"] != "excluded") & m["qualifier"].isna() & (m["solvent"] == "water")
    members = m[usable].copy()
    transfer: pd.DataFrame | None = None
    if reference_state is not None:
        vh_outliers = set(findings.loc[findings["rule"] == "van_t_hoff_outlier", "value_id"].dropna())
        transfer = transfer_to_reference_state(members, reference_state, enthalpies, vh_outliers, activity_model)
        for column in ("pka", "temperature_k", "ionic_strength_molal", "constant_type"):
            members[column] = transfer[column]
    keys = _group_keys(members)
    members["group"] = keys.groupby(list(keys.columns), sort=False, dropna=False).ngroup().to_numpy()
    group_keys = keys.assign(group=members["group"]).drop_duplicates("group").set_index("group")
    members["flagged"] = members["status"] == "flagged"
    table, outlier = consensus(members[["group", "pka", "pka_uncertainty", "source_id", "flagged"]])

    if transfer is not None:
        t_ref, i_ref = reference_state  # type: ignore[misc]
        where = f"{float(t_ref):.2f} K, I = {float(i_ref):g} mol/kg"
        by_group = transfer.assign(group=members["group"]).groupby("group", sort=False)
        n_moved = by_group["transferred"].sum().reindex(table.index).fillna(0).astype(int)
        sources_used = by_group["delta_h_source"].agg(lambda s: "; ".join(sorted(set(s.dropna()))))
        notes = by_group["note"].agg(lambda s: "; ".join(sorted(set(s) - {""})))
        sources_used = sources_used.reindex(table.index).fillna("")
        notes = notes.reindex(table.index).fillna("")
        moved_text = ("; " + n_moved.astype(str) + " of " + table["n_values"].astype(str) + f" values carried to {where}"
                      + np.where(sources_used != "", " (ΔH° " + sources_used + ")", ""))
        table["reason"] = (table["reason"] + moved_text.where(n_moved > 0, "")
                           + np.where(notes != "", f"; not carried to {where}: " + notes, ""))

    key_frame = group_keys.loc[table.index].reset_index(drop=True)
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
    at = "" if transfer is None else " (carried to the reference state)"
    new_findings = pd.DataFrame(
        {
            "rule": "consensus_outlier",
            "severity": "warning",
            "value_id": outliers["value_id"],
            "message": "pKa " + outliers["pka"].round(3).astype(str) + at
            + " is a gross outlier among independent values at the same conditions; left out of the recommended value",
        }
    )
    m.loc[outliers.index, "status"] = "flagged"
    all_findings = attach_locations(pd.concat([findings, new_findings], ignore_index=True), m)

    # lineage of each recommended value: its members (outliers excluded) and the method
    kept = members[~outlier.to_numpy()]
    inputs = _member_lists(kept["group"], kept["value_id"])
    rec_id_of = pd.Series(rec_ids, index=table.index)
    consensus_step = pd.Series(1, index=table.index, dtype="int64")
    transfer_lineage = pd.DataFrame(columns=list(LINEAGE.columns))
    if transfer is not None:
        moved = transfer[transfer["transferred"]].assign(
            group=members["group"], value_id=members["value_id"], measured=m.loc[transfer.index, "pka"]
        )
        if not moved.empty:
            detail = pd.Series(
                [
                    {"value_id": v, "pka_measured": round(float(a), 6), "pka_transferred": round(float(b), 6),
                     "delta_h_j_mol": None if pd.isna(h) else round(float(h), 3),
                     "delta_cp_j_mol_k": None if pd.isna(c) else round(float(c), 3),
                     "delta_h_source": None if pd.isna(src) else src}
                    for v, a, b, h, c, src in zip(moved["value_id"], moved["measured"], moved["pka"],
                                                  moved["delta_h_j_mol"], moved["delta_cp_j_mol_k"],
                                                  moved["delta_h_source"], strict=True)
                ],
                index=moved.index,
            )
            per_group = detail.groupby(moved["group"], sort=False).agg(list)
            head = {"temperature_k": float(reference_state[0]), "ionic_strength_molal": float(reference_state[1]),
                    "activity_model": activity_model,
                    "equation": "integrated van 't Hoff, constant dCp (Clarke & Glew 1966)"}
            transfer_lineage = pd.DataFrame(
                {
                    "target_id": rec_id_of[per_group.index].to_numpy(),
                    "step_no": 1,
                    "operation": "transfer_to_reference_state",
                    "parameters": [json.dumps({**head, "members": d}, ensure_ascii=False, separators=(",", ":"))
                                   for d in per_group],
                    "inputs": moved.groupby("group", sort=False)["value_id"].agg(_json_list)[per_group.index].to_numpy(),
                }
            )
            consensus_step[per_group.index] = 2
    rec_lineage = pd.DataFrame(
        {
            "target_id": rec_ids,
            "step_no": consensus_step.to_numpy(),
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
    parts = [lineage, copy_lineage, rec_lineage] + ([transfer_lineage] if len(transfer_lineage) else [])
    return ConsolidateResult(
        measurements=m,
        recommended=rec,
        lineage=LINEAGE.validate(
            pd.concat(parts, ignore_index=True)
            .sort_values(["target_id", "step_no"])
            .reset_index(drop=True)
        ),
        findings=all_findings,
    )
