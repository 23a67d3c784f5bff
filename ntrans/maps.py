"""Maps: per-cell values painted onto the DEM grid (GeoTIFF), a face layer, PNG quick-looks.

Every raster shares the DEM's grid exactly (transform, shape, CRS).  A pixel takes the
value of the cell whose polygon contains the pixel centre (``rasterio.features.rasterize``
of the cell index, then one array lookup), so painting costs one rasterisation however
many maps are written.  The rasters are painted and written window by window
(:data:`MAP_WINDOW`), each window rasterising only the cells over it, and the
quick-looks drawn from a grid of at most :data:`QUICKLOOK_MAX` pixels a side, so memory
stays bounded whatever the DEM's size.  Rasters are float32, DEFLATE-compressed, tiled 256 x 256, with
nodata :data:`NODATA`, and carry no time stamps: the same values give the same bytes.

The quick-looks draw the values over a hillshade of the DEM (Horn 1981 gradient), with a
colour bar in the map's units, a scale bar and a north arrow, in colour-blind-safe
palettes: ``cividis`` for magnitudes, ``PuOr`` centred on zero for signed biases.

Per-cell summaries (pure, on pandas DataFrames):

- :func:`cell_friction_factor`: bed area / wet area of each cell at a reference depth
  (1 on a flat bed; the mean surface factor once the cell is wholly wet);
- :func:`cell_median_of_faces`: the median over the window of a face quantity across
  the faces of each cell (n ratio, stage bias with n carried over unchanged).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd
from affine import Affine

logger = logging.getLogger(__name__)

NODATA = -9999.0
BLOCK = 256
#: maps are painted and written in windows of this many pixels a side (a multiple of
#: BLOCK), so memory does not grow with the DEM
MAP_WINDOW = 2048
#: cells rasterised at a time (rasterio makes a GeoJSON-like mapping of each first: 500,000
#: cells at once took about 400 MB)
RASTERIZE_BATCH = 16_384
#: GDAL block cache while the maps are written (written blocks wait there to be flushed)
MAP_CACHE_BYTES = 64 * 2**20
#: longer side of a quick-look's grid, in pixels: a larger DEM is drawn from every k-th
#: pixel (decimated as it is read, nearest), the cells painted on that coarser grid
QUICKLOOK_MAX = 1600
PNG_DPI = 110
PNG_METADATA: dict[str, Any] = {"Software": None}
"""Fixed PNG metadata: no software version and no time stamp, so reruns are identical."""


# ------------------------------------------------------------------ per-cell summaries


def cell_friction_factor(
    cell_stage: pd.DataFrame,
    *,
    reference_index: int,
    id_column: str = "cell_id",
) -> pd.Series:
    """Terrain friction factor per cell: wetted bed area / wet plan area at one stage.

    Parameters
    ----------
    cell_stage
        Rows per cell and stage with columns ``id_column, stage, wet_area, bed_area``
        (areas in horizontal units squared).
    reference_index
        Position of the reference stage in each cell's sorted stages (0-based; negative
        counts from the top, as in Python).  With a depth window the k-th stage of every
        cell is its low point plus the k-th depth.

    Returns
    -------
    pandas.Series
        Dimensionless factor >= 1 indexed by cell id; NaN where the cell is dry there.
    """
    frame = cell_stage[[id_column, "stage", "wet_area", "bed_area"]].sort_values(
        [id_column, "stage"], kind="mergesort"
    )
    rank = frame.groupby(id_column, sort=False).cumcount().to_numpy()
    count = frame.groupby(id_column, sort=False)[id_column].transform("size").to_numpy()
    want = np.where(reference_index < 0, count + reference_index, reference_index)
    picked = frame[rank == want]
    wet = picked["wet_area"].to_numpy(dtype=float)
    bed = picked["bed_area"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        factor = np.where(wet > 0, bed / wet, np.nan)
    ids = frame[id_column].drop_duplicates().to_numpy()
    return pd.Series(factor, index=picked[id_column].to_numpy(), name="friction_factor").reindex(ids)


def cell_median_of_faces(
    face_values: pd.DataFrame,
    faces: pd.DataFrame,
    *,
    value: str,
    face_id: str = "face_id",
) -> pd.Series:
    """Median of a face quantity over the window, across every face of each cell.

    Parameters
    ----------
    face_values
        Rows per face and stage with columns ``face_id`` and ``value`` (NaN ignored).
    faces
        One row per face with ``face_id, cell_a, cell_b`` (``cell_b`` NaN / empty on the
        boundary); a face counts for both of its cells.

    Returns
    -------
    pandas.Series
        Median per cell id (NaN for cells none of whose faces has a value).
    """
    link = faces[[face_id, "cell_a", "cell_b"]]
    long = pd.concat(
        [
            link[[face_id, "cell_a"]].rename(columns={"cell_a": "cell"}),
            link[[face_id, "cell_b"]].rename(columns={"cell_b": "cell"}),
        ],
        ignore_index=True,
    )
    long = long[long["cell"].notna()]
    vals = face_values[[face_id, value]]
    vals = vals[np.isfinite(vals[value].to_numpy(dtype=float))]
    merged = long.merge(vals, on=face_id, how="inner")
    return merged.groupby("cell", sort=True)[value].median().rename(value)


def face_median(face_values: pd.DataFrame, *, value: str, face_id: str = "face_id") -> pd.Series:
    """Median of a face quantity over the window, per face (NaN ignored)."""
    vals = face_values[[face_id, value]]
    return vals.groupby(face_id, sort=True)[value].median()


# ------------------------------------------------------------------- painting on a grid


def cell_index_grid(geometries: Sequence[Any] | np.ndarray, *, transform: Any, shape: tuple[int, int]) -> np.ndarray:
    """Index (0..n-1) of the cell whose polygon holds each pixel centre; -1 elsewhere.

    The cells are burnt :data:`RASTERIZE_BATCH` at a time, in order, into one grid (the
    same pixels as one call: a later cell wins a pixel either way), since rasterio holds
    every polygon of a call as a GeoJSON-like mapping.  The mappings are built from one
    coordinate array per batch (:func:`polygon_mappings`), not polygon by polygon.
    """
    from rasterio import features

    from .memory import collection_paused

    geoms = np.asarray(list(geometries), dtype=object)
    burnt = np.zeros(shape, dtype=np.int32)
    for start in range(0, geoms.size, RASTERIZE_BATCH):
        with collection_paused():  # many small lists, none of them cyclic
            mappings = polygon_mappings(geoms[start:start + RASTERIZE_BATCH])
            shapes = [(m, start + i + 1) for i, m in enumerate(mappings) if m is not None]
            if shapes:
                features.rasterize(shapes, out=burnt, transform=transform, all_touched=False)
            del shapes, mappings
    return burnt - 1


def polygon_mappings(geometries: np.ndarray) -> list[Any]:
    """GeoJSON-like mappings (``{"type", "coordinates"}``, x / y only) of polygons and
    multipolygons, None for missing or empty ones; other geometries are returned as they
    are.

    The coordinates of all of them are taken out in one array and cut into rings by their
    counts: about a quarter of the time of each geometry's ``__geo_interface__`` (the
    same coordinates, so the same pixels when burnt).
    """
    import shapely

    geoms = np.asarray(geometries, dtype=object)
    out: list[Any] = [None] * geoms.size
    if geoms.size == 0:
        return out
    kind = shapely.get_type_id(geoms)
    empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    areal = np.flatnonzero(~empty & ((kind == 3) | (kind == 6)))
    for i in np.flatnonzero(~empty & (kind != 3) & (kind != 6)).tolist():
        out[i] = geoms[i]
    if areal.size == 0:
        return out
    def spans(owner: np.ndarray, n: int) -> list[tuple[int, int]]:
        # (start, end) of each owner's run in an array sorted by owner
        ends = np.cumsum(np.bincount(owner, minlength=n)).tolist()
        return list(zip([0, *ends[:-1]], ends, strict=True))

    parts, part_of = shapely.get_parts(geoms[areal], return_index=True)
    rings, ring_of = shapely.get_rings(parts, return_index=True)
    coords, coord_of = shapely.get_coordinates(rings, return_index=True)
    points = coords.tolist()
    ring_list = [points[a:b] for a, b in spans(coord_of, rings.size)]
    part_rings = [ring_list[a:b] for a, b in spans(ring_of, parts.size)]
    multi = (kind[areal] == 6).tolist()
    for k, (i, (a, b)) in enumerate(zip(areal.tolist(), spans(part_of, areal.size), strict=True)):
        out[i] = ({"type": "MultiPolygon", "coordinates": part_rings[a:b]} if multi[k]
                  else {"type": "Polygon", "coordinates": part_rings[a]})
    return out


def paint(index_grid: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Per-cell ``values`` on the pixels of each cell (float32, NaN outside or unknown)."""
    vals = np.append(np.asarray(values, dtype=np.float32), np.float32(np.nan))
    return vals[np.where(index_grid >= 0, index_grid, vals.size - 1)]


