"""Deterministic synthetic benchmark case: a valley DEM and an irregular cell mesh.

``make_case(folder, n_pixels)`` writes into ``folder``:

- ``dem.tif``: a square-ish grid of about ``n_pixels`` 1 m pixels, EPSG:32633, float32,
  tiled DEFLATE.  Terrain = a valley falling gently down the grid, a meandering channel
  cut into its floor, and smooth noise (a sum of random plane waves).  Generated in row
  blocks, so 10^8 pixels stay well under 2 GB of memory.
- ``cells.gpkg``: a Voronoi mesh of jittered grid points clipped to the DEM extent, about
  ``n_pixels / pixels_per_cell`` cells, integer field ``cell_id`` (1..N).
- ``case.json``: the parameters and terrain statistics (written last; its presence marks
  a complete case).

``cached_case(n_pixels)`` keeps cases under ``bench/_cases/`` (git-ignored), keyed by size,
cell size and seed, and builds them only once.

Run as a script to build one case and print its figures::

    python bench/make_case.py 1e6
"""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path

import numpy as np

CASES_DIR = Path(__file__).resolve().parent / "_cases"
CRS = "EPSG:32633"
ORIGIN_X = 500_000.0  # metres, inside UTM zone 33N
ORIGIN_Y = 5_100_000.0  # metres, top edge of the grid
PIXEL = 1.0  # metres
BLOCK = 256  # GeoTIFF tile size
ROWS_PER_CHUNK = 1024  # rows generated and written at once (a multiple of BLOCK)


def grid_shape(n_pixels: int) -> tuple[int, int]:
    """(rows, cols) of a square-ish grid holding about ``n_pixels`` pixels."""
    cols = int(math.ceil(math.sqrt(n_pixels)))
    rows = int(math.ceil(n_pixels / cols))
    return rows, cols


