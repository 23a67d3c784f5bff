"""``build_tables()``: cell and face stage tables from a DEM and mesh cells (``ntrans tables``).

Flow: open and check the DEM and the cells -> faces of the whole mesh (vector only) ->
tiles (:mod:`ntrans.engine`) -> per tile, pure numpy: pixel weights, surface factor,
subgrid and flat cell tables, face profiles and face tables, conveyance at n = 1
(horizontal units cubed per second: depths converted to the horizontal unit, k = 1.0 or
1.486; :func:`ntrans.inputs.conveyance_factor`) -> rows streamed tile by tile into Parquet inside an atomic output folder ->
cell and face summaries as GeoPackage, optional CSV copies, a run summary in JSON.

Flat face beds need the flat elevation of both adjacent cells; a tile carries the
neighbouring cells its faces touch (its *halo*) and recomputes their terrain summary,
so each tile is independent (see :mod:`ntrans.engine`).

Rows are ordered by tile (tile row, tile column; on a DEM wider than GDAL's block cache
can follow, in bands of tile columns first: :func:`ntrans.engine.band_tiles_for_cache`),
then by cell (face) index within the tile, then by stage; the order is the same
in-process and on Dask workers.
"""

from __future__ import annotations

import contextlib
import dataclasses
import itertools
import json
import logging
import os
import shutil
import time
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import shapely

from . import __version__
from .coverage import area_share_inside
from .engine import (
    COVERAGE_MODES,
    ELEVATION_RULES,
    FACE_RULES,
    TileSettings,
    band_tiles_for_cache,
    default_reference,
    execute,
    make_tasks,
    plan_tiles,
    rows_of,
)
from .errors import (
    CoarseFaceSpacingWarning,
    FlatElevationWarning,
    InputError,
    MemoryEstimateWarning,
    MeshGapWarning,
    PartialCoverageWarning,
    check_choice,
    warn,
)
from .inputs import RASTER_CACHE_BYTES, rasters_kept_open, unit_name
from .memory import available_memory, collection_paused, release_free_memory
from .stages import StageSpec

log = logging.getLogger(__name__)

CELL_STAGE_COLUMNS: tuple[str, ...] = (
    "cell_id", "stage", "depth", "wet_area", "volume", "bed_area", "hydraulic_radius",
    "mean_depth", "flat_elevation", "flat_depth", "flat_wet_area", "flat_volume",
    "flat_hydraulic_radius",
)
FACE_STAGE_COLUMNS: tuple[str, ...] = (
    "face_id", "cell_a", "cell_b", "stage", "depth", "length", "flow_area",
    "wetted_perimeter", "top_width", "hydraulic_radius", "flat_bed", "flat_depth",
    "flat_flow_area", "conveyance_flat", "conveyance_lumped", "conveyance_strip",
)
CELL_SUMMARY_COLUMNS: tuple[str, ...] = (
    "cell_id", "area", "covered_fraction", "covered_area", "z_min", "z_mean", "z_max",
    "flat_elevation", "bed_factor",
)
FACE_SUMMARY_COLUMNS: tuple[str, ...] = (
    "face_id", "cell_a", "cell_b", "length", "low_point", "relief", "covered_fraction",
    "perimeter_ratio",
)

#: Fractions below 1 - this count as partly outside the DEM / over nodata (round-off);
#: fractions within it of 1 are written as 1 (:func:`whole_within_round_off`).
PARTIAL_TOLERANCE = 1e-6
#: cells whose WKB takes at most this many bytes (about) are encoded for ``cells.gpkg``
#: beside the tiles instead of after them; larger layers are encoded batch by batch at
#: the end, so their encoded geometry never sits in memory whole
EARLY_ENCODE_BYTES = 64 << 20


#: memory per cell- or face-stage of a tile result held at once (its table rows and their
#: temporaries): about 174 bytes measured with 3,000 depths on the demo mesh (peak 6.7 GB
#: against 0.41 GB with 30, all four tiles in flight); kept as a bound
TABLE_BYTES_PER_ITEM_STAGE = 200.0
#: the rest of a job's peak, as in the README's bound
TABLE_BASE_BYTES = 0.3e9


def estimated_stage_rows_bytes(tile_items: list[int], n_stages: int, in_flight: int) -> float:
    """Peak memory (bytes) the stage rows of the ``in_flight`` largest tiles take at once,
    for tiles of ``tile_items`` cells and faces each and ``n_stages`` stages."""
    largest = sorted(tile_items, reverse=True)[:max(int(in_flight), 1)]
    return TABLE_BYTES_PER_ITEM_STAGE * float(sum(largest)) * float(n_stages)


def _check_stage_rows_fit(tile_items: list[int], n_stages: int, in_flight: int) -> None:
    """Refuse stage tables whose rows would take more than twice the memory available
    (they could not finish), and warn above 90 % of it, before the tiles run."""
    have = available_memory()
    need = TABLE_BASE_BYTES + estimated_stage_rows_bytes(tile_items, n_stages, in_flight)
    if have is None or need <= 0.9 * have:
        return
    what = (f"these stage tables need about {need / 1e9:.1f} GB of memory ({n_stages} stages "
            f"for up to {max(tile_items, default=0)} cells and faces per tile, {in_flight} "
            f"tile(s) at once) and {have / 1e9:.1f} GB is available")
    if need > 2.0 * have:
        raise InputError(f"{what}; give fewer stages, a smaller --tile-size or --threads 1")
    warn(f"{what}; if the job runs out of memory, give fewer stages, a smaller --tile-size "
         "or --threads 1", MemoryEstimateWarning, stacklevel=3)


