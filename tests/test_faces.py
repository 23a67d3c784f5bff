"""Face profiles and face stage tables (ntrans.faces)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from ntrans.errors import GeometryError, InputError
from ntrans.faces import (
    Profiles,
    face_flat_bed,
    face_profile_summary,
    face_stage_table,
    flat_face_table,
    sample_profiles,
)

# --- a straight channel along y built into a DEM ------------------------------------

PIXEL = 0.05  # m; fine enough that the bilinear profile is within 1% of the section
HALF = 9.0  # the DEM spans x, y in [-HALF, HALF]


def section_rectangle(u: np.ndarray, b: float = 10.0, bank: float = 3.0) -> np.ndarray:
    return np.where(np.abs(u) < b / 2, 0.0, bank)


def section_trapezoid(u: np.ndarray, b: float = 6.0, z: float = 2.0, bank: float = 3.0) -> np.ndarray:
    return np.clip((np.abs(u) - b / 2) / z, 0.0, bank)


def section_triangle(u: np.ndarray, z: float = 1.5, bank: float = 3.0) -> np.ndarray:
    return np.clip(np.abs(u) / z, 0.0, bank)


def section_circle(u: np.ndarray, d: float = 4.0) -> np.ndarray:
    r = d / 2
    return np.where(np.abs(u) < r, r - np.sqrt(np.clip(r * r - u * u, 0.0, None)), r)


def channel_dem(section, *, pixel: float = PIXEL, half: float = HALF):
    """DEM (rows, cols) of z = section(x) (channel axis along y), and its transform."""
    n = int(round(2 * half / pixel))
    x = -half + (np.arange(n) + 0.5) * pixel
    z = np.broadcast_to(section(x)[None, :], (n, n)).copy()
    return z, Affine(pixel, 0.0, -half, 0.0, -pixel, half)


def crossing_lines(reach: float = 8.4) -> dict[str, shapely.LineString]:
    """A face across the channel square to its axis, and one at 45 degrees; both span
    x in [-reach, reach], wider than every channel's water surface."""
    return {
        "square": shapely.LineString([(-reach, 0.3), (reach, 0.3)]),
        "oblique": shapely.LineString([(-reach, -reach), (reach, reach)]),
    }


def chow_elements(kind: str, y: float, stretch: float) -> tuple[float, float, float]:
    """Chow (1959) Table 2-1 A, P, T; ``stretch`` scales the section horizontally
    (a face crossing at 45 degrees sees every width times sqrt(2))."""
    if kind == "rectangle":
        b = 10.0 * stretch
        return b * y, b + 2 * y, b
    if kind == "trapezoid":
        b, z = 6.0 * stretch, 2.0 * stretch
        return (b + z * y) * y, b + 2 * y * math.sqrt(1 + z * z), b + 2 * z * y
    if kind == "triangle":
        z = 1.5 * stretch
        return z * y * y, 2 * y * math.sqrt(1 + z * z), 2 * z * y
    d = 4.0
    theta = 2 * math.acos(1 - 2 * y / d)
    return (
        stretch * (theta - math.sin(theta)) * d * d / 8,
        theta * d / 2,  # only used square to the axis
        stretch * d * math.sin(theta / 2),
    )


SECTIONS = {
    "rectangle": (section_rectangle, 1.5),
    "trapezoid": (section_trapezoid, 1.5),
    "triangle": (section_triangle, 2.0),
    "circle": (section_circle, 1.2),
}


