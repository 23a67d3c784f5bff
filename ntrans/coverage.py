"""Polygon -> pixel weights on one DEM window.

Pure functions on shapely geometry arrays and numpy arrays; vectorised over all edges
of all polygons at once (no loop per polygon, edge or pixel).

Exact mode works in pixel units (u = column, v = row).  Every ring edge is split at the
vertical and then the horizontal grid lines it crosses, so each sub-segment lies in one
pixel (r, c).  A sub-segment with signed rise ``dv`` and mean column ``um`` deposits
``dv * (c + 1 - um)`` at (r, c) and the rest of ``dv`` at (r, c + 1); the running sum of
the deposits along a row is the covered fraction of each pixel (Green's theorem applied
per row band).  Rings are oriented through their signed areas, so input orientation
does not matter and holes subtract.  The edge geometry is vectorised numpy; the walk
through pixels and the running sums are a compiled kernel (:mod:`ntrans._kernels`)
working on one polygon's bounding box at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from affine import Affine

from .errors import GeometryError, InputError

__all__ = [
    "PixelWeights",
    "area_share_inside",
    "centre_coverage",
    "exact_coverage",
    "exact_coverage_stage_sums",
    "exact_coverage_values",
]

_MIN_FRACTION = 1e-12


@dataclass(frozen=True)
class PixelWeights:
    """Pixel ``(row, col)`` of the window is covered by polygon ``item`` over ``fraction``.

    All four arrays are 1-D and of equal length; ``item``, ``row``, ``col`` are int64,
    ``fraction`` is float64 in (0, 1].  Entries are sorted by (item, row, col).
    """

    item: np.ndarray
    row: np.ndarray
    col: np.ndarray
    fraction: np.ndarray

    def __len__(self) -> int:
        return int(self.item.size)

    @classmethod
    def empty(cls) -> PixelWeights:
        """No covered pixels."""
        i = np.zeros(0, dtype=np.int64)
        return cls(i, i.copy(), i.copy(), np.zeros(0))


def _check_window(transform: Affine, shape: tuple[int, int]) -> tuple[int, int]:
    if transform.b != 0 or transform.d != 0:
        raise InputError(
            "the raster transform is rotated or sheared; warp the DEM to a north-up grid first"
        )
    if transform.a == 0 or transform.e == 0:
        raise InputError("the raster transform has a zero pixel size; check the DEM's georeferencing")
    rows, cols = int(shape[0]), int(shape[1])
    if rows < 0 or cols < 0:
        raise InputError(f"window shape {shape!r} is negative; give (rows, cols) >= 0")
    return rows, cols


def _as_geometry_array(polygons) -> np.ndarray:
    geoms = np.asarray(polygons, dtype=object)
    if geoms.ndim != 1:
        geoms = geoms.reshape(-1)
    type_id = shapely.get_type_id(geoms)  # -1 for None
    bad = ~np.isin(type_id, (-1, 3, 6)) & ~shapely.is_empty(geoms)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise GeometryError(
            f"item {first} is a {geoms[first].geom_type}, not a polygon; give Polygon or "
            "MultiPolygon cells"
        )
    return geoms


def _edges(geoms: np.ndarray, transform: Affine, rows: int, cols: int):
    """All ring edges of the polygons clipped to the window, in pixel units.

    Returns ``(item, u0, v0, u1, v1, sign)``; ``sign`` (+1 / -1) orients every ring so
    that exteriors add and holes subtract.
    """
    x0, y0 = transform.c, transform.f
    x1, y1 = x0 + transform.a * cols, y0 + transform.e * rows
    rect = (min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1))
    # tile windows are made to hold their polygons: clip only those reaching out of it
    box = shapely.bounds(geoms)
    with np.errstate(invalid="ignore"):
        inside = ((box[:, 0] >= rect[0]) & (box[:, 1] >= rect[1])
                  & (box[:, 2] <= rect[2]) & (box[:, 3] <= rect[3]))
    clipped = np.array(geoms, dtype=object, copy=True)
    if not inside.all():
        clipped[~inside] = shapely.clip_by_rect(geoms[~inside], *rect)
    idx = np.arange(geoms.size)
    # explode multi-part results (possibly nested in collections) down to polygons
    for _ in range(3):
        tid = shapely.get_type_id(clipped)
        if not np.isin(tid, (4, 5, 6, 7)).any():
            break
        clipped, pos = shapely.get_parts(clipped, return_index=True)
        idx = idx[pos]
    keep = (shapely.get_type_id(clipped) == 3) & ~shapely.is_empty(clipped)
    parts, part_item = clipped[keep], idx[keep]
    # coordinates with ring offsets, without a Python object per ring
    xy, ring_offsets, ring_part, exterior = polygon_rings(parts)
    n_rings = ring_offsets.size - 1
    coord_ring = np.repeat(np.arange(n_rings), np.diff(ring_offsets))
    u = (xy[:, 0] - x0) / transform.a
    v = (xy[:, 1] - y0) / transform.e
    same = coord_ring[:-1] == coord_ring[1:]
    e_ring = coord_ring[:-1][same]
    u0, v0 = u[:-1][same], v[:-1][same]
    u1, v1 = u[1:][same], v[1:][same]
    # signed area per ring (shoelace, about the ring's first vertex for precision)
    first = np.zeros(n_rings, dtype=np.int64)
    if e_ring.size:
        starts = np.flatnonzero(np.r_[True, e_ring[1:] != e_ring[:-1]])
        first[e_ring[starts]] = starts
    ur, vr = u0[first[e_ring]], v0[first[e_ring]]
    cross = (u0 - ur) * (v1 - vr) - (u1 - ur) * (v0 - vr)
    area2 = np.bincount(e_ring, weights=cross, minlength=n_rings)
    # deposits below assume exteriors with negative shoelace area in (u, v)
    ring_sign = np.where(exterior, -np.sign(area2), np.sign(area2))
    sign = ring_sign[e_ring]
    item = part_item[ring_part[e_ring]]
    return item, u0, v0, u1, v1, sign


def polygon_rings(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Ring coordinates of Polygons and MultiPolygons.

    Returns ``(coords, ring_start, ring_geom, exterior)``.

    ``coords`` (n, 2) holds every ring's points (closing point included), ring ``k`` is
    ``coords[ring_start[k]:ring_start[k + 1]]``, belongs to polygon ``ring_geom[k]`` and
    is an exterior ring where ``exterior[k]``.  Polygons without holes (most meshes) take
    a path that builds no ring objects.
    """
    if (shapely.get_type_id(geoms) == 3).all() and not shapely.get_num_interior_rings(geoms).any():
        coords, owner = shapely.get_coordinates(geoms, return_index=True)
        ring_start = np.searchsorted(owner, np.arange(geoms.size + 1))
        return coords, ring_start, np.arange(geoms.size), np.ones(geoms.size, dtype=bool)
    _, coords, offsets = shapely.to_ragged_array(geoms)
    ring_start = offsets[0]
    part_rings = offsets[1]
    geom_parts = offsets[2] if len(offsets) > 2 else np.arange(geoms.size + 1)
    ring_part = np.repeat(np.arange(part_rings.size - 1), np.diff(part_rings))
    ring_geom = np.repeat(np.arange(geom_parts.size - 1), np.diff(geom_parts))[ring_part]
    exterior = np.arange(ring_start.size - 1) == part_rings[ring_part]
    return coords, ring_start, ring_geom, exterior


