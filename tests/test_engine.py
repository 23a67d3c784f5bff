"""Tiles: planning (which cells, faces, window) and running (in-process, tiled, Dask)."""

from __future__ import annotations

import distributed  # noqa: F401  (loads its config defaults)
import numpy as np
import pandas as pd
import pyogrio.raw
import pytest
import shapely
from affine import Affine
from conftest import grid_polygons, write_cells, write_dem

from ntrans.engine import MARGIN, band_tiles_for_cache, execute, plan_tiles, run_tile
from ntrans.errors import InputError, PartialCoverageWarning

# 40 x 40 one-metre pixels, lower-left corner (0, 0)
T40 = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 40.0)


def _pixel_box(window):
    """(col0, row0, col1, row1) of a rasterio Window."""
    return (window.col_off, window.row_off, window.col_off + window.width,
            window.row_off + window.height)


# --------------------------------------------------------------------------- planning


@pytest.mark.parametrize("tile_size", [1, 7, 10, 16, 1024])
def test_every_cell_in_exactly_one_tile(tile_size):
    polys = np.array(grid_polygons(8, 8, 5.0), dtype=object)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=tile_size)
    owned = np.concatenate([t.cells for t in tiles])
    assert np.array_equal(np.sort(owned), np.arange(64))
    assert [t.index for t in tiles] == list(range(len(tiles)))
    # deterministic order: tile row, then tile column
    keys = [t.key for t in tiles]
    assert keys == sorted(keys)


@pytest.mark.parametrize("band_tiles", [1, 2, 3])
def test_bands_reorder_the_same_tiles(band_tiles):
    """Bands of tile columns change the order of the tiles, never their content."""
    polys = np.array(grid_polygons(8, 8, 5.0), dtype=object)
    rows = plan_tiles(polys, T40, (40, 40), tile_size=10)
    bands = plan_tiles(polys, T40, (40, 40), tile_size=10, band_tiles=band_tiles)
    # order: band (tile column // band_tiles), then tile row, then tile column
    keys = [t.key for t in bands]
    assert keys == sorted(keys, key=lambda k: (k[1] // band_tiles, k[0], k[1]))
    assert [t.index for t in bands] == list(range(len(bands)))
    by_key = {t.key: t for t in rows}
    assert sorted(by_key) == sorted(keys)
    for t in bands:
        same = by_key[t.key]
        assert np.array_equal(t.cells, same.cells) and np.array_equal(t.halo, same.halo)
        assert t.window == same.window


def test_face_bounds_plan_the_same_tiles_as_face_lines():
    from ntrans.mesh import build_faces

    polys = np.array(grid_polygons(8, 8, 5.0), dtype=object)
    mesh = build_faces(polys, snap_tolerance=1e-6)
    kw = dict(tile_size=10, face_cell_a=mesh.cell_a, face_cell_b=mesh.cell_b)
    by_lines = plan_tiles(polys, T40, (40, 40), face_lines=mesh.geometry, **kw)
    by_bounds = plan_tiles(polys, T40, (40, 40), face_bounds=shapely.bounds(mesh.geometry),
                           **kw)
    assert len(by_lines) == len(by_bounds) == 16
    for a, b in zip(by_lines, by_bounds, strict=True):
        assert a.key == b.key and a.window == b.window
        assert np.array_equal(a.faces, b.faces) and np.array_equal(a.halo, b.halo)


@pytest.mark.parametrize("block_shape, width, itemsize, cache_mb, expected", [
    # 256 px blocks, 512 px tiles: a window spans ceil(1.5 * 512 / 256) + 1 = 4 block
    # rows and 2n + 2 block columns for n tile columns, 256 kB each (float32), so a band
    # row takes (2n + 2) MB; half of 32 MB holds n = 7 (16 MB), whatever the width
    ((256, 256), 10_000, 4, 32, 7),
    ((256, 256), 100_000, 4, 32, 7),
    ((256, 256), 10_000, 8, 32, 3),    # float64: (2n + 2) * 2 MB <= 16 MB -> n = 3
    ((256, 256), 10_000, 4, 128, None),  # a whole tile row (40 MB) fits in 64 MB
    ((256, 256), 3_163, 4, 32, None),  # 7 tile columns: the whole row is the band
    ((1, 10_000), 10_000, 4, 32, None),  # striped: a block spans the width
    ((512, 512), 100_000, 4, 32, 3),   # 3 block rows, n + 2 columns of 1 MB: n = 3 (15 MB)
    (None, 10_000, 4, 32, None),       # layout not known: row order
])
def test_band_width_keeps_one_band_row_in_half_the_cache(block_shape, width, itemsize,
                                                         cache_mb, expected):
    assert band_tiles_for_cache(block_shape, width, itemsize, 512, cache_mb * 2**20) == expected


def test_tile_membership_by_box_centre():
    polys = np.array(grid_polygons(8, 8, 5.0), dtype=object)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=10)
    # 4 x 4 tiles of 10 px; box centre (2.5 + 5i, 2.5 + 5j) -> column bin (5i + 2.5) // 10
    assert len(tiles) == 16
    for t in tiles:
        cent = shapely.centroid(shapely.envelope(polys[t.cells]))
        cols = np.floor(shapely.get_x(cent) / 10)
        rows = np.floor((40 - shapely.get_y(cent)) / 10)
        assert np.all(cols == t.key[1]) and np.all(rows == t.key[0])
    # an L whose centroid (x 7.5) and box centre (x 10.5) fall in different tiles
    ell = shapely.Polygon([(1, 1), (20, 1), (20, 3), (3, 3), (3, 20), (1, 20)])
    assert shapely.centroid(ell).x < 10 < shapely.centroid(shapely.envelope(ell)).x
    (tile,) = plan_tiles(np.array([ell], dtype=object), T40, (40, 40), tile_size=10)
    assert tile.key == (2, 1)  # box centre (10.5, 10.5): row (40 - 10.5) // 10, col 10.5 // 10


def test_window_covers_cells_plus_margin_and_is_clipped():
    polys = np.array(grid_polygons(8, 8, 5.0), dtype=object)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=10)
    for t in tiles:
        c0, r0, c1, r1 = _pixel_box(t.window)
        minx, miny, maxx, maxy = shapely.total_bounds(polys[t.cells])
        # pixel bounds of the cells, widened by the margin, clipped to the 40 x 40 raster
        assert c0 == max(int(minx) - MARGIN, 0)
        assert c1 == min(int(maxx) + MARGIN, 40)
        assert r0 == max(int(40 - maxy) - MARGIN, 0)
        assert r1 == min(int(40 - miny) + MARGIN, 40)