def write_geotiff(
    path: str | os.PathLike[str],
    array: np.ndarray,
    *,
    transform: Any,
    crs: Any,
    description: str = "",
    units: str = "",
) -> Path:
    """Write one float32 band on the given grid: DEFLATE, tiled 256, nodata :data:`NODATA`.

    NaN becomes the nodata value.  No time stamp is written.
    """
    import rasterio

    data = np.asarray(array, dtype=np.float32)
    data = np.where(np.isfinite(data), data, np.float32(NODATA)).astype(np.float32)
    profile = _map_profile(data.shape[0], data.shape[1], transform, crs)
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    with rasterio.open(p, "w", **profile) as dst:
        dst.write(data, 1)
        if description:
            dst.set_band_description(1, description)
        if units:
            dst.set_band_unit(1, units)
    return p


def face_layer_descriptions(vertical_unit: str = "m") -> dict[str, str]:
    """What each column of the bundle's ``maps/faces.gpkg`` holds (its
    ``gpkg_data_columns``); stage errors are in ``vertical_unit``."""
    bias = ("median over the window of the face's stage error (target minus source stage "
            "at equal conveyance, face_adjustment.parquet's {column}) {how} ({unit})")
    return {
        "face_id": "face number, as in face_adjustment.parquet",
        "cell_a": "cell id on one side of the face",
        "cell_b": "cell id on the other side (empty on the mesh boundary)",
        "length": "face length in plan (horizontal unit)",
        "n_ratio_median": "median over the window of the face's n ratio (n target / n source "
                          "at equal conveyance, face_adjustment.parquet's n_ratio; "
                          "dimensionless)",
        "stage_bias_unadjusted_median": bias.format(column="stage_bias_unadjusted",
                                                    how="with n carried over unchanged",
                                                    unit=vertical_unit),
        "stage_bias_adjusted_median": bias.format(column="stage_bias_adjusted",
                                                  how="with the fitted n", unit=vertical_unit),
        "dominant_class": "roughness class with the largest length along the face",
    }


