"""Faces from cell polygons (ntrans.mesh)."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from conftest import grid_polygons
from shapely import Polygon, box

from ntrans.errors import GeometryError, InputError
from ntrans.mesh import Faces, border_gaps, build_faces

TOL = 1e-6


def pairs(f: Faces) -> list[tuple[int, int]]:
    return [(int(a), int(b)) for a, b in zip(f.cell_a, f.cell_b, strict=True) if b >= 0]


def boundary_count(f: Faces, cell: int | None = None) -> int:
    m = f.cell_b < 0
    if cell is not None:
        m &= f.cell_a == cell
    return int(m.sum())


def test_two_squares_share_one_side():
    f = build_faces([box(0, 0, 1, 1), box(1, 0, 2, 1)], snap_tolerance=TOL)
    assert pairs(f) == [(0, 1)]
    inner = f.cell_b >= 0
    assert f.length[inner][0] == pytest.approx(1.0, abs=4 * TOL)  # geometry identity
    # each cell: its three outer sides are one connected boundary piece
    assert boundary_count(f, 0) == 1 and boundary_count(f, 1) == 1
    np.testing.assert_allclose(f.length[~inner], [3.0, 3.0], atol=4 * TOL)
    assert shapely.hausdorff_distance(f.geometry[inner][0], shapely.LineString([(1, 0), (1, 1)])) < 4 * TOL


def test_unmatched_vertices_one_side_split():
    # left cell's right edge has no vertex at y = 0.5; the two right cells split there
    cells = [box(0, 0, 1, 1), box(1, 0, 2, 0.5), box(1, 0.5, 2, 1)]
    f = build_faces(cells, snap_tolerance=TOL)
    assert pairs(f) == [(0, 1), (0, 2), (1, 2)]
    np.testing.assert_allclose(f.length[f.cell_b >= 0], [0.5, 0.5, 1.0], atol=4 * TOL)  # geometry identity


def test_edge_split_on_one_side_only_gives_one_face():
    left = Polygon([(0, 0), (1, 0), (1, 0.3), (1, 0.7), (1, 1), (0, 1)])  # extra vertices
    f = build_faces([left, box(1, 0, 2, 1)], snap_tolerance=TOL)
    assert pairs(f) == [(0, 1)]
    assert f.length[f.cell_b >= 0][0] == pytest.approx(1.0, abs=4 * TOL)


def test_hole_cell_ring_around_inner_cell():
    ring = box(0, 0, 3, 3).difference(box(1, 1, 2, 2))
    inner = box(1, 1, 2, 2)
    f = build_faces([ring, inner], snap_tolerance=TOL)
    assert pairs(f) == [(0, 1)]
    shared = f.geometry[f.cell_b >= 0][0]
    assert shapely.is_closed(shared)
    assert f.length[f.cell_b >= 0][0] == pytest.approx(4.0)  # geometry identity: hole perimeter
    assert boundary_count(f, 0) == 1 and boundary_count(f, 1) == 0
    assert f.length[f.cell_b < 0][0] == pytest.approx(12.0, abs=4 * TOL)


def test_corner_contact_is_not_a_face():
    f = build_faces([box(0, 0, 1, 1), box(1, 1, 2, 2)], snap_tolerance=1e-3)
    assert pairs(f) == []
    # each cell's whole boundary is one boundary face (geometry identity: perimeter 4)
    np.testing.assert_allclose(np.sort(f.length), [4.0, 4.0], atol=4e-3)


def test_sliver_gap_below_tolerance_is_shared():
    tol = 1e-3
    f = build_faces([box(0, 0, 1, 1), box(1 + 4e-4, 0, 2, 1)], snap_tolerance=tol)
    assert pairs(f) == [(0, 1)]
    # the face is one side of the gap; its ends are accurate to about the tolerance
    assert f.length[f.cell_b >= 0][0] == pytest.approx(1.0, abs=2 * tol)


def test_small_overlap_below_tolerance_is_shared():
    tol = 1e-3
    f = build_faces([box(0, 0, 1 + 3e-4, 1), box(1, 0, 2, 1)], snap_tolerance=tol)
    assert pairs(f) == [(0, 1)]
    assert f.length[f.cell_b >= 0][0] == pytest.approx(1.0, abs=2 * tol)


def test_gap_above_tolerance_is_not_shared():
    f = build_faces([box(0, 0, 1, 1), box(1.01, 0, 2, 1)], snap_tolerance=1e-3)
    assert pairs(f) == []


def test_multipart_border_gives_two_faces():
    a = box(0, 0, 1, 3)
    u = box(1, 0, 3, 3).difference(box(1, 1, 2, 2))  # touches a at y in [0, 1] and [2, 3]
    c = box(1, 1, 2, 2)
    f = build_faces([a, u, c], snap_tolerance=TOL)
    assert pairs(f) == [(0, 1), (0, 1), (0, 2), (1, 2)]
    ab = f.geometry[(f.cell_a == 0) & (f.cell_b == 1)]
    # deterministic order: by start point (x, then y)
    assert shapely.get_coordinates(ab[0])[0, 1] < shapely.get_coordinates(ab[1])[0, 1]
    np.testing.assert_allclose(f.length[(f.cell_a == 0) & (f.cell_b == 1)], [1.0, 1.0], atol=4 * TOL)
    # c shares three sides with u: one connected face of length 3
    assert f.length[(f.cell_a == 1) & (f.cell_b == 2)][0] == pytest.approx(3.0, abs=4 * TOL)


def grid(nx: int, ny: int) -> list[Polygon]:
    return [box(i, j, i + 1, j + 1) for j in range(ny) for i in range(nx)]


def test_two_by_two_grid():
    cells = grid(2, 2)
    f = build_faces(cells, snap_tolerance=TOL)
    assert pairs(f) == [(0, 1), (0, 2), (1, 3), (2, 3)]
    assert boundary_count(f) == 4  # one connected outer piece per cell (an L of two sides)
    # boundary edges as separate sides: 8 unit sides in total (geometry identity)
    assert f.length[f.cell_b < 0].sum() == pytest.approx(8.0, abs=16 * TOL)
    np.testing.assert_allclose(f.length[f.cell_b >= 0], 1.0, atol=4 * TOL)


def test_two_by_two_grid_split_at_corners_gives_eight_boundary_faces():
    f = build_faces(grid(2, 2), snap_tolerance=TOL, boundary_corner_angle=45.0)
    assert len(pairs(f)) == 4 and boundary_count(f) == 8  # one face per outer unit side
    np.testing.assert_allclose(f.length[f.cell_b < 0], 1.0, atol=4 * TOL)  # geometry identity
    assert [boundary_count(f, c) for c in range(4)] == [2, 2, 2, 2]


def test_ring_boundary_split_at_corners():
    ring = box(0, 0, 3, 3).difference(box(1, 1, 2, 2))
    f = build_faces([ring, box(1, 1, 2, 2)], snap_tolerance=TOL, boundary_corner_angle=45.0)
    np.testing.assert_allclose(np.sort(f.length[f.cell_b < 0]), [3.0] * 4)  # four outer sides
    assert pairs(f) == [(0, 1)]  # shared faces are never split


def test_two_by_two_grid_with_straight_boundary_sides_split():
    # the same grid with a vertex in the middle of every outer side: still one L per cell
    cells = [shapely.segmentize(c, 0.5) for c in grid(2, 2)]
    f = build_faces(cells, snap_tolerance=TOL)
    assert len(pairs(f)) == 4 and boundary_count(f) == 4


def voronoi_mesh(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    pts = shapely.multipoints(rng.uniform(0, 100, (n, 2)))
    env = box(0, 0, 100, 100)
    cells = shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=env))
    return shapely.intersection(cells, env)


@pytest.mark.parametrize("seed", [1, 2])
def test_boundary_length_is_perimeter_of_union(seed):
    cells = voronoi_mesh(40, seed)
    f = build_faces(cells, snap_tolerance=1e-6)
    union = shapely.union_all(cells)
    # geometry identity: the boundary faces trace the outline of the mesh (each end of a
    # boundary face may lose up to 1e-9 to the clean-up buffer)
    assert f.length[f.cell_b < 0].sum() == pytest.approx(union.length, abs=1e-6)
    # geometry identity: every cell's faces add up to its perimeter
    per_cell = np.bincount(f.cell_a, f.length, minlength=len(cells))
    per_cell += np.bincount(f.cell_b[f.cell_b >= 0], f.length[f.cell_b >= 0], minlength=len(cells))
    np.testing.assert_allclose(per_cell, shapely.length(cells), atol=1e-5)


def test_shuffled_input_gives_the_same_faces():
    cells = voronoi_mesh(30, 3)
    f1 = build_faces(cells, snap_tolerance=1e-6)
    perm = np.random.default_rng(0).permutation(len(cells))
    f2 = build_faces(cells[perm], snap_tolerance=1e-6)
    # map f2's local cell ids back to the original positions
    a2, b2 = perm[f2.cell_a], np.where(f2.cell_b >= 0, perm[np.maximum(f2.cell_b, 0)], -1)
    lo, hi = np.where(b2 >= 0, np.minimum(a2, b2), a2), np.where(b2 >= 0, np.maximum(a2, b2), -1)
    key1 = {(int(a), int(b), round(float(x), 6), round(float(y), 6))
            for a, b, (x, y) in zip(f1.cell_a, f1.cell_b, shapely.get_coordinates(shapely.get_point(f1.geometry, 0)), strict=True)}
    key2 = {(int(a), int(b), round(float(x), 6), round(float(y), 6))
            for a, b, (x, y) in zip(lo, hi, shapely.get_coordinates(shapely.get_point(f2.geometry, 0)), strict=True)}
    assert key1 == key2
    # same geometry after mapping
    order2 = np.lexsort((shapely.get_coordinates(shapely.get_point(f2.geometry, 0))[:, 0], hi, lo))
    order1 = np.lexsort((shapely.get_coordinates(shapely.get_point(f1.geometry, 0))[:, 0], f1.cell_b, f1.cell_a))
    assert np.all(shapely.equals_exact(f1.geometry[order1], f2.geometry[order2], tolerance=1e-9))
    # and the same run twice is identical
    f3 = build_faces(cells, snap_tolerance=1e-6)
    assert np.array_equal(f1.cell_a, f3.cell_a) and np.array_equal(f1.cell_b, f3.cell_b)
    assert np.all(shapely.equals_exact(f1.geometry, f3.geometry, tolerance=0))


def test_faces_sorted_and_oriented():
    f = build_faces(voronoi_mesh(25, 5), snap_tolerance=1e-6)
    first = shapely.get_coordinates(shapely.get_point(f.geometry, 0))
    last = shapely.get_coordinates(shapely.get_point(f.geometry, -1))
    order = np.lexsort((first[:, 1], first[:, 0], f.cell_b, f.cell_a))
    assert np.array_equal(order, np.arange(f.n_faces))
    assert np.all(f.cell_b[f.cell_b >= 0] > f.cell_a[f.cell_b >= 0])
    closed = shapely.is_closed(f.geometry)
    starts_low = (first[:, 0] < last[:, 0]) | ((first[:, 0] == last[:, 0]) & (first[:, 1] <= last[:, 1]))
    assert np.all(starts_low | closed)


def test_input_errors():
    with pytest.raises(InputError):
        build_faces([box(0, 0, 1, 1)], snap_tolerance=0.0)
    with pytest.raises(GeometryError):
        build_faces([shapely.LineString([(0, 0), (1, 1)])], snap_tolerance=TOL)
    bowtie = Polygon([(0, 0), (1, 1), (1, 0), (0, 1)])
    with pytest.raises(GeometryError):
        build_faces([bowtie], snap_tolerance=TOL)
    assert build_faces([], snap_tolerance=TOL).n_faces == 0


def jittered_mesh(n: int, seed: int) -> np.ndarray:
    """A Voronoi mesh with every cell's vertices moved independently by ~1e-4 (gaps and
    overlaps), and every other cell's edges split at 5 m (unmatched vertices)."""
    cells = voronoi_mesh(n, seed)
    rng = np.random.default_rng(1)
    moved = []
    for poly in cells:
        ring = np.asarray(poly.exterior.coords)[:-1]
        moved.append(Polygon(ring + rng.uniform(-1e-4, 1e-4, ring.shape)))
    moved = np.array(moved, dtype=object)
    moved[::2] = shapely.segmentize(moved[::2], 5.0)
    assert np.all(shapely.is_valid(moved))
    return moved