def test_tiles_without_cells_are_skipped():
    # two cells far apart: the 4 x 4 tile grid has only two occupied tiles
    polys = np.array([shapely.box(1, 1, 4, 4), shapely.box(35, 35, 39, 39)], dtype=object)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=10)
    assert [t.key for t in tiles] == [(0, 3), (3, 0)]
    assert [t.cells.tolist() for t in tiles] == [[1], [0]]


def test_cell_larger_than_tile_enlarges_window():
    big = shapely.box(0, 0, 40, 30)
    small = shapely.box(0, 30, 5, 40)
    tiles = plan_tiles(np.array([big, small], dtype=object), T40, (40, 40), tile_size=4)
    big_tile = next(t for t in tiles if 0 in t.cells)
    assert _pixel_box(big_tile.window) == (0, 10 - MARGIN, 40, 40)


def test_cells_outside_raster_get_clipped_or_empty_window():
    polys = np.array([shapely.box(5, 5, 10, 10), shapely.box(100, 100, 110, 110)], dtype=object)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=10)
    outside = next(t for t in tiles if 1 in t.cells)
    assert outside.window.width == 0 or outside.window.height == 0


def test_faces_follow_cell_a_and_halo_holds_cell_b():
    polys = np.array(grid_polygons(4, 1, 10.0), dtype=object)  # 4 cells in a row
    t = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 10.0)
    lines = np.array([shapely.LineString([(10, 0), (10, 10)]),
                      shapely.LineString([(20, 0), (20, 10)]),
                      shapely.LineString([(30, 0), (30, 10)]),
                      shapely.LineString([(0, 0), (0, 10)])], dtype=object)
    fa = np.array([0, 1, 2, 0])
    fb = np.array([1, 2, 3, -1])
    tiles = plan_tiles(polys, t, (10, 40), tile_size=20, face_cell_a=fa, face_cell_b=fb,
                       face_lines=lines)
    assert [x.cells.tolist() for x in tiles] == [[0, 1], [2, 3]]
    assert [x.faces.tolist() for x in tiles] == [[0, 1, 3], [2]]
    # face 1 (cells 1 | 2) crosses the tile border: cell 2 is the first tile's halo
    assert [x.halo.tolist() for x in tiles] == [[2], []]
    assert _pixel_box(tiles[0].window) == (0, 0, 30 + MARGIN, 10)