@pytest.mark.parametrize("kind", list(SECTIONS))
@pytest.mark.parametrize("crossing", ["square", "oblique"])
def test_channel_sections_match_chow_table_2_1(kind, crossing):
    section, depth = SECTIONS[kind]
    dem, tr = channel_dem(section)
    line = crossing_lines()[crossing]
    prof = sample_profiles([line], dem, tr, PIXEL / 2)
    table = face_stage_table(prof, np.array([depth]))  # bed at z = 0: stage = depth
    stretch = 1.0 if crossing == "square" else math.sqrt(2.0)
    area, perim, top = chow_elements(kind, depth, stretch)
    # Chow (1959) Table 2-1 (rectangle, trapezoid, triangle, circle), at 0.05 m pixels.
    # Tolerance 1%: the bilinear profile cuts each kink of the section over one pixel;
    # the rectangle's vertical walls become a one-pixel ramp, which moves A and T by at
    # most pixel / b (1 - y / bank) = 0.25% and P by under one pixel (0.4%).
    assert table["flow_area"][0, 0] == pytest.approx(area, rel=0.01)
    assert table["top_width"][0, 0] == pytest.approx(top, rel=0.01)
    if kind == "circle" and crossing == "oblique":
        # stretched circle is an ellipse: no Table 2-1 perimeter; P >= the circle's arc
        # (geometry identity: stretching horizontally never shortens a curve)
        assert table["wetted_perimeter"][0, 0] >= perim * 0.99
    else:
        assert table["wetted_perimeter"][0, 0] == pytest.approx(perim, rel=0.01)
    assert table["hydraulic_radius"][0, 0] == pytest.approx(
        table["flow_area"][0, 0] / table["wetted_perimeter"][0, 0]
    )


def test_hand_checked_v_profile():
    prof = Profiles([0, 0, 0], [0.0, 1.0, 2.0], [1.0, 0.0, 1.0], 1)
    t = face_stage_table(prof, np.array([-1.0, 0.0, 0.5, 1.0, 2.0, np.nan]))
    # geometry identity: triangles of the V (side slope 1:1)
    np.testing.assert_allclose(t["flow_area"][0, :5], [0, 0, 0.25, 1.0, 3.0])
    np.testing.assert_allclose(t["top_width"][0, :5], [0, 0, 1.0, 2.0, 2.0])
    np.testing.assert_allclose(
        t["wetted_perimeter"][0, :5], [0, 0, math.sqrt(2), 2 * math.sqrt(2), 2 * math.sqrt(2)]
    )
    assert np.isnan(t["hydraulic_radius"][0, 0])  # dry: R undefined
    assert all(np.isnan(t[k][0, 5]) for k in t)  # NaN stage -> NaN


@pytest.mark.parametrize("closure", ["lumped", "strip"])
def test_tile_arrays_freed_without_the_cyclic_collector(closure):
    import gc
    import weakref

    from ntrans.closures import face_conveyance

    # a profile per face, stages, the strip closure's chunks and breakpoints: everything
    # cached on the profiles must go with them by reference counting alone (a cycle
    # would hold a tile's arrays until a full collection, which a large mesh delays)
    prof = Profiles([0, 0, 0, 1, 1], [0.0, 1.0, 2.0, 0.0, 1.0], [1.0, 0.0, 1.0, 2.0, 0.5], 2)
    gc.disable()
    try:
        face_stage_table(prof, np.array([0.5, 1.0]))
        face_conveyance(prof, np.array([[0.5, 1.0], [1.0, 2.0]]), closure=closure,
                        n_segment=0.03)
        segments = list(prof._segments.values())
        assert segments  # the cache really was filled
        refs = [weakref.ref(prof)] + [weakref.ref(seg) for seg in segments]
        del prof, segments
        assert all(ref() is None for ref in refs)
    finally:
        gc.enable()


def test_level_profile_steps_exactly_at_its_elevation():
    prof = Profiles([0, 0, 0], [0.0, 1.0, 3.0], [2.0, 2.0, 2.0], 1)
    t = face_stage_table(prof, np.array([2.0, 2.5]))
    # geometry identity: a flat face is dry at its own elevation, fully wet above
    np.testing.assert_allclose(t["flow_area"][0], [0.0, 1.5])
    np.testing.assert_allclose(t["top_width"][0], [0.0, 3.0])


