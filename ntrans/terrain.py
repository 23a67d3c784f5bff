"""Terrain operations on one DEM window: surface factor and bilinear sampling.

Pure functions on numpy arrays.  Nodata is NaN; it is never treated as an elevation.
Horizontal lengths are in the CRS unit, elevations in the DEM's vertical unit.

The surface factor ``s = sqrt(1 + zx^2 + zy^2)`` turns the plan area of a pixel into the
3-D area of the terrain it carries (s = 1 / cos(theta) on a plane tilted by theta).  The
gradient is the 3x3 weighted difference of Horn (1981), Proc. IEEE 69(1).
"""

from __future__ import annotations

import numpy as np
from affine import Affine

from .errors import InputError

__all__ = ["pixel_centres", "sample_bilinear", "surface_factor"]


def _check_spacing(name: str, value: float) -> float:
    value = float(value)
    if not np.isfinite(value) or value == 0.0:
        raise InputError(f"pixel size {name}={value!r} is zero or not finite; give a positive length")
    return abs(value)


def _row_difference(left: np.ndarray, mid: np.ndarray, right: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Difference quotient along one row of the 3x3 window, in pixel units.

    Central difference ``(right - left) / 2`` when both ends exist, else a one-sided
    difference with the middle pixel; ``valid`` is False when neither is possible.
    """
    ok_l = ~np.isnan(left)
    ok_m = ~np.isnan(mid)
    ok_r = ~np.isnan(right)
    central = ok_l & ok_r
    fwd = ~central & ok_m & ok_r
    bwd = ~central & ~fwd & ok_m & ok_l
    with np.errstate(invalid="ignore"):
        diff = np.where(
            central,
            (right - left) * 0.5,
            np.where(fwd, right - mid, np.where(bwd, mid - left, 0.0)),
        )
    return diff, central | fwd | bwd


def _fallback_gradient(nb: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Horn gradient (pixel units) of 3x3 neighbourhoods ``nb`` (k, 3, 3) with gaps.

    The three rows (for x) or columns (for y) of the window get weights 1, 2, 1; a row
    whose difference cannot be formed drops out and the weights are renormalised, so the
    result stays exact on a plane.  No usable row gives zero slope.
    """
    grads = []
    for lines in (nb, nb.transpose(0, 2, 1)):
        num = np.zeros(nb.shape[0])
        den = np.zeros(nb.shape[0])
        for k, weight in ((0, 1.0), (1, 2.0), (2, 1.0)):
            diff, valid = _row_difference(lines[:, k, 0], lines[:, k, 1], lines[:, k, 2])
            num += np.where(valid, weight * diff, 0.0)
            den += np.where(valid, weight, 0.0)
        grads.append(np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0))
    return grads[0], grads[1]


def surface_factor(
    elevation: np.ndarray, dx: float, dy: float, *, z_to_xy: float = 1.0
) -> np.ndarray:
    """Surface factor ``s = sqrt(1 + zx^2 + zy^2)`` per pixel (dimensionless, >= 1).

    Parameters
    ----------
    elevation : (rows, cols) array, NaN for nodata, vertical units.
    dx, dy : pixel width and height in horizontal units (the sign is ignored).
    z_to_xy : factor turning vertical units into horizontal units (e.g. 0.3048 for
        elevations in feet over a metre grid).

    Returns
    -------
    (rows, cols) float64 array; NaN where the pixel is nodata.  Horn (1981) 3x3 weighted
    differences; at the window edge and next to nodata each row of the stencil falls back
    to a one-sided difference, rows with no usable pair drop out, and a direction with no
    usable neighbour gets zero slope.  Exact (to round-off) on a plane.

    Examples
    --------
    >>> z = np.add.outer(np.zeros(3), np.arange(3.0))  # slope 1 along x
    >>> bool(np.allclose(surface_factor(z, 1.0, 1.0), np.sqrt(2.0)))
    True
    """
    z = np.asarray(elevation, dtype=float)
    if z.ndim != 2:
        raise InputError(f"elevation has {z.ndim} dimensions; give a 2-D array (rows, cols)")
    dx = _check_spacing("dx", dx)
    dy = _check_spacing("dy", dy)
    if not np.isfinite(z_to_xy) or z_to_xy <= 0:
        raise InputError(f"z_to_xy={z_to_xy!r} is not a positive number; give the vertical-to-horizontal unit factor")
    from ._kernels import horn_surface_factor

    z_xy = z if z_to_xy == 1.0 else z * float(z_to_xy)
    zp = np.pad(z_xy, 1, mode="constant", constant_values=np.nan)
    # Horn (1981): full 3x3 stencil wherever all neighbours exist (NaN elsewhere)
    s, partial = horn_surface_factor(zp, 0.125 / dx, 0.125 / dy)
    # window edges and pixels next to nodata: use the neighbours that exist
    if partial.size:
        rr, cc = np.divmod(partial, z.shape[1])
        k = np.arange(3)
        nb = zp[rr[:, None, None] + k[None, :, None], cc[:, None, None] + k[None, None, :]]
        gx, gy = _fallback_gradient(nb)
        gx /= dx
        gy /= dy
        s[rr, cc] = np.sqrt(gx * gx + gy * gy + 1.0)
    return s