def test_tile_size_must_be_positive():
    with pytest.raises(InputError):
        plan_tiles(np.array([shapely.box(0, 0, 1, 1)], dtype=object), T40, (40, 40), tile_size=0)


def test_workers_and_scheduler_exclusive():
    with pytest.raises(InputError):
        list(execute([], dem=None, dem_path="x.tif", settings=None, workers=2,
                     scheduler="tcp://127.0.0.1:1"))


@pytest.mark.parametrize("workers, scheduler", [(2, "tcp://127.0.0.1:1"), (0, None), (-1, None)])
def test_worker_connection_checks_its_options_at_once(workers, scheduler):
    from ntrans.cluster import connect_workers

    with pytest.raises(InputError):
        connect_workers(workers, scheduler)  # before any cluster is started
    assert connect_workers(None, None) is None  # neither: run in this process


@pytest.mark.parametrize("address, valid", [
    ("tcp://127.0.0.1:8786", True), ("127.0.0.1:8786", True), ("tls://[::1]:8786", True),
    ("tcp://scheduler.example.org:8786", True), ("inproc://10.0.0.1/123/1", True),
    ("garbage", False), ("http://example.com:80", False), ("tcp://127.0.0.1", False),
    ("tcp://host:port", False),
])
def test_scheduler_address_is_checked_before_connecting(address, valid):
    from ntrans.cluster import check_where

    if valid:
        check_where(None, address)
        return
    with pytest.raises(InputError, match="tcp://HOST:PORT"):
        check_where(None, address)


def test_a_server_that_never_answers_is_given_up_on(monkeypatch):
    """Something listening at the address that is not a Dask scheduler (e.g. its
    dashboard's port): the job gives up after the wait with one sentence instead of
    hanging, and closing does not wait for the connection attempt."""
    import socket
    import time

    import ntrans.cluster as cluster

    monkeypatch.setattr(cluster, "SCHEDULER_WAIT_SECONDS", 1.0)
    with socket.socket() as server:
        server.bind(("127.0.0.1", 0))
        server.listen()  # accepts connections, never says a word
        address = f"tcp://127.0.0.1:{server.getsockname()[1]}"
        started = time.perf_counter()
        with pytest.raises(InputError, match="did not answer within 1 s"):
            with cluster.WorkerConnection(None, address) as connection:
                connection.n_workers()
        assert time.perf_counter() - started < 8.0  # the wait, not the client's timeouts


def test_task_travels_as_wkb_and_comes_back_identical():
    import pickle

    from ntrans.engine import TileTask

    tiles = plan_tiles(np.array(grid_polygons(2, 2, 10.0), dtype=object), T40, (40, 40))
    polys = np.array([shapely.Polygon([(0, 0), (1.0 / 3.0, 0), (0, 0.1 + 1e-13)]), None],
                     dtype=object)
    lines = np.array([shapely.LineString([(0, 0), (2.0 / 3.0, 1.0 / 7.0)])], dtype=object)
    task = TileTask(tiles[0], polys, None, lines, np.array([0]), np.array([-1]), np.array([1.0]))
    wire = pickle.dumps(task)
    # what a scheduler does: unpickle and pickle again, without using the geometry;
    # the bytes are forwarded as they are, not decoded and encoded again
    forwarded = pickle.loads(wire)
    assert forwarded._polygons is None and forwarded._face_lines is None  # not decoded
    assert pickle.dumps(forwarded) == wire
    back = pickle.loads(pickle.dumps(forwarded))
    # WKB stores IEEE doubles: coordinates come back to the bit
    np.testing.assert_array_equal(shapely.get_coordinates(back.polygons),
                                  shapely.get_coordinates(polys))
    assert back.polygons[1] is None
    np.testing.assert_array_equal(shapely.get_coordinates(back.face_lines),
                                  shapely.get_coordinates(lines))
    assert back.tile.index == task.tile.index and back.tile.window == task.tile.window
    np.testing.assert_array_equal(back.face_b, task.face_b)