def test_stations_include_vertices_and_respect_spacing():
    line = shapely.LineString([(0, 0), (1.0, 0), (1.0, 2.5)])
    dem = np.zeros((4, 4))
    prof = sample_profiles([line], dem, Affine(1, 0, -0.5, 0, -1, 3.5), 0.4)
    # geometry identity: both segments divided evenly, every vertex kept
    assert np.all(np.diff(prof.station) <= 0.4 + 1e-12)
    assert np.any(np.isclose(prof.station, 1.0))
    assert prof.station[0] == 0.0 and prof.station[-1] == pytest.approx(3.5)
    assert prof.length[0] == pytest.approx(3.5)
    xy = np.c_[prof.x, prof.y]
    assert np.any(np.all(np.isclose(xy, [1.0, 0.0]), axis=1))


def test_several_faces_are_contiguous_and_empty_lines_allowed():
    lines = [shapely.LineString([(0, 0), (2, 0)]), None, shapely.LineString([(0, 1), (0, 2)])]
    dem, tr = np.ones((5, 5)), Affine(1, 0, -1, 0, -1, 4)
    prof = sample_profiles(lines, dem, tr, 0.5)
    assert prof.n_faces == 3
    assert np.all(np.diff(prof.face) >= 0)
    assert not np.any(prof.face == 1)
    s = face_profile_summary(prof)
    assert np.isnan(s["low_point"][1]) and s["covered_fraction"][1] == 0.0
    np.testing.assert_allclose(prof.length, [2.0, 0.0, 1.0])


def test_nan_stations_lower_coverage_and_fake_no_elevation():
    dem = np.full((10, 10), 5.0)
    dem[:, 6:] = np.nan  # nodata on the right
    dem[:, 2] = 1.0  # a low column that is real
    tr = Affine(1, 0, 0, 0, -1, 10)
    prof = sample_profiles([shapely.LineString([(0.5, 5.5), (9.5, 5.5)])], dem, tr, 0.25)
    assert np.isnan(prof.z).any()  # nodata stays NaN
    s = face_profile_summary(prof)
    assert 0.0 < s["covered_fraction"][0] < 1.0
    # bilinear between pixel centres: valid up to the centre of column 5 (x = 5.5)
    assert s["covered_fraction"][0] == pytest.approx(5.0 / 9.0)  # geometry identity
    assert s["low_point"][0] == 1.0 and s["high_point"][0] == 5.0  # no 0 or -9999
    t = face_stage_table(prof, np.array([10.0]))
    assert t["top_width"][0, 0] == pytest.approx(5.0)  # only the valid part is wet


def test_summary_mean_is_length_weighted():
    prof = Profiles([0, 0, 0], [0.0, 1.0, 4.0], [0.0, 2.0, 2.0], 1)
    s = face_profile_summary(prof)
    # geometry identity: (1 * 1 + 3 * 2) / 4
    assert s["mean_elevation"][0] == pytest.approx(7.0 / 4.0)
    assert s["relief"][0] == 2.0


def test_bad_inputs_raise_input_errors():
    with pytest.raises(InputError):
        sample_profiles([shapely.LineString([(0, 0), (1, 0)])], np.zeros((2, 2)), Affine.identity(), 0.0)
    with pytest.raises(GeometryError):
        sample_profiles([shapely.box(0, 0, 1, 1)], np.zeros((2, 2)), Affine.identity(), 0.5)
    prof = Profiles([0, 0], [0.0, 1.0], [0.0, 1.0], 1)
    with pytest.raises(InputError):
        face_stage_table(prof, np.zeros((3, 2)))
    with pytest.raises(InputError):
        face_flat_bed("highest", np.zeros(1), np.zeros(1))


