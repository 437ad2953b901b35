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
    lineage: pd.DataFrame  # the steps this stage adds (copies, consensus, transfers)
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


def _groups(keys: pd.DataFrame) -> tuple[np.ndarray, pd.DataFrame]:
    """Group number of each row of ``keys`` (all columns together), 0, 1, ... in order of first
    appearance, as ``keys.groupby(list(keys.columns), sort=False, dropna=False).ngroup()``, and
    the keys of each group (row g: group g).

    Built from the integer codes of one column at a time, which is much faster than grouping by
    tuples of strings and floats on a million rows; the keys' texts come from the codes'
    distinct values, so equal texts are one object (cheap to hash and compare later).

    Examples
    --------
    >>> numbers, keys = _groups(pd.DataFrame({"a": ["x", "y", "x", "x"], "b": [1.0, 1.0, 2.0, 1.0]}))
    >>> numbers.tolist(), keys.to_dict("list")
    ([0, 1, 2, 0], {'a': ['x', 'y', 'x'], 'b': [1.0, 1.0, 2.0]})
    """
    numbers = np.zeros(len(keys), dtype=np.int64)
    span = 1  # numbers < span
    factorized = {}
    for column in keys.columns:
        codes, uniques = pd.factorize(keys[column], use_na_sentinel=False)
        factorized[column] = codes, uniques
        if span * max(len(uniques), 1) >= 2**62:  # renumber densely before the int64 overflows
            numbers = pd.factorize(numbers)[0]
            span = len(keys)
        numbers = numbers * len(uniques) + codes  # one number per combination of the codes so far
        span *= max(len(uniques), 1)
    numbers = pd.factorize(numbers)[0]  # 0, 1, ... in order of first appearance
    first_rows = np.unique(numbers, return_index=True)[1]
    group_keys = pd.DataFrame({column: uniques.take(codes[first_rows]) for column, (codes, uniques) in factorized.items()})
    return numbers, group_keys


def _per_group(values: np.ndarray, groups: pd.Categorical, how: str) -> np.ndarray:
    """``how`` ("sum", "median", "first", "nunique", ...) of ``values`` for each category of
    ``groups`` (group codes 0 .. n-1 as a Categorical), missing values skipped.

    pandas' cython group kernels, the same arithmetic as grouping the frame (compensated sums,
    exact medians); the codes are used as they are, so no grouping key is hashed again.

    Examples
    --------
    >>> groups = pd.Categorical.from_codes([0, 0, 1, 1], categories=range(3))
    >>> _per_group(np.array([1.0, 3.0, 2.0, np.nan]), groups, "median").tolist()
    [2.0, 2.0, nan]
    """
    return pd.Series(values).groupby(groups, observed=False).agg(how).to_numpy()


def _texts(template: str, numbers: np.ndarray | pd.Series) -> np.ndarray:
    """``template.format(number)`` for each number, formatted once per distinct number.

    Examples
    --------
    >>> _texts("{:.2f} K", np.array([298.15, 310.0, 298.15])).tolist()
    ['298.15 K', '310.00 K', '298.15 K']
    """
    codes, uniques = pd.factorize(np.asarray(numbers), use_na_sentinel=False)
    return np.array([template.format(u) for u in uniques], dtype=object)[codes]


def _join_columns(*parts: np.ndarray | str) -> np.ndarray:
    """Row-wise concatenation of text columns (object arrays of equal length) and constants.

    One ``str.join`` over all pieces with a row separator, then one ``split``: on a million rows
    far faster than adding column to column. Falls back to adding when a piece holds the
    separator.

    Examples
    --------
    >>> _join_columns("kr-", np.array(["a", "b"], dtype=object), "|", np.array(["1", "2"], dtype=object)).tolist()
    ['kr-a|1', 'kr-b|2']
    """
    columns = [p for p in parts if not isinstance(p, str)]
    n = len(columns[0])
    grid = np.empty((n, len(parts) + 1), dtype=object)
    for k, part in enumerate(parts):
        grid[:, k] = part
    grid[:, -1] = "\x00"
    joined = "".join(grid.ravel().tolist())
    if joined.count("\x00") == n:
        return np.array(joined.split("\x00")[:-1], dtype=object)
    out = np.full(n, "", dtype=object)
    for part in parts:  # a separator inside some text: add column to column (a few steps)
        out = out + part
    return out


