"""Consolidation's vectorized helpers against the plain pandas operations they replace.

Check values: the reference results are pandas' own ``groupby(...).ngroup()``, ``sort_values``
and per-group sorted joins on random data (computed in the test, no outside values).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.consolidate import _groups, _join_columns, _member_lists, _text_order


def _random_ids(rng: np.random.Generator, n: int, prefixes: tuple[str, ...] = ("kv", "kr")) -> list[str]:
    return [f"{rng.choice(prefixes)}-{int(x):016x}" for x in rng.integers(0, 2**63, n)]


def test_group_numbers_match_pandas_ngroup() -> None:
    rng = np.random.default_rng(1)
    keys = pd.DataFrame({"c": rng.choice(["a", "b", "c"], 500), "s": rng.integers(0, 3, 500),
                         "t": rng.choice([298.15, 310.15, np.nan], 500)})
    numbers, group_keys = _groups(keys)
    expected = keys.groupby(list(keys.columns), sort=False, dropna=False).ngroup().to_numpy()
    assert (numbers == expected).all()
    first = keys.drop_duplicates().reset_index(drop=True)
    pd.testing.assert_frame_equal(group_keys, first, check_dtype=False)


def test_text_order_matches_sort_values_for_hex_ids_and_other_text() -> None:
    rng = np.random.default_rng(2)
    ids = _random_ids(rng, 300)
    ids = ids + ids[:50]  # repeated ids with other step numbers
    steps = rng.integers(1, 5, len(ids))
    frame = pd.DataFrame({"id": ids, "step": steps}).drop_duplicates()
    expected = frame.sort_values(["id", "step"]).index.to_numpy()
    got = frame.index.to_numpy()[_text_order(frame["id"].reset_index(drop=True), frame["step"].to_numpy())]
    assert (got == expected).all()
    other = pd.Series(["b-1", "a", "kv-xyz", "ä"])  # not our id form: the general sort
    assert _text_order(other).tolist() == other.sort_values().index.tolist()


def test_member_lists_and_joined_columns() -> None:
    rng = np.random.default_rng(3)
    ids = pd.Series(_random_ids(rng, 200, ("kv",)))
    group = pd.Series(rng.integers(0, 40, 200))
    got = _member_lists(group, ids)
    expected = ids.groupby(group).agg(lambda s: '["' + '","'.join(sorted(s)) + '"]')
    assert got.sort_index().to_dict() == expected.to_dict()
    assert _member_lists(pd.Series([], dtype="int64"), pd.Series([], dtype=object)).empty
    texts = np.array(["a\x00b", "c"], dtype=object)  # a separator inside a text: still right
    assert _join_columns(texts, "|", texts).tolist() == ["a\x00b|a\x00b", "c|c"]
