"""Tests of ntrans.coverage: exact and pixel-centre polygon coverage."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine

from ntrans.coverage import (
    PixelWeights,
    area_share_inside,
    centre_coverage,
    exact_coverage,
    exact_coverage_values,
)
from ntrans.errors import GeometryError, InputError

# Exact-area checks: fractions are sums of O(100) terms of order 1 -> round-off ~1e-13.
ROUND_OFF = 1e-11


def window_boxes(transform, shape):
    rows, cols = shape
    cc, rr = np.meshgrid(np.arange(cols), np.arange(rows))
    x0 = transform.c + transform.a * cc
    y0 = transform.f + transform.e * rr
    x1, y1 = x0 + transform.a, y0 + transform.e
    return shapely.box(np.minimum(x0, x1), np.minimum(y0, y1), np.maximum(x0, x1), np.maximum(y0, y1))


def brute_force(polygons, transform, shape):
    """Covered fraction per (item, row, col) from shapely intersections, pixel by pixel."""
    px = window_boxes(transform, shape)
    return np.stack(
        [shapely.area(shapely.intersection(px, p)) / abs(transform.a * transform.e) for p in polygons]
    )


def dense(weights: PixelWeights, n_items, shape):
    out = np.zeros((n_items, *shape))
    np.add.at(out, (weights.item, weights.row, weights.col), weights.fraction)
    return out


def random_polygons(rng, n, xlim, ylim):
    """Star-shaped polygons, some with holes, plus a multipolygon."""
    polys = []
    for _ in range(n):
        cx, cy = rng.uniform(*xlim), rng.uniform(*ylim)
        k = rng.integers(3, 12)
        ang = np.sort(rng.uniform(0, 2 * np.pi, k))
        rad = rng.uniform(0.3, 4.0, k)
        poly = shapely.Polygon(np.c_[cx + rad * np.cos(ang), cy + rad * np.sin(ang)])
        poly = shapely.make_valid(poly, method="structure", keep_collapsed=False)
        hole = shapely.buffer(shapely.Point(cx, cy), 0.25 * rad.min())
        if rng.random() < 0.5 and poly.contains(hole):
            poly = shapely.difference(poly, hole)
        polys.append(poly)
    polys.append(
        shapely.MultiPolygon([shapely.box(xlim[0], ylim[0], xlim[0] + 1.3, ylim[0] + 2.1),
                              shapely.box(xlim[1] - 2.2, ylim[1] - 0.7, xlim[1], ylim[1])])
    )
    return polys


WINDOWS = [
    (Affine(1.0, 0.0, 0.0, 0.0, -1.0, 20.0), (20, 25)),
    (Affine(0.7, 0.0, 100.0, 0.0, -0.5, 200.0), (24, 30)),
    (Affine(2.5, 0.0, -10.0, 0.0, 1.5, -5.0), (10, 9)),  # south-up grid
]


# projected coordinates far from the origin: ulp at 4.2e6 m is ~1e-9 m, so both methods
# place crossings only to ~1e-9 m (fractions to ~1e-9 of a 2 m pixel)
UTM_LIKE = (Affine(2.0, 0.0, 500000.0, 0.0, -2.0, 4200000.0), (20, 25))


@pytest.mark.parametrize(
    "transform, shape, tol", [(*w, ROUND_OFF) for w in WINDOWS] + [(*UTM_LIKE, 1e-8)]
)
@pytest.mark.parametrize("seed", [0, 1])
def test_exact_matches_brute_force(transform, shape, tol, seed):
    rng = np.random.default_rng(seed)
    x0, x1 = sorted([transform.c, transform.c + transform.a * shape[1]])
    y0, y1 = sorted([transform.f, transform.f + transform.e * shape[0]])
    # centres also slightly outside the window so some polygons are cut by its edge
    polys = random_polygons(rng, 8, (x0 - 2, x1 + 2), (y0 - 2, y1 + 2))
    w = exact_coverage(polys, transform, shape)
    # geometry identity: fraction = area(polygon & pixel) / pixel area (shapely overlay)
    np.testing.assert_allclose(dense(w, len(polys), shape), brute_force(polys, transform, shape), atol=tol)


@pytest.mark.parametrize("transform, shape", WINDOWS + [UTM_LIKE])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_values_walk_equals_weights_then_gather(transform, shape, seed):
    """The one-walk entry values are the weights' values, bit for bit, NaN pixels left out."""
    rng = np.random.default_rng(seed)
    x0, x1 = sorted([transform.c, transform.c + transform.a * shape[1]])
    y0, y1 = sorted([transform.f, transform.f + transform.e * shape[0]])
    polys = random_polygons(rng, 8, (x0 - 2, x1 + 2), (y0 - 2, y1 + 2)) + [None]
    elevation = rng.normal(100.0, 3.0, shape)
    elevation[rng.random(shape) < 0.15] = np.nan  # nodata pixels, some inside polygons
    surface = 1.0 + rng.random(shape)
    pixel_area = abs(transform.a * transform.e)
    w = exact_coverage(polys, transform, shape)
    z = elevation[w.row, w.col]
    ok = ~np.isnan(z)
    plan = w.fraction * pixel_area
    expected = (w.item[ok], z[ok], plan[ok], (plan * surface[w.row, w.col])[ok])
    got = exact_coverage_values(polys, transform, elevation, surface, pixel_area)
    assert ok.sum() < ok.size  # the case drops pixels
    for a, b in zip(got, expected, strict=True):
        np.testing.assert_array_equal(a, b)  # same products in the same order: exact
    assert got[0].dtype == np.int64