def test_flat_face_table_and_rules():
    t = flat_face_table(np.array([1.0, 2.0]), np.array([10.0, 4.0]), np.array([1.5, 3.0]))
    # DESIGN.md flat face: A = L h, P = T = L when wet, R = h
    np.testing.assert_allclose(t["flat_depth"], [[0.5, 2.0], [0.0, 1.0]])
    np.testing.assert_allclose(t["flat_flow_area"], [[5.0, 20.0], [0.0, 4.0]])
    np.testing.assert_allclose(t["flat_wetted_perimeter"], [[10.0, 10.0], [0.0, 4.0]])
    np.testing.assert_allclose(t["flat_hydraulic_radius"], t["flat_depth"])
    za, zb = np.array([1.0, 3.0]), np.array([2.0, np.nan])  # second face: boundary
    np.testing.assert_allclose(face_flat_bed("higher", za, zb), [2.0, 3.0])
    np.testing.assert_allclose(face_flat_bed("min", za, zb), [1.0, 3.0])
    np.testing.assert_allclose(face_flat_bed("mean", za, zb), [1.5, 3.0])
    summ = {"mean_elevation": np.array([7.0, 8.0])}
    np.testing.assert_allclose(face_flat_bed("profile_mean", za, zb, summ), [7.0, 8.0])


@pytest.mark.parametrize("rule", ["higher", "mean", "min"])
def test_face_beside_a_cell_without_flat_elevation_takes_the_other_cell(rule):
    # a cell without a flat elevation (NaN) beside a cell with one, beside a boundary (or
    # another such cell), and a cell with one beside a boundary; then the sides swapped
    za = np.array([np.nan, np.nan, 4.0])
    zb = np.array([2.0, np.nan, np.nan])
    got = face_flat_bed(rule, za, zb)
    np.testing.assert_allclose(got, [2.0, np.nan, 4.0])
    np.testing.assert_allclose(face_flat_bed(rule, zb, za), got)


# --- properties of any piecewise-linear profile --------------------------------------

profiles_strategy = st.lists(
    st.tuples(
        st.floats(0.05, 3.0, allow_nan=False),  # station step
        st.floats(-2.0, 2.0, allow_nan=False),  # elevation
    ),
    min_size=2,
    max_size=12,
)


@settings(max_examples=40, deadline=None)
@given(points=profiles_strategy, eta=st.floats(-2.5, 2.5), delta=st.floats(1e-3, 0.5))
def test_stage_table_properties(points, eta, delta):
    steps, z = zip(*points, strict=True)
    station = np.concatenate([[0.0], np.cumsum(steps[1:])])
    prof = Profiles(np.zeros(len(z), dtype=np.int64), station, np.array(z), 1)
    t = face_stage_table(prof, np.array([eta, eta + delta]))
    a, p, w = t["flow_area"][0], t["wetted_perimeter"][0], t["top_width"][0]
    tol = 1e-9 * (1 + station[-1]) * 10  # rounding only
    assert a[1] >= a[0] - tol  # geometry identity: area grows with stage
    assert np.all(p >= w - tol)  # geometry identity: a slope is longer than its plan
    assert np.all(w <= station[-1] + tol)
    # dA/deta = T: T is non-decreasing, so the area gained over [eta, eta + delta]
    # lies between delta T(eta) and delta T(eta + delta) (geometry identity)
    gained = a[1] - a[0]
    assert delta * w[0] - tol <= gained <= delta * w[1] + tol
    # a deep stage: A = L (eta - mean elevation) (geometry identity)
    deep = face_stage_table(prof, np.array([10.0]))
    mean = face_profile_summary(prof)["mean_elevation"][0]
    assert deep["flow_area"][0, 0] == pytest.approx(station[-1] * (10.0 - mean), rel=1e-9)


def test_chunked_sums_equal_one_pass(monkeypatch):
    rng = np.random.default_rng(4)
    counts = rng.integers(1, 9, 40)  # faces of 1..8 stations (1 = no segment)
    face = np.repeat(np.arange(40), counts)
    station = np.concatenate([np.cumsum(np.r_[0.0, rng.uniform(0.1, 1, c - 1)]) for c in counts])
    z = rng.normal(0, 1, face.size)
    z[::9] = np.nan
    prof = Profiles(face, station, z, 40)
    stages = rng.normal(0, 1, (40, 5))
    whole = face_stage_table(prof, stages)
    monkeypatch.setattr("ntrans.faces._SEGMENTS_PER_CHUNK", 7)
    parts = face_stage_table(prof, stages)
    for key in whole:  # same algebra in pieces (implementation check)
        np.testing.assert_allclose(parts[key], whole[key], rtol=1e-12, atol=1e-12)