def _check_north_up(transform: Affine) -> None:
    if transform.b != 0 or transform.d != 0:
        raise InputError(
            "the raster transform is rotated or sheared; warp the DEM to a north-up grid first"
        )
    if transform.a == 0 or transform.e == 0:
        raise InputError("the raster transform has a zero pixel size; check the DEM's georeferencing")


def pixel_centres(transform: Affine, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates of pixel centres of a north-up window.

    Returns ``(x, y)``: x of each column ``(cols,)`` and y of each row ``(rows,)``, in
    CRS units.
    """
    _check_north_up(transform)
    rows, cols = int(shape[0]), int(shape[1])
    x = transform.c + transform.a * (np.arange(cols) + 0.5)
    y = transform.f + transform.e * (np.arange(rows) + 0.5)
    return x, y


def _axis_weights(f: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lower index, upper index and upper weight along one axis; f in pixel-centre units."""
    f = np.clip(f, 0.0, n - 1.0)  # nearest-edge clamp within half a pixel
    if n == 1:
        i0 = np.zeros(f.shape, dtype=np.int64)
        return i0, i0, np.zeros(f.shape)
    i0 = np.minimum(np.floor(f).astype(np.int64), n - 2)
    return i0, i0 + 1, f - i0


def sample_bilinear(
    elevation: np.ndarray, transform: Affine, x: np.ndarray, y: np.ndarray
) -> np.ndarray:
    """Bilinear interpolation of ``elevation`` between pixel centres at points ``(x, y)``.

    Parameters
    ----------
    elevation : (rows, cols) array, NaN for nodata.
    transform : affine transform of the window (north-up; rotation raises InputError).
    x, y : point coordinates in CRS units (broadcast together).

    Returns
    -------
    Array of the broadcast shape.  NaN where the point lies outside the window or where
    a pixel with non-zero interpolation weight is nodata.  Within half a pixel of the
    window edge the point is clamped to the edge row / column.

    Examples
    --------
    >>> from affine import Affine
    >>> z = np.array([[0.0, 1.0], [2.0, 3.0]])
    >>> float(sample_bilinear(z, Affine(1, 0, 0, 0, -1, 2), 1.0, 1.0))
    1.5
    """
    z = np.asarray(elevation, dtype=float)
    if z.ndim != 2:
        raise InputError(f"elevation has {z.ndim} dimensions; give a 2-D array (rows, cols)")
    _check_north_up(transform)
    x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
    rows, cols = z.shape
    fc = (x - transform.c) / transform.a - 0.5
    fr = (y - transform.f) / transform.e - 0.5
    inside = (fc >= -0.5) & (fc <= cols - 0.5) & (fr >= -0.5) & (fr <= rows - 0.5)
    out = np.full(x.shape, np.nan)
    if rows == 0 or cols == 0 or not inside.any():
        return out
    all_in = bool(inside.all())
    c0, c1, tc = _axis_weights(fc if all_in else fc[inside], cols)
    r0, r1, tr = _axis_weights(fr if all_in else fr[inside], rows)
    flat = z.ravel()
    i00 = r0 * cols
    i10 = r1 * cols
    v00, v01 = flat[i00 + c0], flat[i00 + c1]
    v10, v11 = flat[i10 + c0], flat[i10 + c1]
    # a pixel with zero weight must not spread its NaN: take its partner's value (also
    # at weight 1, so the lerp returns the pixel value exactly); only where it matters
    c_lo, c_hi = tc == 1.0, tc == 0.0
    r_lo, r_hi = tr == 1.0, tr == 0.0
    any_nan = bool(np.isnan(v00).any() or np.isnan(v01).any() or np.isnan(v10).any()
                   or np.isnan(v11).any())
    if any_nan or c_lo.any():
        v00, v10 = np.where(c_lo, v01, v00), np.where(c_lo, v11, v10)
    if any_nan:
        v01, v11 = np.where(c_hi, v00, v01), np.where(c_hi, v10, v11)
    top = v01 - v00
    top *= tc
    top += v00  # lerp form: exact on constants
    bottom = v11 - v10
    bottom *= tc
    bottom += v10
    if any_nan or r_lo.any():
        top = np.where(r_lo, bottom, top)
    if any_nan:
        bottom = np.where(r_hi, top, bottom)
    total = bottom - top
    total *= tr
    total += top
    if all_in and total.ndim:
        return total
    out[inside] = total
    return out