def write_face_layer(path: str | os.PathLike[str], faces: Any, values: pd.DataFrame, *,
                     face_id: str = "face_id",
                     descriptions: dict[str, str] | None = None) -> Path:
    """Write ``faces`` joined to ``values`` (indexed by face id; its columns become
    attributes), in face id order; ``descriptions`` (column -> text) go to its
    ``gpkg_data_columns``.

    ``faces``: a GeoDataFrame of lines with ``face_id``, or the same layer as an
    :class:`ntrans.outputs.EncodedLayer` (attributes and WKB: no geometry objects made).
    """
    from .outputs import EncodedGeometry, EncodedLayer, write_geopackage

    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    frame = faces.frame if isinstance(faces, EncodedLayer) else faces
    keep = [c for c in (face_id, "cell_a", "cell_b", "length") if c in frame.columns]
    if isinstance(faces, EncodedLayer):
        layer = frame[keep].merge(values, left_on=face_id, right_index=True, how="left")
    else:
        layer = frame[[*keep, "geometry"]].merge(values, left_on=face_id, right_index=True,
                                                 how="left")
    order = np.argsort(layer[face_id].to_numpy(), kind="mergesort")
    layer = layer.iloc[order].reset_index(drop=True)
    encoded, crs = None, None
    if isinstance(faces, EncodedLayer):
        encoded = EncodedGeometry(faces.geometry.geometry_type, faces.geometry.wkb[order])
        crs = faces.crs
    if p.exists():
        p.unlink()
    return write_geopackage(layer, p, "faces", encoded=encoded, crs=crs,
                            descriptions=descriptions)


# --------------------------------------------------------------------------- quick-looks


