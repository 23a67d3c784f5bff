"""Tiles: which cells and faces go together, which DEM window they need, where they run.

A *tile* is a group of cells binned by the centre of their bounding box on a grid of
``tile_size`` x ``tile_size`` DEM pixels, together with the faces whose ``cell_a`` is one
of those cells and one DEM window that covers all of them plus a margin of
:data:`MARGIN` pixels (the 3x3 slope stencil and the bilinear profile sampler both
reach one pixel beyond what they cover).  Every cell belongs to exactly one tile; a cell
larger than a tile simply makes its tile's window larger.

The flat bed of a face needs the flat elevations of *both* adjacent cells.  Rather than
a first pass over the whole mesh, a tile also carries the *halo* cells: the ``cell_b`` of
its faces that belong to another tile.  Their coverage and terrain summary are computed
again inside this tile (a little duplicated work along tile borders) but no stage rows
are written for them; the tile is therefore self-contained and can run anywhere.

:func:`run_tile` is pure (arrays in, arrays out) so the same function runs in-process or
on a Dask worker.  :func:`execute` runs tasks one after another in this process
(default), on a local cluster of worker processes (``workers=N``), or on an existing Dask
scheduler (``scheduler=ADDRESS``), and yields results in tile order in every case, so the
output files are the same whichever way they were computed.
"""

from __future__ import annotations

import functools
import logging
import os
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import shapely
from affine import Affine
from rasterio.windows import Window

from .errors import InputError
from .stages import StageSpec

log = logging.getLogger(__name__)

MARGIN = 2
"""Pixels added around a tile's window: slope stencil (1) + bilinear support (1)."""

"""How long to wait for an existing Dask scheduler to answer."""

CoverageMode = Literal["exact", "centre"]
ElevationRule = Literal["mean", "min", "median", "centroid", "field"]
FaceRule = Literal["higher", "mean", "min", "profile_mean"]

ELEVATION_RULES: tuple[str, ...] = ("mean", "min", "median", "centroid", "field")
FACE_RULES: tuple[str, ...] = ("higher", "mean", "min", "profile_mean")
COVERAGE_MODES: tuple[str, ...] = ("exact", "centre")


# --------------------------------------------------------------------------- planning


@dataclass(frozen=True)
class Tile:
    """One unit of work.

    Attributes
    ----------
    index : position in the deterministic tile order (0, 1, ...).
    key : (tile_row, tile_col) on the tile grid (may be negative for cells whose
        box centre lies outside the DEM).
    cells : global indices of the cells owned by this tile, increasing.
    halo : global indices of other tiles' cells that this tile's faces touch, increasing.
    faces : global indices of the faces owned by this tile (their ``cell_a`` is here).
    window : DEM window (pixels) covering cells, halo and faces plus the margin, clipped
        to the raster; may be empty (height or width 0) when every cell lies outside.
    """

    index: int
    key: tuple[int, int]
    cells: np.ndarray
    halo: np.ndarray
    faces: np.ndarray
    window: Window


def _pixel_bounds(bounds: np.ndarray, transform: Affine) -> np.ndarray:
    """(n, 4) world bounds -> (n, 4) float pixel bounds ``col0, row0, col1, row1``.

    Overwrites and returns ``bounds`` (a fresh array from ``shapely.bounds``): the mesh
    may hold millions of faces, so no (4, n) temporaries.
    """
    inv = ~transform
    if inv.b != 0 or inv.d != 0:  # rotated: all four corners
        minx, miny, maxx, maxy = bounds.T
        xs = np.stack([minx, maxx, minx, maxx])
        ys = np.stack([miny, miny, maxy, maxy])
        cols = inv.a * xs + inv.b * ys + inv.c
        rows = inv.d * xs + inv.e * ys + inv.f
        return np.stack([cols.min(0), rows.min(0), cols.max(0), rows.max(0)], axis=1)
    for lo, hi, scale, offset in ((0, 2, inv.a, inv.c), (1, 3, inv.e, inv.f)):
        a = bounds[:, lo] * scale + offset
        b = bounds[:, hi] * scale + offset
        np.minimum(a, b, out=bounds[:, lo])
        np.maximum(a, b, out=bounds[:, hi])
    return bounds


