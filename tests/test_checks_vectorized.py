"""Vectorized paths of the rules agree with their one-group-at-a-time definitions.

Tris: pKa(25 °C) 8.072, ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol) (Goldberg, Kishore & Lennen 2002,
J. Phys. Chem. Ref. Data 31, 231). Noise and the second, flatter series are made up for the test.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from test_checks import T25, make_measurements

from pipeline import checks, physchem


@pytest.mark.parametrize("weighted", [False, True])
def test_grouped_van_t_hoff_fits_equal_one_fit_per_group(weighted: bool) -> None:
    rng = np.random.default_rng(7)
    t = np.array([278.15, 283.15, 288.15, 298.15, 310.15, 318.15, 328.15])
    tris = physchem.van_t_hoff(8.072, 298.15, t, 47450.0, -59.0).value + rng.normal(0, 0.003, t.size)
    flat = physchem.van_t_hoff(4.2, 298.15, t[:4], 1500.0).value + rng.normal(0, 0.003, 4)
    groups = [(t, tris, True, 310.15), (t[:4], flat, False, 288.15), (t[:5], tris[:5], False, 298.15)]
    group = np.concatenate([np.full(len(g[0]), k) for k, g in enumerate(groups)])
    weights = rng.uniform(100, 10000, group.size) if weighted else None
    fits = physchem.fit_van_t_hoff_groups(
        group, np.concatenate([g[0] for g in groups]), np.concatenate([g[1] for g in groups]),
        [g[3] for g in groups], [g[2] for g in groups], weights=weights,
    )
    for k, (tk, pk, with_cp, t_ref) in enumerate(groups):
        w = None if weights is None else weights[group == k]
        one = physchem.fit_van_t_hoff(tk, pk, weights=w, with_heat_capacity=with_cp, t_ref_k=t_ref)
        n = 3 if with_cp else 2
        assert fits.pka_ref[k] == pytest.approx(one.pka_ref, rel=1e-9)
        assert fits.delta_h[k] == pytest.approx(one.delta_h, rel=1e-6)
        assert fits.delta_cp[k] == pytest.approx(one.delta_cp, rel=1e-6, abs=1e-9)
        # curve_fit's covariance comes from a finite-difference Jacobian: equal to about 1e-5
        np.testing.assert_allclose(fits.covariance[k, :n, :n], one.covariance, rtol=1e-4)
        assert fits.chi_squared[k] == pytest.approx(float(np.sum((one.normalized_residuals if w is not None
                                                                  else one.residuals) ** 2)), rel=1e-6)
        assert fits.dof[k] == len(tk) - n


def test_grouped_van_t_hoff_needs_more_points_than_parameters() -> None:
    with pytest.raises(ValueError, match="2 points given in group 0; fitting 2 parameters needs at least 3"):
        physchem.fit_van_t_hoff_groups([0, 0], [288.15, 298.15], [4.8, 4.76], [298.15], [False])


def _one_series_at_a_time(t: np.ndarray, pka: np.ndarray, u: np.ndarray, limit: float = 3.0,
                          min_t: int = 4) -> set[int]:
    """The van 't Hoff rule for one series of nodes, one scipy fit per left-out node (the rule's
    definition, written as a loop): indices of the nodes set aside whose |z| exceeds the limit."""
    active, flagged = np.arange(len(t)), set()
    z = np.zeros(len(t))
    while len(active) >= min_t:
        for k in active:
            others = active[active != k]
            with_cp = len(others) >= 5
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # a flat curve: curve_fit finds no covariance
                fit = physchem.fit_van_t_hoff(t[others], pka[others], with_heat_capacity=with_cp, t_ref_k=float(t[k]))
            spread = float(fit.covariance[0, 0]) + float(np.sum(fit.residuals**2)) / (len(others) - (3 if with_cp else 2))
            z[k] = (pka[k] - fit.pka_ref) / np.sqrt(u[k] ** 2 + spread)
        worst = active[np.argmax(np.abs(z[active]))]
        if abs(z[worst]) <= limit:
            break
        flagged.add(int(worst))
        active = active[active != worst]
    return flagged


def test_van_t_hoff_rule_equals_one_fit_per_left_out_node() -> None:
    # made-up series of 4 to 8 temperatures around Tris-like curves, some with one or two outliers,
    # one flat series with an outlier (not judged: no covariance for the flat other nodes)
    rng = np.random.default_rng(11)
    temperatures = np.array([278.15, 283.15, 288.15, 293.15, 298.15, 303.15, 310.15, 318.15])
    rows, expected = [], set()
    for s in range(40):
        n = 4 + s % 5
        t = np.sort(rng.choice(temperatures, n, replace=False))
        pka = np.round(physchem.van_t_hoff(6.0 + s / 10, T25, t, 20000.0 + 1000.0 * s, -50.0).value
                       + rng.normal(0, 0.004, n), 3)
        first = int(rng.integers(n))
        if s % 3 == 0:
            pka[first] += 0.25
        if s % 6 == 0:  # a second outlier: two rounds of setting aside
            pka[(first + n // 2) % n] -= 0.4
        if s == 39:
            pka[:] = 5.0
            pka[2] = 6.0
        u = rng.choice([0.003, 0.006, 0.01], n)
        expected |= {(f"c{s}", float(t[k])) for k in _one_series_at_a_time(t, pka, u)}
        rows += [{"compound_id": f"c{s}", "pka": p, "temperature_k": x, "pka_uncertainty": v}
                 for x, p, v in zip(t, pka, u, strict=True)]
    m = make_measurements(rows)
    result = checks.RULES["van_t_hoff_outlier"].function(m, {})
    found = m.set_index("value_id").loc[result.value_id, ["compound_id", "temperature_k"]]
    assert set(zip(found["compound_id"], found["temperature_k"], strict=True)) == expected
    assert expected and not any(c == "c39" for c, _ in expected)