@pytest.mark.parametrize("as_wkb", [False, True])
def test_tasks_from_face_lines_kept_as_wkb(as_wkb):
    """A job keeps its face lines as WKB: each task decodes its own lines, to the bit, and
    sends them on as the same bytes; the polygons stay objects unless sent as WKB."""
    import pickle

    from ntrans.engine import make_tasks
    from ntrans.mesh import build_faces

    polys = np.array(grid_polygons(4, 4, 10.0), dtype=object)
    mesh = build_faces(polys, snap_tolerance=1e-6)
    tiles = plan_tiles(polys, T40, (40, 40), tile_size=20, face_cell_a=mesh.cell_a,
                       face_cell_b=mesh.cell_b, face_lines=mesh.geometry)
    args = dict(face_cell_a=mesh.cell_a, face_cell_b=mesh.cell_b, face_length=mesh.length,
                as_wkb=as_wkb)
    plain = list(make_tasks(tiles, polys, face_lines=mesh.geometry, **args))
    kept = list(make_tasks(tiles, polys, face_lines=shapely.to_wkb(mesh.geometry),
                           face_lines_wkb=True, **args))
    assert len(kept) == len(plain) == 4
    for a, b in zip(plain, kept, strict=True):
        assert (b._polygons is None) == as_wkb and b._face_lines is None
        assert pickle.dumps(a) == pickle.dumps(b)  # the same task on the wire
        assert shapely.equals_exact(a.face_lines, b.face_lines, tolerance=0).all()
        np.testing.assert_array_equal(shapely.get_coordinates(a.face_lines),
                                      shapely.get_coordinates(b.face_lines))
        assert shapely.equals_exact(a.polygons, b.polygons, tolerance=0).all()
        np.testing.assert_array_equal(a.face_a, b.face_a)


# --------------------------------------------------------------------------- running


def _terrain(rows, cols):
    """Smooth terrain with relief (elevations about 8..13 m) on 1 m pixels."""
    y, x = np.mgrid[0:rows, 0:cols] + 0.5
    return 10.0 + 0.05 * x + 1.5 * np.sin(x / 5.0) * np.cos(y / 7.0)


@pytest.fixture
def mesh(tmp_path):
    """30 x 30 m DEM; 4 x 3 cells of 7 m from (1.3, 2.6): borders cut through pixels."""
    dem = write_dem(tmp_path / "dem.tif", _terrain(30, 30), dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(4, 3, 7.0, origin=(1.3, 2.6)))
    return dem, cells


def _tables(out):
    cell = pd.read_parquet(out / "cell_stage.parquet")
    face = pd.read_parquet(out / "face_stage.parquet")
    cell = cell.sort_values(["cell_id", "stage"], kind="stable").reset_index(drop=True)
    face = face.sort_values(["face_id", "stage"], kind="stable").reset_index(drop=True)
    return cell, face


def _assert_same(a: pd.DataFrame, b: pd.DataFrame):
    assert list(a.columns) == list(b.columns)
    assert len(a) == len(b)
    for name in a.columns:
        x, y = a[name].to_numpy(), b[name].to_numpy()
        if x.dtype.kind in "fi":
            scale = float(np.nanmax(np.abs(y))) if np.any(np.isfinite(y)) else 1.0
            # Tiles change only the window origin (pixel coordinates are computed from a
            # different offset) and which other cells share a cumulative sum: both are
            # round-off, ~1e-16 relative; 1e-12 of the value (or of the column's largest
            # value, for values that are zero up to round-off) bounds it with room.
            np.testing.assert_allclose(x, y, rtol=1e-12, atol=1e-12 * scale, err_msg=name)
        else:
            assert a[name].equals(b[name]), name


@pytest.mark.parametrize("tile_size", [3, 8])
def test_tiled_equals_untiled(mesh, tmp_path, tile_size):
    from ntrans.tables import build_tables

    dem, cells = mesh
    one = build_tables(dem, cells, out=tmp_path / "one", depths="0:2:0.5")
    many = build_tables(dem, cells, out=tmp_path / "many", depths="0:2:0.5",
                        tile_size=tile_size)
    assert one.n_tiles == 1 and many.n_tiles > 4  # tiles cut through cells and faces
    c1, f1 = _tables(tmp_path / "one")
    c2, f2 = _tables(tmp_path / "many")
    _assert_same(c1, c2)
    _assert_same(f1, f2)