def plan_tiles(
    polygons: np.ndarray,
    transform: Affine,
    shape: tuple[int, int],
    *,
    tile_size: int = 512,
    face_cell_a: np.ndarray | None = None,
    face_cell_b: np.ndarray | None = None,
    face_lines: np.ndarray | None = None,
    margin: int = MARGIN,
    band_tiles: int | None = None,
    face_bounds: np.ndarray | None = None,
) -> list[Tile]:
    """Group cells (and their faces) into tiles with one DEM window each.

    Parameters
    ----------
    polygons : shapely Polygon array, one per cell (global cell index = position).
    transform, shape : the DEM's affine transform and (rows, cols).
    tile_size : tile edge in DEM pixels (>= 1).
    face_cell_a, face_cell_b, face_lines : the mesh faces (``cell_b`` = -1 on the
        boundary); a face belongs to the tile of its ``cell_a``.
    margin : pixels added around the union of the bounds.
    band_tiles : tile columns per band (see :func:`band_tiles_for_cache`); None: one band
        as wide as the DEM.
    face_bounds : (n_faces, 4) array, optional
        ``xmin, ymin, xmax, ymax`` of the faces, instead of ``face_lines``.

    Returns
    -------
    Tiles in deterministic order: band of ``band_tiles`` tile columns, then tile row,
    then tile column (tile row, then tile column without bands); tiles without cells
    are not returned.
    """
    if int(tile_size) < 1:
        raise InputError(f"tile size {tile_size} is not a positive number of pixels; use e.g. 512")
    tile_size = int(tile_size)
    polygons = np.asarray(polygons, dtype=object)
    n_cells = polygons.size
    if n_cells == 0:
        return []
    height, width = int(shape[0]), int(shape[1])

    # bounding-box centre -> tile key (as good as the centroid for grouping neighbours,
    # and the bounds are needed anyway: a centroid costs more than the whole plan)
    pb_cells = _pixel_bounds(shapely.bounds(polygons), transform)
    ccol = 0.5 * (pb_cells[:, 0] + pb_cells[:, 2])
    crow = 0.5 * (pb_cells[:, 1] + pb_cells[:, 3])
    with np.errstate(invalid="ignore"):
        trow = np.floor(crow / tile_size)
        tcol = np.floor(ccol / tile_size)
    # a cell without a finite box (empty geometry) goes to tile (0, 0)
    bad = ~(np.isfinite(trow) & np.isfinite(tcol))
    trow[bad] = 0
    tcol[bad] = 0
    trow = trow.astype(np.int64)
    tcol = tcol.astype(np.int64)

    if band_tiles is not None and int(band_tiles) < 1:
        raise InputError(f"band_tiles {band_tiles} is not a positive number of tile columns")
    band = np.zeros(n_cells, dtype=np.int64) if band_tiles is None else tcol // int(band_tiles)
    order = np.lexsort((np.arange(n_cells), tcol, trow, band))
    keys = np.stack([trow[order], tcol[order]], axis=1)
    new = np.ones(n_cells, dtype=bool)
    new[1:] = np.any(keys[1:] != keys[:-1], axis=1)
    starts = np.flatnonzero(new)
    tile_of_sorted = np.cumsum(new) - 1
    tile_of_cell = np.empty(n_cells, dtype=np.int64)
    tile_of_cell[order] = tile_of_sorted
    n_tiles = starts.size

    # faces: owner tile = tile of cell_a; halo = cell_b in another tile
    if face_cell_a is not None and len(face_cell_a) > 0:
        fa = np.asarray(face_cell_a, dtype=np.int64)
        fb = np.asarray(face_cell_b, dtype=np.int64)
        f_tile = tile_of_cell[fa]
        f_order = np.lexsort((np.arange(fa.size), f_tile))
        f_starts = np.searchsorted(f_tile[f_order], np.arange(n_tiles + 1))
        if face_bounds is None and face_lines is not None:
            face_bounds = shapely.bounds(np.asarray(face_lines, dtype=object))
        pb_faces = (
            _pixel_bounds(np.asarray(face_bounds, dtype=np.float64), transform)
            if face_bounds is not None
            else np.full((fa.size, 4), np.nan)
        )
        interior = fb >= 0
        halo_mask = interior.copy()
        halo_mask[interior] = tile_of_cell[fb[interior]] != f_tile[interior]
        h_tile = f_tile[halo_mask]
        h_cell = fb[halo_mask]
        if h_tile.size:
            pairs = np.unique(np.stack([h_tile, h_cell], axis=1), axis=0)
        else:
            pairs = np.empty((0, 2), dtype=np.int64)
        h_starts = np.searchsorted(pairs[:, 0], np.arange(n_tiles + 1))
    else:
        fa = np.empty(0, dtype=np.int64)
        f_order = fa
        f_starts = np.zeros(n_tiles + 1, dtype=np.int64)
        pb_faces = np.empty((0, 4))
        pairs = np.empty((0, 2), dtype=np.int64)
        h_starts = np.zeros(n_tiles + 1, dtype=np.int64)

    tiles: list[Tile] = []
    for t in range(n_tiles):  # loop over tiles only
        stop = starts[t + 1] if t + 1 < n_tiles else n_cells
        cells = np.sort(order[starts[t] : stop])
        halo = pairs[h_starts[t] : h_starts[t + 1], 1].astype(np.int64)
        faces = np.sort(f_order[f_starts[t] : f_starts[t + 1]]).astype(np.int64)
        pb = np.concatenate([pb_cells[cells], pb_cells[halo], pb_faces[faces]])
        pb = pb[np.all(np.isfinite(pb), axis=1)]
        if pb.size:
            col0 = int(np.floor(pb[:, 0].min())) - margin
            row0 = int(np.floor(pb[:, 1].min())) - margin
            col1 = int(np.ceil(pb[:, 2].max())) + margin
            row1 = int(np.ceil(pb[:, 3].max())) + margin
            col0, col1 = max(col0, 0), min(col1, width)
            row0, row1 = max(row0, 0), min(row1, height)
        else:
            col0 = col1 = row0 = row1 = 0
        window = Window(col0, row0, max(col1 - col0, 0), max(row1 - row0, 0))
        key = (int(keys[starts[t], 0]), int(keys[starts[t], 1]))
        tiles.append(Tile(t, key, cells, halo, faces, window))
    log.debug("planned %d tiles of %d px for %d cells", n_tiles, tile_size, n_cells)
    return tiles


