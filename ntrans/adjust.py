"""``adjust_roughness()``: equivalent Manning's n per roughness class (``ntrans adjust``).

Flow: read and check the DEM, the cells and the roughness inputs (nothing is written
when any of them is bad) -> faces of the whole mesh -> tiles (:mod:`ntrans.engine`) ->
pass 1, per tile, pure numpy: pixel weights, surface factor, flat elevations, face
profiles with a roughness class per segment and a class per pixel, then the per (item,
class) sufficient statistics of both families at the window stages
(:mod:`ntrans.translate`) -> one global class fit -> pass 2, per tile: n ratios,
conveyances and stage bias per face (and cell) -> tables, maps, summary.

The *fit domain* is the faces, unless a subgrid side uses the ``cell`` closure (friction
applied per cell): then the cells are fitted (lumped radius V / A_bed; a ``strip``
closure on cells means the conveyance form).  Faces are always tabulated; with the
``cell`` closure their target is evaluated with the lumped radius, for reference.

The second pass recomputes each tile's geometry instead of keeping it, so memory stays
bounded by one tile plus the (item, class, stage) statistics.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import shapely

from . import __version__
from .cautions import CAUTIONS
from .cluster import check_where, connect_workers, default_threads
from .engine import (
    COVERAGE_MODES,
    ELEVATION_RULES,
    FACE_RULES,
    make_tasks,
)
from .errors import (
    DeepWindowWarning,
    DryWetMismatchWarning,
    InputError,
    MemoryEstimateWarning,
    check_choice,
    warn,
)
from .inputs import conveyance_factor, rasters_kept_open, unit_name
from .memory import available_memory, release_free_memory
from .quantiles import SpilledQuantiles
from .roughness import (
    AREA_TOLERANCE,
    OVERLAP_RULES,
    RoughnessModel,
    check_class_raster_holes,
    check_roughness_inputs,
    class_at_points,
    class_index_on_window,
    class_raster_holes_error,
    load_roughness,
    outside_range,
)
from .stages import StageSpec
from .translate import (
    COMPOSITES,
    CellGeometry,
    ClassStats,
    FaceGeometry,
    FitTerms,
    FlatGeometry,
    bias_summary_spilled,
    combine_fit_terms,
    conveyance,
    fit_terms,
    flag_lines,
    n_ratio,
    solve_class_n,
    solve_stage,
)
from .translate import Family as _Family

log = logging.getLogger(__name__)

#: a window is called deep (DeepWindowWarning) when more than half of its wet cell-stages
#: lie more than this many metres above their cell's lowest terrain, i.e. the median
#: depth over the wet cells exceeds it: deeper than river floods on floodplains run
#: (common practice, no source).  A water surface in feet over terrain in metres stands
#: 3.28 times too high, so it trips this rule wherever the terrain lies more than about
#: 13 m above the datum (2.28 x 13 m = 30 m)
DEEP_WINDOW_METRES = 30.0

#: bins of the stage bias's spill files are uniform in asinh(bias / this), in the DEM's
#: vertical unit: fine near zero, relative further out (they never change the figures)
BIAS_BIN_UNIT = 0.001

FAMILIES: tuple[str, ...] = ("flat", "subgrid")
SUBGRID_CLOSURES: tuple[str, ...] = ("lumped", "strip", "cell")

CLASS_COLUMNS: tuple[str, ...] = (
    "class", "n_source", "n_target", "ratio", "ratio_p10", "ratio_p50", "ratio_p90", "faces",
    "weight_share", "flags", "surface", "bias_unadjusted_median", "bias_unadjusted_p90_abs",
    "bias_unadjusted_max_abs", "bias_adjusted_median", "bias_adjusted_p90_abs",
    "bias_adjusted_max_abs",
)
FACE_COLUMNS: tuple[str, ...] = (
    "face_id", "cell_a", "cell_b", "stage", "depth", "n_ratio", "conveyance_source",
    "conveyance_target", "conveyance_target_unadjusted", "stage_bias_unadjusted",
    "stage_bias_adjusted", "dominant_class",
)
CELL_COLUMNS: tuple[str, ...] = (
    "cell_id", "stage", "depth", "n_ratio", "n_ratio_lumped", "n_ratio_conveyance_form",
    "n_ratio_lumped_equal_volume", "n_ratio_conveyance_form_equal_volume", "conveyance_source",
    "conveyance_target", "conveyance_target_unadjusted", "stage_bias_unadjusted",
    "stage_bias_adjusted", "dominant_class",
)


@dataclass
class AdjustResult:
    """What :func:`adjust_roughness` wrote and found.

    ``classes`` is the per-class table (as in ``n_by_class.csv``), ``summary`` the content
    of ``adjust_summary.json``, ``text`` the one-screen summary ending with the cautions.
    ``units`` are the face table's column units; the cell table's are in
    ``summary["cell_units"]`` (its conveyance columns are in L^4/s).
    """

    out: Path
    files: list[Path]
    classes: Any
    summary: dict[str, Any]
    text: str
    seconds: float = 0.0
    units: dict[str, str] = field(default_factory=dict)


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class _Plan:
    source: str
    target: str
    source_closure: str   # closure of the source (flat -> "lumped")
    target_closure: str
    domain: str           # "faces" or "cells"
    composite: str
    elevation_rule: str
    face_rule: str
    coverage: str
    spacing: float
    z_to_xy: float
    k: float              # Manning unit factor of the horizontal unit (1.0 or 1.486)

    @property
    def conveyance_k(self) -> float:
        """k z_to_xy^(5/3): the factor that gives conveyance in horizontal units (flow areas,
        radii, volumes and depths formed in the vertical unit are converted by it)."""
        return conveyance_factor(self.k, self.z_to_xy)


def _families(source: str, target: str, closure: str, source_closure: str | None) -> tuple[str, str, str]:
    """(source closure, target closure, domain) from the options."""
    check_choice("source family", source, FAMILIES)
    check_choice("target family", target, FAMILIES)
    check_choice("closure", closure, SUBGRID_CLOSURES)
    if source_closure is not None:
        check_choice("source closure", source_closure, SUBGRID_CLOSURES)
    if source == "flat" and target == "flat":
        raise InputError("source and target are both flat; one side must be subgrid "
                         "(--from subgrid or --to subgrid; source or target in a project "
                         "file)")
    if source_closure is not None and not (source == "subgrid" and target == "subgrid"):
        raise InputError("a source closure applies only when both sides are subgrid; drop it "
                         "or use subgrid on both sides (--from subgrid --to subgrid; source "
                         "and target in a project file)")
    if source == "subgrid" and target == "subgrid":
        sc = source_closure or "lumped"
        tc = closure
    elif source == "flat":
        sc, tc = "flat", closure
    else:
        sc, tc = closure, "flat"
    domain = "cells" if "cell" in (sc, tc) else "faces"
    return sc, tc, domain


def _domain_closure(closure: str) -> str:
    """Closure used by translate: flat geometry and cells' lumped radius -> lumped."""
    return "strip" if closure == "strip" else "lumped"


# --------------------------------------------------------------------------- per tile


@dataclass
class _TileGeometry:
    cells: np.ndarray            # global indices of own cells
    faces: np.ndarray            # global indices of the tile's faces
    face_a: np.ndarray           # global cell_a / cell_b (-1 boundary)
    face_b: np.ndarray
    face_geom: FaceGeometry
    cell_geom: CellGeometry
    face_flat: np.ndarray        # flat face bed
    cell_flat: np.ndarray        # flat cell elevation (own cells)
    face_low: np.ndarray
    cell_low: np.ndarray
    cell_covered: np.ndarray     # plan area of own cells over valid terrain
    cell_assigned: np.ndarray    # plan area of own cells' pixels, nodata included
    face_stages: np.ndarray      # (n_faces, n_window)
    cell_stages: np.ndarray      # (n_cells, n_window)
    uncovered: float             # plan area of own cells' pixels with no class
    covered: float               # plan area of own cells' pixels