def test_jittered_mesh_with_unmatched_vertices_finds_the_same_faces():
    # tolerance 1e-3 covers the 1e-4 jitter
    cells = voronoi_mesh(60, 7)
    moved = jittered_mesh(60, 7)
    exact = build_faces(cells, snap_tolerance=1e-6)
    rough = build_faces(moved, snap_tolerance=1e-3)
    assert pairs(rough) == pairs(exact)
    both = exact.cell_b >= 0
    # face ends are accurate to about the tolerance (mesh construction, no source)
    np.testing.assert_allclose(rough.length[rough.cell_b >= 0], exact.length[both], atol=3e-3)
    assert rough.length[rough.cell_b < 0].sum() == pytest.approx(400.0, abs=0.01)  # box outline


@pytest.mark.parametrize("seed", [4, 8])
def test_conforming_cells_by_edge_matching_agree_with_the_buffer_method(seed, monkeypatch):
    # interior Voronoi cells share identical edges: their faces come from edge matching;
    # forcing every pair through the buffer intersection must give the same faces
    import ntrans.mesh as mesh_module

    cells = voronoi_mesh(80, seed)
    fast = build_faces(cells, snap_tolerance=1e-6)

    def nothing_handled(geoms, p, q, rank, min_length):
        empty = np.empty(0, dtype=np.int64)
        return np.empty(0, dtype=object), empty, empty.copy(), np.zeros(p.size, dtype=bool)

    monkeypatch.setattr(mesh_module, "_exact_shared", nothing_handled)
    slow = build_faces(cells, snap_tolerance=1e-6)
    assert pairs(fast) == pairs(slow)
    assert np.array_equal(fast.cell_b, slow.cell_b)
    # face ends accurate to about the tolerance (mesh construction, no source): the buffer
    # method may keep a sub-tolerance over-reach where a border continues almost straight
    dist = shapely.hausdorff_distance(fast.geometry, slow.geometry)
    assert np.all(dist < 10 * 1e-6)
    np.testing.assert_allclose(fast.length, slow.length, atol=10 * 1e-6)