def test_bands_give_the_same_rows_in_band_order(mesh, tmp_path, monkeypatch):
    """Tiles taken in bands of one tile column: the same rows, to the bit (each tile's
    window does not depend on the order), in band order."""
    import ntrans.tables
    from ntrans.tables import build_tables

    dem, cells = mesh
    build_tables(dem, cells, out=tmp_path / "rows", depths="0:2:0.5", tile_size=8)
    monkeypatch.setattr(ntrans.tables, "band_tiles_for_cache", lambda *args: 1)
    build_tables(dem, cells, out=tmp_path / "bands", depths="0:2:0.5", tile_size=8)
    for name, keys in (("cell_stage.parquet", ["cell_id", "stage"]),
                       ("face_stage.parquet", ["face_id", "stage"])):
        a = pd.read_parquet(tmp_path / "rows" / name)
        b = pd.read_parquet(tmp_path / "bands" / name)
        assert not a[keys].equals(b[keys])  # another order ...
        a = a.sort_values(keys, kind="stable").reset_index(drop=True)
        b = b.sort_values(keys, kind="stable").reset_index(drop=True)
        pd.testing.assert_frame_equal(a, b, check_exact=True)  # ... of the same rows


def test_dask_two_processes_equals_single_process(mesh, tmp_path):
    from ntrans.tables import build_tables

    dem, cells = mesh
    build_tables(dem, cells, out=tmp_path / "local", stages="9:12:1", tile_size=8)
    # Two worker processes, started as in production (forked from a server process
    # that has loaded ntrans once); tasks and results travel pickled between processes.
    build_tables(dem, cells, out=tmp_path / "dask", stages="9:12:1", tile_size=8, workers=2)
    for name in ("cell_stage.parquet", "face_stage.parquet"):
        a = pd.read_parquet(tmp_path / "local" / name)
        b = pd.read_parquet(tmp_path / "dask" / name)
        # same tiles, same functions, same order: identical to the bit, row order included
        pd.testing.assert_frame_equal(a, b, check_exact=True)
    # the workers' row files were read back and removed: same files as in one process
    assert sorted(p.name for p in (tmp_path / "dask").iterdir()) == sorted(
        p.name for p in (tmp_path / "local").iterdir())


def test_local_workers_start_loaded_and_without_the_profiler():
    import multiprocessing

    from ntrans.cluster import WorkerConnection

    if "forkserver" not in multiprocessing.get_all_start_methods():
        pytest.skip("no forkserver on this platform")
    with WorkerConnection(2, None) as connection:
        client = connection.client
        # forked from the server that imported the tile code (Dask replaces a preload
        # list set before it makes its context; the worker would then load it itself)
        loaded = client.run(lambda: "ntrans._worker_preload" in __import__("sys").modules)
        profiling = client.run(
            lambda: __import__("dask").config.get("distributed.worker.profile.enabled"))
    assert list(loaded.values()) == [True, True]
    assert list(profiling.values()) == [False, False]


def test_script_without_main_guard_gets_one_clear_error(tmp_path):
    # local workers start from a fresh process that imports the calling script; a script
    # that calls ntrans at import time (no main guard) makes them fail to start.  The
    # script must get an InputError that says what to change, not Dask's own error
    import subprocess
    import sys

    script = tmp_path / "no_guard.py"
    script.write_text(
        "import ntrans.cluster as c\n"
        "from ntrans.errors import InputError\n"
        "try:\n"
        "    list(c.run_ordered(c.call, abs, [-1, -2], workers=1))\n"
        "except InputError as exc:\n"
        "    print('INPUT ERROR:', exc)\n")
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=180, cwd=tmp_path)
    lines = [line for line in done.stdout.splitlines() if line.startswith("INPUT ERROR:")]
    assert lines and "if __name__ == '__main__':" in lines[0]