def _tile_geometry(task: Any, elevation: np.ndarray, transform: Any, plan: _Plan,
                   model: RoughnessModel, crs: Any, window_stages: Any) -> _TileGeometry:
    """Geometry of one tile (pure apart from the water-surface callback)."""
    from .cells import cell_terrain_summary, flat_elevation
    from .coverage import centre_coverage, exact_coverage
    from .faces import Profiles, face_flat_bed, face_profile_summary, sample_profiles
    from .terrain import sample_bilinear, surface_factor

    tile = task.tile
    n_own = tile.cells.size
    n_all = n_own + tile.halo.size
    n_cls = model.n_classes
    pixel_area = abs(transform.a * transform.e - transform.b * transform.d)
    if elevation.size == 0:
        item = np.empty(0, dtype=np.int64)
        rows = cols = item
        frac = np.empty(0)
        s_pix = np.empty(0)
        cls_win = np.empty((0, 0), dtype=np.int32)
    else:
        cover = exact_coverage if plan.coverage == "exact" else centre_coverage
        w = cover(task.polygons, transform, elevation.shape)
        item, rows, cols = (np.asarray(a, dtype=np.int64) for a in (w.item, w.row, w.col))
        frac = np.asarray(w.fraction, dtype=float)
        sf = surface_factor(elevation, abs(transform.a), abs(transform.e), z_to_xy=plan.z_to_xy)
        s_pix = sf[rows, cols]
        cls_win = class_index_on_window(model, transform, elevation.shape, crs=crs)
    z = elevation[rows, cols] if elevation.size else np.empty(0)
    plan_area = frac * pixel_area
    pix_cls = cls_win[rows, cols].astype(np.int64) if elevation.size else np.empty(0, np.int64)

    summary = cell_terrain_summary(item, z, plan_area, n_all,
                                   median=plan.elevation_rule == "median")
    centroid_z = None
    if plan.elevation_rule == "centroid":
        cent = shapely.centroid(task.polygons)
        centroid_z = (sample_bilinear(elevation, transform, shapely.get_x(cent), shapely.get_y(cent))
                      if elevation.size else np.full(n_all, np.nan))
    flat_z = np.asarray(flat_elevation(plan.elevation_rule, summary, centroid_z=centroid_z,
                                       field=task.field_values), dtype=float)

    own = item < n_own
    valid = own & np.isfinite(z)
    uncovered = float(plan_area[valid & (pix_cls < 0)].sum())
    covered = float(plan_area[valid].sum())
    cell_geom = CellGeometry(item[own], z[own], plan_area[own], (plan_area * s_pix)[own],
                             pix_cls[own], n_own, n_cls)
    cell_low = np.asarray(summary["z_min"], dtype=float)[:n_own]

    # faces
    n_f = tile.faces.size
    if n_f == 0 or elevation.size == 0:
        e = np.empty(0)
        prof = Profiles(np.empty(0, dtype=np.int64), e, e, n_f, x=e, y=e)
    else:
        prof = sample_profiles(task.face_lines, elevation, transform, plan.spacing)
    seg_cls = np.full(prof.n_stations, -1, dtype=np.int64)
    k_seg = prof.segment_index()
    if k_seg.size:
        mx, my = prof.segment_midpoints()
        seg_cls[k_seg] = class_at_points(cls_win, transform, mx, my)
    face_geom = FaceGeometry(prof.face, prof.station, prof.z, seg_cls, n_f, n_cls,
                             z_to_xy=plan.z_to_xy)
    fsum = face_profile_summary(prof)
    face_low = np.asarray(fsum["low_point"], dtype=float)
    la, lb = task.face_a, task.face_b
    if n_f:
        za = flat_z[la]
        zb = np.where(lb >= 0, flat_z[np.where(lb >= 0, lb, 0)], np.nan)
        face_flat = np.asarray(face_flat_bed(plan.face_rule, za, zb, fsum), dtype=float)  # type: ignore[arg-type]
    else:
        face_flat = np.empty(0)
    local = np.concatenate([tile.cells, tile.halo])
    ga = local[la] if n_f else np.empty(0, dtype=np.int64)
    gb = np.where(lb >= 0, local[np.where(lb >= 0, lb, 0)], -1) if n_f else np.empty(0, dtype=np.int64)

    face_stages, cell_stages = window_stages(
        face_low=face_low, cell_low=cell_low, prof=prof, cell_pixels=(item[own], rows[own],
                                                                        cols[own], plan_area[own]),
        n_cells=n_own, window=(transform, elevation.shape), face_a=np.asarray(la, dtype=np.int64))
    return _TileGeometry(tile.cells, tile.faces, ga, gb, face_geom, cell_geom, face_flat,
                         flat_z[:n_own], face_low, cell_low,
                         np.asarray(summary["covered_area"], dtype=float)[:n_own],
                         np.bincount(item[own], weights=plan_area[own], minlength=n_own),
                         face_stages, cell_stages, uncovered, covered)


class _Window:
    """Window stages per item: a StageSpec, or water-surface rasters (one column each)."""

    def __init__(self, spec: StageSpec | None, surfaces: list[Any], dem: Any) -> None:
        self.spec = spec
        self.surfaces = surfaces
        self.dem = dem
        for ws in surfaces:
            if tuple(ws.transform)[:6] != tuple(dem.transform)[:6] or ws.crs != dem.crs:
                log.info("water surface %s is on another grid than the DEM; it is sampled at "
                         "the face stations and DEM pixel centres (bilinear)", ws.name)

    @property
    def n(self) -> int:
        return self.spec.values.size if self.spec is not None else len(self.surfaces)

    def __call__(self, *, face_low, cell_low, prof, cell_pixels, n_cells, window, face_a):
        if self.spec is not None:
            return self.spec.for_items(face_low), self.spec.for_items(cell_low)
        transform, shape = window
        n_f = face_low.size
        fst = np.full((n_f, self.n), np.nan)
        cst = np.full((n_cells, self.n), np.nan)
        item, rows, cols, area = cell_pixels
        # window offsets of this tile in the DEM grid
        inv = ~self.dem.transform
        col_off = int(round(inv.a * transform.c + inv.b * transform.f + inv.c))
        row_off = int(round(inv.d * transform.c + inv.e * transform.f + inv.f))
        # a face's stage is the mean along its line: stations weighted by the length they
        # stand for (profiles are denser where they cross pixel-centre rows and columns);
        # a face of one point takes that point's value
        station_weight = prof.station_weights() if prof.n_stations else np.empty(0)
        if station_weight.size:
            no_length = np.bincount(prof.face, weights=station_weight, minlength=n_f) <= 0
            station_weight = np.where(no_length[prof.face], 1.0, station_weight)
        for j, ws in enumerate(self.surfaces):  # loop over events
            if prof.n_stations:
                v = ws.sample(prof.x, prof.y, crs=self.dem.crs)
                fst[:, j] = _mean_above_lowest(prof.face, v, station_weight, n_f)
            if item.size and shape[0] and shape[1]:
                grid = ws.on_dem_window(self.dem, row_off, col_off, shape[0], shape[1])
                cst[:, j] = _mean_above_lowest(item, grid[rows, cols], area, n_cells)
        # a face whose line has no water-surface value (e.g. on the raster's edge) takes
        # the value of its first cell
        if n_f and n_cells:
            fallback = np.where(face_a < n_cells, face_a, 0)
            fst = np.where(np.isnan(fst) & (face_a < n_cells)[:, None], cst[fallback], fst)
        return fst, cst


def _mean_above_lowest(item: np.ndarray, values: np.ndarray, weights: np.ndarray,
                       n_items: int) -> np.ndarray:
    """Weighted mean of the finite ``values`` per item (NaN for items without any), formed
    as the item's lowest value plus the weighted mean excess over it.

    A water surface level over a whole cell or face then gives that level exactly, whatever
    the weights' round-off (the plan areas of a cell's pixels differ in their last bits
    from tile window to tile window); formed directly, the mean could land a last bit
    below the level and count every pixel of a flattened pond at that level as wet.
    """
    ok = np.isfinite(values)
    item, values, weights = item[ok], values[ok], weights[ok]
    lowest = np.full(n_items, np.inf)
    np.minimum.at(lowest, item, values)
    excess = np.bincount(item, weights=(values - lowest[item]) * weights, minlength=n_items)
    total = np.bincount(item, weights=weights, minlength=n_items)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, lowest + excess / np.where(total > 0, total, 1.0), np.nan)


def _families_for(tg: _TileGeometry, plan: _Plan, domain: str) -> tuple[_Family, _Family]:
    """Source and target families on the faces or the cells of one tile."""
    if domain == "faces":
        geom, flat = tg.face_geom, FlatGeometry.from_geometry(tg.face_geom, tg.face_flat)
    else:
        geom, flat = tg.cell_geom, FlatGeometry.from_geometry(tg.cell_geom, tg.cell_flat)

    def fam(closure: str) -> _Family:
        if closure == "flat":
            return _Family(flat, "lumped")
        if domain == "faces" and closure == "cell":
            return _Family(geom, "lumped")
        return _Family(geom, _domain_closure(closure))  # type: ignore[arg-type]

    return fam(plan.source_closure), fam(plan.target_closure)


def _family_stats(fam: _Family, stages: np.ndarray, cache: dict[int, ClassStats],
                  need_strip: bool = False) -> ClassStats:
    """Statistics of ``fam``'s geometry at ``stages``, computed once per geometry."""
    key = id(fam.geometry)
    st = cache.get(key)
    if st is None or (fam.closure == "strip" and np.isnan(st.strip).any()):
        st = fam.geometry.stats(stages, strip=need_strip or fam.closure == "strip")
        cache[key] = st
    return st