# --- processing in spatial blocks -------------------------------------------------------


def jittered_grid_voronoi(n_side: int, seed: int) -> np.ndarray:
    """A conforming mesh: Voronoi cells of jittered grid points, clipped to the box."""
    rng = np.random.default_rng(seed)
    i, j = np.meshgrid(np.arange(n_side), np.arange(n_side))
    pts = np.column_stack([i.ravel(), j.ravel()]) + 0.5 + rng.uniform(-0.3, 0.3, (i.size, 2))
    env = box(0, 0, n_side, n_side)
    cells = shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(pts), extend_to=env))
    return shapely.intersection(cells, env)


def patchwork_mesh() -> np.ndarray:
    """A non-conforming 8 x 6 grid of unit squares: a cell with a hole filled by another
    cell, a two-part cell, edges split on one side only, a shifted cell (gap on one side,
    overlap on the other, 4e-4) and an enlarged cell (overlap 3e-4); tolerance 1e-3."""
    cells: list = grid(8, 6)
    cells[9] = box(1, 1, 2, 2).difference(box(1.3, 1.3, 1.7, 1.7))
    cells.append(box(1.3, 1.3, 1.7, 1.7))
    cells[12] = box(4, 1, 5, 2 + 3e-4)
    cells[30] = box(6 + 4e-4, 3, 7 + 4e-4, 4)
    cells[20] = shapely.MultiPolygon([box(4, 2, 5, 3), box(6, 2, 7, 3)])
    del cells[22]  # its square is the second part of cell 20
    out = np.array(cells, dtype=object)
    out[::3] = shapely.segmentize(out[::3], 0.25)
    assert np.all(shapely.is_valid(out))
    return out