@pytest.mark.parametrize("transform, shape", WINDOWS + [UTM_LIKE])
@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("relative", [False, True])
def test_stage_sums_walk_equals_values_then_item_sums(transform, shape, seed, relative):
    """The one-walk stage sums are those of the entry values, bit for bit: the same
    entries (NaN and infinite elevations left out) summed in the same order."""
    from ntrans._kernels import item_stage_sums

    from ntrans.coverage import exact_coverage_stage_sums

    rng = np.random.default_rng(seed)
    x0, x1 = sorted([transform.c, transform.c + transform.a * shape[1]])
    y0, y1 = sorted([transform.f, transform.f + transform.e * shape[0]])
    polys = random_polygons(rng, 8, (x0 - 2, x1 + 2), (y0 - 2, y1 + 2)) + [None]
    far = shapely.box(x1 + 50, y1 + 50, x1 + 51, y1 + 51)  # an item without pixels
    polys.insert(3, far)
    elevation = rng.normal(100.0, 3.0, shape)
    elevation[rng.random(shape) < 0.15] = np.nan
    w = exact_coverage(polys, transform, shape)
    elevation[w.row[::7], w.col[::7]] = np.inf  # infinite values inside polygons
    surface = 1.0 + rng.random(shape)
    pixel_area = abs(transform.a * transform.e)
    levels = np.array([0.5, 1.0, 2.0, 4.0]) if relative else np.array([96.0, 99.5, 100.0, 104.0])
    n_items = len(polys) + 2  # rows beyond the last polygon stay empty

    item, z, plan, bed = exact_coverage_values(polys, transform, elevation, surface, pixel_area)
    finite = np.isfinite(z)
    expected = item_stage_sums(item[finite], z[finite], plan[finite], bed[finite], levels,
                               relative, n_items)
    got = exact_coverage_stage_sums(polys, transform, elevation, surface, pixel_area, levels,
                                    relative=relative, n_items=n_items)
    assert (~finite).any()  # the case has infinite elevations inside polygons
    for a, b in zip(got, expected, strict=True):
        np.testing.assert_array_equal(a, b)
    assert np.isnan(got[0][3]) and got[2][3] == 0.0  # the item without pixels


def test_stage_sums_walk_reports_bad_areas_and_empty_windows():
    from ntrans.coverage import exact_coverage_stage_sums

    transform = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 4.0)
    polys = [shapely.box(0.5, 0.5, 3.5, 3.5)]
    surface = np.ones((4, 4))
    surface[2, 2] = np.inf
    with pytest.raises(InputError, match="finite areas"):
        exact_coverage_stage_sums(polys, transform, np.ones((4, 4)), surface, 1.0,
                                  np.array([2.0]), relative=False, n_items=1)
    low, high, covered, moment, wet, wet_bed, wet_moment = exact_coverage_stage_sums(
        polys, transform, np.empty((0, 0)), np.empty((0, 0)), 1.0, np.array([2.0]),
        relative=False, n_items=2)
    assert np.isnan(low).all() and (covered == 0).all() and wet.shape == (2, 1)


def test_values_walk_empty_and_shape_mismatch():
    transform = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 4.0)
    far = [shapely.box(50, 50, 51, 51), None]
    item, z, plan, bed = exact_coverage_values(far, transform, np.ones((4, 4)), np.ones((4, 4)), 1.0)
    assert item.size == z.size == plan.size == bed.size == 0
    with pytest.raises(InputError, match="window's shape"):
        exact_coverage_values(far, transform, np.ones((4, 4)), np.ones((4, 5)), 1.0)