@pytest.mark.parametrize("threads", [2, 3])
def test_threads_equal_one_thread_to_the_bit(mesh, tmp_path, monkeypatch, threads):
    import functools
    import threading

    import ntrans.mesh
    from ntrans.tables import build_tables

    # face blocks of 3 cells, so that the mesh too is built several blocks at a time
    ran_on: dict[str, set] = {"one": set(), "many": set()}
    run_block_job = ntrans.mesh.run_block_job

    def recorded(job, *, into):
        into.add(threading.current_thread().name)
        return run_block_job(job)

    monkeypatch.setattr(ntrans.mesh, "build_faces",
                        functools.partial(ntrans.mesh.build_faces, block_cells=3))
    dem, cells = mesh
    results = {}
    for name, n in (("one", 1), ("many", threads)):
        monkeypatch.setattr(ntrans.mesh, "run_block_job",
                            functools.partial(recorded, into=ran_on[name]))
        results[name] = build_tables(dem, cells, out=tmp_path / name, stages="9:12:0.5",
                                     tile_size=8, threads=n)
    assert results["many"].n_tiles > threads  # several tiles really run at once
    assert ran_on["one"] == {threading.current_thread().name}
    assert ran_on["many"] and threading.current_thread().name not in ran_on["many"]
    for name in ("cell_stage.parquet", "face_stage.parquet"):
        # same tiles, same functions, results taken in tile order: identical, row order
        # included
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "one" / name),
                                      pd.read_parquet(tmp_path / "many" / name),
                                      check_exact=True)
    for name in ("cells.gpkg", "faces.gpkg"):
        one, many = (pyogrio.raw.read(tmp_path / run / name) for run in ("one", "many"))
        assert one[2].tolist() == many[2].tolist()  # the same geometry, byte for byte
        for a, b in zip(one[3], many[3], strict=True):
            np.testing.assert_array_equal(a, b)


def test_default_threads_one_per_core_up_to_four(monkeypatch):
    import os

    from ntrans import cluster

    for cores, expected in [(1, 1), (2, 2), (3, 3), (4, 4), (16, 4)]:
        monkeypatch.setattr(os, "sched_getaffinity", lambda pid, n=cores: set(range(n)),
                            raising=False)
        assert cluster.default_threads() == expected


@pytest.mark.parametrize("cores, workers, noted", [(2, 2, True), (2, 1, True), (1, 1, True),
                                                   (2, 3, False), (16, 4, True), (16, 5, False)])
def test_local_cluster_no_larger_than_one_process_is_noted(monkeypatch, cores, workers, noted):
    """A local cluster with no more workers than one process's tile threads gets a note
    (it computes on the same cores and adds start-up and transfers)."""
    from ntrans import cluster

    monkeypatch.setattr(cluster.os, "sched_getaffinity", lambda pid: set(range(cores)),
                        raising=False)
    note = cluster.local_cluster_note(workers)
    assert (note is not None) == noted
    if noted:
        assert f"{workers} worker(s)" in note
        assert f"{min(cores, cluster.DEFAULT_THREADS_MAX)} tile thread(s)" in note


@pytest.mark.parametrize("cores, pooled", [(1, False), (3, True)])
def test_run_ordered_uses_the_default_threads(monkeypatch, cores, pooled):
    """Without ``threads`` the tasks run on a pool of one thread per core (none on one)."""
    import threading

    from ntrans import cluster

    monkeypatch.setattr(cluster, "default_threads", lambda: cores)
    names = list(cluster.run_ordered(lambda shared, task: threading.current_thread().name,
                                     None, range(6)))
    assert all(n.startswith("ntrans-tiles") for n in names) == pooled
    assert any(n == threading.current_thread().name for n in names) != pooled


def test_thread_runner_keeps_order_bounds_work_and_stops_on_error():
    import threading
    import time

    from ntrans.cluster import run_ordered

    started: list[int] = []
    lock = threading.Lock()

    def slow_then_fast(shared, task):
        with lock:
            started.append(task)
        time.sleep(0.02 if task % 2 == 0 else 0.0)  # later tasks finish first
        if task == shared:
            raise ValueError("tile failed")
        return task * 10

    assert list(run_ordered(slow_then_fast, -1, range(12), threads=3)) == [
        10 * k for k in range(12)]
    started.clear()
    results = run_ordered(slow_then_fast, 4, iter(range(1000)), threads=2, max_in_flight=3)
    with pytest.raises(ValueError, match="tile failed"):
        list(results)
    # the error stops the run: tasks past the bounded window were never started
    assert max(started) < 4 + 3 + 2


@pytest.mark.parametrize("kwargs", [{"threads": 0}, {"threads": 2, "workers": 2},
                                    {"threads": 2, "scheduler": "tcp://127.0.0.1:1"}])