def _row_runs(item, row, col, local, carry, rows, cols, *, threshold):
    """Sum deposits along each (item, row) and expand them into pixel runs.

    A deposit at ``col`` adds ``local`` to that pixel only and ``carry`` to every pixel
    right of it (0 <= col < cols; duplicates are summed).  Returns PixelWeights for every
    pixel whose value exceeds ``threshold``, clipped to at most 1, sorted by
    (item, row, col).
    """
    if item.size == 0:
        return PixelWeights.empty()
    key = (item * rows + row) * cols + col
    order = _sorted_order(key, (int(item.max()) + 1) * rows * cols)
    del item, row, col
    key = key[order]
    first = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    local = np.add.reduceat(local[order], first)
    carry = np.add.reduceat(carry[order], first)
    key = key[first]
    group = key // cols
    col = key - group * cols
    gstart = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    gsize = np.diff(np.r_[gstart, group.size])
    after = _group_cumsum(carry, gstart, gsize)  # value right of the deposit column
    at = after - carry + local  # value at the deposit column
    next_col = np.empty_like(col)
    next_col[:-1] = col[1:]
    next_col[np.r_[gstart[1:] - 1, group.size - 1]] = cols
    keep_at = at > threshold
    run_len = np.where(after > threshold, next_col - col - 1, 0)
    length = keep_at + run_len
    n = int(length.sum())
    off = np.zeros(length.size, dtype=np.int64)
    np.cumsum(length[:-1], out=off[1:])
    # columns: +1 steps inside a run, a jump to the next run's first column between runs
    start = (col + ~keep_at)[length > 0]
    out_col = np.ones(n, dtype=np.int64)
    if n:
        out_col[0] = start[0]
        out_col[off[length > 0][1:]] = np.diff(start) - length[length > 0][:-1] + 1
        np.cumsum(out_col, out=out_col)
    frac = np.repeat(np.minimum(after, 1.0), length)
    frac[off[keep_at]] = np.minimum(at[keep_at], 1.0)
    out_item = group // rows
    out_row = group - out_item * rows
    return PixelWeights(
        np.repeat(out_item, length), np.repeat(out_row, length), out_col, frac
    )