def assert_identical(f1: Faces, f2: Faces) -> None:
    # no tolerance: blocks must reproduce the one-block result to the bit
    assert np.array_equal(f1.cell_a, f2.cell_a)
    assert np.array_equal(f1.cell_b, f2.cell_b)
    assert np.array_equal(f1.length, f2.length)
    c1, i1 = shapely.get_coordinates(f1.geometry, return_index=True)
    c2, i2 = shapely.get_coordinates(f2.geometry, return_index=True)
    assert np.array_equal(i1, i2)
    assert np.array_equal(c1, c2)


MESHES = {
    "conforming": (lambda: jittered_grid_voronoi(18, 0), 1e-6),
    "jittered_split": (lambda: jittered_mesh(120, 3), 1e-3),
    "patchwork": (patchwork_mesh, 1e-3),
    # far from the origin the clean-up buffer width follows the coordinate scale
    "patchwork_far": (lambda: shapely.transform(patchwork_mesh(), lambda c: c + 3e5), 1e-3),
}


@pytest.mark.parametrize("angle", [None, 45.0])
@pytest.mark.parametrize("block_cells", [1, 3, 7, 50])
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_blocks_give_identical_faces(mesh, block_cells, angle):
    make, tol = MESHES[mesh]
    cells = make()
    whole = build_faces(cells, snap_tolerance=tol, boundary_corner_angle=angle, block_cells=None)
    assert whole.n_faces > len(cells)  # a real mesh, boundary faces included
    assert boundary_count(whole) > 0
    blocked = build_faces(
        cells, snap_tolerance=tol, boundary_corner_angle=angle, block_cells=block_cells
    )
    assert_identical(whole, blocked)