def test_segment_index_and_midpoints():
    lines = [shapely.LineString([(0, 0), (1, 0)]), shapely.LineString([(5, 5), (5, 6)])]
    prof = sample_profiles(lines, np.zeros((8, 8)), Affine(1, 0, -1, 0, -1, 7), 0.5)
    seg = prof.segment_index()
    # two segments per face, none across the faces' junction (station 2 -> 3)
    np.testing.assert_array_equal(seg, [0, 1, 3, 4])
    mx, my = prof.segment_midpoints()
    np.testing.assert_allclose(np.c_[mx, my], [[0.25, 0], [0.75, 0], [5, 5.25], [5, 5.75]])


def test_vertical_units_factor_scales_only_the_rise():
    prof = Profiles([0, 0], [0.0, 4.0], [0.0, 1.0], 1)
    t = face_stage_table(prof, np.array([1.0]), z_to_xy=3.0)
    # geometry identity: rise of 1 vertical unit = 3 horizontal units -> P = hypot(4, 3)
    assert t["wetted_perimeter"][0, 0] == pytest.approx(5.0)
    assert t["flow_area"][0, 0] == pytest.approx(2.0)  # horizontal x vertical units


def test_stations_do_not_depend_on_the_faces_before():
    """A face's stations are distances along that face alone (geometry identity: the
    station of a vertex is the length of the line up to it), bit for bit the same whether
    other, long faces come before it in the tile or not."""
    import shapely as _sh
    from affine import Affine as _Affine

    from ntrans.faces import sample_profiles as _sample

    face = _sh.LineString([(1.1, 1.3), (2.7, 1.3), (2.7, 3.9)])
    long = _sh.LineString([(0.0, 0.0), (123456.789, 0.1), (0.3, 98765.4321)])
    z = np.zeros((8, 8))
    tr = _Affine(1, 0, 0, 0, -1, 8)
    alone = _sample(np.array([face]), z, tr, 0.5)
    after = _sample(np.array([long, long, face]), z, tr, 0.5)
    assert np.array_equal(after.station[after.face == 2], alone.station[alone.face == 0])


@pytest.mark.parametrize("sizes", [[1], [3], [2, 1, 5], [1, 1, 1], [40, 2, 7, 1]])
def test_distance_along_sums_each_line_alone(sizes):
    """The compiled distance along lines: each line's running sum of its own segment
    lengths, starting at 0 at its first vertex (np.cumsum of that line alone, the same
    additions in the same order: bit for bit)."""
    from ntrans._kernels import distance_along

    rng = np.random.default_rng(len(sizes))
    seg = rng.uniform(0.0, 1e4, sum(sizes))
    first = np.zeros(seg.size, dtype=bool)
    first[np.cumsum([0, *sizes[:-1]])] = True
    got = distance_along(seg, first)
    at = 0
    for n in sizes:
        expected = np.concatenate([[0.0], np.cumsum(seg[at:at + n - 1])])
        assert got[at:at + n].tobytes() == expected.tobytes()
        at += n


def test_station_weights_are_the_length_each_station_stands_for():
    prof = Profiles(np.array([0, 0, 0, 1, 1, 2]), np.array([0.0, 1.0, 4.0, 0.0, 2.0, 0.0]),
                    np.zeros(6), 3)
    # geometry identity (trapezoidal rule): half of each adjacent segment; a lone station
    # stands for no length; the weights of a face add up to its length
    np.testing.assert_allclose(prof.station_weights(), [0.5, 2.0, 1.5, 1.0, 1.0, 0.0])