def _sorted_order(key: np.ndarray, key_max: int) -> np.ndarray:
    """Stable argsort of non-negative integer keys below ``key_max``.

    Key and position are packed into one uint64 when they fit, because sorting values
    is much faster than ``argsort``; otherwise a stable ``argsort``.
    """
    n = key.size
    idx_bits = max(int(n - 1).bit_length(), 1)
    if idx_bits + max(int(key_max - 1).bit_length(), 1) <= 64:
        packed = key.astype(np.uint64) << np.uint64(idx_bits)
        packed |= np.arange(n, dtype=np.uint64)
        packed.sort()
        packed &= np.uint64((1 << idx_bits) - 1)
        return packed.view(np.int64)
    return np.argsort(key, kind="stable")


def _group_cumsum(value: np.ndarray, gstart: np.ndarray, gsize: np.ndarray) -> np.ndarray:
    """Cumulative sums restarting at every group start (groups contiguous)."""
    v = value.astype(np.float64, copy=True)
    cs = np.cumsum(v)
    if gstart.size > 1:
        # restart: subtract what the previous groups added, then remove leftover drift
        v[gstart[1:]] -= cs[gstart[1:] - 1] - np.r_[0.0, cs[gstart[1:-1] - 1]]
        cs = np.cumsum(v)
        drift = cs[gstart] - value[gstart]
        cs -= np.repeat(drift, gsize)
    return cs


def exact_coverage(polygons, transform: Affine, shape: tuple[int, int]) -> PixelWeights:
    """Exact area fraction of each window pixel covered by each polygon.

    Parameters
    ----------
    polygons : array-like of shapely Polygon / MultiPolygon (holes allowed; None or
        empty gives no pixels).  Item ``i`` is ``polygons[i]``.
    transform : affine transform of the window (north-up, no rotation).
    shape : ``(rows, cols)`` of the window.

    Returns
    -------
    PixelWeights sorted by (item, row, col); fractions in (0, 1] (below 1e-12 dropped).
    ``sum(fraction) * |pixel area|`` equals the polygon's area inside the window.

    Examples
    --------
    >>> from affine import Affine
    >>> from shapely import box
    >>> w = exact_coverage([box(0.5, 0.5, 1.5, 1.0)], Affine(1, 0, 0, 0, -1, 2), (2, 2))
    >>> w.fraction.tolist()
    [0.25, 0.25]
    """
    from ._kernels import exact_coverage_runs

    rows, cols = _check_window(transform, shape)
    edges = _item_edges(polygons, transform, rows, cols)
    if edges is None:
        return PixelWeights.empty()
    # the kernel returns int64 indices and float64 fractions already
    return PixelWeights(*exact_coverage_runs(*edges, rows, cols, _MIN_FRACTION))