@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_blocks_mapped_through_pickle_give_identical_faces(mesh):
    import pickle

    def on_workers(fn, jobs):
        # what a Dask worker sees: the job crosses a scheduler (unpickled and pickled
        # again, forwarded as the same bytes) and the result crosses a pickle
        for job in jobs:
            wire = pickle.dumps(job)
            assert pickle.dumps(pickle.loads(wire)) == wire
            yield pickle.loads(pickle.dumps(fn(pickle.loads(wire))))

    make, tol = MESHES[mesh]
    cells = make()
    whole = build_faces(cells, snap_tolerance=tol, block_cells=None)
    mapped = build_faces(cells, snap_tolerance=tol, block_cells=7, map_blocks=on_workers)
    assert_identical(whole, mapped)


@pytest.mark.parametrize("block_cells", [None, 7])
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_lines_as_wkb_are_the_same_faces(mesh, block_cells):
    """Face lines built as WKB block by block: the same bytes shapely writes for the
    shapely lines, with their bounds and lengths to the bit."""
    make, tol = MESHES[mesh]
    cells = make()
    lines = build_faces(cells, snap_tolerance=tol, block_cells=block_cells)
    wkb = build_faces(cells, snap_tolerance=tol, block_cells=block_cells, lines_as_wkb=True)
    assert wkb.geometry.tolist() == shapely.to_wkb(lines.geometry).tolist()
    assert np.array_equal(wkb.bounds, shapely.bounds(lines.geometry))
    assert np.array_equal(wkb.length, lines.length)
    assert np.array_equal(wkb.cell_a, lines.cell_a) and np.array_equal(wkb.cell_b, lines.cell_b)
    assert np.array_equal(lines.bounds, wkb.bounds) and not lines.has_z and not wkb.has_z
    assert_identical(lines, Faces(shapely.from_wkb(wkb.geometry), wkb.cell_a, wkb.cell_b,
                                  wkb.length))