class _Terrain:
    """Elevation as an analytic function of map coordinates (metres from the top-left)."""

    def __init__(self, width: float, height: float, seed: int) -> None:
        rng = np.random.default_rng(seed)
        self.width = width
        self.height = height
        self.floor_z = 100.0  # m, valley floor at the top edge
        self.fall = 0.0005  # m/m, valley slope down the grid (towards larger y)
        self.half_floor = 0.30 * width  # m, half width of the flat valley floor
        self.side_slope = 0.04  # m/m, valley side slope beyond the floor
        # meandering channel centreline x_c(y): two harmonics
        self.meander_amp = (0.08 * width, 0.025 * width)
        self.meander_len = (max(0.45 * height, 200.0), max(0.17 * height, 90.0))
        self.meander_phase = tuple(rng.uniform(0, 2 * np.pi, 2))
        self.channel_half = max(6.0, width / 150.0)  # m, half top width
        self.channel_depth = 3.0  # m
        # smooth noise: plane waves, wavelengths 25 m .. width/3, amplitude ~ wavelength
        n_waves = 16
        wavelength = np.geomspace(25.0, max(width / 3.0, 50.0), n_waves)
        angle = rng.uniform(0, np.pi, n_waves)
        self.kx = 2 * np.pi / wavelength * np.cos(angle)
        self.ky = 2 * np.pi / wavelength * np.sin(angle)
        self.phase = rng.uniform(0, 2 * np.pi, n_waves)
        self.amp = 0.004 * wavelength**0.8 + 0.05  # m

    def centreline(self, y: np.ndarray) -> np.ndarray:
        xc = np.full_like(y, 0.5 * self.width)
        for amp, length, phase in zip(
            self.meander_amp, self.meander_len, self.meander_phase, strict=True
        ):
            xc += amp * np.sin(2 * np.pi * y / length + phase)
        return xc

    def centreline_slope(self, y: np.ndarray) -> np.ndarray:
        dxdy = np.zeros_like(y)
        for amp, length, phase in zip(
            self.meander_amp, self.meander_len, self.meander_phase, strict=True
        ):
            k = 2 * np.pi / length
            dxdy += amp * k * np.cos(k * y + phase)
        return dxdy

    def elevation(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Elevation (m) of pixel centres: ``x`` (cols,), ``y`` (rows,) -> (rows, cols)."""
        xx = x[None, :]
        yy = y[:, None]
        # valley: flat floor, linear sides, falling down the grid
        across = np.abs(xx - 0.5 * self.width)
        z = self.floor_z - self.fall * yy + self.side_slope * np.maximum(
            across - self.half_floor, 0.0
        )
        # channel: smooth trapezoid-like section around the meandering centreline,
        # distance measured normal to the centreline (first-order correction)
        xc = self.centreline(y)[:, None]
        normal = 1.0 / np.sqrt(1.0 + self.centreline_slope(y) ** 2)[:, None]
        dist = np.abs(xx - xc) * normal / self.channel_half
        z -= self.channel_depth * np.clip(1.5 - dist**2, 0.0, 1.0)
        # smooth noise: sin(kx x + ky y + p) = sin(a) cos(b) + cos(a) sin(b), separable
        for kx, ky, p, a in zip(self.kx, self.ky, self.phase, self.amp, strict=True):
            ax = kx * x + p
            by = ky * y
            z += a * (np.sin(by)[:, None] * np.cos(ax)[None, :]
                      + np.cos(by)[:, None] * np.sin(ax)[None, :])
        return z


def _write_dem(path: Path, rows: int, cols: int, seed: int) -> dict:
    import rasterio
    from rasterio.transform import from_origin

    terrain = _Terrain(cols * PIXEL, rows * PIXEL, seed)
    profile = {
        "driver": "GTiff",
        "width": cols,
        "height": rows,
        "count": 1,
        "dtype": "float32",
        "crs": CRS,
        "transform": from_origin(ORIGIN_X, ORIGIN_Y, PIXEL, PIXEL),
        "nodata": -9999.0,
        "tiled": True,
        "blockxsize": BLOCK,
        "blockysize": BLOCK,
        "compress": "deflate",
        "predictor": 3,
        "BIGTIFF": "IF_SAFER",
    }
    x = (np.arange(cols) + 0.5) * PIXEL
    z_min, z_max = np.inf, -np.inf
    sample = []
    step = 37  # subsample for quantiles (every 37th pixel of every 37th row)
    with rasterio.open(path, "w", **profile) as dst:
        for r0 in range(0, rows, ROWS_PER_CHUNK):
            r1 = min(r0 + ROWS_PER_CHUNK, rows)
            y = (np.arange(r0, r1) + 0.5) * PIXEL
            z = terrain.elevation(x, y).astype(np.float32)
            z_min = min(z_min, float(z.min()))
            z_max = max(z_max, float(z.max()))
            first = (-r0) % step
            sample.append(z[first::step, ::step].ravel())
            dst.write(z, 1, window=rasterio.windows.Window(0, r0, cols, r1 - r0))
    sample = np.concatenate(sample)
    q = np.quantile(sample, [0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99])
    return {
        "z_min": z_min,
        "z_max": z_max,
        "z_quantiles": dict(
            zip(["p01", "p10", "p25", "p50", "p75", "p90", "p99"], q.tolist(), strict=True)
        ),
    }


def _write_cells(path: Path, rows: int, cols: int, pixels_per_cell: float, seed: int) -> dict:
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(seed + 1)
    width, height = cols * PIXEL, rows * PIXEL
    spacing = math.sqrt(pixels_per_cell) * PIXEL
    nx = max(1, round(width / spacing))
    ny = max(1, round(height / spacing))
    sx, sy = width / nx, height / ny
    ii, jj = np.meshgrid(np.arange(nx), np.arange(ny))
    px = ORIGIN_X + (ii.ravel() + 0.5 + rng.uniform(-0.35, 0.35, ii.size)) * sx
    py = ORIGIN_Y - (jj.ravel() + 0.5 + rng.uniform(-0.35, 0.35, jj.size)) * sy
    extent = shapely.box(ORIGIN_X, ORIGIN_Y - height, ORIGIN_X + width, ORIGIN_Y)
    points = shapely.multipoints(np.column_stack([px, py]))
    regions = shapely.voronoi_polygons(points, extend_to=extent, ordered=True)
    polygons = shapely.intersection(shapely.get_parts(regions), extent)
    # keep the grid precision: no sub-nanometre slivers from the clip
    polygons = shapely.set_precision(polygons, 1e-6)
    polygons = polygons[~shapely.is_empty(polygons)]
    polygons = shapely.get_parts(polygons)  # a clip never splits a convex cell
    n_cells = polygons.size
    frame = gpd.GeoDataFrame(
        {"cell_id": np.arange(1, n_cells + 1, dtype=np.int64)}, geometry=polygons, crs=CRS
    )
    frame.to_file(path, driver="GPKG", engine="pyogrio", layer="cells")
    n_vertices = int(shapely.get_num_coordinates(polygons).sum())
    return {"n_cells": int(n_cells), "n_polygon_vertices": n_vertices,
            "cell_spacing": [sx, sy]}


def make_case(
    folder: str | Path,
    n_pixels: int | float,
    pixels_per_cell: float = 200,
    seed: int = 0,
) -> dict:
    """Write ``dem.tif``, ``cells.gpkg`` and ``case.json`` into ``folder``; return the metadata.

    Parameters
    ----------
    folder : output folder (created).
    n_pixels : about how many 1 m DEM pixels (the grid is ceil(sqrt(n)) columns wide).
    pixels_per_cell : mean cell area in pixels (m^2).
    seed : random seed; the same arguments give the same files.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    n_pixels = int(n_pixels)
    rows, cols = grid_shape(n_pixels)
    t0 = time.perf_counter()
    dem_meta = _write_dem(folder / "dem.tif", rows, cols, seed)
    t1 = time.perf_counter()
    cell_meta = _write_cells(folder / "cells.gpkg", rows, cols, pixels_per_cell, seed)
    t2 = time.perf_counter()
    meta = {
        "n_pixels_requested": n_pixels,
        "rows": rows,
        "cols": cols,
        "n_pixels": rows * cols,
        "pixel_size": PIXEL,
        "crs": CRS,
        "pixels_per_cell": pixels_per_cell,
        "seed": seed,
        **dem_meta,
        **cell_meta,
        "seconds_dem": round(t1 - t0, 2),
        "seconds_cells": round(t2 - t1, 2),
        "dem": "dem.tif",
        "cells": "cells.gpkg",
    }
    (folder / "case.json").write_text(json.dumps(meta, indent=2))
    return meta


def case_folder(n_pixels: int | float, pixels_per_cell: float = 200, seed: int = 0) -> Path:
    """Cache folder of a case under ``bench/_cases``."""
    return CASES_DIR / f"px{int(n_pixels):d}_ppc{pixels_per_cell:g}_seed{seed}"


def cached_case(
    n_pixels: int | float, pixels_per_cell: float = 200, seed: int = 0
) -> tuple[Path, dict]:
    """Folder and metadata of a cached case, building it first if missing."""
    folder = case_folder(n_pixels, pixels_per_cell, seed)
    marker = folder / "case.json"
    if marker.exists():
        return folder, json.loads(marker.read_text())
    return folder, make_case(folder, n_pixels, pixels_per_cell, seed)


def estimate_case_bytes(n_pixels: int | float, pixels_per_cell: float = 200) -> int:
    """Rough disk size of a case (DEM compresses to about half; ~1 kB per cell)."""
    return int(2.5 * n_pixels + 1000 * n_pixels / pixels_per_cell)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("n_pixels", type=float, help="about how many pixels, e.g. 1e6")
    parser.add_argument("--pixels-per-cell", type=float, default=200)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--folder", type=Path, default=None,
                        help="write here instead of the bench/_cases cache")
    args = parser.parse_args()
    if args.folder is not None:
        meta = make_case(args.folder, args.n_pixels, args.pixels_per_cell, args.seed)
        folder = args.folder
    else:
        folder, meta = cached_case(args.n_pixels, args.pixels_per_cell, args.seed)
    print(f"case folder: {folder}")
    print(json.dumps(meta, indent=2))


if __name__ == "__main__":
    main()