def _hex_id_parts(ids: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """(prefix, number) of ids of the form two letters, "-", 16 lower-case hex digits (our value
    and recommendation ids, e.g. ``kv-0123456789abcdef``); ordering by prefix, then number, orders
    the ids as text. None when some id has another form.

    Examples
    --------
    >>> prefix, number = _hex_id_parts(np.array(["kv-00000000000000ff", "kr-0000000000000010"], dtype=object))
    >>> number.tolist(), bool(prefix[1] < prefix[0])
    ([255, 16], True)
    """
    try:
        raw = ids.astype("S20")  # ASCII bytes; a 20th byte shows an id longer than 19
    except (UnicodeEncodeError, TypeError, ValueError):
        return None
    chars = raw.view(np.uint8).reshape(len(ids), 20)
    if len(ids) == 0 or (chars[:, 19] != 0).any() or (chars[:, 18] == 0).any():
        return None
    hex_text = np.ascontiguousarray(chars[:, 3:19]).tobytes().decode("ascii")
    try:
        number_bytes = bytes.fromhex(hex_text)
    except ValueError:
        return None
    # fromhex also takes upper case and skips spaces: the round trip holds for lower case only
    if (chars[:, 2] != ord("-")).any() or number_bytes.hex() != hex_text:
        return None
    number = np.frombuffer(number_bytes, dtype=">u8").astype(np.uint64)
    prefix = (chars[:, 0].astype(np.uint16) << 8) | chars[:, 1]
    return prefix, number


def _text_order(ids: pd.Series, minor: np.ndarray | None = None) -> np.ndarray:
    """Positions that sort ``ids`` as text and, among equal ids, by ``minor`` (small integers
    >= 0, e.g. lineage step numbers), as ``sort_values([ids, minor])`` would.

    Our ids sort as numbers (:func:`_hex_id_parts`): one argsort of the numbers, then cheap
    stable passes; other ids take a general (slower) text sort.

    Examples
    --------
    >>> _text_order(pd.Series(["kv-0000000000000002", "kv-0000000000000001", "kv-0000000000000002"]),
    ...             np.array([2, 1, 1])).tolist()
    [1, 2, 0]
    >>> _text_order(pd.Series(["b", "a"])).tolist()
    [1, 0]
    """
    minor = np.zeros(len(ids), dtype=np.int64) if minor is None else np.asarray(minor, dtype=np.int64)
    parts = _hex_id_parts(ids.to_numpy(dtype=object))
    if parts is None or (len(minor) and (minor.min() < 0 or minor.max() > 2**20)):
        frame = pd.DataFrame({"id": ids.to_numpy(dtype=object), "minor": minor})
        return frame.sort_values(["id", "minor"], kind="stable").index.to_numpy()
    prefix, number = parts
    order = np.argsort(number)
    sorted_number = number[order]
    id_rank = np.concatenate([[0], np.cumsum(sorted_number[1:] != sorted_number[:-1])])
    # (id rank, minor) is nearly sorted already, so the stable sort is quick
    order = order[np.argsort(id_rank * (int(minor.max(initial=0)) + 1) + minor[order], kind="stable")]
    return order[np.argsort(prefix[order], kind="stable")]  # 16-bit keys: a radix sort


def mark_copies(m: pd.DataFrame, source_kind: pd.Series) -> pd.Series:
    """``copy_of`` for each measurement: the value id of the original, or None.

    Original = the member from the highest-ranked source kind (experimental first), then the
    lowest source id and row.
    """
    ref = reference_key(m["reference"])
    has_ref = ref.notna().to_numpy()
    cited = m[has_ref]
    key = _group_keys(cited)
    key["ref"] = ref[has_ref]
    key["pka3"] = cited["pka"].round(3)
    group = _groups(key)[0]
    rank = cited["source_id"].map(source_kind).map(SOURCE_KIND_RANK).fillna(9).to_numpy()
    source_code = pd.factorize(cited["source_id"], sort=True)[0]  # codes in text order
    by_preference = np.lexsort((cited["source_row"].to_numpy(), source_code, rank))  # stable
    # the preferred member of each group is its first one in that order
    first_seen = np.unique(group[by_preference], return_index=True)[1]
    original = by_preference[first_seen][group]
    is_copy = original != np.arange(len(cited))
    copy_of = np.full(len(m), np.nan, dtype=object)  # NaN, as pd.Series(None, dtype=object) holds
    copy_of[np.flatnonzero(has_ref)[is_copy]] = cited["value_id"].to_numpy(dtype=object)[original[is_copy]]
    return pd.Series(copy_of, index=m.index, dtype=object)


def _recommendation_ids(keys: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """``kr-`` + the first 16 hex digits of the SHA-256 of "compound|step|T|I|constant type"
    (T to 0.01 K, I to 0.001 mol/kg) for each row of ``keys``, hashed in DuckDB, and the
    positions that sort the ids.

    Examples
    --------
    >>> ids, by_id = _recommendation_ids(pd.DataFrame({"compound_id": ["acetic"], "step": [1], "t": [298.15],
    ...                                                "i": [0.0], "constant_type": ["thermodynamic"]}))
    >>> ids.tolist(), by_id.tolist()
    (['kr-07c7c7f05bf99bce'], [0])
    """
    key_text = pd.DataFrame(
        {
            "text": _join_columns(
                keys["compound_id"].to_numpy(dtype=object), "|", _texts("{}", keys["step"]), "|",
                _texts("{:.2f}", keys["t"]), "|", _texts("{:.3f}", keys["i"]), "|",
                keys["constant_type"].to_numpy(dtype=object),
            ),
            "position": np.arange(len(keys)),
        }
    )
    with duckdb.connect() as con:
        con.register("key_text", key_text)
        found = con.execute(
            "SELECT 'kr-' || left(sha256(text), 16) AS id FROM key_text ORDER BY position"
        ).fetchnumpy()
    ids = np.asarray(found["id"], dtype=object)
    return ids, _text_order(pd.Series(ids, dtype=object))


#: Method and category names as shared objects (arrays of them are cheap to check and hash).
METHODS = np.array(["single", "weighted_mean", "median_mad"], dtype=object)
CATEGORIES = np.array(["Recommended", "Tentative", "Doubtful"], dtype=object)
RECOMMENDED_CATEGORY, TENTATIVE, DOUBTFUL = 0, 1, 2


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
    # integer group codes and numpy arrays: each per-group figure is one pandas group kernel
    codes, uniques = pd.factorize(members["group"], use_na_sentinel=False)
    n_groups = len(uniques)
    every_group = pd.RangeIndex(n_groups)
    all_members = pd.Categorical.from_codes(codes, categories=every_group)
    pka = members["pka"].to_numpy(dtype=float)
    median = _per_group(pka, all_members, "median")[codes]
    deviation = np.abs(pka - median)
    scale = np.maximum(MAD_TO_SIGMA * _per_group(deviation, all_members, "median")[codes], DEFAULT_SPREAD)
    n_all = np.bincount(codes, minlength=n_groups)[codes]
    outlier = (n_all >= 3) & (deviation / scale > OUTLIER_Z)

    keep = ~outlier
    group = codes[keep]
    x = pka[keep]
    u = members["pka_uncertainty"].to_numpy(dtype=float)[keep]
    with np.errstate(divide="ignore", over="ignore"):
        w = 1.0 / np.where(u > 0, u, np.nan) ** 2
    source_code = pd.factorize(members["source_id"])[0][keep].astype(float)
    source_code[source_code < 0] = np.nan  # a missing source id is no source

    kept_members = pd.Categorical.from_codes(group, categories=every_group)

    def per_group(values: np.ndarray, how: str) -> np.ndarray:
        return _per_group(values, kept_members, how)

    n = np.bincount(group, minlength=n_groups)
    n_sources = per_group(source_code, "nunique")
    all_u = np.bincount(group, weights=~np.isnan(w), minlength=n_groups) == n
    sum_w = per_group(w, "sum")
    sum_wx = per_group(w * x, "sum")
    median_kept = per_group(x, "median")
    with np.errstate(divide="ignore", invalid="ignore"):  # 0/0 where a group has no weights
        weighted_mean = sum_wx / sum_w
        chi2 = per_group(w * (x - weighted_mean[group]) ** 2, "sum")
        birge = np.where(all_u & (n > 1), np.sqrt(chi2 / (n - 1)), np.nan)
        internal_u = 1.0 / np.sqrt(sum_w)
        stated_u = 1.0 / np.sqrt(np.where(sum_w > 0, sum_w, np.nan))
    low, high = per_group(x, "min"), per_group(x, "max")
    kept_mad = per_group(np.abs(x - median_kept[group]), "median")
    # the median's standard uncertainty is sqrt(pi/2)·sigma/sqrt(n) for normal data; it is never
    # taken below what the members state themselves (their combined uncertainty) nor below the
    # customary pKa reproducibility over sqrt(n), so identical values do not give u = 0
    robust_u = np.fmax(
        np.maximum.reduce(
            [
                MEDIAN_EFFICIENCY * MAD_TO_SIGMA * kept_mad / np.sqrt(n),
                (high - low) / (2 * np.sqrt(n)),
                DEFAULT_SPREAD / np.sqrt(n),
            ]
        ),
        stated_u,
    )
    u_single = per_group(u, "first")
    all_flagged = per_group(members["flagged"].to_numpy(dtype=bool)[keep], "all").astype(bool)

    single = n == 1
    use_weighted = ~single & all_u
    method = METHODS[np.where(single, 0, np.where(use_weighted, 1, 2))]
    value = np.where(single, median_kept, np.where(use_weighted, weighted_mean, median_kept))
    uncertainty = np.where(
        single, u_single, np.where(use_weighted, internal_u * np.maximum(1.0, np.where(np.isnan(birge), 1.0, birge)), robust_u)
    )
    discordant = birge > BIRGE_DISCORDANT
    n_outliers = np.bincount(codes[outlier], minlength=n_groups)
    category = np.select(
        [discordant | all_flagged, (n_sources >= 2) & (use_weighted | ~all_u)],
        [DOUBTFUL, RECOMMENDED_CATEGORY],
        TENTATIVE,
    )
    # without uncertainties, agreement of several sources is still only Tentative
    category[(category == RECOMMENDED_CATEGORY) & ~all_u] = TENTATIVE
    category = CATEGORIES[category]
    # the reason: the first that applies of discordant, all flagged, single, no uncertainties,
    # else agreement (written from the last to the first, so the first wins)
    reason = _texts("{} sources agree within their uncertainties", n_sources.astype(np.int64))
    reason[~all_u] = _texts("uncertainties missing: median of {} values", n[~all_u])
    reason[single] = "one measurement only"
    reason[all_flagged] = "every member carries a warning finding"
    birge_text = pd.Series(birge[discordant]).round(2).astype(str).to_numpy(dtype=object)
    reason[discordant] = "sources disagree beyond their uncertainties (Birge ratio " + birge_text + ")"
    has_outliers = n_outliers > 0
    reason[has_outliers] = reason[has_outliers] + _texts("; {} outlier(s) left out", n_outliers[has_outliers])

    # groups in order of their first kept member, labelled with the caller's keys
    order = pd.unique(group)
    out = pd.DataFrame(
        {
            "n_values": n,
            "n_sources": n_sources.astype(np.int64),
            "all_u": all_u,
            "sum_w": sum_w,
            "sum_wx": sum_wx,
            "median": median_kept,
            "mean": per_group(x, "mean"),
            "min": low,
            "max": high,
            "u_single": u_single,
            "all_flagged": all_flagged,
            "method": method,
            "pka": value,
            "pka_uncertainty": uncertainty,
            "birge_ratio": birge,
            "category": category,
            "reason": reason,
        }
    ).iloc[order]
    out.index = pd.Index(uniques, tupleize_cols=False)[order]
    out.index.name = "group"
    return out, pd.Series(outlier, index=members.index)


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
    worst = f["severity"].map(rank).groupby(f["value_id"], sort=False).max()
    return worst.map({v: k for k, v in rank.items()})


def _json_list(values: pd.Series) -> str:
    return json.dumps(sorted(values.tolist()), separators=(",", ":"))


def _member_lists(group: pd.Series, value_id: pd.Series) -> pd.Series:
    """Per group, the JSON array of its members' value ids, sorted.

    All members in (group, value id) order are joined into one string, with ``"]`` + NUL +
    ``["`` at each group's end, and split at the NULs: no Python work per group. Value ids
    (``kv-`` + hex digits) need no JSON escaping.

    Examples
    --------
    >>> _member_lists(pd.Series(["g", "g", "h"]), pd.Series(["kv-b", "kv-a", "kv-c"])).to_dict()
    {'g': '["kv-a","kv-b"]', 'h': '["kv-c"]'}
    """
    codes, uniques = pd.factorize(group)
    by_id = _text_order(value_id)
    order = by_id[np.argsort(codes[by_id], kind="stable")]
    sorted_codes = codes[order]
    group_ends = np.ones(len(order), dtype=bool)
    group_ends[:-1] = sorted_codes[1:] != sorted_codes[:-1]
    pieces = np.empty(2 * len(order), dtype=object)
    pieces[0::2] = value_id.to_numpy(dtype=object)[order]
    pieces[1::2] = np.array(['","', '"]\x00["'], dtype=object)[group_ends.astype(np.intp)]
    lists = ('["' + "".join(pieces.tolist())).split("\x00")[:-1]
    if len(lists) != int(group_ends.sum()):
        raise ValueError("a value id holds a NUL character; value ids are 'kv-' + 16 hex digits")
    index = pd.Index(uniques, tupleize_cols=False)[sorted_codes[group_ends]]
    return pd.Series(np.array(lists, dtype=object), index=index)


#: Columns of a measurement that grouping, consensus and the reference-state transfer read.
MEMBER_COLUMNS = ["value_id", "compound_id", "step", "pka", "pka_uncertainty", "temperature_k",
                  "ionic_strength_molal", "constant_type", "charge", "source_id"]


def consolidate(
    measurements: pd.DataFrame,
    findings: pd.DataFrame,
    sources: pd.DataFrame,
    steps_so_far: pd.Series | None = None,
    reference_state: tuple[float, float] | None = None,
    enthalpies: pd.DataFrame | None = None,
    activity_model: str = "davies",
) -> ConsolidateResult:
    """Mark copies and status, compute recommended values, and the lineage steps they add.

    ``steps_so_far`` gives each measurement's number of lineage steps before this stage (by
    value id; :func:`pipeline.lineage.step_counts`, none when omitted). The result's
    ``lineage`` holds only this stage's steps, sorted by target id and step: one
    ``recognised_as_copy`` step after each copy's own, and a ``consensus`` step for each
    recommended value (publish writes them with the measurements' steps).

    ``reference_state`` = (temperature [K], ionic strength [mol/kg]), e.g. ``(298.15, 0.0)``,
    carries every usable member there first (:func:`transfer_to_reference_state`, with the
    optional ``enthalpies`` table of ΔH° and the ``activity_model``); each recommended value
    with transferred members then gets a ``transfer_to_reference_state`` lineage step (every
    member's measured and transferred pKa, ΔH°, ΔCp° and where they came from) before its
    ``consensus`` step, and its reason says how many members were carried, or why not. The
    stored ``measurements`` keep the measured values. ``None`` (the default) transfers nothing.
    """
    # a shallow copy: pandas copies on write, so replacing columns leaves the caller's frame as is
    m = measurements.copy(deep=False)
    kind = sources.set_index("source_id")["kind"]
    m["copy_of"] = mark_copies(m, kind)
    worst = _worst_severity(findings)
    finding_of = worst.index.get_indexer(m["value_id"])  # one pass over the million value ids
    has_finding = finding_of >= 0
    severity = worst.to_numpy(dtype=object)[finding_of[has_finding]]
    status = np.full(len(m), "ok", dtype="<U8")
    status[has_finding] = np.where(severity == "error", "excluded", np.where(severity == "warning", "flagged", "ok"))

    usable = (m["copy_of"].isna().to_numpy() & (status != "excluded") & m["qualifier"].isna().to_numpy()
              & (m["solvent"] == "water").to_numpy())
    members = m.loc[usable, MEMBER_COLUMNS]
    transfer: pd.DataFrame | None = None
    if reference_state is not None:
        vh_outliers = set(findings.loc[findings["rule"] == "van_t_hoff_outlier", "value_id"].dropna())
        transfer = transfer_to_reference_state(members, reference_state, enthalpies, vh_outliers, activity_model)
        for column in ("pka", "temperature_k", "ionic_strength_molal", "constant_type"):
            members[column] = transfer[column]
    members["group"], group_keys = _groups(_group_keys(members))
    table, outlier = consensus(
        pd.DataFrame(
            {"group": members["group"], "pka": members["pka"], "pka_uncertainty": members["pka_uncertainty"],
             "source_id": members["source_id"], "flagged": status[usable] == "flagged"},
            index=members.index,
        )
    )

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

    key_frame = group_keys.iloc[table.index.to_numpy(dtype=np.int64)].reset_index(drop=True)
    rec_ids, by_id = _recommendation_ids(key_frame)
    # the recommended table in id order: every column is taken in that order once
    step = key_frame["step"].to_numpy()[by_id]
    rec = RECOMMENDED.validate(
        pd.DataFrame(
            {
                "recommendation_id": rec_ids[by_id],
                "compound_id": key_frame["compound_id"].to_numpy()[by_id],
                "step": pd.arrays.IntegerArray(step, step == 0),  # step 0 stood for "no step"
                "temperature_k": key_frame["t"].to_numpy()[by_id],
                "ionic_strength_molal": key_frame["i"].to_numpy()[by_id],
                "constant_type": key_frame["constant_type"].to_numpy()[by_id],
                "pka": table["pka"].to_numpy()[by_id],
                "pka_uncertainty": table["pka_uncertainty"].to_numpy()[by_id],
                "n_values": table["n_values"].to_numpy().astype("int64")[by_id],
                "n_sources": table["n_sources"].to_numpy().astype("int64")[by_id],
                "method": table["method"].to_numpy()[by_id],
                "birge_ratio": table["birge_ratio"].to_numpy()[by_id],
                "category": table["category"].to_numpy()[by_id],
                "reason": table["reason"].to_numpy()[by_id],
            }
        )
    )

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
    outlier_rows = m.index.get_indexer(outliers.index)
    status[outlier_rows] = "flagged"
    m["status"] = status
    # locations come from the measurements that have findings (a small part of a million rows)
    located = has_finding.copy()
    located[outlier_rows] = True
    all_findings = attach_locations(pd.concat([findings, new_findings], ignore_index=True),
                                    m.loc[located, ["value_id", "compound_id", "source_id", "source_row"]])

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
    birge = table["birge_ratio"].to_numpy(dtype=float)
    birge_text = np.full(len(table), "null", dtype=object)
    has_birge = ~np.isnan(birge)
    birge_text[has_birge] = [str(round(float(b), 4)) for b in birge[has_birge]]  # Python's exact rounding
    rec_lineage = pd.DataFrame(
        {
            "target_id": rec_ids,
            "step_no": consensus_step.to_numpy(),
            "operation": "consensus",
            "parameters": _join_columns(
                '{"method":"', table["method"].to_numpy(dtype=object), '","n_values":', _texts("{}", table["n_values"]),
                ',"birge_ratio":', birge_text, ',"category":"', table["category"].to_numpy(dtype=object), '"}',
            ),
            "inputs": inputs.reindex(table.index).to_numpy(),
        }
    )
    copies = m[m["copy_of"].notna()]
    earlier = steps_so_far if steps_so_far is not None else pd.Series(dtype="int64")
    copy_lineage = pd.DataFrame(
        {
            "target_id": copies["value_id"],
            "step_no": copies["value_id"].map(earlier).fillna(0).astype("int64") + 1,
            "operation": "recognised_as_copy",
            "parameters": '{"rule":"same compound, step, conditions, primary reference and value"}',
            "inputs": '["' + copies["copy_of"] + '"]',
        }
    )
    added = LINEAGE.validate(pd.concat(
        [copy_lineage, rec_lineage] + ([transfer_lineage] if len(transfer_lineage) else []), ignore_index=True
    ))
    order = _text_order(added["target_id"], added["step_no"].to_numpy())
    return ConsolidateResult(
        measurements=m,
        recommended=rec,
        lineage=added.take(order).reset_index(drop=True),
        findings=all_findings,
    )