# --------------------------------------------------------------------------- tile passes


@dataclass(frozen=True)
class _Job:
    """Everything a tile pass needs besides the task (small enough to ship to a worker)."""

    dem: Any
    plan: _Plan
    model: RoughnessModel
    window: _Window


def _load_tile(job: _Job, task: Any) -> _TileGeometry:
    """Read the tile's DEM window and build its geometry."""
    wdw = task.tile.window
    if wdw.height > 0 and wdw.width > 0:
        arr = np.asarray(job.dem.read_window(int(wdw.row_off), int(wdw.col_off), int(wdw.height),
                                             int(wdw.width)), dtype=float)
        tr = job.dem.window_transform(int(wdw.row_off), int(wdw.col_off))
    else:
        arr, tr = np.empty((0, 0)), job.dem.transform
    return _tile_geometry(task, arr, tr, job.plan, job.model, job.dem.crs, job.window)


def _pass_statistics(job: _Job, task: Any) -> dict[str, Any]:
    """Pass 1 of one tile: the class fit's terms from the fit domain's items
    (:func:`ntrans.translate.fit_terms`; sums where it can, not every item-stage)."""
    plan, model = job.plan, job.model
    tg = _load_tile(job, task)
    fam_s, fam_t = _families_for(tg, plan, plan.domain)
    faces = plan.domain == "faces"
    st = tg.face_stages if faces else tg.cell_stages
    cache: dict[int, ClassStats] = {}
    st_s = _family_stats(fam_s, st, cache)
    k_source = fam_s.conveyance(st, model.n, composite=plan.composite, k=plan.conveyance_k,  # type: ignore[arg-type]
                                stats=st_s)
    terms = fit_terms(k_source, _family_stats(fam_t, st, cache), model.n,
                      closure=_domain_closure(plan.target_closure),  # type: ignore[arg-type]
                      composite=plan.composite, k=plan.conveyance_k)  # type: ignore[arg-type]
    low = tg.face_low if faces else tg.cell_low
    deep = DEEP_WINDOW_METRES / float(job.dem.z_metres_per_unit)
    return {"terms": terms, "uncovered": tg.uncovered, "covered": tg.covered,
            "cells": tg.cells, "cell_covered": tg.cell_covered,
            "cell_assigned": tg.cell_assigned, "cell_flat": tg.cell_flat,
            "wetting": _WindowWetting.of(st, low, tg.cell_stages, tg.cell_low, deep)}


@dataclass
class _WindowWetting:
    """How the window meets the terrain, summed tile by tile (pass 1).

    Fit domain: ``reached`` items with terrain and a stage, ``wet`` items above their
    lowest terrain at some window stage, ``nearest`` the largest stage minus lowest
    terrain of any item-stage (at most 0 when none is wet), ``lowest`` the lowest
    terrain.  Cells: ``cell_wet`` cell-stages above the cell's lowest terrain, ``cell_deep``
    those more than the deep limit above it.  ``terrain_low``: the lowest terrain of any
    cell or face (NaN pixels left out).
    """

    reached: int = 0
    wet: int = 0
    nearest: float = -np.inf
    lowest: float = np.inf
    cell_wet: int = 0
    cell_deep: int = 0
    terrain_low: float = np.inf

    @classmethod
    def of(cls, stages: np.ndarray, low: np.ndarray, cell_stages: np.ndarray,
           cell_low: np.ndarray, deep: float) -> _WindowWetting:
        with np.errstate(invalid="ignore"):
            depth = np.asarray(stages, dtype=float) - np.asarray(low, dtype=float)[:, None]
            cell_depth = (np.asarray(cell_stages, dtype=float)
                          - np.asarray(cell_low, dtype=float)[:, None])
        finite = np.isfinite(depth)
        has_low = np.isfinite(low)
        every_low = np.concatenate([np.asarray(low, dtype=float).ravel(),
                                    np.asarray(cell_low, dtype=float).ravel()])
        every_low = every_low[np.isfinite(every_low)]
        return cls(reached=int(finite.any(axis=1).sum()),
                   wet=int((depth > 0).any(axis=1).sum()),
                   nearest=float(depth[finite].max()) if finite.any() else -np.inf,
                   lowest=float(np.min(low[has_low])) if has_low.any() else np.inf,
                   cell_wet=int(np.count_nonzero(cell_depth > 0)),
                   cell_deep=int(np.count_nonzero(cell_depth > deep)),
                   terrain_low=float(every_low.min()) if every_low.size else np.inf)

    def add(self, other: _WindowWetting) -> None:
        self.reached += other.reached
        self.wet += other.wet
        self.nearest = max(self.nearest, other.nearest)
        self.lowest = min(self.lowest, other.lowest)
        self.cell_wet += other.cell_wet
        self.cell_deep += other.cell_deep
        self.terrain_low = min(self.terrain_low, other.terrain_low)


def _check_window_wets(wetting: _WindowWetting, *, spec: StageSpec | None, domain: str,
                       z_unit: str, surfaces: list[Any]) -> None:
    """InputError when no item of the fit domain is wet at any window stage: one sentence
    saying what the window met."""
    if wetting.wet > 0:
        return
    item = domain[:-1]
    if spec is None:
        names = ", ".join(repr(ws.name) for ws in surfaces)
        what = f"water surface {names}" if len(surfaces) == 1 else f"water surfaces {names}"
        if wetting.reached == 0:
            raise InputError(
                f"the {what} has no value over any {item} of the mesh with terrain (it lies "
                "off the mesh or holds only nodata there); check its extent, CRS and nodata "
                "value")
        raise InputError(
            f"the {what} lies below the terrain everywhere: at every {item} it reaches it "
            f"stands at least {-wetting.nearest:.3g} {z_unit} below the {item}'s lowest "
            f"terrain; check that it holds elevations, not depths, in the DEM's vertical "
            f"unit ({z_unit})")
    if spec.mode == "stage":
        low = f" (the lowest lies at {wetting.lowest:.6g} {z_unit})" if np.isfinite(
            wetting.lowest) else ""
        raise InputError(
            f"the window's stages ({spec.values.min():g} to {spec.values.max():g} {z_unit}) "
            f"lie below the lowest terrain of every {item}{low}; give stages above the "
            "terrain in the DEM's vertical unit, or depths instead")
    raise InputError(f"no {item} of the mesh is wet at any depth of the window; give depths "
                     "above zero over cells with terrain")


def _warn_if_window_deep(wetting: _WindowWetting, *, spec: StageSpec | None, z_unit: str,
                         z_metres: float) -> None:
    """DeepWindowWarning when the median depth over the wet cell-stages exceeds
    :data:`DEEP_WINDOW_METRES` (more than half of them deeper)."""
    if not (wetting.cell_wet and 2 * wetting.cell_deep > wetting.cell_wet):
        return
    limit = DEEP_WINDOW_METRES / z_metres
    if spec is not None and spec.mode == "depth":
        hint = "check the window's depths"
    else:
        what = "water surface" if spec is None else "stages"
        hint = (f"check the vertical unit of the {what} (a water surface in feet over terrain "
                "in metres stands 3.28 times too high)")
    warn(f"the calibration window is implausibly deep: {wetting.cell_deep} of "
         f"{wetting.cell_wet} wet cell-stages lie more than {limit:.3g} {z_unit} above their "
         f"cell's lowest terrain; {hint}", DeepWindowWarning, stacklevel=3)