def test_threads_checked_at_once(mesh, tmp_path, kwargs):
    from ntrans.tables import build_tables

    dem, cells = mesh
    with pytest.raises(InputError, match="threads"):
        build_tables(dem, cells, out=tmp_path / "out", stages="10", **kwargs)
    assert not (tmp_path / "out").exists()


def test_rasters_kept_open_share_one_handle_between_threads(mesh):
    """Threads read through one handle per path, taking turns (GDAL datasets are not for
    two threads at once), and get what each would read alone."""
    import threading
    from concurrent.futures import ThreadPoolExecutor

    import ntrans.inputs as inputs

    dem, _ = mesh
    info = inputs.open_dem(dem)
    alone = info.read_window(0, 0, 30, 30)
    together = threading.Barrier(3, timeout=30)

    def read_twice(k):
        first = info.read_window(k, k, 10, 12)
        together.wait()  # three threads read at the same time
        return first, info.read_window(k + 1, k, 10, 12)

    with inputs.rasters_kept_open():
        with ThreadPoolExecutor(3) as pool:
            reads = list(pool.map(read_twice, range(3)))
        session = inputs._session
        handles = session.handles()
        assert len(handles) == 1  # one handle per path, not per thread or read
        with inputs.rasters_kept_open():  # nested (any thread): the outer block owns them
            assert inputs._session is session
    assert inputs._session is None and all(src.closed for src in handles)
    for k, (first, second) in enumerate(reads):
        np.testing.assert_array_equal(first, alone[k:k + 10, k:k + 12])
        np.testing.assert_array_equal(second, alone[k + 1:k + 11, k:k + 12])


def test_spilled_rows_come_back_identical(tmp_path):
    from ntrans.engine import SpilledRows, rows_of, spill_rows

    rows = {"cell": np.array([3, 3, 9], dtype=np.int64),
            "volume": np.array([0.1, np.nan, 1e300]), "empty_ok": np.zeros(3)}
    spilled = spill_rows(rows, str(tmp_path / "t.arrow"))
    assert isinstance(spilled, SpilledRows)
    back = rows_of(spilled)
    assert not (tmp_path / "t.arrow").exists()  # read once, then removed
    for name, values in rows.items():
        assert back[name].dtype == values.dtype
        np.testing.assert_array_equal(back[name], values)  # bits, NaN included
    assert rows_of(rows) is rows  # rows that were never spilled pass through


def test_existing_scheduler_equals_single_process(mesh, tmp_path):
    from distributed import LocalCluster

    from ntrans.tables import build_tables

    dem, cells = mesh
    build_tables(dem, cells, out=tmp_path / "local", stages="10,11", tile_size=8)
    # a threads-only cluster starts in about a second; the path is the same as for a
    # remote scheduler (Client(address))
    with LocalCluster(n_workers=1, processes=False, dashboard_address=None) as cluster:
        build_tables(dem, cells, out=tmp_path / "remote", stages="10,11", tile_size=8,
                     scheduler=cluster.scheduler_address)
    for name in ("cell_stage.parquet", "face_stage.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "local" / name),
                                      pd.read_parquet(tmp_path / "remote" / name),
                                      check_exact=True)


def test_unreachable_scheduler_is_a_user_error(mesh, tmp_path, monkeypatch):
    import ntrans.cluster as cluster
    from ntrans.tables import build_tables

    monkeypatch.setattr(cluster, "SCHEDULER_TIMEOUT", "1s")
    dem, cells = mesh
    with pytest.raises(InputError):
        build_tables(dem, cells, out=tmp_path / "out", stages="10", scheduler="tcp://127.0.0.1:9")
    assert not (tmp_path / "out").exists()


def test_tile_all_nodata(tmp_path):
    from ntrans.tables import build_tables

    z = _terrain(20, 20)
    z[:, :10] = np.nan  # the left tile column holds no terrain at all
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(4, 4, 5.0))
    with pytest.warns(PartialCoverageWarning, match="8 cells"):
        res = build_tables(dem, cells, out=tmp_path / "out", stages="10,11", tile_size=10)
    assert res.n_tiles == 4
    cell, face = _tables(tmp_path / "out")
    assert len(cell) == 16 * 2
    dry = cell[cell.cell_id.isin([1, 2, 5, 6, 9, 10, 13, 14])]
    # no terrain: nothing is wet and there is no flat bed
    np.testing.assert_array_equal(np.nan_to_num(dry.wet_area), 0.0)
    np.testing.assert_array_equal(np.nan_to_num(dry.volume), 0.0)
    assert dry.flat_elevation.isna().all()
    wet = cell[~cell.cell_id.isin(dry.cell_id)]
    assert wet.flat_elevation.notna().all()