def exact_coverage_values(
    polygons, transform: Affine, elevation: np.ndarray, surface: np.ndarray, pixel_area: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per covered pixel with valid terrain: item, elevation, plan area and bed area.

    The numbers :func:`exact_coverage` gives, turned into per-entry values in the same
    walk: ``z = elevation[row, col]``, ``plan = fraction x pixel_area`` (CRS units
    squared), ``bed = plan x surface[row, col]``; pixels whose elevation is NaN are left
    out.  Sorted by (item, row, col).

    Parameters
    ----------
    polygons, transform : as for :func:`exact_coverage`.
    elevation : (rows, cols) window, NaN for nodata; its shape is the window's.
    surface : (rows, cols) surface factor of the window (>= 1).
    pixel_area : area of one pixel, CRS units squared.

    Returns
    -------
    ``(item, z, plan, bed)``: int64 and three float64 arrays of equal length.
    """
    from ._kernels import exact_coverage_values as walk

    elevation, edges = _window_edges(polygons, transform, elevation, surface)
    if edges is None:
        empty = np.zeros(0)
        return np.zeros(0, dtype=np.int64), empty, empty.copy(), empty.copy()
    return walk(*edges, *elevation.shape, _MIN_FRACTION, elevation, surface, float(pixel_area))


def _window_edges(polygons, transform: Affine, elevation, surface):
    """``(elevation as float64, edges)`` for the walks over a window of values (edges
    None when no polygon reaches the window); checks the shapes."""
    elevation = np.asarray(elevation, dtype=np.float64)
    if elevation.ndim != 2 or np.shape(surface) != elevation.shape:
        raise InputError(
            f"elevation {elevation.shape} and surface {np.shape(surface)} must be 2-D arrays "
            "of the window's shape"
        )
    rows, cols = _check_window(transform, elevation.shape)
    return elevation, _item_edges(polygons, transform, rows, cols)


def exact_coverage_stage_sums(
    polygons, transform: Affine, elevation: np.ndarray, surface: np.ndarray,
    pixel_area: float, levels: np.ndarray, *, relative: bool, n_items: int,
) -> tuple[np.ndarray, ...]:
    """Per-item terrain statistics and stage sums of the exact coverage, in one walk.

    The numbers :func:`ntrans._kernels.item_stage_sums` gives for the entries of
    :func:`exact_coverage_values` (with the non-finite elevations left out), to the bit,
    without forming the entries: each polygon's pixels are summed while its bounding
    box is walked.

    Parameters
    ----------
    polygons, transform, elevation, surface, pixel_area : as for
        :func:`exact_coverage_values`.
    levels : (n_levels,) increasing finite stages, or depths with ``relative``.
    n_items : rows to return (at least the number of polygons).

    Returns
    -------
    ``(low, high, covered, moment, wet, wet_bed, wet_moment)``: (n_items,) and
    (n_items, n_levels) float64 arrays (see :func:`ntrans.cells.tables_from_sums`).
    """
    from ._kernels import exact_coverage_stage_sums as walk
    from ._kernels import item_stage_sums

    elevation, edges = _window_edges(polygons, transform, elevation, surface)
    if edges is None:
        empty = np.zeros(0)
        empty_item = np.zeros(0, dtype=np.int64)
        return item_stage_sums(empty_item, empty, empty, empty, levels, bool(relative),
                               int(n_items))
    *sums, n_bad = walk(*edges, *elevation.shape, _MIN_FRACTION, elevation, surface,
                        float(pixel_area), levels, bool(relative), int(n_items))
    if n_bad:
        raise InputError(
            "an area array holds NaN or infinite values at pixels with valid elevation; "
            "give finite areas (set z to NaN to leave a pixel out)"
        )
    return tuple(sums)


def _item_edges(polygons, transform: Affine, rows: int, cols: int):
    """Edges of the polygons for the coverage kernels, grouped by item; None if none.

    Returns ``(edge_start, u0, v0, u1, v1, sign)``: ``edge_start`` (n_items + 1) delimits
    each item's edges, in pixel units, with ``sign`` as float64.
    """
    geoms = _as_geometry_array(polygons)
    if geoms.size == 0 or rows == 0 or cols == 0:
        return None
    item, u0, v0, u1, v1, sign = _edges(geoms, transform, rows, cols)
    if item.size == 0:
        return None
    if np.any(item[1:] < item[:-1]):
        order = np.argsort(item, kind="stable")
        item, u0, v0, u1, v1, sign = (a[order] for a in (item, u0, v0, u1, v1, sign))
    edge_start = np.searchsorted(item, np.arange(int(item[-1]) + 2)).astype(np.int64)
    return edge_start, u0, v0, u1, v1, sign.astype(np.float64)


def centre_coverage(polygons, transform: Affine, shape: tuple[int, int]) -> PixelWeights:
    """Pixels whose centre lies inside each polygon, with fraction 1.

    Scanline test at every pixel-centre row (half-open in rows, a centre exactly on a
    vertical edge goes to the polygon on its right in pixel space), vectorised over all
    edges.  Overlapping polygons each get the pixel.

    Examples
    --------
    >>> from affine import Affine
    >>> from shapely import box
    >>> w = centre_coverage([box(0.2, 0.2, 1.8, 0.8)], Affine(1, 0, 0, 0, -1, 2), (2, 2))
    >>> (w.row.tolist(), w.col.tolist())
    ([1, 1], [0, 1])
    """
    rows, cols = _check_window(transform, shape)
    geoms = _as_geometry_array(polygons)
    if geoms.size == 0 or rows == 0 or cols == 0:
        return PixelWeights.empty()
    item, u0, v0, u1, v1, sign = _edges(geoms, transform, rows, cols)
    if item.size == 0:
        return PixelWeights.empty()
    vlo, vhi = np.minimum(v0, v1), np.maximum(v0, v1)
    r_lo = np.clip(np.ceil(vlo - 0.5), 0, rows).astype(np.int64)
    r_hi = np.clip(np.ceil(vhi - 0.5), 0, rows).astype(np.int64)
    n = np.maximum(r_hi - r_lo, 0)
    total = int(n.sum())
    if total == 0:
        return PixelWeights.empty()
    e = np.repeat(np.arange(item.size), n)
    run_start = np.zeros(item.size, dtype=np.int64)
    np.cumsum(n[:-1], out=run_start[1:])
    r = np.repeat(r_lo, n) + (np.arange(total) - np.repeat(run_start, n))
    vc = r + 0.5
    uc = u0[e] + (vc - v0[e]) * (u1[e] - u0[e]) / (v1[e] - v0[e])
    c = np.maximum(np.ceil(uc - 0.5).astype(np.int64), 0)
    val = np.sign(v1[e] - v0[e]) * sign[e]
    ok = c < cols
    val = val[ok]
    weights = _row_runs(item[e][ok], r[ok], c[ok], val, val, rows, cols, threshold=0.5)
    return PixelWeights(weights.item, weights.row, weights.col, np.ones(len(weights)))


def area_share_inside(polygons, bounds: tuple[float, float, float, float]) -> np.ndarray:
    """Share of each polygon's area inside the box ``bounds`` = (left, bottom, right, top),
    in [0, 1] (0 for a polygon without area).

    Only polygons reaching beyond the box are intersected with it; the rest give 1.

    Examples
    --------
    >>> from shapely import box
    >>> area_share_inside([box(0, 0, 1, 1), box(1, 0, 3, 1)], (0, 0, 2, 2)).tolist()
    [1.0, 0.5]
    """
    geoms = _as_geometry_array(polygons)
    share = np.zeros(geoms.size)
    if geoms.size == 0:
        return share
    area = shapely.area(geoms)
    has_area = np.nan_to_num(area, nan=0.0) > 0
    left, bottom, right, top = (float(v) for v in bounds)
    with np.errstate(invalid="ignore"):
        b = shapely.bounds(geoms)
        within = ((b[:, 0] >= left) & (b[:, 1] >= bottom) & (b[:, 2] <= right)
                  & (b[:, 3] <= top))
    share[has_area & within] = 1.0
    cut = has_area & ~within
    if cut.any():
        inside = shapely.area(shapely.intersection(geoms[cut], shapely.box(left, bottom, right, top)))
        share[cut] = np.clip(inside / area[cut], 0.0, 1.0)
    return share