def _pass_tables(job: _Job, task: Any, n_fit: np.ndarray) -> dict[str, Any]:
    """Pass 2 of one tile: per face and per cell ratios, conveyances and stage bias."""
    plan, model = job.plan, job.model
    comp, k = plan.composite, plan.conveyance_k
    tg = _load_tile(job, task)
    out: dict[str, Any] = {"faces": tg.faces, "cells": tg.cells, "face_a": tg.face_a,
                           "face_b": tg.face_b}
    # faces (with the cell closure, evaluated with the lumped radius for reference)
    fs, ft = _families_for(tg, replace(plan, domain="faces"), "faces")
    eta = tg.face_stages
    fcache: dict[int, ClassStats] = {}
    fst_s, fst_t = _family_stats(fs, eta, fcache), _family_stats(ft, eta, fcache)
    ks = fs.conveyance(eta, model.n, composite=comp, k=k, stats=fst_s)  # type: ignore[arg-type]
    kt0 = ft.conveyance(eta, model.n, composite=comp, k=k, stats=fst_t)  # type: ignore[arg-type]
    rr = n_ratio(ks, kt0)
    out["face"] = {
        "stage": eta,
        "depth": eta - tg.face_low[:, None],
        "n_ratio": rr.ratio,
        "conveyance_source": ks,
        "conveyance_target": ft.conveyance(eta, n_fit, composite=comp, k=k,  # type: ignore[arg-type]
                                           stats=fst_t),
        "conveyance_target_unadjusted": kt0,
        "stage_bias_unadjusted": solve_stage(ft, ks, model.n, start=eta, composite=comp, k=k) - eta,  # type: ignore[arg-type]
        "stage_bias_adjusted": solve_stage(ft, ks, n_fit, start=eta, composite=comp, k=k) - eta,  # type: ignore[arg-type]
    }
    out["face_dominant"] = FlatGeometry.from_geometry(tg.face_geom, tg.face_flat).stats(
        eta[:, :0]).dominant_class()
    out["face_mismatch"] = int(rr.mismatch.sum())

    # cells
    cs, ct = _families_for(tg, replace(plan, domain="cells"), "cells")
    ceta = tg.cell_stages
    sub = tg.cell_geom.stats(ceta)
    ccache: dict[int, ClassStats] = {id(tg.cell_geom): sub}
    flat_st = FlatGeometry.from_geometry(tg.cell_geom, tg.cell_flat).stats(ceta)
    cst_s, cst_t = _family_stats(cs, ceta, ccache), _family_stats(ct, ceta, ccache)
    kc_s = cs.conveyance(ceta, model.n, composite=comp, k=k, stats=cst_s)  # type: ignore[arg-type]
    kc_t0 = ct.conveyance(ceta, model.n, composite=comp, k=k, stats=cst_t)  # type: ignore[arg-type]
    crr = n_ratio(kc_s, kc_t0)
    k_flat = conveyance(flat_st, model.n, composite=comp, k=k)  # type: ignore[arg-type]
    k_lump = conveyance(sub, model.n, closure="lumped", composite=comp, k=k)  # type: ignore[arg-type]
    k_form = conveyance(sub, model.n, closure="strip", k=k)
    flip = plan.source == "subgrid" and plan.target == "flat"
    r_l = n_ratio(k_lump, k_flat).ratio if flip else n_ratio(k_flat, k_lump).ratio
    r_f = n_ratio(k_form, k_flat).ratio if flip else n_ratio(k_flat, k_form).ratio
    wet, bed = sub.total(sub.wet), sub.total(sub.perimeter)
    vol, s53 = sub.total(sub.area), sub.total(sub.strip)
    with np.errstate(invalid="ignore", divide="ignore"):
        ev_l = np.where(bed > 0, (wet / np.where(bed > 0, bed, 1.0)) ** (2 / 3), np.nan)
        hbar = np.where(wet > 0, vol / np.where(wet > 0, wet, 1.0), np.nan)
        ev_f = np.where(wet > 0, (s53 / np.where(wet > 0, wet, 1.0)) / hbar ** (5 / 3), np.nan)
        if flip:
            ev_l, ev_f = 1.0 / ev_l, 1.0 / ev_f
    if plan.domain == "cells":
        cbu = solve_stage(ct, kc_s, model.n, start=ceta, composite=comp, k=k) - ceta  # type: ignore[arg-type]
        cba = solve_stage(ct, kc_s, n_fit, start=ceta, composite=comp, k=k) - ceta  # type: ignore[arg-type]
    else:
        cbu = cba = np.full(ceta.shape, np.nan)
    out["cell"] = {
        "stage": ceta,
        "depth": ceta - tg.cell_low[:, None],
        "n_ratio": crr.ratio,
        "n_ratio_lumped": r_l,
        "n_ratio_conveyance_form": r_f,
        "n_ratio_lumped_equal_volume": ev_l,
        "n_ratio_conveyance_form_equal_volume": ev_f,
        "conveyance_source": kc_s,
        "conveyance_target": ct.conveyance(ceta, n_fit, composite=comp, k=k,  # type: ignore[arg-type]
                                           stats=cst_t),
        "conveyance_target_unadjusted": kc_t0,
        "stage_bias_unadjusted": cbu,
        "stage_bias_adjusted": cba,
    }
    out["cell_dominant"] = flat_st.dominant_class()
    out["cell_mismatch"] = int(crr.mismatch.sum())
    with np.errstate(invalid="ignore", divide="ignore"):
        bed_factor = np.where(wet > 0, bed / np.where(wet > 0, wet, 1.0), np.nan)
    out["bed_factor"] = _nanmedian_rows(bed_factor)
    return out


def _run_tiles(fn: Any, job: _Job, tasks: Any, *args: Any, connection: Any, progress: bool,
               total: int, desc: str, threads: int | None = None) -> Any:
    """Yield ``fn(job, task, *args)`` for every task, in task order (see ntrans.cluster)."""
    from .cluster import run_ordered

    yield from run_ordered(_call_pass, (fn, job, args), tasks, connection=connection,
                           progress=progress, total=total, desc=desc, threads=threads)


def _call_pass(shared: tuple, task: Any) -> Any:
    fn, job, args = shared
    return fn(job, task, *args)


# --------------------------------------------------------------------------- main job