def refuse_without_terrain(covered_area: np.ndarray, dem: Any) -> None:
    """InputError when no cell covers any valid DEM pixel (``covered_area``, square CRS
    units, all 0 or NaN): every table would be empty, and the cause is the DEM (its
    nodata value, or another area's terrain), which the sentence names."""
    covered = np.nan_to_num(np.asarray(covered_area, dtype=float), nan=0.0)
    if covered.size == 0 or np.any(covered > 0):
        return
    nodata = getattr(dem, "nodata", None)
    value = "" if nodata is None else f" ({nodata:g})"
    raise InputError(
        f"none of the {covered.size} cells lies over valid terrain: the DEM '{dem.path}' "
        f"holds only nodata{value} under them; check the DEM's nodata value and that it is "
        "the terrain of this mesh")


#: Elevations (metres) beyond these are no terrain on Earth (the deepest ocean trench lies
#: about 11 km down, from memory; the upper limit leaves room for any local datum): a
#: DEM that holds them holds an undeclared nodata value (-3.4e38, -32767, -99999, ...).
LOWEST_TERRAIN_METRES = -11_000.0
HIGHEST_TERRAIN_METRES = 100_000.0


def refuse_implausible_terrain(lowest: float | None, highest: float | None, dem: Any) -> None:
    """InputError when the terrain under the cells reaches below
    :data:`LOWEST_TERRAIN_METRES` or above :data:`HIGHEST_TERRAIN_METRES` (``lowest``,
    ``highest`` in the DEM's vertical units; NaN / None: not known)."""
    per_unit = float(getattr(dem, "z_metres_per_unit", 1.0))
    nodata = getattr(dem, "nodata", None)
    declared = ("declares no nodata value" if nodata is None
                else f"declares {nodata:g} as nodata")
    unit = table_units(dem)["stage"]
    for value, beyond, limit in ((lowest, "lower", LOWEST_TERRAIN_METRES),
                                 (highest, "higher", HIGHEST_TERRAIN_METRES)):
        if value is None or not np.isfinite(value):
            continue
        if (value * per_unit < limit) if beyond == "lower" else (value * per_unit > limit):
            raise InputError(
                f"the DEM '{dem.path}' holds elevations of {value:.6g} {unit} under the cells, "
                f"{beyond} than any terrain on Earth, and {declared}: declare the value its "
                f"gaps hold as nodata (e.g. gdal_edit.py -a_nodata {value:.9g}) and run again")


def whole_within_round_off(fraction: np.ndarray) -> np.ndarray:
    """``fraction`` clipped to [0, 1], with values within :data:`PARTIAL_TOLERANCE` of 1
    set to 1: a cell or face wholly over valid terrain sums its pieces to 1 only up to
    round-off (0.9999999999999875), and ``covered_fraction < 1`` must pick the items
    the partial-coverage warning counts, not half the mesh."""
    fraction = np.clip(np.asarray(fraction, dtype=float), 0.0, 1.0)
    return np.where(fraction >= 1.0 - PARTIAL_TOLERANCE, 1.0, fraction)