def band_tiles_for_cache(
    block_shape: tuple[int, int] | None,
    width: int,
    itemsize: int,
    tile_size: int,
    cache_bytes: int,
) -> int | None:
    """Tile columns per band, so that neighbouring tiles find their shared DEM blocks in
    GDAL's block cache; None to go through whole tile rows.

    A tile window overlaps the windows above and below it by its margin, so the blocks
    along that edge are read again one tile row later.  In row order that is a whole
    DEM width later: once one tile row of blocks is larger than the cache, every shared
    block is decoded twice or more (a 10^8-pixel DEM, 10,000 px wide in 256 x 256 float32
    blocks, through a 32 MB cache: 2.3 s of reading on one thread in row order, 1.4 s in
    bands of seven tile columns, about what a 128 MB cache gives).  Tiles taken in bands
    of this many columns keep what one band row touches within half of ``cache_bytes``
    (the rest for the tiles in flight), whatever the DEM's width; the blocks along the
    band borders are decoded twice.  None when the
    whole tile row fits, or when a block spans the width (a striped file: bands would
    decode every strip once per band).  Windows are taken as up to 1.5 tile edges high
    and wide (cells that reach past their tile).

    >>> band_tiles_for_cache((256, 256), 10_000, 4, 512, 32 * 2**20)
    7
    >>> band_tiles_for_cache((1, 10_000), 10_000, 4, 512, 32 * 2**20) is None
    True
    """
    if block_shape is None or int(tile_size) < 1:
        return None
    block_rows, block_cols = (max(int(b), 1) for b in block_shape)
    tile, width = int(tile_size), int(width)
    if block_cols >= width or 2 * tile >= width:
        return None
    rows_spanned = -(-3 * tile // (2 * block_rows)) + 1  # ceil(1.5 tile / block) + 1

    def band_bytes(n: int) -> int:
        cols_spanned = -(-(2 * n + 1) * tile // (2 * block_cols)) + 1
        return rows_spanned * cols_spanned * block_rows * block_cols * int(itemsize)

    if band_bytes(-(-width // tile)) <= cache_bytes // 2:
        return None  # a whole tile row fits
    n = 1
    while band_bytes(n + 1) <= cache_bytes // 2 and (n + 1) * tile < width:
        n += 1
    return n


# --------------------------------------------------------------------------- tasks


@dataclass(frozen=True)
class TileSettings:
    """Options every tile needs (small, picklable).

    ``reference`` is the reference depth (depth mode: above each item's low point) or the
    reference stage (stage mode) at which ``bed_factor`` and ``perimeter_ratio`` are
    reported.  ``face_spacing`` is the profile sampling step (CRS units); ``z_to_xy``
    converts vertical to horizontal units for the surface factor and the wetted perimeter;
    ``conveyance_factor`` (``k z_to_xy^(5/3)``, :func:`ntrans.inputs.conveyance_factor`)
    turns the face conveyances at n = 1 into horizontal units cubed per second.
    """

    stages: StageSpec
    reference: float
    coverage: CoverageMode = "exact"
    elevation_rule: ElevationRule = "mean"
    face_rule: FaceRule = "higher"
    face_spacing: float = 0.5
    z_to_xy: float = 1.0
    conveyance_factor: float = 1.0
    faces: bool = True


class TileTask:
    """What a worker needs for one tile besides the DEM window (small, picklable).

    ``polygons`` holds the tile's own cells then its halo cells (local cell index =
    position); ``field_values`` the user's flat elevations in the same order (or None);
    ``face_lines`` the tile's faces, ``face_a`` / ``face_b`` their local cell indices
    (-1 on the boundary) and ``face_length`` their lengths.

    Geometry travels as WKB, converted for the whole array at once (pickling shapely
    objects one by one costs more than computing the tile), and is decoded only where
    it is used: a Dask scheduler unpickles and re-pickles every task it forwards, which
    then costs it a copy of bytes instead of a decode and an encode.  Either part may
    also be given as WKB in this process (a job keeps its face lines as WKB).
    """

    __slots__ = ("tile", "field_values", "face_a", "face_b", "face_length",
                 "_polygons", "_face_lines", "_polygons_wkb", "_face_lines_wkb")

    def __init__(
        self,
        tile: Tile,
        polygons: np.ndarray,
        field_values: np.ndarray | None = None,
        face_lines: np.ndarray | None = None,
        face_a: np.ndarray | None = None,
        face_b: np.ndarray | None = None,
        face_length: np.ndarray | None = None,
    ) -> None:
        self.tile = tile
        self.field_values = field_values
        self.face_a = np.empty(0, dtype=np.int64) if face_a is None else face_a
        self.face_b = np.empty(0, dtype=np.int64) if face_b is None else face_b
        self.face_length = np.empty(0) if face_length is None else face_length
        self._polygons: np.ndarray | None = np.asarray(polygons, dtype=object)
        self._face_lines: np.ndarray | None = (
            np.empty(0, dtype=object) if face_lines is None
            else np.asarray(face_lines, dtype=object)
        )
        self._polygons_wkb: np.ndarray | None = None
        self._face_lines_wkb: np.ndarray | None = None

    @property
    def polygons(self) -> np.ndarray:
        if self._polygons is None:
            self._polygons, self._polygons_wkb = shapely.from_wkb(self._polygons_wkb), None
        return self._polygons

    @property
    def face_lines(self) -> np.ndarray:
        if self._face_lines is None:
            self._face_lines, self._face_lines_wkb = shapely.from_wkb(self._face_lines_wkb), None
        return self._face_lines

    def __reduce__(self):
        # a part not decoded yet (forwarded without being used) goes as the same bytes
        polygons = (self._polygons_wkb if self._polygons is None
                    else shapely.to_wkb(self._polygons))
        lines = (self._face_lines_wkb if self._face_lines is None
                 else shapely.to_wkb(self._face_lines))
        return (_task_from_wkb, (self.tile, polygons, self.field_values, lines, self.face_a,
                                 self.face_b, self.face_length))


_NO_INDEX = np.empty(0, dtype=np.int64)
_NO_LENGTH = np.empty(0)


def _task_from_wkb(tile, polygons, field_values, face_lines, face_a, face_b, face_length,
                   polygons_wkb: bool = True, lines_wkb: bool = True) -> TileTask:
    """A :class:`TileTask` whose polygons and / or face lines are WKB (decoded on use)."""
    task = TileTask.__new__(TileTask)
    task.tile, task.field_values = tile, field_values
    task.face_a, task.face_b, task.face_length = face_a, face_b, face_length
    task._polygons, task._polygons_wkb = (None, polygons) if polygons_wkb else (polygons, None)
    task._face_lines, task._face_lines_wkb = (None, face_lines) if lines_wkb else (face_lines, None)
    return task


def make_tasks(
    tiles: Iterable[Tile],
    polygons: np.ndarray,
    *,
    field_values: np.ndarray | None = None,
    face_lines: np.ndarray | None = None,
    face_cell_a: np.ndarray | None = None,
    face_cell_b: np.ndarray | None = None,
    face_length: np.ndarray | None = None,
    as_wkb: bool = False,
    face_lines_wkb: bool = False,
) -> Iterator[TileTask]:
    """Yield one :class:`TileTask` per tile (lazily: memory bounded by one tile).

    ``as_wkb``: encode all the geometry once, in one vectorised call, and build tasks that
    hold WKB (for tasks sent to other processes, which would otherwise encode each tile's
    geometry when pickled).  ``face_lines_wkb``: ``face_lines`` is WKB already (each
    task decodes its own lines when it runs).
    """
    polygons = np.asarray(polygons, dtype=object)
    lines_all = None if face_lines is None else np.asarray(face_lines, dtype=object)
    if as_wkb:
        polygons = shapely.to_wkb(polygons)
        if lines_all is not None and not face_lines_wkb:
            lines_all = shapely.to_wkb(lines_all)
    build = functools.partial(_task_from_wkb, polygons_wkb=as_wkb,
                              lines_wkb=as_wkb or face_lines_wkb)
    no_lines = np.empty(0, dtype=object)
    for tile in tiles:
        local = np.concatenate([tile.cells, tile.halo])
        fv = None if field_values is None else np.asarray(field_values, dtype=float)[local]
        if face_cell_a is None or tile.faces.size == 0:
            yield build(tile, polygons[local], fv, no_lines, _NO_INDEX, _NO_INDEX, _NO_LENGTH)
            continue
        # global cell index -> local index (own cells then halo), by binary search
        sorter = np.argsort(local, kind="stable")
        ga = np.asarray(face_cell_a, dtype=np.int64)[tile.faces]
        gb = np.asarray(face_cell_b, dtype=np.int64)[tile.faces]
        la = sorter[np.searchsorted(local, ga, sorter=sorter)]
        lb = np.where(gb >= 0, sorter[np.searchsorted(local, np.maximum(gb, 0), sorter=sorter)
                                      .clip(0, local.size - 1)], -1)
        yield build(
            tile,
            polygons[local],
            fv,
            lines_all[tile.faces],  # type: ignore[index]
            la,
            lb,
            np.asarray(face_length, dtype=float)[tile.faces],
        )


# --------------------------------------------------------------------------- computing


def reference_stages(spec: StageSpec, reference: float, low_points: np.ndarray) -> np.ndarray:
    """(n_items,) reference stage: low point + reference depth, or the reference stage."""
    low = np.asarray(low_points, dtype=float)
    if spec.mode == "depth":
        return low + reference
    return np.full(low.shape, float(reference))


def default_reference(spec: StageSpec) -> float:
    """Middle of the requested depths (depth mode) or of the stage window (stage mode)."""
    v = np.asarray(spec.values, dtype=float)
    return float(0.5 * (v.min() + v.max()))


def run_tile(
    task: TileTask,
    elevation: np.ndarray,
    transform: Affine,
    settings: TileSettings,
) -> dict[str, Any]:
    """Compute the cell and face tables of one tile.  Pure: no file access.

    Parameters
    ----------
    task : the tile's cells (own + halo) and faces.
    elevation : (rows, cols) float array of the tile's DEM window, NaN for nodata.
    transform : affine transform of that window.
    settings : stage specification and rules.

    Returns
    -------
    dict with ``tile`` (index) and four column dicts: ``cell_rows`` (one row per own
    cell and stage, ``cell`` = global cell index), ``cell_summary`` (one row per own
    cell; under the centre rule with ``assigned_area``, the plan area of every pixel the
    rule gives the cell, nodata included), ``face_rows`` (one row per face and stage, ``face`` = global face index,
    ``cell_a`` / ``cell_b`` global, -1 on the boundary) and ``face_summary``.
    """
    from ._kernels import entry_values
    from .cells import (
        cell_tables,
        flat_cell_table,
        flat_elevation,
        sorted_levels,
        tables_from_sums,
    )
    from .coverage import centre_coverage, exact_coverage_stage_sums, exact_coverage_values
    from .terrain import sample_bilinear, surface_factor

    tile = task.tile
    elevation = np.asarray(elevation, dtype=float)
    n_own = tile.cells.size
    n_all = n_own + tile.halo.size
    pixel_area = abs(transform.a * transform.e - transform.b * transform.d)
    dx, dy = abs(transform.a), abs(transform.e)
    spec = settings.stages
    n_st = spec.values.size

    # terrain summary of every cell (own and halo) and the stage table, with one extra
    # column at the reference stage.  Per entry (a pixel of a cell): elevation, plan
    # area = fraction x pixel area, bed area = plan x surface factor
    levels = np.append(spec.values, float(settings.reference))
    relative = spec.mode == "depth"
    median = settings.elevation_rule == "median"
    sf = (surface_factor(elevation, dx, dy, z_to_xy=settings.z_to_xy)
          if elevation.size else np.empty(elevation.shape))
    if settings.coverage == "exact" and not median:
        # one walk sums each cell's pixels where it finds them: no per-pixel arrays
        lv, order = sorted_levels(levels)
        sums = exact_coverage_stage_sums(task.polygons, transform, elevation, sf, pixel_area,
                                         lv[order], relative=relative, n_items=n_all)
        summary, table = tables_from_sums(sums, lv, order, relative=relative)
    else:
        if elevation.size == 0:
            assigned = np.zeros(n_own)
            item = np.zeros(0, dtype=np.int64)
            z, plan, bed = np.empty(0), np.empty(0), np.empty(0)
        elif settings.coverage == "exact":
            item, z, plan, bed = exact_coverage_values(
                task.polygons, transform, elevation, sf, pixel_area
            )
        else:
            w = centre_coverage(task.polygons, transform, elevation.shape)
            item = np.asarray(w.item, dtype=np.int64)
            z, plan, bed = entry_values(w.row, w.col, w.fraction, elevation, sf, pixel_area)
            # every pixel the rule gives a cell, nodata included: the covered fraction's base
            assigned = np.bincount(item, minlength=n_all)[:n_own] * pixel_area
        summary, table = cell_tables(item, z, plan, bed, n_all, levels, relative=relative,
                                     median=median)
    centroid_z = None
    if settings.elevation_rule == "centroid":
        cent = shapely.centroid(task.polygons)
        if elevation.size:
            centroid_z = sample_bilinear(
                elevation, transform, shapely.get_x(cent), shapely.get_y(cent)
            )
        else:
            centroid_z = np.full(n_all, np.nan)
    flat_z = np.asarray(
        flat_elevation(settings.elevation_rule, summary, centroid_z=centroid_z, field=task.field_values),
        dtype=float,
    )

    # --- cell stage rows (own cells only)
    z_low = np.asarray(summary["z_min"], dtype=float)[:n_own]
    stages = spec.for_items(z_low)
    covered = np.asarray(summary["covered_area"], dtype=float)[:n_own]
    flat = flat_cell_table(flat_z[:n_own], covered, stages)

    cell_rows: dict[str, np.ndarray] = {
        "cell": np.repeat(tile.cells, n_st),
        "stage": stages.ravel(),
        "depth": (stages - z_low[:, None]).ravel(),
    }
    for name in ("wet_area", "volume", "bed_area", "hydraulic_radius", "mean_depth"):
        cell_rows[name] = np.asarray(table[name], dtype=float)[:n_own, :n_st].ravel()
    cell_rows["flat_elevation"] = np.repeat(flat_z[:n_own], n_st)
    for name in ("flat_depth", "flat_wet_area", "flat_volume", "flat_hydraulic_radius"):
        cell_rows[name] = np.asarray(flat[name], dtype=float).ravel()

    wet_ref = np.asarray(table["wet_area"], dtype=float)[:n_own, n_st]
    bed_ref = np.asarray(table["bed_area"], dtype=float)[:n_own, n_st]
    with np.errstate(invalid="ignore", divide="ignore"):
        bed_factor = np.where(wet_ref > 0, bed_ref / wet_ref, np.nan)
    cell_summary = {
        "cell": tile.cells,
        "covered_area": covered,
        "z_min": z_low,
        "z_mean": np.asarray(summary["z_mean"], dtype=float)[:n_own],
        "z_max": np.asarray(summary["z_max"], dtype=float)[:n_own],
        "flat_elevation": flat_z[:n_own],
        "bed_factor": bed_factor,
    }
    if settings.coverage == "centre":
        cell_summary["assigned_area"] = assigned

    out: dict[str, Any] = {"tile": tile.index, "cell_rows": cell_rows, "cell_summary": cell_summary}
    if settings.faces:
        out["face_rows"], out["face_summary"] = _face_part(task, elevation, transform, settings, flat_z)
    return out


def _face_part(task, elevation, transform, settings, flat_z):
    from .closures import face_conveyance
    from .faces import (
        Profiles,
        face_flat_bed,
        face_profile_summary,
        face_stage_table,
        flat_face_table,
        sample_profiles,
    )

    tile = task.tile
    spec = settings.stages
    n_st = spec.values.size
    n_f = tile.faces.size
    lengths = np.asarray(task.face_length, dtype=float)
    if n_f == 0 or elevation.size == 0:
        empty = np.empty(0)
        prof = Profiles(np.empty(0, dtype=np.int64), empty, empty, n_f)
    else:
        prof = sample_profiles(task.face_lines, elevation, transform, settings.face_spacing)
    fsum = face_profile_summary(prof)
    low = np.asarray(fsum["low_point"], dtype=float)
    stages = spec.for_items(low)
    ref = reference_stages(spec, settings.reference, low)
    stages_ext = np.concatenate([stages, ref[:, None]], axis=1)
    ft = face_stage_table(prof, stages_ext, z_to_xy=settings.z_to_xy)

    la, lb = task.face_a, task.face_b
    za = flat_z[la] if n_f else np.empty(0)
    zb = np.where(lb >= 0, flat_z[np.where(lb >= 0, lb, 0)], np.nan) if n_f else np.empty(0)
    flat_bed = face_flat_bed(settings.face_rule, za, zb, fsum)
    flat = flat_face_table(flat_bed, lengths, stages)
    flat_depth = flat["flat_depth"]

    conv = {}
    # flow area (L Z) and radius (Z) are in vertical units: the factor k z_to_xy^(5/3)
    # gives K in L^3/s, as converting them to L first would
    k = settings.conveyance_factor
    with np.errstate(invalid="ignore"):
        # n = 1 everywhere: the lumped closure is k A R^(2/3) straight from the table
        area = np.asarray(ft["flow_area"], dtype=float)[:, :n_st]
        radius = np.asarray(ft["hydraulic_radius"], dtype=float)[:, :n_st]
        no_terrain = ~(np.asarray(fsum["covered_fraction"], dtype=float) > 0)
        conv["lumped"] = np.where(area > 0, k * area * np.cbrt(radius) ** 2, 0.0)
        conv["lumped"][no_terrain] = np.nan  # never a fake zero for a face off the DEM
    for closure in ("flat", "strip"):
        # strip takes the table's stage matrix (reference column dropped after): the
        # profile's segments, their sort and the stage lookup are then shared
        conv[closure] = np.asarray(
            face_conveyance(
                prof,
                stages if closure == "flat" else stages_ext,
                closure=closure,
                n_segment=None,  # n = 1 everywhere: geometric conveyance
                flat_bed=flat_bed if closure == "flat" else None,
                k=k,
                z_to_xy=settings.z_to_xy,
            ),
            dtype=float,
        )[:, :n_st].reshape(n_f, n_st)

    gb = np.where(lb >= 0, np.concatenate([tile.cells, tile.halo])[np.where(lb >= 0, lb, 0)], -1)
    ga = np.concatenate([tile.cells, tile.halo])[la] if n_f else np.empty(0, dtype=np.int64)
    rows: dict[str, np.ndarray] = {
        "face": np.repeat(tile.faces, n_st),
        "cell_a": np.repeat(ga, n_st),
        "cell_b": np.repeat(gb, n_st),
        "stage": stages.ravel(),
        "depth": (stages - low[:, None]).ravel(),
        "length": np.repeat(lengths, n_st),
    }
    for name in ("flow_area", "wetted_perimeter", "top_width", "hydraulic_radius"):
        rows[name] = np.asarray(ft[name], dtype=float)[:, :n_st].ravel()
    rows["flat_bed"] = np.repeat(flat_bed, n_st)
    rows["flat_depth"] = flat_depth.ravel()
    rows["flat_flow_area"] = np.asarray(flat["flat_flow_area"], dtype=float).ravel()
    for closure in ("flat", "lumped", "strip"):
        rows[f"conveyance_{closure}"] = conv[closure].ravel()

    p_ref = np.asarray(ft["wetted_perimeter"], dtype=float)[:, n_st]
    t_ref = np.asarray(ft["top_width"], dtype=float)[:, n_st]
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(t_ref > 0, p_ref / t_ref, np.nan)
    high = np.asarray(fsum["high_point"], dtype=float)
    summary = {
        "face": tile.faces,
        "cell_a": ga,
        "cell_b": gb,
        "length": lengths,
        "low_point": low,
        "relief": high - low,
        "covered_fraction": np.asarray(fsum["covered_fraction"], dtype=float),
        "perimeter_ratio": ratio,
    }
    return rows, summary


# --------------------------------------------------------------------------- running


def _dem_by_path(path: str, open_kwargs: tuple):
    """The DEM's description for a worker, opened once per file version: a file
    replaced or rewritten at the same path is described afresh (shape, transform,
    nodata), as its handle is reopened (:func:`ntrans.inputs.file_stamp`)."""
    from .inputs import file_stamp

    return _open_cached(path, open_kwargs, file_stamp(path))


@functools.lru_cache(maxsize=4)
def _open_cached(path: str, open_kwargs: tuple, stamp: tuple | None):
    from .inputs import open_dem

    # the job checked the projection's scale when it opened the DEM
    return open_dem(path, check_scale=False, **dict(open_kwargs))


def read_tile_window(dem: Any, window: Window) -> tuple[np.ndarray, Affine]:
    """Read a tile's window (NaN for nodata and outside) and its transform."""
    if window.height <= 0 or window.width <= 0:
        return np.empty((0, 0)), dem.transform
    row_off, col_off = int(window.row_off), int(window.col_off)
    arr = np.asarray(
        dem.read_window(row_off, col_off, int(window.height), int(window.width)), dtype=float
    )
    wt = dem.transform @ Affine.translation(col_off, row_off)
    return arr, wt


def run_task_local(dem: Any, task: TileTask, settings: TileSettings) -> dict[str, Any]:
    """Read the tile's window from an open DEM and run :func:`run_tile`.

    The result also holds ``timing``: process id, end time (epoch seconds), wall seconds
    and CPU seconds of the thread that ran the tile, which the job logs at debug level.
    """
    started, cpu = time.perf_counter(), time.thread_time()
    arr, wt = read_tile_window(dem, task.tile.window)
    out = run_tile(task, arr, wt, settings)
    out["timing"] = (os.getpid(), time.time(), time.perf_counter() - started,
                     time.thread_time() - cpu)
    return out


def run_task_from_path(
    dem_path: str, open_kwargs: tuple, task: TileTask, settings: TileSettings,
    spill_dir: str | None = None,
) -> dict[str, Any]:
    """Dask-side wrapper: open the DEM by path (cached per worker), read, compute.

    With ``spill_dir`` (a folder on this machine that the job reads too) the row tables
    are left there as Arrow IPC files (:class:`SpilledRows`) instead of travelling back
    through the scheduler's connections.
    """
    from .inputs import rasters_kept_open_by_this_process

    dem = _dem_by_path(str(dem_path), open_kwargs)
    with rasters_kept_open_by_this_process():  # neighbouring tiles share DEM blocks
        out = run_task_local(dem, task, settings)
    if spill_dir is not None:
        for key in ("cell_rows", "face_rows"):
            if key in out:
                path = os.path.join(spill_dir, f"tile-{task.tile.index:06d}-{key}.arrow")
                out[key] = spill_rows(out[key], path)
    return out


@dataclass(frozen=True)
class SpilledRows:
    """Columns of a tile result that a worker left in an Arrow IPC file at ``path``."""

    path: str


def spill_rows(rows: dict[str, np.ndarray], path: str) -> SpilledRows:
    """Write a dict of equal-length 1-D arrays to an uncompressed Arrow IPC file."""
    import pyarrow as pa

    table = pa.table(rows)
    with pa.OSFile(path, "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return SpilledRows(path)


def rows_of(value: dict[str, np.ndarray] | SpilledRows) -> dict[str, np.ndarray]:
    """The row columns of a tile result; spilled ones are memory-mapped, then deleted."""
    if not isinstance(value, SpilledRows):
        return value
    import pyarrow as pa

    table = pa.ipc.open_file(pa.memory_map(value.path)).read_all()
    os.unlink(value.path)  # the mapping stays valid while the arrays use it
    return {name: table.column(name).to_numpy() for name in table.column_names}


def execute(
    tasks: Iterable[TileTask],
    *,
    dem: Any,
    dem_path: str,
    settings: TileSettings,
    open_kwargs: dict[str, Any] | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    connection: Any = None,
    progress: bool = False,
    total: int | None = None,
    max_in_flight: int | None = None,
    local_runner: Callable[..., dict[str, Any]] | None = None,
    spill_dir: str | os.PathLike[str] | None = None,
    threads: int | None = None,
) -> Iterator[dict[str, Any]]:
    """Run tile tasks and yield their results in tile order.

    Parameters
    ----------
    tasks : tile tasks in tile order (may be a lazy iterator).
    dem : the open DEM (used in-process); ``dem_path`` is what workers open.
    workers : start a ``dask.distributed.LocalCluster`` with this many single-threaded
        worker processes.
    scheduler : address of an existing Dask scheduler (``tcp://host:8786``).
    connection : a :class:`ntrans.cluster.WorkerConnection` opened by the caller
        (instead of ``workers`` / ``scheduler``; lets start-up overlap the job's setup).
    progress : show a progress bar (stderr) via :func:`ntrans.progress.track`.
    max_in_flight : tasks submitted but not yet yielded (default 4 per worker), which
        bounds memory on the client.
    spill_dir : for workers on this machine only: a folder where they leave the row
        tables (read back with :func:`rows_of`), which costs the job far less than
        receiving them over the scheduler's connections.
    threads : without workers: run this many tiles at once in this process (default:
        one per core, up to four).

    Without ``workers`` or ``scheduler`` everything runs in this process, ``threads``
    tiles at a time, with no extra service.  In every mode results come
    back in the order of ``tasks``, so outputs are identical.
    """
    from .cluster import run_ordered

    if workers is None and scheduler is None and connection is None:
        shared = (local_runner or run_task_local, dem, settings)
        fn = _run_with_open_dem
    else:
        shared = (str(dem_path), tuple(sorted((open_kwargs or {}).items())), settings,
                  None if spill_dir is None else os.fspath(spill_dir))
        fn = _run_with_dem_path
    yield from run_ordered(
        fn, shared, tasks, workers=workers, scheduler=scheduler, connection=connection,
        progress=progress, total=total, desc="tiles", max_in_flight=max_in_flight,
        threads=threads,
    )


def _run_with_open_dem(shared: tuple, task: TileTask) -> dict[str, Any]:
    runner, dem, settings = shared
    return runner(dem, task, settings)


def _run_with_dem_path(shared: tuple, task: TileTask) -> dict[str, Any]:
    dem_path, open_kwargs, settings, spill_dir = shared
    return run_task_from_path(dem_path, open_kwargs, task, settings, spill_dir)