def adjust_roughness(
    dem: str | os.PathLike[str],
    cells: str | os.PathLike[str],
    *,
    out: str | os.PathLike[str],
    id_field: str | None = None,
    cells_layer: str | None = None,
    n: float | str | None = None,
    classes: str | os.PathLike[str] | None = None,
    classes_layer: str | None = None,
    class_field: str | None = None,
    n_table: str | os.PathLike[str] | None = None,
    n_field: str | None = None,
    class_raster: str | os.PathLike[str] | None = None,
    default_class: str | None = None,
    overlap_rule: str = "error",
    source: str = "flat",
    target: str = "subgrid",
    closure: str = "lumped",
    source_closure: str | None = None,
    composite: str = "horton_einstein",
    depths: str | None = None,
    stages: str | None = None,
    water_surface: list[str | os.PathLike[str]] | str | None = None,
    elevation_rule: str = "mean",
    elevation_field: str | None = None,
    face_rule: str = "higher",
    coverage: str = "exact",
    face_spacing: float | None = None,
    snap_tolerance: float | None = None,
    vertical_units: str | None = None,
    csv: bool = False,
    overwrite: bool = False,
    tile_size: int = 512,
    workers: int | None = None,
    scheduler: str | None = None,
    threads: int | None = None,
    progress: bool = False,
) -> AdjustResult:
    """Fit one Manning's n per roughness class for the target model family.

    Parameters
    ----------
    dem, cells : terrain raster (projected CRS) and the mesh cell polygons.
    out : output folder, written whole or not at all.
    n, classes + class_field + n_table, classes + n_field, class_raster + n_table :
        the source model's roughness (exactly one form); ``default_class`` for ground no
        class covers; ``overlap_rule`` (``error | first | last | max_n``) for overlapping
        class polygons.  See :func:`ntrans.roughness.load_roughness`.
    cells_layer, classes_layer : the layer of ``cells`` / ``classes`` to read; needed when
        the file holds several.
    source, target : ``flat`` or ``subgrid`` (at least one subgrid).
    closure : friction closure of the subgrid side (``lumped | strip | cell``); the
        target's when both sides are subgrid, with ``source_closure`` the source's.
    composite : composite n along a face: ``horton_einstein | pavlovskii | lotter``.
    depths, stages, water_surface : the calibration window (exactly one): depths above
        each item's low point, absolute stages, or water-surface rasters exported from
        the calibrated source model (each face at the raster's length-weighted mean along
        its line, each cell at its area-weighted mean, per raster).
    elevation_rule, elevation_field, face_rule : flat beds (see ``build_tables``).
    coverage, face_spacing, snap_tolerance, vertical_units, tile_size : as in
        ``build_tables``.
    csv : also write the face and cell tables as CSV.
    workers, scheduler : run the tiles on a local Dask cluster of ``workers`` processes or
        on an existing scheduler (both passes); results are the same as in-process.
    threads : without workers: tiles (and face blocks) at once in this process
        (default: one per core, up to four; 1 for one at a time); same results.
    progress : progress bar on stderr.

    Returns
    -------
    AdjustResult

    Raises
    ------
    RoughnessError
        A class or the default class missing from the n table, or an n outside 0.005-1
        (checked before the mesh is read); a class raster with nodata under the mesh and
        no default class (before the tile passes where the holes are clear, else after
        the first).
    InputError
        Among others: a water surface off the mesh (before the tile passes), or a window
        that wets no face (cell) of the fit domain (after the first pass, before anything
        is written).  A window whose median depth over the wet cells exceeds
        :data:`DEEP_WINDOW_METRES` warns (:class:`~ntrans.errors.DeepWindowWarning`);
        cells partly or wholly without terrain warn
        (:class:`~ntrans.errors.PartialCoverageWarning`), and so do cells the
        ``centroid`` or ``field`` rule gives no flat elevation
        (:class:`~ntrans.errors.FlatElevationWarning`).

    Writes ``n_by_class.csv``, ``face_adjustment.parquet``, ``cell_adjustment.parquet``,
    ``cells.gpkg`` (with ``covered_fraction``), ``faces.gpkg`` and ``adjust_summary.json``.  Lengths in the CRS's
    horizontal unit, stages and stage bias in the DEM's vertical unit; conveyance
    k A R^(2/3) / n with A and R converted to the horizontal unit L and k = 1.0 (metre) or
    1.486 (foot): L^3/s on faces, L^4/s on cells (k V R^(2/3) / n).

    The adjusted n values are a starting point for calibration in the target model, not a
    substitute for it; a qualified engineer must review them; local codes, agency guidance
    and licensed practice take precedence (:data:`ntrans.cautions.CAUTIONS`).
    """
    from .coverage import area_share_inside
    from .inputs import check_water_surfaces_reach, read_water_surfaces
    from .outputs import (
        OutputFolder,
        TableWriter,
        id_arrow_type,
        ids_at,
        ids_series,
        unit_symbol,
        write_csv,
        write_geopackage,
    )
    from .summaries import cell_medians_over_faces
    from .tables import (
        centre_covered_fractions,
        covered_fractions,
        partial_coverage,
        prepare_mesh_job,
        refuse_implausible_terrain,
        refuse_without_terrain,
        table_units,
        warn_missing_flat_elevation,
        warn_partial_coverage,
    )

    started = time.perf_counter()
    check_choice("coverage", coverage, COVERAGE_MODES)
    check_choice("elevation rule", elevation_rule, ELEVATION_RULES)
    check_choice("face rule", face_rule, FACE_RULES)
    check_choice("composite method", composite, COMPOSITES)
    check_choice("overlap rule", overlap_rule, OVERLAP_RULES)
    sc, tc, domain = _families(source, target, closure, source_closure)
    check_where(workers, scheduler, threads)
    if isinstance(water_surface, str | os.PathLike):
        water_surface = [water_surface]
    given = sum(v is not None and v != [] for v in (depths, stages, water_surface))
    if given != 1:
        raise InputError("give exactly one calibration window: depths, stages or water-surface "
                         "rasters")
    spec = None if water_surface else StageSpec.from_options(stages=stages, depths=depths)
    # the classes against the n table and every n, before the mesh is read
    check_roughness_inputs(n=n, classes=classes, class_field=class_field, n_table=n_table,
                           n_field=n_field, class_raster=class_raster, default_class=default_class,
                           classes_layer=classes_layer)
    # workers start (and warm up) in the background while the mesh is read and built
    with (
        connect_workers(workers, scheduler) or contextlib.nullcontext() as connection,
        OutputFolder(out, overwrite=overwrite, inputs=[dem, cells, classes, n_table, class_raster,
                                                       *(water_surface or [])]) as folder,
        contextlib.ExitStack() as spills,  # closed (files removed) before the folder is kept
        rasters_kept_open(),  # tiles share DEM blocks: decode each once
    ):
        setup = prepare_mesh_job(
            dem, cells, id_field=id_field, cells_layer=cells_layer,
            vertical_units=vertical_units, elevation_rule=elevation_rule,
            elevation_field=elevation_field, face_spacing=face_spacing, snap_tolerance=snap_tolerance, tile_size=tile_size,
            connection=connection, threads=threads,
        )
        dem_info, layer, geoms, ids = setup.dem, setup.layer, setup.geoms, setup.ids
        field_values, mesh, tiles = setup.field_values, setup.mesh, setup.tiles
        # the mesh outline is only needed to check class polygons against it
        mesh_area = shapely.union_all(geoms) if classes is not None else None
        model = load_roughness(n=n, classes=classes, classes_layer=classes_layer,
                               class_field=class_field, n_table=n_table,
                               n_field=n_field, class_raster=class_raster,
                               default_class=default_class, overlap_rule=overlap_rule,  # type: ignore[arg-type]
                               crs=dem_info.crs, mesh_area=mesh_area)
        # holes of a class raster under the mesh, in seconds where they are clear (the
        # exact count follows the statistics pass)
        check_class_raster_holes(class_raster, geoms, dem_info, default_class=default_class)
        surfaces = read_water_surfaces(water_surface, dem=dem_info) if water_surface else []
        if surfaces:
            check_water_surfaces_reach(surfaces, dem_info, tuple(shapely.total_bounds(geoms)))
        window = _Window(spec, surfaces, dem_info)
        plan = _Plan(source, target, sc, tc, domain, composite, elevation_rule, face_rule, coverage,
                     setup.spacing, float(dem_info.z_to_xy), float(dem_info.manning_k))
        k = plan.k
        n_cells, n_faces, n_cls, n_win = geoms.size, mesh.n_faces, model.n_classes, window.n
        log.info("adjust: %s/%s -> %s/%s on %s, %d cells, %d faces, %d classes, %d window stages, "
                 "%d tiles", source, sc, target, tc, domain, n_cells, n_faces, n_cls, n_win, len(tiles))

        def tasks():
            return make_tasks(tiles, geoms, field_values=field_values,
                              face_lines=setup.face_geometry.wkb, face_cell_a=mesh.cell_a,
                              face_cell_b=mesh.cell_b, face_length=mesh.length,
                              as_wkb=connection is not None, face_lines_wkb=True)

        job = _Job(dem_info, plan, model, window)
        run = {"connection": connection, "progress": progress, "total": len(tiles),
               "threads": threads}

        # values for quantiles go to spill files in the output's temporary folder, so
        # memory does not grow with items x window stages (ntrans.quantiles)
        tmp = folder.path
        spread = spills.enter_context(SpilledQuantiles(tmp / "_spread.spill", n_cls))

        # ---- pass 1: the class fit's terms from the fit domain, tile by tile
        parts: list[FitTerms] = []
        uncovered = covered = 0.0
        wetting = _WindowWetting()
        cell_covered = np.zeros(n_cells)
        cell_assigned = np.zeros(n_cells)
        cell_flat = np.full(n_cells, np.nan)
        _warn_if_short_of_memory(n_cells, n_faces, n_win,
                                 1 if connection is not None else
                                 (default_threads() if threads is None else int(threads)),
                                 int(tile_size))
        for res in _run_tiles(_pass_statistics, job, tasks(), desc="fit statistics", **run):
            layer.raise_if_checks_failed()
            uncovered += res["uncovered"]
            covered += res["covered"]
            wetting.add(res["wetting"])
            cell_covered[res["cells"]] = res["cell_covered"]
            cell_assigned[res["cells"]] = res["cell_assigned"]
            cell_flat[res["cells"]] = res["cell_flat"]
            terms = res["terms"]
            spread.add(terms.spread_class, terms.spread_ratio, terms.spread_weight,
                       terms.spread_stage)
            parts.append(terms.without_spread())
            del res, terms
        layer.finish_checks()
        refuse_without_terrain(cell_covered, dem_info)
        refuse_implausible_terrain(wetting.terrain_low, None, dem_info)
        z_unit = table_units(dem_info)["stage"]
        _check_window_wets(wetting, spec=spec, domain=domain, z_unit=z_unit, surfaces=surfaces)
        _warn_if_window_deep(wetting, spec=spec, z_unit=z_unit,
                             z_metres=float(dem_info.z_metres_per_unit))
        share = uncovered / covered if covered > 0 else 0.0
        if model.source == "raster" and model.default < 0 and share > AREA_TOLERANCE:
            raise class_raster_holes_error(share)
        release_free_memory()  # the tiles' temporaries, before the fit
        if not parts:  # no tile: nothing to fit
            none = np.empty(0, dtype=np.int64)
            dry = np.empty((0, n_win))
            parts.append(fit_terms(dry, ClassStats(none, none, 0, n_cls, np.empty(0), dry, dry,
                                                   dry, dry), model.n,
                                   closure=_domain_closure(tc), composite=composite,  # type: ignore[arg-type]
                                   k=plan.conveyance_k))
        log.debug("fit statistics gathered; solving the class fit")
        terms = combine_fit_terms(parts)  # empties parts
        _warn_if_fit_short_of_memory(terms.mixed_stage.size, domain)
        fit = solve_class_n(terms, model.n, spread=spread)
        del terms
        spread.close()
        log.debug("class fit: n %s (cost %.6g)", np.round(fit.n_target, 6).tolist(), fit.cost)
        out_rng = outside_range(model, fit.n_target)
        flags = [list(f) + (["outside_published_range"] if out_rng[c] else []) for c, f in enumerate(fit.flags)]
        n_fit = fit.n_target
        if not fit.success:
            log.warning("the class fit did not converge (cost %.3g); check the flags", fit.cost)

        # ---- pass 2: per item tables
        units = table_units(dem_info)
        z_unit = units["stage"]
        units.update({"conveyance_target_unadjusted": units["conveyance_source"],
                      "dominant_class": "", "n_ratio_lumped": "1", "n_ratio_conveyance_form": "1",
                      "n_ratio_lumped_equal_volume": "1", "n_ratio_conveyance_form_equal_volume": "1",
                      "n_ratio_median": "1", "stage_bias_unadjusted_median": z_unit,
                      "n_ratio_cell_median": "1",
                      "bed_factor": "1"})
        # a cell's conveyance k V R^(2/3) / n is a discharge times a length
        cell_units = {**units, **dict.fromkeys(CELL_CONVEYANCE_COLUMNS,
                                               f"{unit_symbol(dem_info.horizontal_unit)}4/s")}
        descriptions = _descriptions()
        cell_descriptions = {**descriptions, **_cell_conveyance_descriptions()}
        if domain == "faces":
            # the stage errors are solved on the fit domain only: say why these are empty
            for column in ("stage_bias_unadjusted", "stage_bias_adjusted"):
                cell_descriptions[column] += (
                    "; solved only when the class fit runs on cells (closure 'cell'), so "
                    "empty here: the stage errors of this run are per face, in "
                    "face_adjustment.parquet")
        id_type = id_arrow_type(ids)
        f64 = pa.float64()
        face_schema = pa.schema(
            [pa.field("face_id", pa.int64()), pa.field("cell_a", id_type), pa.field("cell_b", id_type)]
            + [pa.field(c, f64) for c in FACE_COLUMNS[3:-1]] + [pa.field("dominant_class", pa.string())])
        cell_schema = pa.schema([pa.field("cell_id", id_type)]
                                + [pa.field(c, f64) for c in CELL_COLUMNS[1:-1]]
                                + [pa.field("dominant_class", pa.string())])
        meta = {"ntrans:version": __version__, "ntrans:source": f"{source}/{sc}",
                "ntrans:target": f"{target}/{tc}", "ntrans:composite": composite,
                "ntrans:manning_k": str(k)}
        cls_names = np.array(model.classes + ("",), dtype=object)
        cls_arrow = pa.array(list(model.classes) + [""], type=pa.string())

        def class_column(index: np.ndarray) -> pa.Array:
            """Class names (empty for -1) as an arrow string column, without Python lists."""
            return cls_arrow.take(pa.array(np.where(index < 0, n_cls, index).astype(np.int64)))

        # the fit domain's bias at every window stage goes to spill files for the per-class
        # figures (group: the item's dominant class, then one for items of no class); the
        # maps need one median per item
        bias_spills = {name: spills.enter_context(SpilledQuantiles(
            tmp / f"_bias_{name}.spill", n_cls + 1, scale="asinh", unit=BIAS_BIN_UNIT,
            weighted=False)) for name in ("unadjusted", "adjusted")}
        face_bias_med = np.full(n_faces, np.nan)
        cell_bias_med = np.full(n_cells, np.nan)
        face_ratio_med = np.full(n_faces, np.nan)
        face_dom = np.full(n_faces, -1, dtype=np.int64)
        cell_ratio_med = np.full(n_cells, np.nan)
        cell_bed = np.full(n_cells, np.nan)
        cell_dom = np.full(n_cells, -1, dtype=np.int64)
        mismatch_faces = mismatch_cells = 0

        files: list[Path] = []
        face_path, cell_path = tmp / "face_adjustment.parquet", tmp / "cell_adjustment.parquet"
        fw = TableWriter(face_path, schema=face_schema, units=units, descriptions=descriptions,
                         metadata=meta)
        cw = TableWriter(cell_path, schema=cell_schema, units=cell_units,
                         descriptions=cell_descriptions, metadata=meta)
        try:
            for res in _run_tiles(_pass_tables, job, tasks(), n_fit, desc="tables", **run):
                fc, cc = res["faces"], res["cells"]
                fr, cr = res["face"], res["cell"]
                face_bias_med[fc] = _nanmedian_rows(fr["stage_bias_unadjusted"])
                face_dom[fc] = res["face_dominant"]
                face_ratio_med[fc] = _nanmedian_rows(fr["n_ratio"])
                mismatch_faces += res["face_mismatch"]
                chunk: dict[str, Any] = {
                    "face_id": np.repeat(fc, n_win).astype(np.int64),
                    "cell_a": ids_at(ids, np.repeat(res["face_a"], n_win)),
                    "cell_b": ids_at(ids, np.repeat(res["face_b"], n_win)),
                }
                chunk.update({c: np.asarray(fr[c], dtype=float).ravel() for c in FACE_COLUMNS[3:-1]})
                chunk["dominant_class"] = class_column(np.repeat(res["face_dominant"], n_win))
                fw.write(chunk)

                cell_bias_med[cc] = _nanmedian_rows(cr["stage_bias_unadjusted"])
                own_rows, own_dom = ((fr, res["face_dominant"]) if domain == "faces"
                                     else (cr, res["cell_dominant"]))
                group = np.where(own_dom < 0, n_cls, own_dom)[:, None]
                for name, spill in bias_spills.items():
                    spill.add(group, own_rows[f"stage_bias_{name}"])
                cell_dom[cc] = res["cell_dominant"]
                cell_ratio_med[cc] = _nanmedian_rows(cr["n_ratio"])
                cell_bed[cc] = res["bed_factor"]
                mismatch_cells += res["cell_mismatch"]
                chunk = {"cell_id": ids_at(ids, np.repeat(cc, n_win))}
                chunk.update({c: np.asarray(cr[c], dtype=float).ravel() for c in CELL_COLUMNS[1:-1]})
                chunk["dominant_class"] = class_column(np.repeat(res["cell_dominant"], n_win))
                cw.write(chunk)
            if connection is not None:
                connection.release()  # workers shut down while the last files are written
            release_free_memory()  # the tiles' temporaries, before the summaries
            files += [fw.close(), cw.close()]
        except BaseException:
            fw.abort()
            cw.abort()
            raise

        # ---- per class table
        log.debug("tables written; stage bias figures per class")
        bias = {name: bias_summary_spilled(spill, model.classes)
                for name, spill in bias_spills.items()}
        spills.close()
        log.debug("writing the cell and face layers")
        frame = _class_frame(model, fit, flags, bias)
        class_path = tmp / "n_by_class.csv"
        frame.to_csv(class_path, index=False, float_format="%.6g")
        files.append(class_path)

        # ---- maps
        import geopandas as gpd
        import pandas as pd

        crs = layer.frame.crs
        if coverage == "centre":
            covered_fraction = centre_covered_fractions(
                cell_covered, cell_assigned, area_share_inside(geoms, tuple(dem_info.bounds)))
        else:
            covered_fraction = covered_fractions(cell_covered, shapely.area(geoms))
        # the per-cell figures of the fit domain, as the maps show them: with the faces
        # fitted, the median over the window and over every face of the cell
        if domain == "faces":
            over = cell_medians_over_faces(
                face_path, cell_ids=ids, values=["n_ratio", "stage_bias_unadjusted"],
                work_dir=tmp)
            fit_ratio_med = over["n_ratio"].to_numpy(dtype=float)
            fit_bias_med = over["stage_bias_unadjusted"].to_numpy(dtype=float)
        else:
            fit_ratio_med, fit_bias_med = cell_ratio_med, cell_bias_med
        cell_frame = gpd.GeoDataFrame(
            {"cell_id": ids, "covered_fraction": covered_fraction,
             "n_ratio_median": fit_ratio_med,
             "stage_bias_unadjusted_median": fit_bias_med,
             "n_ratio_cell_median": cell_ratio_med, "bed_factor": cell_bed,
             "dominant_class": cls_names[cell_dom].astype(str)},
            geometry=gpd.GeoSeries(geoms, crs=crs), crs=crs)
        files.append(write_geopackage(cell_frame, tmp / "cells.gpkg", "cells",
                                      descriptions=cell_layer_descriptions(domain)))
        face_frame = pd.DataFrame(
            {"face_id": np.arange(n_faces, dtype=np.int64),
             "cell_a": ids_series(ids, mesh.cell_a),
             "cell_b": ids_series(ids, mesh.cell_b),
             "length": mesh.length, "n_ratio_median": face_ratio_med,
             "stage_bias_unadjusted_median": face_bias_med,
             "dominant_class": cls_names[face_dom].astype(str)})
        files.append(write_geopackage(face_frame, tmp / "faces.gpkg", "faces",
                                      encoded=setup.face_geometry, crs=crs,
                                      descriptions=FACE_LAYER_DESCRIPTIONS))
        if csv:
            files.append(write_csv(face_path, tmp / "face_adjustment.csv"))
            files.append(write_csv(cell_path, tmp / "cell_adjustment.csv"))

        seconds = time.perf_counter() - started
        summary = {
            "ntrans_version": __version__,
            "dem": os.fspath(dem),
            "cells": os.fspath(cells),
            "source": {"family": source, "closure": sc},
            "target": {"family": target, "closure": tc},
            "fit_domain": domain,
            "composite": composite,
            "manning_k": k,
            "roughness": {"input": model.source, "classes": list(model.classes),
                          "default_class": (model.classes[model.default] if model.default >= 0
                                            else None),
                          "overlap_rule": overlap_rule},
            "window": ({"mode": spec.mode, "values": spec.values.tolist()} if spec is not None
                       else {"mode": "water_surface", "rasters": [s.name for s in surfaces]}),
            "elevation_rule": elevation_rule,
            "face_rule": face_rule,
            "coverage": coverage,
            "cells_count": int(n_cells),
            "faces_count": int(n_faces),
            "tiles": len(tiles),
            "horizontal_unit": dem_info.horizontal_unit,
            "vertical_unit": dem_info.vertical_unit,
            "horizontal_unit_name": unit_name(dem_info.horizontal_unit, dem_info.xy_metres_per_unit),
            "vertical_unit_name": unit_name(dem_info.vertical_unit, dem_info.z_metres_per_unit),
            "classes": json.loads(frame.to_json(orient="records")),
            "stage_bias": {"unadjusted": bias["unadjusted"]["overall"],
                           "adjusted": bias["adjusted"]["overall"]},
            **partial_coverage(ids, covered_fraction).summary(),
            "flagged": {"face_stage_dry_wet_mismatch": mismatch_faces,
                        "cell_stage_dry_wet_mismatch": mismatch_cells,
                        "classes_flagged": int(sum(1 for f in flags if f))},
            "fit": {"success": fit.success, "cost": fit.cost},
            "weighting": "source conveyance share per window stage, split among the wet "
                         "classes by their part of the conveyance (weight_share); spread = "
                         "weighted quantiles with weight x class share of the item's extent",
            "cautions": list(CAUTIONS),
            "seconds": round(seconds, 3),
            "units": {c: units.get(c, "") for c in (*FACE_COLUMNS, *CELL_COLUMNS)},
            "cell_units": {c: cell_units.get(c, "") for c in CELL_COLUMNS},
            "class_units": class_table_units(z_unit),
            "class_descriptions": class_table_descriptions(domain),
            "cell_layer": cell_layer_descriptions(domain),
            "face_layer": dict(FACE_LAYER_DESCRIPTIONS),
        }
        (tmp / "adjust_summary.json").write_text(json.dumps(summary, indent=2, default=_json_default))
        files.append(tmp / "adjust_summary.json")
        rel = [p.name for p in files]

    final = Path(os.fspath(out)).expanduser().absolute()
    warn_partial_coverage(ids, covered_fraction, stacklevel=2)
    warn_missing_flat_elevation(ids, cell_flat, elevation_rule, elevation_field, stacklevel=2)
    mism = mismatch_faces if domain == "faces" else mismatch_cells
    if mism:
        warn(
            f"{mism} {domain[:-1]}-stages are wet in one family and dry in the other; they were "
            "left out of the fit (see the flags in n_by_class.csv)",
            DryWetMismatchWarning, stacklevel=2)
    text = _text_summary(summary, frame, final, z_unit)
    log.info("adjustment written to %s in %.1f s", final, seconds)
    return AdjustResult(out=final, files=[final / r for r in rel], classes=frame, summary=summary,
                        text=text, seconds=seconds, units=units)  # face units (cells: summary)