def test_tile_with_no_cells_and_cell_larger_than_tile(tmp_path):
    from ntrans.tables import build_tables

    dem = write_dem(tmp_path / "dem.tif", _terrain(40, 40), dtype="float64")
    big = shapely.box(0.5, 0.5, 25.5, 25.5)  # 625 pixels, larger than a 4-pixel tile
    far = shapely.box(35, 35, 39, 39)  # leaves empty tiles between the two
    cells = write_cells(tmp_path / "cells.gpkg", [big, far])
    one = build_tables(dem, cells, out=tmp_path / "one", depths="0.5,1,3")
    many = build_tables(dem, cells, out=tmp_path / "many", depths="0.5,1,3", tile_size=4)
    assert one.n_tiles == 1
    assert many.n_tiles == 2  # only the two occupied tiles out of 100
    c1, f1 = _tables(tmp_path / "one")
    c2, f2 = _tables(tmp_path / "many")
    _assert_same(c1, c2)
    _assert_same(f1, f2)


def test_run_tile_is_pure_on_arrays():
    from ntrans.engine import TileSettings, make_tasks
    from ntrans.stages import StageSpec

    polys = np.array(grid_polygons(2, 1, 2.0), dtype=object)
    t = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 2.0)
    tiles = plan_tiles(polys, t, (2, 4), tile_size=1024)
    (task,) = list(make_tasks(tiles, polys))
    settings = TileSettings(stages=StageSpec(np.array([1.0, 2.0])), reference=1.5, faces=False)
    z = np.array([[0.0, 0.0, 1.0, 1.0], [0.0, 0.0, 1.0, 1.0]])
    res = run_tile(task, z, t, settings)
    rows = res["cell_rows"]
    assert rows["cell"].tolist() == [0, 0, 1, 1]
    # geometry identity: 4 pixels of 1 m2 under 1 m (cell 0 at stage 1) or 2 m of water
    np.testing.assert_allclose(rows["volume"], [4.0, 8.0, 0.0, 4.0])
    np.testing.assert_allclose(rows["wet_area"], [4.0, 4.0, 0.0, 4.0])


class _Payload:
    """Data two passes share (tokenised by content, like a job object)."""

    def __init__(self, values):
        self.values = values

    def __dask_tokenize__(self):
        return ("payload", self.values)


def _scaled(shared, task):
    kind, payload, factor = shared
    return task * factor + payload.values[0]


def test_passes_sharing_scattered_data_back_to_back():
    """Pass after pass over the same shared item on one connection: every result comes
    back.  With content keys, a pass scattered its shared items under the keys the
    previous pass was releasing, and its tasks could fail with lost dependencies."""
    from distributed import Client, LocalCluster

    from ntrans.cluster import run_ordered

    payload = _Payload((7,))
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster, Client(cluster):
        connection = _ClientConnection(cluster)
        for repeat in range(40):
            factor = repeat % 3 + 1
            got = list(run_ordered(_scaled, ("pass", payload, factor), range(5),
                                   connection=connection))
            assert got == [t * factor + 7 for t in range(5)]


class _ClientConnection:
    """The part of WorkerConnection run_ordered uses, over an existing cluster."""

    local = True

    def __init__(self, cluster):
        from distributed import Client

        self.client = Client(cluster)


def test_worker_describes_a_replaced_dem_afresh(tmp_path):
    """Workers cache the DEM's description per file version: a DEM replaced at the same
    path with another size and origin is described as it is now, not as it was."""
    import os

    from ntrans.engine import _dem_by_path

    path = write_dem(tmp_path / "dem.tif", np.zeros((10, 12)))
    first = _dem_by_path(str(path), ())
    assert _dem_by_path(str(path), ()) is first  # cached while the file is the same
    write_dem(tmp_path / "new.tif", np.zeros((20, 8)), origin=(100.0, 50.0))
    os.replace(tmp_path / "new.tif", path)
    again = _dem_by_path(str(path), ())
    assert again.shape == (20, 8) and first.shape == (10, 12)
    assert again.transform != first.transform
