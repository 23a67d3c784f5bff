"""Tests of ntrans.terrain: surface factor (Horn 1981) and bilinear sampling."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine

from ntrans.errors import InputError
from ntrans.terrain import pixel_centres, sample_bilinear, surface_factor

# Tolerance for exact results: a few ulps of values near 1 after ~20 flops.
EXACT = 1e-12


def plane(shape, dx, dy, sx, sy, z0=10.0):
    """Plane z = z0 + sx * x + sy * y sampled at pixel centres (x east, y south)."""
    rows, cols = shape
    x = (np.arange(cols) + 0.5) * dx
    y = (np.arange(rows) + 0.5) * dy
    return z0 + sx * x[None, :] + sy * y[:, None]


@pytest.mark.parametrize(
    "shape, dx, dy, sx, sy, z_to_xy",
    [
        ((6, 7), 1.0, 1.0, 0.5, 0.0, 1.0),
        ((5, 4), 2.0, 0.5, -0.3, 0.8, 1.0),
        ((3, 9), 0.25, 3.0, 1.7, -2.2, 1.0),
        ((4, 4), 1.0, 1.0, 1.0, 1.0, 0.3048),
        ((1, 5), 1.0, 1.0, 0.75, 0.0, 1.0),
        ((5, 1), 1.0, 2.0, 0.0, 0.4, 1.0),
    ],
)
def test_surface_factor_plane_is_secant(shape, dx, dy, sx, sy, z_to_xy):
    z = plane(shape, dx, dy, sx, sy)
    s = surface_factor(z, dx, dy, z_to_xy=z_to_xy)
    # slope only along axes with more than one pixel can be seen
    gx = sx * z_to_xy if shape[1] > 1 else 0.0
    gy = sy * z_to_xy if shape[0] > 1 else 0.0
    theta = np.arctan(np.hypot(gx, gy))
    # geometry identity: 3-D area / plan area of a plane tilted by theta is 1/cos(theta);
    # the one-sided edge fallback is exact on a plane too, so every pixel is checked
    np.testing.assert_allclose(s, 1.0 / np.cos(theta), rtol=EXACT)


def test_surface_factor_plane_with_nodata_holes_stays_exact():
    z = plane((8, 9), 1.5, 1.0, 0.6, -0.4)
    z[2, 3] = np.nan
    z[5, :4] = np.nan
    z[0, 8] = np.nan
    s = surface_factor(z, 1.5, 1.0)
    assert np.isnan(s[np.isnan(z)]).all()
    valid = ~np.isnan(z)
    # geometry identity: plane tilted by theta -> 1/cos(theta), fallbacks stay exact
    np.testing.assert_allclose(s[valid], np.sqrt(1 + 0.6**2 + 0.4**2), rtol=EXACT)


def test_surface_factor_matches_horn_formula_in_interior():
    rng = np.random.default_rng(3)
    z = rng.normal(size=(7, 8))
    dx, dy = 2.0, 3.0
    s = surface_factor(z, dx, dy)
    for r in range(1, 6):
        for c in range(1, 7):
            a, b, cc = z[r - 1, c - 1], z[r - 1, c], z[r - 1, c + 1]
            d, f = z[r, c - 1], z[r, c + 1]
            g, h, i = z[r + 1, c - 1], z[r + 1, c], z[r + 1, c + 1]
            # published formula: Horn (1981) Proc. IEEE 69(1), 3x3 weighted differences
            zx = ((cc + 2 * f + i) - (a + 2 * d + g)) / (8 * dx)
            zy = ((g + 2 * h + i) - (a + 2 * b + cc)) / (8 * dy)
            # round-off only: same arithmetic in a different order
            assert s[r, c] == pytest.approx(np.sqrt(1 + zx**2 + zy**2), rel=EXACT)


def test_surface_factor_isolated_pixel_is_flat():
    z = np.full((3, 3), np.nan)
    z[1, 1] = 5.0
    s = surface_factor(z, 1.0, 1.0)
    assert s[1, 1] == 1.0  # no neighbour in any direction -> zero slope (by definition)
    assert np.isnan(s).sum() == 8


def test_surface_factor_at_least_one():
    rng = np.random.default_rng(0)
    z = rng.normal(size=(20, 20))
    z[rng.random((20, 20)) < 0.2] = np.nan
    s = surface_factor(z, 1.0, 1.0)
    assert (s[~np.isnan(z)] >= 1.0).all()


@pytest.mark.parametrize("dx, dy", [(0.0, 1.0), (1.0, np.nan)])
def test_surface_factor_rejects_bad_spacing(dx, dy):
    with pytest.raises(InputError):
        surface_factor(np.zeros((2, 2)), dx, dy)


def test_surface_factor_rejects_non_2d():
    with pytest.raises(InputError):
        surface_factor(np.zeros(4), 1.0, 1.0)


TRANSFORM = Affine(2.0, 0.0, 100.0, 0.0, -1.0, 50.0)  # 2 wide, 1 high, north-up


def test_pixel_centres():
    x, y = pixel_centres(TRANSFORM, (3, 4))
    np.testing.assert_array_equal(x, [101.0, 103.0, 105.0, 107.0])
    np.testing.assert_array_equal(y, [49.5, 48.5, 47.5])


def test_bilinear_returns_pixel_values_at_centres():
    z = np.arange(12.0).reshape(3, 4)
    x, y = pixel_centres(TRANSFORM, z.shape)
    xx, yy = np.meshgrid(x, y)
    np.testing.assert_array_equal(sample_bilinear(z, TRANSFORM, xx, yy), z)


def test_bilinear_exact_on_bilinear_function_and_clamped_at_edges():
    rows, cols = 5, 6
    x, y = pixel_centres(TRANSFORM, (rows, cols))

    def f(px, py):
        return 3.0 + 0.5 * px - 2.0 * py + 0.1 * px * py

    z = f(x[None, :], y[:, None])
    rng = np.random.default_rng(1)
    px = rng.uniform(x[0], x[-1], 50)
    py = rng.uniform(y[-1], y[0], 50)
    # bilinear interpolation reproduces a bilinear function exactly (common practice,
    # no source); tolerance: round-off on values of order 100
    np.testing.assert_allclose(sample_bilinear(z, TRANSFORM, px, py), f(px, py), rtol=1e-12)
    # within half a pixel of the edge the edge value is used
    left_edge = sample_bilinear(z, TRANSFORM, np.full(rows, 100.0), y)
    np.testing.assert_allclose(left_edge, z[:, 0], rtol=1e-12)
    corner = sample_bilinear(z, TRANSFORM, 100.0 + 2.0 * cols, 50.0 - rows)
    assert corner == pytest.approx(z[-1, -1], rel=1e-12)


def test_bilinear_outside_and_nodata_are_nan():
    z = np.arange(12.0).reshape(3, 4)
    z[1, 1] = np.nan
    out = sample_bilinear(
        z, TRANSFORM, np.array([99.9, 108.1, 103.0, 102.0, 101.0]), np.array([49.0, 49.0, 48.0, 49.0, 47.5])
    )
    assert np.isnan(out[:4]).all()  # outside left, outside right, next to nodata x2
    # (101, 47.5) is the centre of pixel (2, 0): nodata pixel (1, 1) has zero weight
    assert out[4] == z[2, 0]


def test_bilinear_single_pixel_window():
    z = np.array([[7.0]])
    out = sample_bilinear(z, TRANSFORM, [100.2, 101.0, 101.9], [49.1, 49.5, 49.9])
    np.testing.assert_array_equal(out, 7.0)


def test_bilinear_rejects_rotation():
    rotated = Affine.rotation(10.0) @ Affine.scale(1.0, -1.0)
    with pytest.raises(InputError):
        sample_bilinear(np.zeros((2, 2)), rotated, 0.0, 0.0)