#: Peak memory of a job: a base, the mesh (per cell and per face: polygons, lines as WKB,
#: ids and per item figures) and one tile's working set per tile thread, which grows
#: with the window stages and the tile's area.  Nothing grows with items x window stages:
#: the fit gathers sums tile by tile and the quantiles come from spill files.  Fitted to
#: the benchmark's runs with 30 window stages and two tile threads: 0.88 GB for 50,176
#: cells and 150,342 faces, 1.4 GB for 499,849 cells and 1.5 million faces.
ADJUST_BASE_BYTES = 400e6
ADJUST_BYTES_PER_CELL = 1000.0
ADJUST_BYTES_PER_FACE = 250.0
#: one 512 px tile's working set per window stage
ADJUST_TILE_BYTES_PER_STAGE = 6.5e6


def estimated_peak_bytes(n_cells: int, n_faces: int, n_window: int, *, threads: int = 1,
                         tile_size: int = 512) -> float:
    """Rough peak memory (bytes) of ``adjust_roughness`` for a mesh of ``n_cells`` cells
    and ``n_faces`` faces, ``n_window`` window stages and ``threads`` tile threads of
    ``tile_size`` pixels."""
    tile = ADJUST_TILE_BYTES_PER_STAGE * float(n_window) * (float(tile_size) / 512.0) ** 2
    return (ADJUST_BASE_BYTES + ADJUST_BYTES_PER_CELL * float(n_cells)
            + ADJUST_BYTES_PER_FACE * float(n_faces) + max(int(threads), 1) * tile)