def test_blocks_from_workers_stay_wkb():
    """A block result that crossed a pickle (a Dask worker's) keeps its lines as the
    bytes it came with: a job that wants WKB never decodes them."""
    import pickle

    seen = []

    def on_workers(fn, jobs):
        for job in jobs:
            res = pickle.loads(pickle.dumps(fn(job)))
            seen.append(res)
            yield res

    make, tol = MESHES["patchwork"]
    cells = make()
    here = build_faces(cells, snap_tolerance=tol, block_cells=7, lines_as_wkb=True)
    there = build_faces(cells, snap_tolerance=tol, block_cells=7, lines_as_wkb=True,
                        map_blocks=on_workers)
    assert len(seen) > 1 and all(res._geometry is None for res in seen)  # never decoded
    assert there.geometry.tolist() == here.geometry.tolist()
    assert np.array_equal(there.bounds, here.bounds)
    assert np.array_equal(there.length, here.length)


def test_has_z_says_whether_face_lines_have_z():
    cells = [shapely.force_3d(box(0, 0, 1, 1), 5.0), shapely.force_3d(box(1, 0, 2, 1), 5.0)]
    for as_wkb in (False, True):
        faces = build_faces(cells, snap_tolerance=1e-6, lines_as_wkb=as_wkb)
        lines = shapely.from_wkb(faces.geometry) if as_wkb else faces.geometry
        assert faces.has_z == bool(shapely.has_z(lines).any())


def test_patchwork_mesh_faces_are_found():
    # the non-conforming fixture really has its special faces (geometry identity)
    f = build_faces(patchwork_mesh(), snap_tolerance=1e-3, block_cells=5)
    hole = (f.cell_a == 9) & (f.cell_b == 47)
    assert hole.sum() == 1 and shapely.is_closed(f.geometry[hole][0])
    # geometry identity: perimeter of the 0.4 x 0.4 hole (a closed face is not trimmed;
    # default relative 1e-6 only absorbs float rounding of the segmentized ring)
    assert f.length[hole][0] == pytest.approx(1.6)
    # the two-part cell 20 borders cells on both sides of the removed square
    assert {(20, 21), (20, 22)} <= set(pairs(f))  # cell 22 is the old 23
    # the enlarged cell 12 and the shifted cell 29 (old 30) still share full sides
    for a, b in [(12, 20), (28, 29), (29, 30)]:
        side = (f.cell_a == a) & (f.cell_b == b)
        assert side.sum() == 1
        # face ends accurate to about the tolerance (mesh construction, no source)
        assert f.length[side][0] == pytest.approx(1.0, abs=3e-3)


@pytest.mark.parametrize("block_cells", [None, 1, 20_000])
def test_blocks_on_tiny_meshes(block_cells):
    assert build_faces([], snap_tolerance=TOL, block_cells=block_cells).n_faces == 0
    one = build_faces([box(0, 0, 2, 1)], snap_tolerance=TOL, block_cells=block_cells)
    assert pairs(one) == [] and boundary_count(one, 0) == 1
    # geometry identity: the whole perimeter (default relative 1e-6: float rounding only)
    assert one.length[0] == pytest.approx(6.0)
    two = build_faces(grid(2, 1), snap_tolerance=TOL, block_cells=block_cells)
    assert_identical(two, build_faces(grid(2, 1), snap_tolerance=TOL, block_cells=None))


@pytest.mark.parametrize("bad", [0, -5, 2.5, "100", True, np.float64(10.0)])
def test_bad_block_cells(bad):
    with pytest.raises(InputError):
        build_faces(grid(2, 2), snap_tolerance=TOL, block_cells=bad)


def test_block_cells_accepts_numpy_integers():
    assert_identical(
        build_faces(grid(3, 3), snap_tolerance=TOL, block_cells=np.int32(2)),
        build_faces(grid(3, 3), snap_tolerance=TOL, block_cells=None),
    )


def test_trimmed_ends_do_not_depend_on_the_other_lines():
    # the over-reach trim measures along each line on its own: the same line trimmed
    # alone or after long lines gives the same coordinates, to the bit
    from ntrans.mesh import _trim_open_ends

    rng = np.random.default_rng(2)
    lines = shapely.linestrings(np.cumsum(rng.uniform(0.1, 3.0, (40, 7, 2)), axis=1) + 1e5)
    tol = 0.05
    together, kept = _trim_open_ends(lines, tol, 3 * tol)
    assert kept.all()
    for i in [0, 17, 39]:
        alone, _ = _trim_open_ends(lines[i : i + 1], tol, 3 * tol)
        assert np.array_equal(shapely.get_coordinates(alone), shapely.get_coordinates(together[i]))


