"""Vectorized paths of the rules: the grouped van 't Hoff fit agrees with the one-group fit.

Tris: pKa(25 °C) 8.072, ΔH° 47.45 kJ/mol, ΔCp° -59 J/(K mol) (Goldberg, Kishore & Lennen 2002,
J. Phys. Chem. Ref. Data 31, 231). Noise and the second, flatter series are made up for the test.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import physchem


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
