"""Tests of ntrans.cells: subgrid and flat cell stage tables."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from ntrans.cells import (
    ELEVATION_RULES,
    cell_stage_table,
    cell_tables,
    cell_terrain_summary,
    flat_cell_table,
    flat_elevation,
)
from ntrans.coverage import exact_coverage
from ntrans.errors import InputError
from ntrans.terrain import pixel_centres, sample_bilinear, surface_factor

# Sums of O(1e4) positive terms in float64: relative round-off well below 1e-12.
ROUND_OFF = 1e-12


def entries(cells, z, transform, *, z_to_xy=1.0):
    """Per-entry arrays (item, z, plan_area, bed_area) of cells over a DEM window."""
    w = exact_coverage(cells, transform, z.shape)
    pixel_area = abs(transform.a * transform.e)
    s = surface_factor(z, abs(transform.a), abs(transform.e), z_to_xy=z_to_xy)
    plan = w.fraction * pixel_area
    return w.item, z[w.row, w.col], plan, plan * s[w.row, w.col]


def brute_table(item, z, a, b, stages):
    """Direct evaluation of the definitions, one cell and stage at a time."""
    n_items, n_stages = stages.shape
    out = {k: np.full((n_items, n_stages), np.nan) for k in ("wet_area", "volume", "bed_area")}
    for i in range(n_items):
        m = (item == i) & ~np.isnan(z)
        if not m.any():
            continue
        for j in range(n_stages):
            eta = stages[i, j]
            if np.isnan(eta):
                continue
            wet = z[m] < eta
            out["wet_area"][i, j] = a[m][wet].sum()
            out["volume"][i, j] = (a[m] * np.maximum(eta - z[m], 0.0)).sum()
            out["bed_area"][i, j] = b[m][wet].sum()
    return out


# ---------------------------------------------------------------- tilted plane


@pytest.mark.parametrize("slope, pixel, k", [(0.5, 0.25, 12), (2.0, 0.25, 5), (0.125, 0.5, 9)])
def test_tilted_plane_against_closed_form(slope, pixel, k):
    L = 8.0
    n = int(L / pixel)
    transform = Affine(pixel, 0.0, 0.0, 0.0, -pixel, L)
    x, _ = pixel_centres(transform, (n, n))
    z = np.broadcast_to(slope * x, (n, n)).copy()  # plane z = s x over [0, L]^2
    # stage on a pixel edge (x = k * pixel): every pixel is wholly wet or dry and the
    # midpoint rule integrates the linear depth over each wet pixel exactly, so the
    # pixel sums equal the integrals up to round-off
    eta = slope * pixel * k
    assert 0 < eta < slope * L
    item, zz, plan, bed = entries([shapely.box(0.0, 0.0, L, L)], z, transform)
    t = cell_stage_table(item, zz, plan, bed, np.array([[eta]]))
    wet_area = L * eta / slope
    # METHODS.md [der] tilted plane: A_w = L eta / s
    assert t["wet_area"][0, 0] == pytest.approx(wet_area, rel=ROUND_OFF)
    # METHODS.md [der] tilted plane: V = L eta^2 / (2 s)
    assert t["volume"][0, 0] == pytest.approx(L * eta**2 / (2 * slope), rel=ROUND_OFF)
    # geometry identity: A_bed = A_w sqrt(1 + s^2) (Horn gradient exact on a plane)
    assert t["bed_area"][0, 0] == pytest.approx(wet_area * np.sqrt(1 + slope**2), rel=ROUND_OFF)
    assert t["mean_depth"][0, 0] == pytest.approx(eta / 2, rel=ROUND_OFF)  # V / A_w = eta / 2


def test_tilted_plane_surface_factor_with_vertical_units():
    # elevations in feet over a metre grid: slope seen in metres per metre is s * 0.3048
    slope_ft, ft = 2.0, 0.3048
    transform = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 6.0)
    x, _ = pixel_centres(transform, (6, 6))
    z = np.broadcast_to(slope_ft * x, (6, 6)).copy()
    _, _, plan, bed = entries([shapely.box(0, 0, 6, 6)], z, transform, z_to_xy=ft)
    theta = np.arctan(slope_ft * ft)
    # geometry identity: plane tilted by theta has 3-D / plan area = 1 / cos(theta)
    np.testing.assert_allclose(bed / plan, 1.0 / np.cos(theta), rtol=ROUND_OFF)


# ---------------------------------------------------------------- channels


def valley_dem(pixel, width, length, section):
    """DEM of a straight valley along y; ``section(d)`` is bed height at distance d from the axis."""
    cols, rows = int(width / pixel), int(length / pixel)
    transform = Affine(pixel, 0.0, 0.0, 0.0, -pixel, length)
    x, _ = pixel_centres(transform, (rows, cols))
    z = 100.0 + np.broadcast_to(section(np.abs(x - width / 2)), (rows, cols)).copy()
    return z, transform


@pytest.mark.parametrize(
    "kind, b, zs, depth",
    [("trapezoid", 4.0, 2.0, 1.5), ("trapezoid", 3.0, 1.0, 2.5), ("triangle", 0.0, 1.5, 2.0)],
)
def test_valley_volume_per_length_matches_channel_area(kind, b, zs, depth):
    pixel, width, length = 0.5, 20.0, 61.0
    z, transform = valley_dem(pixel, width, length, lambda d: np.maximum(d - b / 2, 0.0) / zs)
    # square cells of side 20 along the valley, borders cutting through pixel rows
    side = 20.0
    cells = [shapely.box(0.0, 0.2 + side * k, side, 0.2 + side * (k + 1)) for k in range(3)]
    item, zz, plan, bed = entries(cells, z, transform)
    eta = 100.0 + depth
    t = cell_stage_table(item, zz, plan, bed, np.full((3, 1), eta))
    # kinks (d = b/2) and the waterline (d = b/2 + zs*depth) fall on pixel edges, so the
    # midpoint sums are exact and only round-off remains
    assert (b / 2 / pixel) % 1 == 0 and ((b / 2 + zs * depth) / pixel) % 1 == 0
    if kind == "trapezoid":
        area = (b + zs * depth) * depth  # Chow (1959) Table 2-1, trapezoid A = (b + zy) y
        top = b + 2 * zs * depth  # Chow (1959) Table 2-1, trapezoid T = b + 2zy
    else:
        area = zs * depth**2  # Chow (1959) Table 2-1, triangle A = z y^2
        top = 2 * zs * depth  # Chow (1959) Table 2-1, triangle T = 2zy
    np.testing.assert_allclose(t["volume"][:, 0], area * side, rtol=ROUND_OFF)
    np.testing.assert_allclose(t["wet_area"][:, 0], top * side, rtol=ROUND_OFF)


# ---------------------------------------------------------------- mesh identities


def voronoi_cells(rng, n, bounds):
    pts = shapely.multipoints(rng.uniform(bounds[:2], bounds[2:], (n, 2)))
    parts = shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=shapely.box(*bounds)))
    return shapely.clip_by_rect(parts, *bounds)


def test_mesh_volume_equals_terrain_integral():
    rng = np.random.default_rng(7)
    rows, cols, pixel = 30, 40, 0.5
    transform = Affine(pixel, 0.0, 0.0, 0.0, -pixel, rows * pixel)
    z = 10.0 + rng.normal(0.0, 1.0, (rows, cols)).cumsum(axis=1) * 0.2
    z[rng.random((rows, cols)) < 0.05] = np.nan
    cells = voronoi_cells(rng, 25, (0.0, 0.0, cols * pixel, rows * pixel))
    item, zz, plan, bed = entries(cells, z, transform)
    assert (plan < pixel**2 * (1 - 1e-9)).any()  # borders cut through pixels
    stages = np.array([np.nanmin(z) - 1, 9.5, 10.0, 11.0, np.nanmax(z) + 1])
    t = cell_stage_table(item, zz, plan, bed, np.broadcast_to(stages, (len(cells), stages.size)))
    valid = ~np.isnan(z)
    a = pixel**2
    s = surface_factor(z, pixel, pixel)
    for j, eta in enumerate(stages):
        depth = np.maximum(eta - z[valid], 0.0)
        # geometry identity: weights of a pixel sum to 1 over the mesh, so the cell sums
        # add up to the terrain integral over the window
        assert np.nansum(t["volume"][:, j]) == pytest.approx((a * depth).sum(), rel=ROUND_OFF, abs=1e-9)
        assert np.nansum(t["wet_area"][:, j]) == pytest.approx(a * (z[valid] < eta).sum(), rel=ROUND_OFF, abs=1e-9)
        assert np.nansum(t["bed_area"][:, j]) == pytest.approx(
            (a * s[valid])[z[valid] < eta].sum(), rel=ROUND_OFF, abs=1e-9
        )


@pytest.mark.parametrize("rule", ELEVATION_RULES)
def test_flat_dem_subgrid_equals_flat(rule):
    rng = np.random.default_rng(3)
    rows, cols = 20, 24
    transform = Affine(1.0, 0.0, 0.0, 0.0, -1.0, rows)
    z = np.full((rows, cols), 5.0)
    cells = voronoi_cells(rng, 9, (0.0, 0.0, cols, rows))
    item, zz, plan, bed = entries(cells, z, transform)
    n = len(cells)
    stages = np.broadcast_to(np.array([4.0, 5.0, 5.5, 8.25]), (n, 4))
    sub = cell_stage_table(item, zz, plan, bed, stages)
    summary = cell_terrain_summary(item, zz, plan, n)
    cx = shapely.get_x(shapely.centroid(cells))
    cy = shapely.get_y(shapely.centroid(cells))
    zc = flat_elevation(
        rule, summary, centroid_z=sample_bilinear(z, transform, cx, cy), field=np.full(n, 5.0)
    )
    np.testing.assert_array_equal(zc, 5.0)
    flat = flat_cell_table(zc, summary["covered_area"], stages)
    # geometry identity: over a flat bed both descriptions coincide (round-off only)
    np.testing.assert_allclose(sub["wet_area"], flat["flat_wet_area"], rtol=ROUND_OFF)
    np.testing.assert_allclose(sub["volume"], flat["flat_volume"], rtol=ROUND_OFF)
    np.testing.assert_allclose(sub["bed_area"], flat["flat_wet_area"], rtol=ROUND_OFF)
    wet = stages > 5.0
    np.testing.assert_allclose(sub["hydraulic_radius"][wet], flat["flat_hydraulic_radius"][wet], rtol=ROUND_OFF)
    np.testing.assert_allclose(sub["mean_depth"][wet], flat["flat_depth"][wet], rtol=ROUND_OFF)
    # dry: subgrid radius undefined (NaN), flat radius is the zero depth
    assert np.isnan(sub["hydraulic_radius"][~wet]).all()
    assert (flat["flat_hydraulic_radius"][~wet] == 0).all()


# ---------------------------------------------------------------- against brute force


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_items=st.integers(1, 6),
    n=st.integers(0, 60),
    levels=st.integers(2, 50),
)
def test_invariants_and_brute_force(seed, n_items, n, levels):
    rng = np.random.default_rng(seed)
    item = rng.integers(0, n_items, n)
    z = rng.integers(0, levels, n) * 0.25  # few levels: many ties with the stages
    z[rng.random(n) < 0.1] = np.nan
    a = rng.uniform(0.0, 2.0, n)
    b = a * rng.uniform(1.0, 1.5, n)  # surface factor >= 1
    stages = np.sort(rng.integers(-1, levels + 1, (n_items, 8)) * 0.25, axis=1)
    if seed % 2:  # stages in any order, some missing (the reference column is unsorted)
        stages = rng.permuted(stages, axis=1)
        stages[rng.random(stages.shape) < 0.2] = np.nan
    t = cell_stage_table(item, z, a, b, stages)
    ref = brute_table(item, z, a, b, stages)
    for key in ("wet_area", "volume", "bed_area"):
        # definitions of DESIGN.md section 2, summed directly (round-off only)
        np.testing.assert_allclose(t[key], ref[key], rtol=1e-10, atol=1e-10)
    with np.errstate(invalid="ignore"):
        by_stage = np.take_along_axis(t["volume"], np.argsort(stages, axis=1), axis=1)
        assert not (np.diff(by_stage, axis=1) < -1e-12).any()  # V non-decreasing in stage
        assert not (t["bed_area"] < t["wet_area"] - 1e-12).any()  # s >= 1 -> A_b >= A_w
        # R = V / A_b <= V / A_w = mean depth because A_b >= A_w
        assert not (t["hydraulic_radius"] > t["mean_depth"] * (1 + 1e-12)).any()


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_items=st.integers(1, 6),
    n=st.integers(0, 60),
    relative=st.booleans(),
)
def test_cell_tables_equal_the_two_tables(seed, n_items, n, relative):
    """One pass gives exactly what the summary and the stage table give separately."""
    rng = np.random.default_rng(seed)
    item = rng.integers(0, n_items, n)  # any order: grouped first
    z = rng.integers(0, 12, n) * 0.25  # ties with the levels
    z[rng.random(n) < 0.1] = np.nan
    a = rng.uniform(0.0, 2.0, n)
    b = a * rng.uniform(1.0, 1.5, n)
    levels = rng.permutation(rng.integers(-2, 14, 7) * 0.25)  # unsorted, repeats
    summary, table = cell_tables(item, z, a, b, n_items, levels, relative=relative,
                                 median=True)
    ref_summary = cell_terrain_summary(item, z, a, n_items)
    low = ref_summary["z_min"]
    stages = (low[:, None] if relative else 0.0) + np.broadcast_to(levels, (n_items, 7))
    ref_table = cell_stage_table(item, z, a, b, stages)
    for key in ref_summary:  # same sums in the same order: equal to the last bit
        np.testing.assert_array_equal(summary[key], ref_summary[key])
    for key in ref_table:
        np.testing.assert_array_equal(table[key], ref_table[key])


def test_cell_tables_rejects_non_finite_levels():
    with pytest.raises(InputError, match="levels"):
        cell_tables([0], [1.0], [1.0], [1.0], 1, [0.5, np.nan])


def test_item_stage_sums_needs_grouped_entries():
    from ntrans._kernels import item_stage_sums

    one = np.ones(3)
    with pytest.raises(ValueError, match="contiguous"):
        item_stage_sums(np.array([0, 1, 0]), one, one, one, np.zeros(1), False, 2)


def test_unsorted_entries_and_near_ties_are_ordered_exactly():
    # two elevations closer than the packed sort key can resolve (span 1e9), larger first
    z = np.array([0.1000001, 0.1, 1e9, 0.0, 5.0, 0.1000002])
    item = np.array([0, 0, 0, 0, 1, 0])
    a = np.ones(6)
    stages = np.array([[0.1, 0.10000005, 0.10000015, 0.2], [4.0, 5.0, 5.5, 6.0]])
    t = cell_stage_table(item, z, a, a, stages)
    ref = brute_table(item, z, a, a, stages)
    for key in ref:
        np.testing.assert_allclose(t[key], ref[key], rtol=1e-12)  # definitions, summed directly
    assert t["wet_area"][0].tolist() == [1.0, 2.0, 3.0, 4.0]


# ---------------------------------------------------------------- NaN handling and edges


def test_nodata_pixels_excluded_and_empty_items_nan():
    item = np.array([0, 0, 0, 2, 2])
    z = np.array([1.0, np.nan, 2.0, np.nan, np.nan])
    a = np.array([1.0, 100.0, 1.0, 1.0, 1.0])
    stages = np.array([[3.0, np.nan], [3.0, 4.0], [3.0, 4.0]])
    t = cell_stage_table(item, z, a, a, stages)
    assert t["wet_area"][0, 0] == 2.0  # the nodata pixel's area is not counted
    assert t["volume"][0, 0] == 3.0  # (3 - 1) + (3 - 2)
    for key in t:
        assert np.isnan(t[key][0, 1])  # NaN stage -> NaN
        assert np.isnan(t[key][1]).all()  # no pixels at all
        assert np.isnan(t[key][2]).all()  # only nodata pixels


def test_pixel_at_stage_is_dry():
    t = cell_stage_table([0, 0], [1.0, 2.0], [1.0, 1.0], [1.0, 1.0], np.array([[1.0, 2.0]]))
    assert t["wet_area"].tolist() == [[0.0, 1.0]]
    assert np.isnan(t["hydraulic_radius"][0, 0]) and np.isnan(t["mean_depth"][0, 0])
    assert t["volume"].tolist() == [[0.0, 1.0]]


def test_no_entries_at_all():
    t = cell_stage_table(np.zeros(0, int), np.zeros(0), np.zeros(0), np.zeros(0), np.ones((2, 3)))
    assert all(np.isnan(v).all() and v.shape == (2, 3) for v in t.values())


def test_cell_stage_table_rejects_bad_input():
    with pytest.raises(InputError):
        cell_stage_table([0], [1.0], [1.0], [1.0], np.array([2.0]))  # stages not 2-D
    with pytest.raises(InputError):
        cell_stage_table([0, 3], [1.0, 1.0], [1.0, 1.0], [1.0, 1.0], np.ones((2, 1)))
    with pytest.raises(InputError):
        cell_stage_table([0, 1], [1.0], [1.0, 1.0], [1.0, 1.0], np.ones((2, 1)))
    with pytest.raises(InputError):  # NaN area at a valid pixel would poison the sums
        cell_stage_table([0, 1], [1.0, 2.0], [1.0, np.nan], [1.0, 1.0], np.ones((2, 1)))
    with pytest.raises(InputError):
        cell_stage_table([0.0, 1.0], [1.0, 2.0], [1.0, 1.0], [1.0, 1.0], np.ones((2, 1)))


def test_terrain_summary_by_hand():
    item = np.array([1, 0, 0, 0, 0, 1, 3])
    z = np.array([7.0, 4.0, 1.0, 3.0, 2.0, np.nan, np.nan])
    a = np.array([2.0, 1.0, 1.0, 1.0, 3.0, 5.0, 1.0])
    s = cell_terrain_summary(item, z, a, 4)
    assert s["covered_area"].tolist() == [6.0, 2.0, 0.0, 0.0]
    assert s["z_min"][0] == 1.0 and s["z_max"][0] == 4.0
    assert s["z_mean"][0] == pytest.approx((4 + 1 + 3 + 2 * 3) / 6.0, rel=ROUND_OFF)  # by hand
    # sorted z 1, 2, 3, 4 with areas 1, 3, 1, 1: cumulative 1, 4 >= 3 -> median 2
    assert s["z_median"][0] == 2.0
    assert s["z_mean"][1] == 7.0 and s["z_median"][1] == 7.0
    for key in ("z_min", "z_max", "z_mean", "z_median"):
        assert np.isnan(s[key][2:]).all()  # no terrain -> NaN


def test_flat_elevation_rules_and_errors():
    s = cell_terrain_summary([0, 0, 1], [1.0, 3.0, 5.0], [1.0, 1.0, 2.0], 2)
    assert flat_elevation("min", s).tolist() == [1.0, 5.0]
    assert flat_elevation("mean", s).tolist() == [2.0, 5.0]
    assert flat_elevation("median", s).tolist() == [1.0, 5.0]
    assert flat_elevation("field", s, field=[9.0, 8.0]).tolist() == [9.0, 8.0]
    with pytest.raises(InputError):
        flat_elevation("highest", s)  # type: ignore[arg-type]
    with pytest.raises(InputError):
        flat_elevation("centroid", s)
    with pytest.raises(InputError):
        flat_elevation("field", s, field=[1.0, 2.0, 3.0])


def test_flat_cell_table_by_hand():
    t = flat_cell_table(np.array([1.0, np.nan]), np.array([4.0, 2.0]), np.array([[0.5, 1.0, 3.0], [1.0, 2.0, 3.0]]))
    assert t["flat_depth"][0].tolist() == [0.0, 0.0, 2.0]
    assert t["flat_wet_area"][0].tolist() == [0.0, 0.0, 4.0]
    assert t["flat_volume"][0].tolist() == [0.0, 0.0, 8.0]
    assert t["flat_hydraulic_radius"][0].tolist() == [0.0, 0.0, 2.0]  # R_flat = h (DESIGN.md)
    assert all(np.isnan(v[1]).all() for v in t.values())  # no bed elevation -> NaN
    with pytest.raises(InputError):
        flat_cell_table(np.ones(2), np.ones(3), np.ones((2, 1)))


@pytest.mark.parametrize("n_items", [3, 2**40, 2**60])  # packed sort, few z bits, lexsort
def test_sort_by_item_z_is_exact_for_any_key_width(n_items):
    from ntrans.cells import _sort_by_item_z

    rng = np.random.default_rng(4)
    item = rng.integers(0, 3, 200) * (n_items // 3)
    z = rng.integers(0, 20, 200) * 0.1 + rng.integers(0, 2, 200) * 1e-14
    order, it, zs = _sort_by_item_z(item, z, n_items)
    ref = np.lexsort((z, item))
    np.testing.assert_array_equal(it, item[ref])
    np.testing.assert_array_equal(zs, z[ref])
    np.testing.assert_array_equal(item[order], it)


def test_sort_by_item_z_with_subnormal_spans():
    """Items whose elevations differ by subnormal amounts (levels / span overflows):
    still sorted exactly, without overflow or invalid-cast warnings."""
    import warnings

    from ntrans.cells import _sort_by_item_z

    item = np.array([0, 0, 0, 1, 1, 2, 2])
    z = np.array([5e-324, 0.0, 1e-310, 1.0, 1.0 + 2**-52, 3e-320, 1e-321])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        order, it, zs = _sort_by_item_z(item, z, 3)
    ref = np.lexsort((z, item))
    np.testing.assert_array_equal(zs, z[ref])
    np.testing.assert_array_equal(it, item[ref])


@pytest.mark.parametrize("median", [True, False])
def test_terrain_summary_median_only_on_request(median):
    s = cell_terrain_summary([0, 0, 0, 1], [3.0, 1.0, 2.0, np.nan], [1.0, 1.0, 2.0, 1.0], 2,
                             median=median)
    assert s["z_min"][0] == 1.0 and s["z_max"][0] == 3.0 and s["z_mean"][0] == 2.0  # by hand
    assert np.isnan(s["z_min"][1]) and s["covered_area"][1] == 0.0  # nodata only
    assert (s["z_median"][0] == 2.0) if median else np.isnan(s["z_median"][0])
