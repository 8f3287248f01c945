"""Tests of spatial_ev.space.scales (scalogram and scale classes)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from spatial_ev.errors import InputError
from spatial_ev.space.scales import (
    classify_scales,
    default_scale_breaks,
    extent_wavelength,
    resolvable_scales,
    scalogram,
)


def centred_orthonormal_basis(n, rng):
    """A complete orthonormal basis of the n - 1 dimensional space orthogonal to 1."""
    a = np.column_stack([np.ones(n), rng.standard_normal((n, n - 1))])
    q, _ = np.linalg.qr(a)
    return pd.DataFrame(q[:, 1:], columns=[f"v{k:02d}" for k in range(1, n)])


class TestScalogram:
    def test_full_basis_sums_to_one(self):
        # Over the complete basis the per-vector shares sum to 1 (Legendre, Borcard & Roberts
        # 2012, Ecology 93:1234-1240 [memory]; follows from Parseval's identity [derived]).
        rng = np.random.default_rng(1234567)
        basis = centred_orthonormal_basis(15, rng)
        y = rng.standard_normal((15, 4))
        table = scalogram(y, basis)
        assert table["r2"].sum() == pytest.approx(1.0, abs=1e-12)
        assert table["cumulative_r2"].iloc[-1] == pytest.approx(1.0, abs=1e-12)

    def test_subset_equals_ols_r2(self):
        # For orthogonal vectors the shares add up to the regression R²; statsmodels OLS is the
        # reference (univariate response, R² of the fitted model).
        rng = np.random.default_rng(7654321)
        basis = centred_orthonormal_basis(30, rng)
        y = rng.standard_normal(30)
        subset = basis.iloc[:, [0, 3, 7]]
        ols = sm.OLS(y, sm.add_constant(subset.to_numpy())).fit()
        assert scalogram(y, subset)["r2"].sum() == pytest.approx(ols.rsquared, rel=1e-10)

    def test_scales_column_and_index(self):
        rng = np.random.default_rng(99)
        basis = centred_orthonormal_basis(8, rng)
        scales = pd.Series(np.linspace(70, 10, 7), index=basis.columns)
        table = scalogram(rng.standard_normal((8, 2)), basis, scales=scales)
        assert list(table.index) == list(basis.columns)
        np.testing.assert_allclose(table["scale"], scales)

    def test_rows_mismatch(self):
        with pytest.raises(InputError, match="has 4 rows but `Y` has 5 sites"):
            scalogram(np.ones((5, 2)) + np.arange(5)[:, None],
                      pd.DataFrame({"a": [1., -1, 0, 0]}))

    def test_constant_vector(self):
        with pytest.raises(InputError, match="constant"):
            scalogram(np.arange(4.0), pd.DataFrame({"a": [2.0] * 4}))


class TestScaleClasses:
    scales = pd.Series([900., 600., 400., 300., 200., 100.], index=list("abcdef"))

    def test_default_breaks_equal_counts(self):
        np.testing.assert_allclose(default_scale_breaks(self.scales), [500., 250.])
        np.testing.assert_allclose(default_scale_breaks(self.scales, n_classes=2), [350.])

    def test_classify_default(self):
        classes = classify_scales(self.scales, ["f", "a", "d", "b"])
        assert [c.name for c in classes] == ["broad", "medium", "fine"]
        assert classes[0].vectors == ("a", "b")
        assert classes[0].scale_range == (600.0, 900.0)
        assert classes[1].vectors == ("d",)
        assert classes[2].vectors == ("f",)

    def test_user_breaks_any_order_and_empty_class(self):
        classes = classify_scales(self.scales, ["a", "b"], breaks=[150.0, 700.0])
        assert classes[0].vectors == ("a",) and classes[0].bounds == (700.0, np.inf)
        assert classes[1].vectors == ("b",)
        assert classes[2].vectors == () and classes[2].scale_range is None

    def test_unknown_vector(self):
        with pytest.raises(InputError, match=r"\['zz'\] are not in the basis"):
            classify_scales(self.scales, ["zz"])

    def test_bad_breaks(self):
        with pytest.raises(InputError, match="distinct positive"):
            classify_scales(self.scales, ["a"], breaks=[-1.0])

    def test_too_few_vectors(self):
        with pytest.raises(InputError, match="cannot be split"):
            default_scale_breaks(self.scales.iloc[:2])


class TestResolvableScales:
    def test_extent_wavelength_of_a_rotated_rectangle(self):
        # twice the long side of the smallest enclosing rectangle, whatever the rotation and
        # with interior points (shapely's minimum_rotated_rectangle as the oracle)
        import shapely
        from shapely.geometry import MultiPoint

        rng = np.random.default_rng(20261202)
        a = np.deg2rad(30.0)
        rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
        corners = np.array([[0, 0], [300, 0], [300, 120], [0, 120]], float)
        inside = rng.uniform([0, 0], [300, 120], (50, 2))
        xy = np.vstack([corners, inside]) @ rot.T + [1000.0, 2000.0]
        rect = shapely.minimum_rotated_rectangle(MultiPoint([tuple(p) for p in xy]))
        c = np.asarray(rect.exterior.coords)[:3]
        long_side = max(np.hypot(*(c[1] - c[0])), np.hypot(*(c[2] - c[1])))
        assert extent_wavelength(xy) == pytest.approx(2 * long_side, rel=1e-9)
        assert extent_wavelength(xy) == pytest.approx(600.0, rel=1e-9)

    def test_transect_is_twice_its_length(self):
        # a transect's broadest resolvable wavelength is ≈ 2 × extent (REFERENCES "Sampling
        # design" [derived]); collinear points have no hull, the length is used
        xy = np.column_stack([np.arange(11.0) * 3, np.arange(11.0) * 4])
        assert extent_wavelength(xy) == pytest.approx(2 * 50.0)

    def test_finest_is_the_five_percent_quantile(self):
        # numpy's quantile (method "lower") as the oracle
        rng = np.random.default_rng(7)
        s = pd.Series(rng.uniform(10, 500, 61))
        finest, broadest = resolvable_scales(s, [[0, 0], [100, 0], [100, 50], [0, 50]])
        assert finest == np.quantile(s.to_numpy(), 0.05, method="lower")
        assert broadest == pytest.approx(200.0)

    def test_bad_coordinates(self):
        with pytest.raises(InputError, match="two columns"):
            extent_wavelength(np.zeros((4, 3)))
        with pytest.raises(InputError, match="same point"):
            extent_wavelength(np.ones((4, 2)))
