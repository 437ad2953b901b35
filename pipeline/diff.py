"""Release diff: what changed between two published kaledger databases.

Values are matched by ``value_id`` (derived from source, table file and row, so an unchanged
row keeps its id), recommended values by ``recommendation_id`` (derived from compound, step and
conditions), sources by ``source_id``. A measurement's columns fall in two groups:

- its *own* columns, read or computed from its source row (``pka``, conditions, reported text,
  identity, ...): a difference there is a **changed** value;
- the columns consolidation sets from the other rows (``copy_of``, ``status``): a difference
  there only is a **status change** (e.g. a value stops being a copy because the source it
  copied was removed).

A recommended value **moved** when its pKa changed by more than the threshold [pK units];
any other difference (members, uncertainty, category) makes it **revised**.

Both files are attached read-only to one in-memory DuckDB connection; the comparison is
column-wise (pandas), no per-row loops.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import pandas as pd

from pipeline.provenance import json_scalar

DERIVED_COLUMNS = ("copy_of", "status")
DEFAULT_THRESHOLD = 0.02  # pK units; about the spread of good independent pKa values (common practice)


def _sql_path(path: Path) -> str:
    return "'" + str(path).replace("'", "''") + "'"


def _differs(a: pd.Series, b: pd.Series) -> pd.Series:
    """True where two aligned columns differ; two missing values are equal."""
    both_missing = a.isna() & b.isna()
    equal = (a.astype(object) == b.astype(object)).fillna(False).astype(bool)
    return ~(both_missing | equal)


def _changes(old: pd.DataFrame, new: pd.DataFrame, key: str, columns: list[str]) -> pd.DataFrame:
    """Rows present in both, with a boolean column per compared column (True = differs)."""
    both = old.merge(new, on=key, suffixes=("_old", "_new"))
    flags = pd.DataFrame({c: _differs(both[f"{c}_old"], both[f"{c}_new"]) for c in columns}, index=both.index)
    return both, flags


def _change_list(both: pd.DataFrame, flags: pd.DataFrame, key: str, columns: list[str],
                 extra: list[str]) -> list[dict[str, Any]]:
    rows = flags.any(axis=1)
    out = []
    for i in flags.index[rows]:  # loops over changed rows only (few)
        item = {key: both.at[i, key]}
        item.update({c: json_scalar(both.at[i, f"{c}_new"]) for c in extra})
        item["changes"] = {c: [json_scalar(both.at[i, f"{c}_old"]), json_scalar(both.at[i, f"{c}_new"])]
                           for c in columns if flags.at[i, c]}
        out.append(item)
    return sorted(out, key=lambda d: str(d[key]))


def _records(frame: pd.DataFrame, columns: list[str]) -> list[dict[str, Any]]:
    return [{c: json_scalar(v) for c, v in row.items()} for row in frame[columns].to_dict("records")]


def diff(old: Path | str, new: Path | str, threshold: float = DEFAULT_THRESHOLD) -> dict[str, Any]:
    """Compare two published databases.

    Parameters
    ----------
    old, new : paths of published databases (``new`` is the later release)
    threshold : pK units a recommended value must move by to count as moved (> threshold)

    Returns
    -------
    dict
        ``old`` / ``new`` (path, build facts), ``threshold``, ``sources`` (added, removed,
        changed), ``values`` (added, removed, changed, status_changed, removed_with_source),
        ``recommended`` (added, removed, moved, revised), ``findings`` (count per rule and
        severity where they differ). Every list is sorted by id.

    Raises
    ------
    FileNotFoundError
        When either file is missing.
    ValueError
        When ``threshold`` is negative.
    """
    if threshold < 0:
        raise ValueError(f"threshold {threshold!r} must be >= 0 (pK units)")
    old, new = Path(old), Path(new)
    for path in (old, new):
        if not path.is_file():
            raise FileNotFoundError(f"{path}: no kaledger database here; run 'kaledger build' first")
    con = duckdb.connect()
    try:
        con.execute(f"ATTACH {_sql_path(old)} AS o (READ_ONLY)")
        same = old.resolve() == new.resolve()
        if not same:
            con.execute(f"ATTACH {_sql_path(new)} AS n (READ_ONLY)")
        alias = {"o": "o", "n": "o" if same else "n"}

        def table(db: str, name: str) -> pd.DataFrame:
            return con.execute(f"SELECT * FROM {alias[db]}.{name} ORDER BY ALL").df()

        t = {db: {name: table(db, name) for name in ("sources", "measurements", "recommended", "build_info",
                                                     "findings", "compounds")}
             for db in ("o", "n")}
    finally:
        con.close()

    def info(db: str, path: Path) -> dict[str, Any]:
        facts = dict(zip(t[db]["build_info"]["key"], t[db]["build_info"]["value"], strict=True))
        keys = ("built_at", "package_version", "schema_version")
        return {"path": str(path), **{k: facts.get(k) for k in keys}}

    so, sn = t["o"]["sources"], t["n"]["sources"]
    src_added = sn[~sn["source_id"].isin(so["source_id"])]
    src_removed = so[~so["source_id"].isin(sn["source_id"])]
    hash_cols = [c for c in ("file_sha256", "descriptor_sha256", "license", "citation") if c in so and c in sn]
    both, flags = _changes(so, sn, "source_id", hash_cols)
    sources = {
        "added": _records(src_added, ["source_id", "title", "license", "accepted"]),
        "removed": _records(src_removed, ["source_id", "title", "license", "accepted"]),
        "changed": _change_list(both, flags, "source_id", hash_cols, []),
    }

    mo, mn = t["o"]["measurements"], t["n"]["measurements"]
    shown = ["value_id", "source_id", "source_row", "name_reported", "pka", "value_reported"]
    added = mn[~mn["value_id"].isin(mo["value_id"])]
    removed = mo[~mo["value_id"].isin(mn["value_id"])]
    with_source = removed["source_id"].isin(src_removed["source_id"])
    common = [c for c in mo.columns if c in mn.columns and c != "value_id"]
    own = [c for c in common if c not in DERIVED_COLUMNS]
    derived = [c for c in common if c in DERIVED_COLUMNS]
    both, flags = _changes(mo, mn, "value_id", common)
    own_changed = flags[own].any(axis=1)
    values = {
        "added": _records(added, shown),
        "removed": _records(removed[~with_source], shown),
        "removed_with_source": {k: sorted(g["value_id"]) for k, g in removed[with_source].groupby("source_id")},
        "changed": _change_list(both[own_changed], flags.loc[own_changed, own], "value_id", own,
                                ["source_id", "source_row"]),
        "status_changed": _change_list(both[~own_changed], flags.loc[~own_changed, derived], "value_id",
                                       derived, ["source_id", "source_row"]),
        "columns_only_in_old": sorted(set(mo.columns) - set(mn.columns)),
        "columns_only_in_new": sorted(set(mn.columns) - set(mo.columns)),
    }

    names = pd.concat([t["o"]["compounds"], t["n"]["compounds"]]).drop_duplicates("compound_id", keep="last")
    names = names.set_index("compound_id")["name"]
    ro, rn = t["o"]["recommended"], t["n"]["recommended"]
    ro = ro.assign(name=ro["compound_id"].map(names))
    rn = rn.assign(name=rn["compound_id"].map(names))
    rshown = ["recommendation_id", "compound_id", "name", "step", "temperature_k", "ionic_strength_molal", "pka",
              "category"]
    rcommon = [c for c in ro.columns if c in rn.columns and c not in ("recommendation_id", "name")]
    both, flags = _changes(ro, rn, "recommendation_id", rcommon)
    delta = both["pka_new"] - both["pka_old"]
    moved = delta.abs() > threshold
    revised = flags.any(axis=1) & ~moved
    moved_rows = both[moved].assign(delta=delta[moved])
    recommended = {
        "added": _records(rn[~rn["recommendation_id"].isin(ro["recommendation_id"])], rshown),
        "removed": _records(ro[~ro["recommendation_id"].isin(rn["recommendation_id"])], rshown),
        "moved": sorted(
            (
                {"recommendation_id": r["recommendation_id"], "compound_id": r["compound_id_new"],
                 "name": json_scalar(r["name_new"]),
                 "step": json_scalar(r["step_new"]), "temperature_k": json_scalar(r["temperature_k_new"]),
                 "ionic_strength_molal": json_scalar(r["ionic_strength_molal_new"]),
                 "pka_old": json_scalar(r["pka_old"]), "pka_new": json_scalar(r["pka_new"]), "delta": json_scalar(r["delta"]),
                 "category_old": r["category_old"], "category_new": r["category_new"]}
                for r in moved_rows.to_dict("records")
            ),
            key=lambda d: d["recommendation_id"],
        ),
        "revised": _change_list(both[revised], flags.loc[revised], "recommendation_id", rcommon, ["compound_id", "name"]),
    }

    fo = t["o"]["findings"].groupby(["rule", "severity"]).size()
    fn = t["n"]["findings"].groupby(["rule", "severity"]).size()
    counts = pd.concat([fo.rename("old"), fn.rename("new")], axis=1).fillna(0).astype(int)
    counts = counts[counts["old"] != counts["new"]].reset_index()
    findings = _records(counts, ["rule", "severity", "old", "new"])

    return {
        "old": info("o", old),
        "new": info("n", new),
        "threshold": threshold,
        "sources": sources,
        "values": values,
        "recommended": recommended,
        "findings": findings,
    }


def _fmt(x: Any) -> str:
    if isinstance(x, float):
        return f"{x:.6g}"
    return repr(x) if isinstance(x, str) else str(x)


def format_diff(report: dict[str, Any]) -> list[str]:
    """The report of :func:`diff` as lines of text."""
    s, v, r = report["sources"], report["values"], report["recommended"]
    n_with_source = sum(len(ids) for ids in v["removed_with_source"].values())
    lines = [
        f"old: {report['old']['path']} (built {report['old']['built_at']}, kaledger {report['old']['package_version']})",
        f"new: {report['new']['path']} (built {report['new']['built_at']}, kaledger {report['new']['package_version']})",
        "",
        f"sources: {len(s['added'])} added, {len(s['removed'])} removed, {len(s['changed'])} changed",
    ]
    lines += [f"  + {x['source_id']} [{x['license']}] {x['title']}" for x in s["added"]]
    lines += [f"  - {x['source_id']} [{x['license']}] {x['title']} ({x['accepted']} values)" for x in s["removed"]]
    for x in s["changed"]:
        what = ", ".join(f"{c} {str(a)[:12]}… -> {str(b)[:12]}…" for c, (a, b) in x["changes"].items())
        lines.append(f"  ~ {x['source_id']}: {what}")
    lines += [
        "",
        f"values: {len(v['added'])} added, {len(v['removed']) + n_with_source} removed "
        f"({n_with_source} with their source), {len(v['changed'])} changed, "
        f"{len(v['status_changed'])} status changed",
    ]
    lines += [f"  + {x['value_id']} {x['source_id']} row {x['source_row']}: {x['name_reported']} "
              f"pKa {_fmt(x['pka'])} (cell {x['value_reported']!r})" for x in v["added"]]
    lines += [f"  - {x['value_id']} {x['source_id']} row {x['source_row']}: {x['name_reported']} "
              f"pKa {_fmt(x['pka'])}" for x in v["removed"]]
    lines += [f"  - {len(ids)} values of removed source {sid}" for sid, ids in v["removed_with_source"].items()]
    for label, key in (("~", "changed"), ("status", "status_changed")):
        for x in v[key]:
            what = "; ".join(f"{c} {_fmt(a)} -> {_fmt(b)}" for c, (a, b) in x["changes"].items())
            lines.append(f"  {label} {x['value_id']} {x['source_id']} row {x['source_row']}: {what}")
    lines += [
        "",
        f"recommended: {len(r['added'])} added, {len(r['removed'])} removed, {len(r['moved'])} moved by "
        f"more than {report['threshold']} pK, {len(r['revised'])} revised within it",
    ]
    def head(sign: str, x: dict) -> str:
        return (f"  {sign} {x['recommendation_id']} {x['name'] or x['compound_id']} step {x['step']} "
                f"at {_fmt(x['temperature_k'])} K: ")

    lines += [head("+", x) + f"pKa {_fmt(x['pka'])} {x['category']}" for x in r["added"]]
    lines += [head("-", x) + f"pKa {_fmt(x['pka'])} {x['category']}" for x in r["removed"]]
    lines += [head(">", x) + f"pKa {x['pka_old']:.3f} -> {x['pka_new']:.3f} ({x['delta']:+.3f}), "
              f"{x['category_old']} -> {x['category_new']}" for x in r["moved"]]
    for x in r["revised"]:
        what = "; ".join(f"{c} {_fmt(a)} -> {_fmt(b)}" for c, (a, b) in x["changes"].items())
        lines.append(f"  ~ {x['recommendation_id']} {x['name'] or x['compound_id']}: {what}")
    if report["findings"]:
        lines += ["", "findings (old -> new count):"]
        lines += [f"  {x['severity']:8} {x['rule']}: {x['old']} -> {x['new']}" for x in report["findings"]]
    return lines