def _warn_if_short_of_memory(n_cells: int, n_faces: int, n_window: int, threads: int,
                             tile_size: int) -> None:
    """Warn before the long passes when the job will likely not fit in available memory."""
    need = estimated_peak_bytes(n_cells, n_faces, n_window, threads=threads, tile_size=tile_size)
    have = available_memory()
    if have is not None and need > 0.9 * have:
        what = (f"this adjustment will need about {need / 1e9:.1f} GB of memory at its peak "
                f"({n_cells} cells, {n_faces} faces, {n_window} window stages, {threads} tile "
                f"thread(s) of {tile_size} px) and {have / 1e9:.1f} GB is available")
        if need > 2.0 * have:  # it could not finish: refuse before the long passes
            raise InputError(f"{what}; give fewer window stages, run one tile at a time "
                             "(--threads 1) with a smaller --tile-size, or use a machine with "
                             "more memory")
        warn(f"{what}; run one tile at a time (--threads 1) with a smaller --tile-size, or on "
             "a machine with more memory", MemoryEstimateWarning, stacklevel=3)


#: the class fit's memory per item-stage wet in several classes (kept one by one; most of
#: it the least-squares solver's arrays): about 280 bytes at 10^8 pixels with a sparse
#: matrix Jacobian, less with the operator (a synthetic fit: 358 -> 275 at its peak); kept
#: as the bound
FIT_BYTES_PER_MIXED_ENTRY = 300.0


def _warn_if_fit_short_of_memory(n_mixed: int, domain: str) -> None:
    """Warn before the class fit when its item-stages of several classes will likely not
    fit in the memory still available."""
    need = FIT_BYTES_PER_MIXED_ENTRY * float(n_mixed)
    have = available_memory()
    if have is not None and need > 0.9 * have:
        warn(
            f"the class fit will need about {need / 1e9:.1f} GB more memory for {n_mixed} "
            f"{domain[:-1]}-stages wet in several classes and {have / 1e9:.1f} GB is "
            "available; give fewer window stages (--depths / --stages), merge small classes, "
            "or run it on a machine with more memory",
            MemoryEstimateWarning, stacklevel=3)


def _nanmedian_rows(values: np.ndarray) -> np.ndarray:
    """Median of each row over finite values; NaN for rows without any (no warning)."""
    values = np.asarray(values, dtype=float)
    if values.shape[0] == 0 or values.shape[1] == 0:
        return np.full(values.shape[0], np.nan)
    # rows without any value get a dummy row, not a warning (warning filters are not
    # thread-safe, and tiles may run in threads)
    empty = np.isnan(values).all(axis=1)
    out = np.nanmedian(np.where(empty[:, None], 0.0, values), axis=1)
    out[empty] = np.nan
    return out


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value)}")


def _descriptions() -> dict[str, str]:
    from .outputs import column_descriptions

    d = column_descriptions()
    d.update({
        "conveyance_source": "source conveyance at the source n (k A R^(2/3) / n or the closure's "
                             "form; A, R in the horizontal unit, k = 1.0 metre, 1.486 foot)",
        "conveyance_target": "target conveyance with the fitted n",
        "conveyance_target_unadjusted": "target conveyance with the source n carried over",
        "dominant_class": "roughness class with the largest length (faces) or area (cells)",
        "n_ratio_lumped": "flat cell vs subgrid lumped radius V/A_bed, equal stage",
        "n_ratio_conveyance_form": "flat cell vs subgrid conveyance form, equal stage",
        "n_ratio_lumped_equal_volume": "(wet_area / bed_area)^(2/3) (equal volume shortcut)",
        "n_ratio_conveyance_form_equal_volume": "<h^(5/3)> / <h>^(5/3) (equal volume shortcut)",
        "stage_bias_unadjusted": "target stage minus source stage for the source conveyance, "
                                 "n carried over unchanged",
        "stage_bias_adjusted": "target stage minus source stage for the source conveyance, "
                               "fitted n",
    })
    return d