def covered_fractions(covered_area: np.ndarray, area: np.ndarray) -> np.ndarray:
    """Share of each cell's plan area over valid DEM pixels, in [0, 1] (0 for a cell of no
    area or without terrain): covered plan area / cell area, as the exact rule gives it
    (1 within round-off, :func:`whole_within_round_off`)."""
    covered_area = np.asarray(covered_area, dtype=float)
    area = np.asarray(area, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(area > 0, covered_area / np.where(area > 0, area, 1.0), np.nan)
    return whole_within_round_off(np.nan_to_num(fraction, nan=0.0))


def centre_covered_fractions(covered_area: np.ndarray, assigned_area: np.ndarray,
                             inside_share: np.ndarray) -> np.ndarray:
    """Share of each cell over valid DEM pixels under the centre rule, in [0, 1].

    Whole pixels by their centres never add up to a polygon's area, so the covered plan
    area is set against the plan area of every pixel the rule gives the cell (nodata
    included; ``assigned_area``), times the share of the cell's area inside the DEM's
    bounds (``inside_share``, :func:`ntrans.coverage.area_share_inside`).  A cell that
    holds no pixel centre has no terrain under this rule and gets 0.
    """
    covered_area = np.asarray(covered_area, dtype=float)
    assigned_area = np.asarray(assigned_area, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        valid = np.where(assigned_area > 0,
                         covered_area / np.where(assigned_area > 0, assigned_area, 1.0), 0.0)
    fraction = np.nan_to_num(valid, nan=0.0) * np.asarray(inside_share, dtype=float)
    return whole_within_round_off(np.nan_to_num(fraction, nan=0.0))


@dataclass(frozen=True)
class PartialCoverage:
    """Cells not wholly over valid terrain: ``partly`` (some of their area over valid DEM
    pixels), ``wholly`` (none of it; outside the DEM or over nodata), ``first`` the first
    few ids of both, in cell order."""

    partly: int
    wholly: int
    first: list[Any]

    @property
    def count(self) -> int:
        return self.partly + self.wholly

    def summary(self) -> dict[str, Any]:
        """The run-summary entries (``partial_cells`` counts both kinds)."""
        return {"partial_cells": self.count, "cells_without_terrain": self.wholly,
                "partial_cells_first": [str(v) for v in self.first]}

    def message(self) -> str | None:
        """The warning's sentence, or None when every cell is wholly over terrain."""
        if not self.count:
            return None

        def cells(k: int) -> str:
            return f"{k} cell lies" if k == 1 else f"{k} cells lie"

        if self.partly and self.wholly:
            where = (f"{self.count} cells lie outside the DEM or over nodata, {self.wholly} "
                     f"wholly and {self.partly} partly")
        elif self.wholly:
            where = f"{cells(self.wholly)} wholly outside the DEM or over nodata"
        else:
            where = f"{cells(self.partly)} partly outside the DEM or over nodata"
        return (f"{where} (first: {', '.join(map(str, self.first))}); their covered_fraction "
                "is in cells.gpkg")


def partial_coverage(ids: np.ndarray, covered_fraction: np.ndarray) -> PartialCoverage:
    """The cells whose ``covered_fraction`` is below 1 (less :data:`PARTIAL_TOLERANCE`)."""
    fraction = np.asarray(covered_fraction, dtype=float)
    partial = fraction < 1.0 - PARTIAL_TOLERANCE
    wholly = int(np.count_nonzero(fraction <= 0.0))
    return PartialCoverage(int(partial.sum()) - wholly, wholly, ids[partial][:5].tolist())


def warn_partial_coverage(ids: np.ndarray, covered_fraction: np.ndarray, *,
                          stacklevel: int = 2) -> PartialCoverage:
    """Emit :class:`PartialCoverageWarning` for cells not wholly over valid terrain (as
    the tables and the adjustment report them); return what was found."""
    found = partial_coverage(ids, covered_fraction)
    message = found.message()
    if message is not None:
        warn(message, PartialCoverageWarning, stacklevel=stacklevel + 1)
    return found


def warn_missing_flat_elevation(ids: np.ndarray, flat_elevation: np.ndarray, rule: str,
                                elevation_field: str | None = None, *,
                                stacklevel: int = 2) -> int:
    """Emit :class:`FlatElevationWarning` for cells the ``centroid`` or ``field`` elevation
    rule gave no flat elevation (NaN); return how many.

    The terrain statistics (``mean``, ``min``, ``median``) lack a value only for cells
    without terrain, which :func:`warn_partial_coverage` reports already.
    """
    if rule not in ("centroid", "field"):
        return 0
    missing = ~np.isfinite(np.asarray(flat_elevation, dtype=float))
    count = int(missing.sum())
    if not count:
        return count
    one = count == 1
    its = "its" if one else "their"
    why = (f"the terrain at {its} centroid is nodata or outside the DEM" if rule == "centroid"
           else f"{its} {elevation_field!r} attribute is empty")
    first = ", ".join(map(str, np.asarray(ids)[missing][:5].tolist()))
    warn(f"{count} {'cell has' if one else 'cells have'} no flat elevation because {why} "
         f"(first: {first}); {its} flat columns are NaN and a face beside "
         f"{'it' if one else 'one'} takes the other cell's flat elevation",
         FlatElevationWarning, stacklevel=stacklevel + 1)
    return count


@dataclass
class TablesResult:
    """What :func:`build_tables` wrote, and a few summary numbers.

    ``out`` is the output folder, ``files`` the files inside it.  ``n_partial`` counts
    cells partly outside the DEM or over nodata (``partial_ids`` the first few of them).
    """

    out: Path
    files: list[Path]
    n_cells: int
    n_faces: int
    n_stages: int
    n_tiles: int
    n_partial: int = 0
    partial_ids: list[Any] = field(default_factory=list)
    seconds: float = 0.0
    units: dict[str, str] = field(default_factory=dict)


def table_units(dem: Any) -> dict[str, str]:
    from .outputs import column_units, unit_symbol

    units = column_units(dem.horizontal_unit, dem.vertical_unit)
    z = unit_symbol(dem.vertical_unit)
    units.update(
        {
            "flat_flow_area": units["flow_area"],
            "conveyance_flat": units.get("conveyance", ""),
            "conveyance_lumped": units.get("conveyance", ""),
            "conveyance_strip": units.get("conveyance", ""),
            "relief": z,
            "bed_factor": "1",
            "perimeter_ratio": "1",
        }
    )
    return units


def _descriptions() -> dict[str, str]:
    from .outputs import column_descriptions

    d = column_descriptions()
    d.update(
        {
            "depth": "stage minus the item's lowest terrain point",
            "flat_flow_area": "face length times flat_depth",
            "conveyance_flat": "conveyance at n = 1, flat face: k L h^(5/3) (h in the "
                               "horizontal unit; k = 1.0 metre, 1.486 foot)",
            "conveyance_lumped": "conveyance at n = 1, lumped radius: k A R^(2/3) (A, R in "
                                 "the horizontal unit; k = 1.0 metre, 1.486 foot)",
            "conveyance_strip": "conveyance at n = 1, strips: k sum h^(5/3) ds (h in the "
                                "horizontal unit; k = 1.0 metre, 1.486 foot)",
            "relief": "highest minus lowest point of the face profile",
            "bed_factor": "bed_area / wet_area at the reference depth",
            "perimeter_ratio": "wetted_perimeter / top_width at the reference depth",
        }
    )
    return d


def layer_descriptions(columns: tuple[str, ...], units: dict[str, str], *, mode: str,
                       reference: float, item: str) -> dict[str, str]:
    """What each column of the tables' ``cells.gpkg`` (``item`` "cell") or ``faces.gpkg``
    (``item`` "face") holds, with its unit, for ``gpkg_data_columns``.

    ``bed_factor`` and ``perimeter_ratio`` name the reference they are taken at: the
    middle of the table's depths (``mode`` "depth", above the item's lowest terrain) or
    of its stages (``mode`` "stage").
    """
    z = units.get("stage", "")
    at = (f"at the reference depth, {reference:g} {z} above the {item}'s lowest terrain "
          "(the middle of the table's depths)" if mode == "depth"
          else f"at the reference stage, {reference:g} {z} (the middle of the table's stages)")
    special = {
        "area": f"plan area of the {item}",
        "covered_area": f"plan area of the {item} over valid DEM pixels",
        "z_min": f"lowest terrain elevation in the {item}",
        "z_mean": f"area-weighted mean terrain elevation in the {item}",
        "z_max": f"highest terrain elevation in the {item}",
        "bed_factor": f"wetted bed area (3-D) / wet plan area {at}",
        "perimeter_ratio": f"wetted perimeter / top width {at}",
    }
    special["covered_fraction"] = (
        "share of the face's line where the terrain, bilinear between the four nearest "
        "pixel centres, has no nodata pixel among them" if item == "face"
        else "share of the cell over valid DEM pixels (under the centre rule: of the pixels "
             "the rule gives it, times its share inside the DEM)")
    base = _descriptions()
    out = {}
    for column in columns:
        text = special.get(column, base.get(column, ""))
        unit = units.get(column, "")
        if text and unit and unit != "1":
            text = f"{text} ({unit})"
        elif text and unit == "1":
            text = f"{text} (dimensionless)"
        if text:
            out[column] = text
    return out


@dataclass
class MeshJob:
    """What every job reads and builds before its tiles run.

    ``mesh`` is the :class:`ntrans.mesh.Faces` built with ``lines_as_wkb=True`` (its
    ``geometry`` is WKB, built block by block; its bounds dropped once the tiles are
    planned); ``face_geometry`` is that same WKB with its layer type, which tiles decode a
    tile at a time and ``faces.gpkg`` takes as it is (1.5 million faces: about 130 MB of
    WKB against 380 MB of shapely lines, for the whole run).
    """

    dem: Any  # ntrans.inputs.DemInfo
    layer: Any  # ntrans.inputs.CellLayer
    ids: np.ndarray
    geoms: np.ndarray
    field_values: np.ndarray | None
    spacing: float
    snap_tolerance: float
    mesh: Any  # ntrans.mesh.Faces with WKB lines, or None without faces
    tiles: list
    face_geometry: Any = None  # ntrans.outputs.EncodedGeometry of the faces, or None


def _encode_early(geoms: np.ndarray) -> Future | None:
    """Start encoding the cells for ``cells.gpkg`` in a thread, beside the tiles (a
    future of :func:`ntrans.outputs.encode_geometry`); None for a layer whose WKB would
    take more than :data:`EARLY_ENCODE_BYTES`."""
    from .outputs import encode_geometry

    estimate = 16 * int(shapely.get_num_coordinates(geoms).sum()) + 64 * geoms.size
    if estimate > EARLY_ENCODE_BYTES:
        return None
    pool = ThreadPoolExecutor(1, thread_name_prefix="ntrans-encode")
    future = pool.submit(encode_geometry, geoms)
    pool.shutdown(wait=False)
    return future


def _block_as_wkb(fn: Callable[[Any], Any], job: Any) -> Any:
    """``fn(job)`` for a block of faces, with its lines encoded as WKB on this thread."""
    result = fn(job)
    result.wkb  # noqa: B018 - encoded and kept by the result
    return result


def _round_up(value: float) -> float:
    """``value`` rounded up to one significant digit (0.047 -> 0.05, 0.13 -> 0.2)."""
    step = 10.0 ** np.floor(np.log10(value))
    return float(np.ceil(value / step - 1e-9) * step)


def warn_border_gaps(ids: np.ndarray, polygons: np.ndarray, mesh: Any, *, snap_tolerance: float,
                     pixel: float, snap_given: bool, unit: str = "",
                     stacklevel: int = 2) -> None:
    """Emit :class:`MeshGapWarning` when boundary faces run along another cell within half
    a pixel (or twice the tolerance, when larger) but beyond the snap tolerance
    (:func:`ntrans.mesh.border_gaps`): gaps or overlaps that cut faces the two cells
    should share, which then carry no flow between them.  Lengths in horizontal CRS
    units, named by ``unit`` (a symbol such as ``m``) in the sentence."""
    from .mesh import border_gaps

    gaps = border_gaps(polygons, mesh, snap_tolerance=snap_tolerance,
                       reach=max(0.5 * pixel, 2.0 * snap_tolerance))
    if not gaps.faces:
        return
    pairs = ", ".join(f"{ids[a]}/{ids[b]}" for a, b in gaps.first)
    more = f" and {gaps.faces - len(gaps.first)} more" if gaps.faces > len(gaps.first) else ""
    source = "" if snap_given else ", 1 % of a pixel"
    u = f" {unit}" if unit else ""
    suggest = _round_up(1.5 * max(gaps.width, snap_tolerance))
    warn(f"{gaps.faces} stretches of cell border ({gaps.length:.4g}{u} in all) run "
         f"along a neighbouring cell across a gap or overlap wider than the snap tolerance "
         f"({snap_tolerance:g}{u}{source}), so they count as mesh boundary and carry no flow "
         f"between the cells (cells {pairs}{more}); give a snap tolerance of about "
         f"{suggest:g}{u} (--snap-tolerance; snap_tolerance in a project file) or make "
         "neighbouring cells share their borders",
         MeshGapWarning, stacklevel=stacklevel + 1)


@collection_paused()
def prepare_mesh_job(
    dem: str | os.PathLike[str],
    cells: str | os.PathLike[str],
    *,
    id_field: str | None,
    cells_layer: str | None = None,
    vertical_units: str | None,
    elevation_rule: str,
    elevation_field: str | None,
    face_spacing: float | None,
    snap_tolerance: float | None,
    tile_size: int,
    faces: bool = True,
    connection: Any = None,
    threads: int | None = None,
) -> MeshJob:
    """Open the DEM, read and check the cells, build the faces and plan the tiles.

    The cell overlap check goes on in a background thread: callers check
    ``layer.raise_if_checks_failed()`` as tiles come in and ``layer.finish_checks()``
    before writing their summaries.

    Face spacing defaults to half a pixel and the snap tolerance to 1 % of a pixel
    (horizontal CRS units).  With a worker ``connection`` the faces are built block by
    block on the workers; without one, ``threads`` blocks at a time in this process
    (default: the tile threads, :func:`ntrans.cluster.default_threads`).  Python's
    cyclic garbage collector is paused meanwhile
    (:func:`ntrans.memory.collection_paused`).
    """
    from .inputs import elevation_field_values, open_dem, read_cells
    from .mesh import build_faces

    if int(tile_size) < 1:
        raise InputError(f"tile size {tile_size} is not a positive number of pixels; use e.g. 512")
    dem_info = open_dem(dem, vertical_units=vertical_units)
    layer = read_cells(cells, dem=dem_info, id_field=id_field, layer=cells_layer,
                       overlaps_in_background=True)
    release_free_memory()  # the reading's temporaries, before the faces are built
    field_values = elevation_field_values(layer, elevation_rule, elevation_field)
    pixel = min(dem_info.pixel_size)
    spacing = 0.5 * pixel if face_spacing is None else float(face_spacing)
    snap = 0.01 * pixel if snap_tolerance is None else float(snap_tolerance)
    if not (np.isfinite(spacing) and spacing > 0):
        raise InputError(f"face spacing {face_spacing!r} is not a positive length; give e.g. {0.5 * pixel:g}")
    if not (np.isfinite(snap) and snap > 0):
        raise InputError(f"snap tolerance {snap_tolerance!r} is not a positive length; give e.g. {0.01 * pixel:g}")
    if spacing > 0.5 * pixel * (1.0 + 1e-9) and faces:
        u = table_units(dem_info)["length"]
        warn(f"face spacing {spacing:g} {u} is coarser than half a DEM pixel "
             f"({0.5 * pixel:g} {u}), so face profiles miss terrain between their stations "
             f"(flow areas in shallow water can be off by several per cent); give "
             f"{0.5 * pixel:g} {u} or less, or leave the default", CoarseFaceSpacingWarning,
             stacklevel=3)
    geoms = np.asarray(layer.geometry, dtype=object)
    map_blocks = None
    if connection is not None:
        from .cluster import call, run_ordered

        def map_blocks(fn, jobs):
            # blocks run here while the workers start, then on the workers (same result);
            # the last few stay here: sending a block costs more than its share of the
            # work unless every worker gets two or more
            left = len(jobs)
            jobs = iter(jobs)
            for job in jobs:
                if connection.ready() and left >= 2 * connection.n_workers():
                    yield from run_ordered(call, fn, itertools.chain([job], jobs),
                                           connection=connection, desc="face blocks")
                    return
                left -= 1
                yield fn(job)
    else:
        from .cluster import run_ordered

        def map_blocks(fn, jobs):
            # GEOS does the block's work with the GIL released; the blocks only read the
            # shared cell polygons, and come back in order (the same faces to the bit)
            return run_ordered(_block_as_wkb, fn, jobs, threads=threads, desc="face blocks")

    mesh = (build_faces(geoms, snap_tolerance=snap, map_blocks=map_blocks, lines_as_wkb=True)
            if faces else None)
    if mesh is not None:
        warn_border_gaps(np.asarray(layer.ids), geoms, mesh, snap_tolerance=snap, pixel=pixel,
                         snap_given=snap_tolerance is not None,
                         unit=table_units(dem_info)["length"], stacklevel=3)
    release_free_memory()
    tiles = plan_tiles(
        geoms,
        dem_info.transform,
        dem_info.shape,
        tile_size=int(tile_size),
        face_cell_a=None if mesh is None else mesh.cell_a,
        face_cell_b=None if mesh is None else mesh.cell_b,
        face_bounds=None if mesh is None else mesh.bounds,
        band_tiles=band_tiles_for_cache(dem_info.block_shape, dem_info.width,
                                        np.dtype(dem_info.dtype).itemsize, int(tile_size),
                                        RASTER_CACHE_BYTES),
    )
    face_geometry = None
    if mesh is not None:
        from .outputs import EncodedGeometry

        # the faces are single lines (ntrans.mesh.Faces), built as WKB block by block
        face_geometry = EncodedGeometry("LineString Z" if mesh.has_z else "LineString",
                                        mesh.geometry)
        mesh = dataclasses.replace(mesh, bounds=None)  # planned: not needed any more
    return MeshJob(
        dem_info, layer, np.asarray(layer.ids), geoms, field_values, spacing, snap, mesh, tiles,
        face_geometry,
    )


def build_tables(
    dem: str | os.PathLike[str],
    cells: str | os.PathLike[str],
    *,
    out: str | os.PathLike[str],
    id_field: str | None = None,
    cells_layer: str | None = None,
    stages: str | None = None,
    depths: str | None = None,
    vertical_units: str | None = None,
    coverage: str = "exact",
    elevation_rule: str = "mean",
    elevation_field: str | None = None,
    face_rule: str = "higher",
    face_spacing: float | None = None,
    snap_tolerance: float | None = None,
    faces: bool = True,
    csv: bool = False,
    overwrite: bool = False,
    tile_size: int = 512,
    workers: int | None = None,
    scheduler: str | None = None,
    threads: int | None = None,
    progress: bool = False,
) -> TablesResult:
    """Cell and face stage tables, subgrid terrain and flat beds, into ``out``.

    Parameters
    ----------
    dem : terrain raster in a projected CRS (metre or foot).
    cells : polygon layer of the mesh cells.
    out : output folder; written whole or not at all (exists -> error unless
        ``overwrite``; only an empty folder or an earlier ntrans output is replaced).
    id_field : attribute with unique cell ids (default: the first of ``cell_id, cellid,
        id, fid, objectid, ogc_fid`` present, any case, else the feature order from 0).
    cells_layer : layer of ``cells`` to read; needed when the file holds several.
    stages, depths : exactly one; SPEC ``start:stop:step`` or a comma list, in the DEM's
        vertical units.  Depths are above each cell's / face's lowest terrain point.
    vertical_units : ``metre``, ``foot`` or ``us_survey_foot`` when the elevations are not
        in the CRS unit.
    coverage : ``exact`` (area fractions) or ``centre`` (pixel centre inside); the
        cells' ``covered_fraction`` is the share of the cell over valid DEM pixels under
        either (:func:`centre_covered_fractions`).
    elevation_rule : flat cell bed: ``mean | min | median | centroid | field``.  A cell
        the rule gives no value (NaN) has NaN flat columns; with ``centroid`` and
        ``field`` that warns (:class:`~ntrans.errors.FlatElevationWarning`).
    elevation_field : attribute with the flat bed elevations (rule ``field``).
    face_rule : flat face bed: ``higher | mean | min`` of the two flat cell elevations
        (the one cell's on the boundary or beside a cell without a flat elevation) or
        ``profile_mean`` of the face's terrain.
    face_spacing : profile sampling step along faces, CRS units (default half a pixel).
    snap_tolerance : border sharing distance, CRS units (default 1% of the pixel size).
    faces : also build the face tables.
    csv : also write the stage tables as CSV.
    tile_size : tile edge in DEM pixels.
    workers, scheduler : run tiles on a local Dask cluster / an existing scheduler.
    threads : without workers: tiles (and face blocks) at once in this process
        (default: one per core, up to four; 1 for one at a time); the same results,
        memory grows by one tile's work per thread.
    progress : show a progress bar on stderr.

    Returns
    -------
    TablesResult

    Raises
    ------
    InputFileError
        A missing or unreadable DEM or cells file.
    CRSError
        No CRS, a geographic CRS, a projection that distorts lengths by more than 2 %, or
        cells that cannot be brought into the DEM's CRS.
    InputError
        Among others: a bad stage or depth range, several layers and no ``cells_layer``,
        duplicate or empty ids, stage rows that could not fit in memory, or workers and a
        scheduler given together (:class:`~ntrans.errors.NtransError` covers them all).
    OutputExistsError, OutputError
        The output folder exists without ``overwrite``, or is not an ntrans output.

    Writes ``cell_stage.parquet``, ``face_stage.parquet``, ``cells.gpkg``, ``faces.gpkg``
    (face outputs only with ``faces``), ``tables_summary.json`` and with ``csv`` the
    ``.csv`` copies of the stage tables.  Column units are in each Parquet file's
    metadata (key ``ntrans:units``) and in the summary JSON.
    """
    from .cluster import check_where, connect_workers
    from .outputs import (
        OutputFolder,
        TableWriter,
        id_arrow_type,
        ids_at,
        ids_series,
        write_csv,
        write_geopackage,
    )

    started = time.perf_counter()
    check_choice("coverage", coverage, COVERAGE_MODES)
    check_choice("elevation rule", elevation_rule, ELEVATION_RULES)
    check_choice("face rule", face_rule, FACE_RULES)
    spec = StageSpec.from_options(stages=stages, depths=depths)
    if int(tile_size) < 1:  # checked before the output folder is touched
        raise InputError(f"tile size {tile_size} is not a positive number of pixels; use e.g. 512")
    check_where(workers, scheduler, threads)

    files: list[Path] = []
    # workers start (and warm up) in the background while the mesh is read and built
    with (
        connect_workers(workers, scheduler) or contextlib.nullcontext() as connection,
        OutputFolder(out, overwrite=overwrite, inputs=[dem, cells]) as folder,
        rasters_kept_open(),  # tiles share DEM blocks: decode each once
    ):
        tmp = folder.path
        job = prepare_mesh_job(
            dem, cells, id_field=id_field, cells_layer=cells_layer,
            vertical_units=vertical_units,
            elevation_rule=elevation_rule, elevation_field=elevation_field,
            face_spacing=face_spacing, snap_tolerance=snap_tolerance,
            tile_size=tile_size, faces=faces, connection=connection, threads=threads,
        )
        dem_info, layer, ids, geoms = job.dem, job.layer, job.ids, job.geoms
        encoded = _encode_early(geoms)
        field_values, spacing, mesh, tiles = job.field_values, job.spacing, job.mesh, job.tiles
        n_cells = geoms.size
        n_faces = mesh.n_faces if mesh is not None else 0
        log.info(
            "%d cells, %d faces, %d stages (%s mode) in %d tiles of %d px",
            n_cells, n_faces, spec.values.size, spec.mode, len(tiles), int(tile_size),
        )
        from .cluster import default_threads

        per_worker = int(threads) if threads is not None else default_threads()
        _check_stage_rows_fit(
            [t.cells.size + (t.faces.size if faces else 0) for t in tiles], spec.values.size,
            min(len(tiles), 2 * per_worker if connection is None else 4 * connection.n_workers()),
        )
        settings = TileSettings(
            stages=spec,
            reference=default_reference(spec),
            coverage=coverage,  # type: ignore[arg-type]
            elevation_rule=elevation_rule,  # type: ignore[arg-type]
            face_rule=face_rule,  # type: ignore[arg-type]
            face_spacing=spacing,
            z_to_xy=float(dem_info.z_to_xy),
            conveyance_factor=float(dem_info.conveyance_factor),
            faces=bool(faces),
        )
        tasks = make_tasks(
            tiles,
            geoms,
            field_values=field_values,
            face_lines=None if mesh is None else job.face_geometry.wkb,
            face_cell_a=None if mesh is None else mesh.cell_a,
            face_cell_b=None if mesh is None else mesh.cell_b,
            face_length=None if mesh is None else mesh.length,
            as_wkb=connection is not None,
            face_lines_wkb=True,
        )

        units = table_units(dem_info)
        descriptions = _descriptions()
        meta = {
            "ntrans:version": __version__,
            "ntrans:stage_mode": spec.mode,
            "ntrans:dem": os.fspath(dem),
            "ntrans:cells": os.fspath(cells),
        }
        id_type = id_arrow_type(ids)
        f64 = pa.float64()
        cell_schema = pa.schema(
            [pa.field("cell_id", id_type)] + [pa.field(c, f64) for c in CELL_STAGE_COLUMNS[1:]]
        )
        face_schema = pa.schema(
            [pa.field("face_id", pa.int64()), pa.field("cell_a", id_type), pa.field("cell_b", id_type)]
            + [pa.field(c, f64) for c in FACE_STAGE_COLUMNS[3:]]
        )

        cell_sum = {k: np.full(n_cells, np.nan) for k in CELL_SUMMARY_COLUMNS[3:]}
        assigned_area = np.zeros(n_cells) if coverage == "centre" else None
        face_sum = {k: np.full(n_faces, np.nan) for k in ("low_point", "relief", "covered_fraction", "perimeter_ratio")}

        cell_path = tmp / "cell_stage.parquet"
        face_path = tmp / "face_stage.parquet"
        cell_writer = TableWriter(cell_path, schema=cell_schema, units=units,
                                  descriptions=descriptions, metadata=meta)
        face_writer = (
            TableWriter(face_path, schema=face_schema, units=units,
                        descriptions=descriptions, metadata=meta)
            if faces else None
        )
        spill_dir = None
        if connection is not None and connection.local:
            spill_dir = tmp / "_tiles"  # local workers leave their rows here
            spill_dir.mkdir()
        try:
            results = execute(
                tasks,
                dem=dem_info,
                dem_path=dem_info.path,
                settings=settings,
                open_kwargs={"vertical_units": vertical_units},
                connection=connection,
                progress=progress,
                spill_dir=spill_dir,
                total=len(tiles),
                threads=threads,
            )
            step = max(len(tiles) // 10, 1)
            for k, res in enumerate(results):
                layer.raise_if_checks_failed()
                pid, end, wall, cpu = res["timing"]
                log.debug("tile %d of %d: process %d, %.2f s (%.2f s CPU), %.2f s ago",
                          res["tile"] + 1, len(tiles), pid, wall, cpu, time.time() - end)
                rows = rows_of(res["cell_rows"])
                chunk: dict[str, Any] = {"cell_id": ids_at(ids, rows["cell"])}
                chunk.update({c: rows[c] for c in CELL_STAGE_COLUMNS[1:]})
                cell_writer.write(chunk)
                cs = res["cell_summary"]
                for name in cell_sum:
                    cell_sum[name][cs["cell"]] = cs[name]
                if assigned_area is not None:
                    assigned_area[cs["cell"]] = cs["assigned_area"]
                if face_writer is not None:
                    fr = rows_of(res["face_rows"])
                    fchunk: dict[str, Any] = {
                        "face_id": fr["face"].astype(np.int64),
                        "cell_a": ids_at(ids, fr["cell_a"]),
                        "cell_b": ids_at(ids, fr["cell_b"]),
                    }
                    fchunk.update({c: fr[c] for c in FACE_STAGE_COLUMNS[3:]})
                    face_writer.write(fchunk)
                    fs = res["face_summary"]
                    for name in face_sum:
                        face_sum[name][fs["face"]] = fs[name]
                if (k + 1) % step == 0 or k + 1 == len(tiles):
                    # the progress bar already shows this; keep it in the log otherwise
                    log.log(logging.DEBUG if progress else logging.INFO,
                            "tiles done: %d of %d", k + 1, len(tiles))
            if connection is not None:
                connection.release()  # workers shut down while the last files are written
            layer.finish_checks()
            if spill_dir is not None:
                shutil.rmtree(spill_dir)
            release_free_memory()  # the tiles' temporaries, before the summaries are written
            files.append(cell_writer.close())
            if face_writer is not None:
                files.append(face_writer.close())
        except BaseException:
            cell_writer.abort()
            if face_writer is not None:
                face_writer.abort()
            raise

        # per-cell summary
        import geopandas as gpd
        import pandas as pd

        refuse_without_terrain(cell_sum["covered_area"], dem_info)
        low, high = cell_sum["z_min"], cell_sum["z_max"]
        low, high = low[np.isfinite(low)], high[np.isfinite(high)]  # none: no terrain
        refuse_implausible_terrain(float(low.min()) if low.size else None,
                                   float(high.max()) if high.size else None, dem_info)
        area = shapely.area(geoms)
        if assigned_area is None:
            covered_fraction = covered_fractions(cell_sum["covered_area"], area)
        else:
            covered_fraction = centre_covered_fractions(
                cell_sum["covered_area"], assigned_area,
                area_share_inside(geoms, tuple(dem_info.bounds)))
        layer.covered_fraction = covered_fraction
        crs = layer.frame.crs
        cell_frame = gpd.GeoDataFrame(
            {
                "cell_id": ids,
                "area": area,
                "covered_fraction": covered_fraction,
                **{k: cell_sum[k] for k in CELL_SUMMARY_COLUMNS[3:]},
            },
            geometry=gpd.GeoSeries(geoms, crs=crs),
            crs=crs,
        )
        layer_texts = {
            item: layer_descriptions(columns, units, mode=spec.mode,
                                     reference=settings.reference, item=item)
            for item, columns in (("cell", CELL_SUMMARY_COLUMNS), ("face", FACE_SUMMARY_COLUMNS))
        }
        files.append(write_geopackage(cell_frame, tmp / "cells.gpkg", "cells",
                                      encoded=None if encoded is None else encoded.result(),
                                      descriptions=layer_texts["cell"]))
        del cell_frame
        if mesh is not None:
            columns: dict[str, Any] = {
                "face_id": np.arange(n_faces, dtype=np.int64),
                "cell_a": ids_series(ids, mesh.cell_a),
                "cell_b": ids_series(ids, mesh.cell_b),
                "length": mesh.length,
                **face_sum,
            }
            face_frame = pd.DataFrame({name: columns.pop(name) for name in FACE_SUMMARY_COLUMNS})
            files.append(write_geopackage(face_frame, tmp / "faces.gpkg", "faces",
                                          encoded=job.face_geometry, crs=crs,
                                          descriptions=layer_texts["face"]))
            del face_frame
        if csv:
            files.append(write_csv(cell_path, tmp / "cell_stage.csv"))
            if faces:
                files.append(write_csv(face_path, tmp / "face_stage.csv"))

        partial = partial_coverage(ids, covered_fraction)
        seconds = time.perf_counter() - started
        summary = {
            "ntrans_version": __version__,
            "dem": os.fspath(dem),
            "cells": os.fspath(cells),
            "cells_count": int(n_cells),
            "faces_count": int(n_faces),
            "tiles": len(tiles),
            "tile_size": int(tile_size),
            "stage_mode": spec.mode,
            "stage_values": spec.values.tolist(),
            "reference": settings.reference,
            "coverage": coverage,
            "elevation_rule": elevation_rule,
            "elevation_field": elevation_field,
            "face_rule": face_rule,
            "face_spacing": spacing,
            "snap_tolerance": job.snap_tolerance,
            "horizontal_unit": dem_info.horizontal_unit,
            "vertical_unit": dem_info.vertical_unit,
            "horizontal_unit_name": unit_name(dem_info.horizontal_unit, dem_info.xy_metres_per_unit),
            "vertical_unit_name": unit_name(dem_info.vertical_unit, dem_info.z_metres_per_unit),
            "manning_k": dem_info.manning_k,
            **partial.summary(),
            "seconds": round(seconds, 3),
            "units": {k: v for k, v in units.items() if k in set(CELL_STAGE_COLUMNS)
                      | set(FACE_STAGE_COLUMNS) | set(CELL_SUMMARY_COLUMNS)
                      | set(FACE_SUMMARY_COLUMNS)},
            # what each column of cells.gpkg and faces.gpkg holds, as in the layers
            "cell_layer": layer_texts["cell"],
            "face_layer": layer_texts["face"] if mesh is not None else {},
        }
        summary_path = tmp / "tables_summary.json"
        summary_path.write_text(json.dumps(summary, indent=2))
        files.append(summary_path)
        rel = [p.name for p in files]

    final = Path(os.fspath(out)).expanduser().absolute()
    warn_partial_coverage(ids, covered_fraction, stacklevel=2)
    warn_missing_flat_elevation(ids, cell_sum["flat_elevation"], elevation_rule,
                                elevation_field, stacklevel=2)
    log.info("tables written to %s in %.1f s", final, seconds)
    return TablesResult(
        out=final,
        files=[final / name for name in rel],
        n_cells=int(n_cells),
        n_faces=int(n_faces),
        n_stages=int(spec.values.size),
        n_tiles=len(tiles),
        n_partial=partial.count,
        partial_ids=partial.first,
        seconds=seconds,
        units=units,
    )