def test_area_identity_with_holes_and_multipolygons():
    rng = np.random.default_rng(5)
    transform, shape = Affine(0.5, 0.0, 0.0, 0.0, -0.5, 15.0), (30, 30)
    polys = random_polygons(rng, 20, (2, 13), (2, 13))
    w = exact_coverage(polys, transform, shape)
    totals = np.bincount(w.item, weights=w.fraction, minlength=len(polys)) * 0.25
    inside = shapely.area(shapely.clip_by_rect(np.array(polys), 0, 0, 15, 15))
    # geometry identity: sum of covered pixel areas = polygon area inside the window
    np.testing.assert_allclose(totals, inside, rtol=1e-12, atol=ROUND_OFF)
    # the data really holds holes and multi-part polygons
    assert shapely.get_num_interior_rings(shapely.get_parts(np.array(polys))).sum() > 0
    assert (shapely.get_type_id(np.array(polys)) == 6).any()  # 6: MultiPolygon


@pytest.mark.parametrize("n_cells", [5, 60])
def test_partition_of_unity_over_voronoi_tessellation(n_cells):
    rng = np.random.default_rng(n_cells)
    transform, shape = Affine(0.8, 0.0, 10.0, 0.0, -0.6, 40.0), (50, 40)
    box = shapely.box(10.0, 10.0, 42.0, 40.0)
    pts = shapely.multipoints(rng.uniform([10, 10], [42, 40], (n_cells, 2)))
    cells = shapely.clip_by_rect(
        shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=box)), 10.0, 10.0, 42.0, 40.0
    )
    w = exact_coverage(cells, transform, shape)
    total = dense(w, len(cells), shape).sum(axis=0)
    # geometry identity: a tessellation covers every pixel exactly once
    np.testing.assert_allclose(total, 1.0, atol=ROUND_OFF)
    assert (w.fraction > 0).all() and (w.fraction <= 1).all()
    # cells whose borders cut through pixels are split between them
    assert (w.fraction < 1).sum() > 0


def test_subpixel_polygon_gets_true_fraction():
    transform, shape = Affine(2.0, 0.0, 0.0, 0.0, -2.0, 4.0), (2, 2)
    tri = shapely.Polygon([(0.2, 0.3), (1.1, 0.3), (0.2, 1.5)])  # inside pixel (1, 0)
    w = exact_coverage([tri], transform, shape)
    assert (w.row.tolist(), w.col.tolist()) == ([1], [0])
    # geometry identity: triangle area 0.9 * 1.2 / 2 over pixel area 4
    assert w.fraction[0] == pytest.approx(0.9 * 1.2 / 2 / 4.0, rel=1e-12)


def test_grid_aligned_polygon_with_hole_and_diagonal():
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 6.0), (6, 6)
    ell = shapely.Polygon(
        [(0, 0), (5, 0), (5, 2), (2, 2), (2, 6), (0, 6)], holes=[[(1, 1), (1, 4), (0.5, 4), (0.5, 1)]]
    )
    diamond = shapely.Polygon([(3, 3), (4, 4), (3, 5), (2, 4)])  # vertices on grid nodes
    polys = [ell, diamond]
    w = exact_coverage(polys, transform, shape)
    # geometry identity: shapely overlay per pixel (edges on grid lines, vertices on nodes)
    np.testing.assert_allclose(dense(w, 2, shape), brute_force(polys, transform, shape), atol=ROUND_OFF)
    assert np.isin(w.fraction, [0.5, 1.0]).all()  # hand check: halves and whole pixels


def test_polygon_partly_outside_window():
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 3.0), (3, 3)
    poly = shapely.box(-5.0, 0.5, 1.5, 10.0)
    w = exact_coverage([poly], transform, shape)
    got = dense(w, 1, shape)[0]
    want = np.array([[1.0, 0.5, 0.0], [1.0, 0.5, 0.0], [0.5, 0.25, 0.0]])
    # geometry identity: overlap of the box with each unit pixel, by hand
    np.testing.assert_allclose(got, want, atol=ROUND_OFF)


def test_area_share_inside_a_box():
    polys = [shapely.box(1, 1, 2, 2),                       # inside
             shapely.box(-1, 0, 1, 1),                      # half off the west edge
             shapely.box(3, 3, 5, 5),                       # a quarter inside
             shapely.Polygon([(0, 0), (4, 0), (0, 4)]),     # corner of the box cut off
             shapely.box(7, 7, 8, 8),                       # outside
             None, shapely.Polygon()]                       # no area
    got = area_share_inside(polys, (0.0, 0.0, 4.0, 4.0))
    # geometry identity: overlap areas by hand; the triangle (area 8) lies wholly inside
    np.testing.assert_allclose(got, [1.0, 0.5, 0.25, 1.0, 0.0, 0.0, 0.0], atol=ROUND_OFF)
    assert area_share_inside([], (0.0, 0.0, 1.0, 1.0)).shape == (0,)