#: what each column of the adjustment's ``faces.gpkg`` holds
FACE_LAYER_DESCRIPTIONS: dict[str, str] = {
    "face_id": "face number, as in face_adjustment.parquet",
    "cell_a": "cell id on one side of the face",
    "cell_b": "cell id on the other side (empty on the mesh boundary)",
    "length": "face length in plan (horizontal unit)",
    "n_ratio_median": "median over the window of the face's n ratio (n target / n source at "
                      "equal conveyance, face_adjustment.parquet's n_ratio)",
    "stage_bias_unadjusted_median": "median over the window of the face's stage bias with n "
                                    "carried over unchanged (vertical unit)",
    "dominant_class": "roughness class with the largest length along the face",
}


def cell_layer_descriptions(domain: str) -> dict[str, str]:
    """What each column of the adjustment's ``cells.gpkg`` holds when the class fit ran on
    ``domain`` ("faces" or "cells"): ``n_ratio_median`` and
    ``stage_bias_unadjusted_median`` are the fit domain's figures, those of the maps."""
    if domain == "faces":
        over = "median over the window and over every face of the cell of the face's"
        table = "face_adjustment.parquet"
    else:
        over = "median over the window of the cell's own"
        table = "cell_adjustment.parquet"
    return {
        "cell_id": "cell id, as in the cells input",
        "covered_fraction": "share of the cell over valid DEM pixels",
        "n_ratio_median": f"{over} n ratio (n target / n source at equal conveyance, {table}'s "
                          "n_ratio), as on maps/n_ratio.tif",
        "stage_bias_unadjusted_median": f"{over} stage bias with n carried over unchanged "
                                        "(target minus source stage, vertical unit), as on "
                                        "maps/stage_bias.tif",
        "n_ratio_cell_median": "median over the window of the cell's own n ratio at equal cell "
                               "conveyance (k V R^(2/3) / n, cell_adjustment.parquet's n_ratio)"
                               + (", equal to n_ratio_median with the cells fitted"
                                  if domain == "cells" else
                                  "; the faces were fitted, so it can differ from "
                                  "n_ratio_median, even in direction"),
        "bed_factor": "wetted bed area / wet plan area, median over the window",
        "dominant_class": "roughness class with the largest area in the cell",
    }


def class_table_units(z_unit: str) -> dict[str, str]:
    """Unit of each column of ``n_by_class.csv`` (``z_unit``: the DEM's vertical unit symbol,
    of the stage errors); Manning's n is in s/m^(1/3) whatever the DEM's units."""
    from .outputs import N_UNIT

    bias = {f"bias_{kind}_{stat}": z_unit for kind in ("unadjusted", "adjusted")
            for stat in ("median", "p90_abs", "max_abs")}
    return {"class": "", "n_source": N_UNIT, "n_target": N_UNIT, "ratio": "1",
            "ratio_p10": "1", "ratio_p50": "1", "ratio_p90": "1", "faces": "count",
            "weight_share": "1", "flags": "", "surface": "", **bias}


def class_table_descriptions(domain: str) -> dict[str, str]:
    """What each column of ``n_by_class.csv`` holds when the class fit ran on ``domain``
    ("faces" or "cells")."""
    item = domain[:-1]
    out = {
        "class": "roughness class",
        "n_source": "Manning's n of the source model (the n table)",
        "n_target": "fitted Manning's n for the target model (n_source where not_fitted)",
        "ratio": "n_target / n_source",
        "ratio_p10": f"10th percentile of the per-{item} n ratios with n carried over "
                     "(weighted; empty where not_fitted)",
        "ratio_p50": f"weighted median of the per-{item} n ratios with n carried over",
        "ratio_p90": f"90th percentile of the per-{item} n ratios with n carried over",
        "faces": f"number of {domain} holding the class, wet in the window or not",
        "weight_share": "the class's share of the fit's weight: each wet "
                        f"{item}-stage's weight (its share of the source conveyance at "
                        "that stage) split among the classes wet in it by their part of its "
                        "conveyance; 0 where not_fitted",
        "flags": "warnings about the fit, separated by ';'",
        "surface": "surface kind of the class in the n table, if given",
    }
    for kind, what in (("unadjusted", "with n carried over unchanged"),
                       ("adjusted", "with the fitted n")):
        stage_error = (f"stage error (target minus source stage, vertical unit) {what}, over "
                       f"the {item}-stages of the {domain} whose largest class is this one")
        out[f"bias_{kind}_median"] = f"median {stage_error}"
        out[f"bias_{kind}_p90_abs"] = f"90th percentile of the absolute {stage_error}"
        out[f"bias_{kind}_max_abs"] = f"largest absolute {stage_error}"
    return out


#: conveyance columns of cell_adjustment.parquet (L^4/s: k V R^(2/3) / n)
CELL_CONVEYANCE_COLUMNS: tuple[str, ...] = (
    "conveyance_source", "conveyance_target", "conveyance_target_unadjusted")


def _cell_conveyance_descriptions() -> dict[str, str]:
    what = ("k V R^(2/3) / n (volume times the Manning velocity at unit slope, a discharge "
            "times a length; V and R in the horizontal unit)")
    return {
        "conveyance_source": f"source cell conveyance at the source n: {what}",
        "conveyance_target": "target cell conveyance with the fitted n (same form)",
        "conveyance_target_unadjusted": "target cell conveyance with the source n carried over "
                                        "(same form)",
    }


def _class_frame(model: RoughnessModel, fit: Any, flags: list[list[str]], bias: dict) -> Any:
    import pandas as pd

    rows = []
    for c, name in enumerate(model.classes):
        bu, ba = bias["unadjusted"][name], bias["adjusted"][name]
        rows.append({
            "class": name, "n_source": float(model.n[c]), "n_target": float(fit.n_target[c]),
            "ratio": float(fit.ratio[c]), "ratio_p10": float(fit.ratio_p10[c]),
            "ratio_p50": float(fit.ratio_p50[c]), "ratio_p90": float(fit.ratio_p90[c]),
            "faces": int(fit.items[c]), "weight_share": float(fit.weight_share[c]),
            "flags": ";".join(flags[c]), "surface": model.surface[c] or "",
            "bias_unadjusted_median": bu["median"], "bias_unadjusted_p90_abs": bu["p90_abs"],
            "bias_unadjusted_max_abs": bu["max_abs"], "bias_adjusted_median": ba["median"],
            "bias_adjusted_p90_abs": ba["p90_abs"], "bias_adjusted_max_abs": ba["max_abs"],
        })
    return pd.DataFrame(rows, columns=list(CLASS_COLUMNS))


def _text_summary(summary: dict[str, Any], frame: Any, out: Path, z_unit: str) -> str:
    s, t = summary["source"], summary["target"]
    lines = [
        f"ntrans adjust: {s['family']} ({s['closure']}) -> {t['family']} ({t['closure']}), "
        f"composite {summary['composite']}, fitted on {summary['fit_domain']}",
        f"window: {summary['window']['mode']} "
        + (", ".join(f"{v:g}" for v in summary["window"].get("values", []))
           or ", ".join(summary["window"].get("rasters", []))),
        f"{summary['cells_count']} cells, {summary['faces_count']} faces",
        "",
        f"{'class':<20} {'n_source':>8} {'n_target':>8} {'ratio':>6} {'p10-p90':>11} "
        f"{'items':>6}  flags",
    ]
    for row in frame.itertuples(index=False):
        spread = f"{row.ratio_p10:.3g}-{row.ratio_p90:.3g}" if np.isfinite(row.ratio_p10) else "-"
        lines.append(f"{str(row[0])[:20]:<20} {row.n_source:>8.4f} {row.n_target:>8.4f} "
                     f"{row.ratio:>6.3f} {spread:>11} {row.faces:>6}  {row.flags}")
    explained = flag_lines(frame["flags"]) if "flags" in frame.columns else []
    if explained:
        lines += ["", *explained]
    bu, ba = summary["stage_bias"]["unadjusted"], summary["stage_bias"]["adjusted"]
    lines += [
        "",
        f"stage bias with n carried over: median {bu['median']:.3g} {z_unit}, "
        f"p90 |bias| {bu['p90_abs']:.3g} {z_unit}, max |bias| {bu['max_abs']:.3g} {z_unit}",
        f"stage bias with the fitted n:   median {ba['median']:.3g} {z_unit}, "
        f"p90 |bias| {ba['p90_abs']:.3g} {z_unit}, max |bias| {ba['max_abs']:.3g} {z_unit}",
        f"output: {out}",
        "",
        *[f"Caution: {c}" for c in summary["cautions"]],
    ]
    return "\n".join(lines)