def hillshade(elevation: np.ndarray, *, dx: float, dy: float, azimuth: float = 315.0, altitude: float = 45.0) -> np.ndarray:
    """Hillshade in [0, 1] (NaN where elevation is NaN), light from ``azimuth`` degrees.

    Gradients from central differences; the sun's elevation is ``altitude`` degrees.
    """
    z = np.asarray(elevation, dtype=float)
    if z.shape[0] < 2 or z.shape[1] < 2:
        return np.where(np.isfinite(z), 0.5, np.nan)
    fill = np.nanmean(z) if np.isfinite(z).any() else 0.0
    zf = np.where(np.isfinite(z), z, fill)
    gy, gx = np.gradient(zf, dy, dx)
    slope = np.arctan(np.hypot(gx, gy))
    aspect = np.arctan2(-gx, gy)  # rows go south, so +gy means rising southwards
    az = np.radians(360.0 - azimuth + 90.0)
    alt = np.radians(altitude)
    shade = np.sin(alt) * np.cos(slope) + np.cos(alt) * np.sin(slope) * np.cos(az - aspect)
    shade = np.clip(shade, 0.0, 1.0)
    return np.where(np.isfinite(z), shade, np.nan)


def _nice_length(span: float) -> float:
    """A round length near a fifth of ``span`` (1, 2 or 5 times a power of ten)."""
    if not span > 0:
        return 1.0
    target = span / 5.0
    power = 10.0 ** np.floor(np.log10(target))
    for step in (5.0, 2.0, 1.0):
        if step * power <= target:
            return float(step * power)
    return float(power)


#: ratio colour-bar ticks: factors and their inverses
_RATIO_TICKS = (1.0, 1.1, 1.25, 1.5, 2.0, 3.0, 5.0, 10.0, 20.0, 50.0, 100.0)


def _ratio_ticks(high: float) -> list[float]:
    """Ticks for a log ratio axis from 1 / ``high`` to ``high``: 1, up to three factors of
    :data:`_RATIO_TICKS` spread evenly in log up to ``high``, and their inverses."""
    candidates = [t for t in _RATIO_TICKS[1:] if t <= high * (1 + 1e-9)]
    if not candidates:
        return [1.0]
    ups = {min(candidates, key=lambda t: abs(np.log(t) - k / 3 * np.log(high)))
           for k in (1, 2, 3)}
    return sorted({1.0} | ups | {round(1.0 / t, 3) for t in ups})