def test_inside_on_the_border_and_across_it_against_brute_force():
    """Polygons wholly inside the window are used as they are, the others clipped: one
    inside, one with edges on the window's border, one across it with a hole cut by it,
    and a two-part polygon with a part outside all match the pixel-by-pixel overlay."""
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 6.0), (6, 6)
    inside = shapely.Polygon([(1.2, 1.1), (3.7, 1.4), (2.5, 4.3)])
    on_border = shapely.box(0.0, 0.0, 6.0, 2.5)
    across = shapely.Polygon([(4.5, 3.0), (8.0, 3.0), (8.0, 7.0), (4.5, 7.0)],
                             holes=[[(5.5, 5.0), (6.5, 5.0), (6.5, 6.5), (5.5, 6.5)]])
    two_parts = shapely.MultiPolygon([shapely.box(0.3, 4.2, 1.7, 5.6), shapely.box(7, 7, 8, 8)])
    polys = [inside, on_border, across, two_parts]
    w = exact_coverage(polys, transform, shape)
    # geometry identity: shapely overlay per pixel
    np.testing.assert_allclose(dense(w, len(polys), shape), brute_force(polys, transform, shape),
                               atol=ROUND_OFF)


def test_polygon_outside_window_and_empty_items():
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 3.0), (3, 3)
    polys = [shapely.box(10, 10, 11, 11), None, shapely.Polygon(), shapely.box(0, 0, 1, 1)]
    w = exact_coverage(polys, transform, shape)
    assert w.item.tolist() == [3]
    assert w.fraction.tolist() == [1.0]
    assert len(exact_coverage([], transform, shape)) == 0


def test_output_types_and_order():
    rng = np.random.default_rng(2)
    transform, shape = WINDOWS[0]
    w = exact_coverage(random_polygons(rng, 5, (0, 25), (0, 20)), transform, shape)
    assert w.item.dtype == np.int64 and w.row.dtype == np.int64 and w.col.dtype == np.int64
    assert w.fraction.dtype == np.float64
    key = (w.item * shape[0] + w.row) * shape[1] + w.col
    assert (np.diff(key) > 0).all()


def test_orientation_does_not_matter():
    transform, shape = WINDOWS[1]
    poly = shapely.Polygon(
        [(101, 190), (115, 192), (112, 199), (103, 197)], holes=[[(105, 193), (108, 193), (107, 195)]]
    )
    a = exact_coverage([shapely.orient_polygons(poly)], transform, shape)
    b = exact_coverage([shapely.orient_polygons(poly, exterior_cw=True)], transform, shape)
    np.testing.assert_allclose(dense(a, 1, shape), dense(b, 1, shape), atol=ROUND_OFF)


@pytest.mark.parametrize("transform, shape", WINDOWS)
def test_centre_coverage_matches_point_in_polygon(transform, shape):
    rng = np.random.default_rng(11)
    x0, x1 = sorted([transform.c, transform.c + transform.a * shape[1]])
    y0, y1 = sorted([transform.f, transform.f + transform.e * shape[0]])
    polys = random_polygons(rng, 10, (x0 - 1, x1 + 1), (y0 - 1, y1 + 1))
    w = centre_coverage(polys, transform, shape)
    rows, cols = shape
    cx = transform.c + transform.a * (np.arange(cols) + 0.5)
    cy = transform.f + transform.e * (np.arange(rows) + 0.5)
    xx, yy = np.meshgrid(cx, cy)
    want = np.stack([shapely.contains_xy(p, xx, yy) for p in polys])
    got = dense(w, len(polys), shape)
    assert (w.fraction == 1.0).all()
    # definition: a pixel counts when its centre is inside (random data: no ties on edges)
    assert got.sum() == want.sum()
    np.testing.assert_array_equal(got, want)


def test_centre_coverage_tessellation_counts_each_pixel_once():
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 4.0), (4, 4)
    # the shared border passes exactly through pixel centres at x = 1.5
    cells = [shapely.box(0, 0, 1.5, 4), shapely.box(1.5, 0, 4, 4)]
    w = centre_coverage(cells, transform, shape)
    total = dense(w, 2, shape).sum(axis=0)
    np.testing.assert_array_equal(total, 1.0)


def test_rejects_rotated_transform_and_non_polygons():
    with pytest.raises(InputError):
        exact_coverage([shapely.box(0, 0, 1, 1)], Affine.rotation(30) @ Affine.scale(1, -1), (2, 2))
    with pytest.raises(GeometryError):
        exact_coverage([shapely.LineString([(0, 0), (1, 1)])], WINDOWS[0][0], WINDOWS[0][1])
    with pytest.raises(GeometryError):
        centre_coverage([shapely.Point(0, 0)], WINDOWS[0][0], WINDOWS[0][1])