def test_validity_test_leaves_the_warning_filters_alone(monkeypatch):
    # shapely.is_valid wraps GEOS in warnings.catch_warnings(), which is not thread-safe;
    # the job's own test must not touch the process's filters (it runs on tile threads)
    import warnings

    from ntrans.mesh import is_valid

    def refuse(*args, **kwargs):
        raise AssertionError("the validity test changed the warning filters")

    geoms = np.array([box(0, 0, 1, 1), Polygon([(0, 0), (1, 1), (1, 0), (0, 1)]), None])
    expected = shapely.is_valid(geoms)
    monkeypatch.setattr(warnings, "catch_warnings", refuse)
    monkeypatch.setattr(warnings, "simplefilter", refuse)
    np.testing.assert_array_equal(is_valid(geoms), expected)
    assert expected.tolist() == [True, False, False]


# --- border_gaps: borders two cells should share, cut apart by a gap wider than the tolerance


def test_gap_wider_than_the_tolerance_is_found_on_both_sides():
    # two unit squares 0.05 apart: each one's side along the gap is such a stretch
    cells = [box(0, 0, 1, 1), box(1.05, 0, 2.05, 1)]
    f = build_faces(cells, snap_tolerance=1e-3)
    gaps = border_gaps(cells, f, snap_tolerance=1e-3, reach=0.5)
    assert gaps.faces == 2
    # geometry identity: the stretches are the two unit sides along the gap (the samples
    # fall 1/20 of a perimeter of 4 apart, five on each side)
    assert gaps.length == pytest.approx(2.0)
    assert gaps.width == pytest.approx(0.05)
    assert sorted(gaps.first) == [(0, 1), (1, 0)]


@pytest.mark.parametrize("cells, tol", [
    ([box(0, 0, 1, 1), box(1.05, 0, 2.05, 1)], 0.1),      # the gap is within the tolerance
    ([box(0, 0, 1, 1), box(3, 0, 4, 1)], 1e-3),           # farther apart than the reach
    (grid(3, 3), 1e-6),                                   # boundary faces meet at mesh corners
    ([box(0, 0, 3, 3).difference(box(1, 1, 2, 2))], 1e-6),  # a hole with nothing in it
    # a building cut out 0.1 from the border with the next cell: the cell's own ground lies
    # between the hole's ring and that cell
    ([box(0, 0, 3, 3).difference(box(1, 1, 2.9, 2)), box(3, 0, 6, 3)], 1e-3),
    (list(voronoi_mesh(40, 3)), 1e-6),
])
def test_shared_borders_and_the_mesh_outline_are_no_gaps(cells, tol):
    f = build_faces(cells, snap_tolerance=tol)
    assert border_gaps(cells, f, snap_tolerance=tol, reach=0.5).faces == 0


def test_jittered_borders_are_gaps_until_the_tolerance_covers_them():
    # a 4 x 4 grid of 10 m cells whose vertices each move up to 3 cm on their own: shared
    # borders open gaps and overlaps of up to about 6 cm
    rng = np.random.default_rng(7)
    cells = [Polygon(np.asarray(c.exterior.coords)[:-1] + rng.uniform(-0.03, 0.03, (4, 2)))
             for c in grid_polygons(4, 4, 10.0)]
    f = build_faces(cells, snap_tolerance=0.01)
    gaps = border_gaps(cells, f, snap_tolerance=0.01, reach=1.0)
    assert gaps.faces > 0 and 0.01 < gaps.width < 0.09
    wide = 1.5 * gaps.width
    f = build_faces(cells, snap_tolerance=wide)
    assert border_gaps(cells, f, snap_tolerance=wide, reach=1.0).faces == 0
    # with it, the 24 interior borders of the grid are faces again
    assert len(pairs(f)) == 24