def quicklook_png(
    path: str | os.PathLike[str],
    values: np.ndarray,
    *,
    elevation: np.ndarray,
    transform: Any,
    title: str,
    label: str,
    length_unit: str = "m",
    scale: Literal["linear", "diverging", "ratio"] = "linear",
    vmin: float | None = None,
    vmax: float | None = None,
    shade: np.ndarray | None = None,
) -> Path:
    """PNG quick-look: ``values`` over a hillshade, colour bar, scale bar, north arrow.

    Parameters
    ----------
    values, elevation
        Arrays on the same grid (NaN = no value / nodata).
    transform
        The grid's affine transform (north-up), for extent and scale bar.
    title, label
        Figure title; colour-bar label with units.
    scale
        ``linear`` (``cividis`` from the 2nd to the 98th percentile), ``diverging`` (``PuOr``
        centred on zero, for signed quantities) or ``ratio`` (``PuOr`` on a log axis centred
        on 1, for factors: 0.8 and 1.25 lie equally far from 1).
    shade
        A precomputed :func:`hillshade` of ``elevation`` (computed here when None).
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm, Normalize, TwoSlopeNorm

    vals = np.asarray(values, dtype=float)
    rows, cols = vals.shape
    a, e = transform.a, transform.e
    left, top = transform.c, transform.f
    right, bottom = left + a * cols, top + e * rows
    extent = (left, right, bottom, top)
    if shade is None:
        shade = hillshade(elevation, dx=abs(a), dy=abs(e))

    if scale not in ("linear", "diverging", "ratio"):
        raise ValueError(f"colour scale {scale!r} is not linear, diverging or ratio")
    finite = vals[np.isfinite(vals)]
    ticks = None
    if scale == "ratio":
        positive = finite[finite > 0]
        vals = np.where(vals > 0, vals, np.nan)  # no place for 0 or less on a log axis
        # 98th percentile of |log ratio|, at least 1.1: a few extreme cells do not wash
        # out the rest, and a uniform map is not stretched over round-off
        bound = float(np.exp(np.percentile(np.abs(np.log(positive)), 98))) if positive.size else 2.0
        bound = max(bound, 1.1)
        norm: Normalize = LogNorm(vmin=1.0 / bound if vmin is None else vmin,
                                  vmax=bound if vmax is None else vmax)
        cmap = "PuOr_r"  # above 1 orange, as a stage that comes out low on the bias map
        ticks = _ratio_ticks(max(norm.vmax, 1.0 / norm.vmin))
    elif scale == "diverging":
        # 98th percentile of |value|: a few extreme cells do not wash out the rest
        bound = float(np.percentile(np.abs(finite), 98)) if finite.size else 1.0
        bound = bound if bound > 0 else 1.0
        norm = TwoSlopeNorm(vcenter=0.0, vmin=-bound if vmin is None else vmin,
                            vmax=bound if vmax is None else vmax)
        cmap = "PuOr"
    else:
        lo = float(np.nanpercentile(finite, 2)) if finite.size else 0.0
        hi = float(np.nanpercentile(finite, 98)) if finite.size else 1.0
        if not hi > lo:
            lo, hi = lo - 0.5 * abs(lo or 1.0) * 0.01 - 1e-6, hi + 0.5 * abs(hi or 1.0) * 0.01 + 1e-6
        norm = Normalize(vmin=lo if vmin is None else vmin, vmax=hi if vmax is None else vmax)
        cmap = "cividis"

    # fixed axes boxes fitted to the map's shape (no automatic layout pass: faster, and
    # identical on every run); the colour bar spans the map's height
    fig_w, fig_h = 7.0, 5.6
    box_w, box_h = 0.68 * fig_w, 0.78 * fig_h
    aspect = abs(e * rows) / abs(a * cols) if a and cols else 1.0
    map_w, map_h = (box_w, box_w * aspect) if box_w * aspect <= box_h else (box_h / aspect, box_h)
    bottom_frac = 0.1 + (box_h - map_h) / 2.0 / fig_h
    fig = plt.figure(figsize=(fig_w, fig_h), dpi=PNG_DPI)
    ax = fig.add_axes((0.11, bottom_frac, map_w / fig_w, map_h / fig_h))
    cax = fig.add_axes((0.11 + map_w / fig_w + 0.04, bottom_frac, 0.03, map_h / fig_h))
    ax.imshow(shade, cmap="gray", extent=extent, vmin=0, vmax=1, interpolation="nearest")
    image = ax.imshow(
        np.ma.masked_invalid(vals), cmap=cmap, norm=norm, extent=extent, alpha=0.75,
        interpolation="nearest",
    )
    bar = fig.colorbar(image, cax=cax, extend="both")
    if ticks is not None:
        bar.set_ticks(ticks, labels=[f"{t:g}" for t in ticks])
        bar.minorticks_off()
    bar.set_label(label)
    ax.set_title(title)
    ax.set_xlabel(f"easting ({length_unit})")
    ax.set_ylabel(f"northing ({length_unit})")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    ax.locator_params(axis="x", nbins=max(2, int(map_w)))

    # scale bar, lower left
    width = right - left
    height = top - bottom
    length = _nice_length(width)
    x0 = left + 0.05 * width
    y0 = bottom + 0.06 * height
    ax.plot([x0, x0 + length], [y0, y0], color="black", linewidth=4, solid_capstyle="butt")
    ax.plot([x0, x0 + length], [y0, y0], color="white", linewidth=2, solid_capstyle="butt")
    ax.text(x0 + length / 2, y0 + 0.02 * height, f"{length:g} {length_unit}", ha="center",
            va="bottom", fontsize=8, color="black",
            bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1})

    # north arrow, upper right (the grid is north-up)
    ax.annotate("N", xy=(0.93, 0.95), xytext=(0.93, 0.82), xycoords="axes fraction",
                ha="center", va="center", fontsize=10, fontweight="bold",
                arrowprops={"arrowstyle": "-|>", "color": "black", "linewidth": 1.5},
                bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1})
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)

    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(p, format="png", metadata=PNG_METADATA)
    plt.close(fig)
    return p


# ------------------------------------------------------------------------- orchestration

#: name -> (title, colour-bar label template, colour scale (see :func:`quicklook_png`),
#: description template); ``{over}`` and ``{short}`` in them say what a cell's value is a
#: median of, for the fit domain (:data:`CELL_MEDIAN_OF`)
MAP_SPECS: dict[str, tuple[str, str, Literal["linear", "diverging", "ratio"], str]] = {
    "friction_factor": (
        "Where the terrain adds wetted bed (bed area / wet area)",
        "bed area / wet area (-)",
        "linear",
        "Wetted bed area over wet plan area per cell at the reference depth (dimensionless)",
    ),
    "n_ratio": (
        "Change of Manning's n needed per cell (target / source)",
        "n ratio, {short} (-, log scale)",
        "ratio",
        "n_target / n_source, {over} (dimensionless)",
    ),
    "stage_bias": (
        "Stage error if n is carried over unchanged",
        "stage bias ({unit})",
        "diverging",
        "Target minus source stage with n carried over unchanged, {over}",
    ),
}

#: fit domain -> (``{over}``, ``{short}``) of :data:`MAP_SPECS`: what the n ratio and
#: stage bias of a cell are medians of
CELL_MEDIAN_OF: dict[str, tuple[str, str]] = {
    "faces": ("median over the window and over the cell's faces", "median of the cell's faces"),
    "cells": ("median over the window of the cell's own values", "median of the cell's own values"),
}


def map_texts(name: str, fit_domain: str = "faces") -> tuple[str, str, str, str]:
    """Title, colour-bar label template, colour scale and band description of map ``name``
    when the class fit ran on ``fit_domain`` ("faces" or "cells")."""
    if fit_domain not in CELL_MEDIAN_OF:
        raise ValueError(f"fit domain {fit_domain!r}: give 'faces' or 'cells'")
    over, short = CELL_MEDIAN_OF[fit_domain]
    title, label, scale, description = MAP_SPECS[name]
    return (title, label.replace("{short}", short), scale,
            description.replace("{over}", over))


def write_maps(
    folder: str | os.PathLike[str],
    *,
    cell_values: pd.DataFrame,
    cell_geometry: Sequence[Any] | np.ndarray,
    elevation: np.ndarray | str | os.PathLike[str],
    transform: Any,
    crs: Any,
    length_unit: str = "m",
    vertical_unit: str = "m",
    faces: Any = None,
    face_values: pd.DataFrame | None = None,
    quicklooks: bool = True,
    fit_domain: str = "faces",
) -> dict[str, Path]:
    """Write the GeoTIFF maps, the PNG quick-looks and the face layer into ``folder``.

    Parameters
    ----------
    cell_values
        One row per cell, in the order of ``cell_geometry``, with any of the columns of
        :data:`MAP_SPECS` (``friction_factor``, ``n_ratio``, ``stage_bias``).
    cell_geometry
        Cell polygons in the DEM's CRS.
    elevation, transform, crs
        The DEM as an array (NaN for nodata) or as the path of its file (read only for
        the quick-looks, decimated), and its grid; every raster is written on this grid.
    faces, face_values
        Optional face lines (GeoDataFrame with ``face_id``) and per-face values
        (indexed by face id) for ``faces.gpkg``.
    quicklooks
        Also draw the PNG quick-looks.
    fit_domain
        "faces" or "cells": what the class fit ran on, so what the per-cell ``n_ratio``
        and ``stage_bias`` are medians of (over the cell's faces, or the cell's own);
        the band descriptions and colour-bar labels say so.

    Returns
    -------
    dict
        Name -> path of every PNG (for the report), plus ``"faces"`` when written.
    """
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    geoms = np.asarray(list(cell_geometry), dtype=object)
    if isinstance(elevation, str | os.PathLike):
        import rasterio

        with rasterio.open(elevation) as src:
            shape = src.shape
    else:
        shape = np.shape(elevation)
    names = [name for name in MAP_SPECS if name in cell_values.columns]
    texts = {name: map_texts(name, fit_domain) for name in names}
    values = {name: cell_values[name].to_numpy(dtype=float) for name in names}
    _write_map_rasters(out, names, values, geoms, transform=transform, crs=crs, shape=shape,
                       vertical_unit=vertical_unit,
                       descriptions={name: texts[name][3] for name in names})
    written: dict[str, Path] = {}
    if quicklooks and names:
        step = max(1, -(-max(shape) // QUICKLOOK_MAX))  # ceil
        look_transform = transform @ Affine.scale(step)
        look_shape = (-(-shape[0] // step), -(-shape[1] // step))
        look_z = _decimated(elevation, step, look_shape)
        shade = hillshade(look_z, dx=abs(look_transform.a), dy=abs(look_transform.e))
        index = cell_index_grid(geoms, transform=look_transform, shape=look_shape)
        for name in names:
            title, label, scale, _ = texts[name]
            written[name] = quicklook_png(
                out / f"{name}.png", paint(index, values[name]), elevation=look_z,
                transform=look_transform, title=title, label=label.format(unit=vertical_unit),
                length_unit=length_unit, scale=scale, shade=shade,
            )
    if faces is not None and face_values is not None:
        written["faces"] = write_face_layer(out / "faces.gpkg", faces, face_values,
                                            descriptions=face_layer_descriptions(vertical_unit))
    return written


def _write_map_rasters(out: Path, names: list[str], values: dict[str, np.ndarray],
                       geoms: np.ndarray, *, transform: Any, crs: Any, shape: tuple[int, int],
                       vertical_unit: str, descriptions: dict[str, str] | None = None) -> None:
    """Every map's GeoTIFF, painted window by window from the cells over each window
    (band descriptions from ``descriptions``, else :data:`MAP_SPECS` for faces)."""
    import contextlib

    import rasterio
    import shapely
    from rasterio.windows import Window

    if not names:
        return
    tree = shapely.STRtree(geoms)
    rows, cols = int(shape[0]), int(shape[1])
    with contextlib.ExitStack() as stack:
        # GDAL keeps written blocks in its cache (by default 5 % of the machine's memory)
        # until it is full: bounded, each block is compressed and written soon after
        stack.enter_context(rasterio.Env(GDAL_CACHEMAX=MAP_CACHE_BYTES))
        targets = {}
        for name in names:
            description = (descriptions or {}).get(name) or map_texts(name)[3]
            dst = stack.enter_context(rasterio.open(
                out / f"{name}.tif", "w", **_map_profile(rows, cols, transform, crs)))
            dst.set_band_description(1, description)
            dst.set_band_unit(1, vertical_unit if name == "stage_bias" else "1")
            targets[name] = dst
        for row0 in range(0, rows, MAP_WINDOW):
            for col0 in range(0, cols, MAP_WINDOW):
                height, width = min(MAP_WINDOW, rows - row0), min(MAP_WINDOW, cols - col0)
                window_transform = transform @ Affine.translation(col0, row0)
                x0, y0 = window_transform @ (0, 0)
                x1, y1 = window_transform @ (width, height)
                near = tree.query(shapely.box(min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1)))
                near.sort()
                local = cell_index_grid(geoms[near], transform=window_transform,
                                        shape=(height, width))
                index = np.where(local >= 0, near[np.maximum(local, 0)], -1)
                for name, dst in targets.items():
                    grid = paint(index, values[name])
                    grid[~np.isfinite(grid)] = np.float32(NODATA)
                    dst.write(grid, 1, window=Window(col0, row0, width, height))


def _map_profile(rows: int, cols: int, transform: Any, crs: Any) -> dict[str, Any]:
    """GeoTIFF profile of a map: float32, DEFLATE, tiled 256, nodata NODATA.

    GDAL compresses the blocks on every core (``NUM_THREADS``): the same file to the byte
    as on one thread, in about half the time on two cores.
    """
    return {
        "driver": "GTiff", "width": cols, "height": rows, "count": 1, "dtype": "float32",
        "crs": crs, "transform": transform, "nodata": NODATA, "tiled": True,
        "blockxsize": BLOCK, "blockysize": BLOCK, "compress": "deflate", "predictor": 3,
        "num_threads": "ALL_CPUS",
    }


def _decimated(elevation: np.ndarray | str | os.PathLike[str], step: int,
               shape: tuple[int, int]) -> np.ndarray:
    """Every ``step``-th pixel of the DEM (NaN for nodata), on a grid of ``shape``."""
    if not isinstance(elevation, str | os.PathLike):
        return np.asarray(elevation, dtype=float)[::step, ::step]
    import rasterio
    from rasterio.enums import Resampling

    from .inputs import band_scale_offset

    with rasterio.open(elevation) as src:
        data = src.read(1, out_shape=shape, resampling=Resampling.nearest, masked=True)
        scale, offset = band_scale_offset(src)
    return data.astype(float).filled(np.nan) * scale + offset
