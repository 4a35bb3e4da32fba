"""The shared numerics: the tensor-product spline evaluator against scipy's FITPACK evaluation."""

import numpy as np
import pytest
from scipy.interpolate import RectBivariateSpline

from sedtemp._numerics import TensorSpline


@pytest.fixture(scope="module")
def splines():
    x = np.log(np.geomspace(3.0, 300.0, 40))
    y = np.linspace(0.5, 3.0, 26)
    surfaces = [np.sin(x[:, None] * (j + 1)) * np.cos(0.5 * y[None]) + x[:, None] * y[None] for j in range(4)]
    return x, y, [RectBivariateSpline(x, y, z) for z in surfaces]


def test_scattered_values_and_x_derivative_equal_fitpack(splines):
    # reference: scipy RectBivariateSpline.ev (FITPACK bispev/parder); same polynomial, rounding only
    x, y, spl = splines
    rng = np.random.default_rng(3)
    px, py = rng.uniform(x[0], x[-1], 3000), rng.uniform(y[0], y[-1], 3000)
    px[:4], py[:4] = [x[0], x[-1], x[7], x[0]], [y[0], y[-1], y[3], y[-1]]  # knots and corners
    val, dval = TensorSpline(spl)(px, py, dx=True)
    ref = np.stack([s.ev(px, py) for s in spl], axis=-1)
    dref = np.stack([s.ev(px, py, dx=1) for s in spl], axis=-1)
    np.testing.assert_allclose(val, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(dval, dref, rtol=0, atol=1e-10)


@pytest.mark.parametrize("width", [0.05, 1.0, None])  # narrow windows, wide ones, the whole span
def test_tensor_grids_per_row_equal_fitpack(splines, width):
    x, y, spl = splines
    rng = np.random.default_rng(4)
    k = 7
    if width is None:
        gx, gy = np.tile(np.linspace(x[0], x[-1], 9), (k, 1)), np.tile(np.linspace(y[0], y[-1], 5), (k, 1))
    else:
        gx = np.clip(rng.uniform(x[0], x[-1], (k, 1)) + np.linspace(0, width, 9), x[0], x[-1])
        gy = np.clip(rng.uniform(y[0], y[-1], (k, 1)) + np.linspace(0, width, 5), y[0], y[-1])
    got = TensorSpline(spl).on_grids(gx, gy)
    assert got.shape == (k, 9, 5, len(spl))
    ref = np.stack([s.ev(np.repeat(gx, 5, axis=1).ravel(), np.tile(gy, (1, 9)).ravel()) for s in spl], axis=-1)
    np.testing.assert_allclose(got.reshape(-1, len(spl)), ref, rtol=0, atol=1e-12)


def test_splines_on_different_knots_are_refused(splines):
    x, y, spl = splines
    other = RectBivariateSpline(x[::2], y, np.ones((x[::2].size, y.size)))
    with pytest.raises(ValueError, match="same knots"):
        TensorSpline([spl[0], other])
