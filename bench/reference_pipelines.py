"""Reference pipelines for the cell stage table, written the way a modeler would without ntrans.

Each pipeline reads ``dem.tif`` and ``cells.gpkg`` and writes ``cell_stage.parquet`` with
the columns ``cell_id, stage, wet_area, volume, bed_area, hydraulic_radius`` (one row per
cell and stage, the definitions of the design notes):

- wet_area = sum w a [z < stage],   volume = sum w a (stage - z)+,
- bed_area = sum w a s [z < stage], hydraulic_radius = volume / bed_area (NaN when dry),

with w the cell's coverage of the pixel, a the pixel area and s the Horn surface factor
(computed once with ``ntrans.terrain.surface_factor`` in row blocks with a one-row halo,
so it equals the whole-raster result, and stored in a temporary float32 GeoTIFF).

Pipelines:

``exactextract``  exact coverage fractions, DEM values and surface-factor values per cell
    from ``exactextract.exact_extract`` (ops ``coverage, values, weights``), then numpy per
    cell: a (pixels x stages) broadcast, reduced by two small matrix products.
``rasterstats``   ``rasterstats.zonal_stats`` with a custom statistic that returns the
    pixel values (one pass over the DEM, one over the surface factor), then the same numpy
    per cell.  Pixel-centre rule (a pixel belongs to a cell when its centre is inside; no
    fractions), so it is close to, not equal to, the exact pipelines.
``floor``         read the DEM and sort all its pixels once: a lower bound for any method
    that must look at every pixel and order elevations.

Run one pipeline::

    python bench/reference_pipelines.py exactextract --dem D --cells C --stages 96:100:0.5 --out O
"""

from __future__ import annotations

import argparse
import tempfile
import time
from collections.abc import Iterable
from pathlib import Path

import numpy as np

TABLE_COLUMNS = ["cell_id", "stage", "wet_area", "volume", "bed_area", "hydraulic_radius"]


# --------------------------------------------------------------------------- shared pieces
def write_surface_factor(dem: str | Path, out: str | Path, *, rows_per_block: int = 2048) -> Path:
    """Write the Horn surface factor of ``dem`` to ``out`` (float32 GeoTIFF, NaN nodata).

    Row blocks with a one-row halo above and below, so every pixel sees the same 3x3
    neighbourhood as in a whole-raster computation while memory stays bounded.
    """
    import rasterio
    from rasterio.windows import Window

    from ntrans.terrain import surface_factor

    out = Path(out)
    with rasterio.open(dem) as src:
        rows, cols = src.height, src.width
        dx, dy = abs(src.transform.a), abs(src.transform.e)
        profile = src.profile.copy()
        profile.update(dtype="float32", nodata=np.nan, compress="deflate", predictor=3,
                       tiled=True, blockxsize=256, blockysize=256, BIGTIFF="IF_SAFER")
        with rasterio.open(out, "w", **profile) as dst:
            for r0 in range(0, rows, rows_per_block):
                r1 = min(r0 + rows_per_block, rows)
                h0, h1 = max(r0 - 1, 0), min(r1 + 1, rows)
                z = src.read(1, window=Window(0, h0, cols, h1 - h0), masked=True)
                z = z.astype(np.float64).filled(np.nan)
                s = surface_factor(z, dx, dy)[r0 - h0 : r0 - h0 + (r1 - r0)]
                dst.write(s.astype(np.float32), 1, window=Window(0, r0, cols, r1 - r0))
    return out


def cell_tables(
    values: Iterable[tuple[np.ndarray, np.ndarray, np.ndarray]],
    stages: np.ndarray,
    pixel_area: float,
    n_cells: int,
) -> dict[str, np.ndarray]:
    """Per-cell numpy: ``values`` yields (coverage, z, s) per cell -> (n_cells, n_stages) arrays.

    One Python iteration per cell; inside the cell everything is one broadcast over
    (pixels x stages) and two matrix products.
    """
    n_stages = stages.size
    wet_area = np.zeros((n_cells, n_stages))
    volume = np.zeros((n_cells, n_stages))
    bed_area = np.zeros((n_cells, n_stages))
    for k, (cov, z, s) in enumerate(values):
        ok = np.isfinite(z)
        if not ok.all():
            cov, z, s = cov[ok], z[ok], s[ok]
        plan = np.asarray(cov, dtype=np.float64) * pixel_area
        depth = stages[None, :] - np.asarray(z, dtype=np.float64)[:, None]
        wet = (depth > 0).astype(np.float64)
        np.maximum(depth, 0.0, out=depth)
        volume[k] = plan @ depth
        wet_area[k] = plan @ wet
        bed_area[k] = (plan * np.asarray(s, dtype=np.float64)) @ wet
    with np.errstate(invalid="ignore", divide="ignore"):
        radius = np.where(bed_area > 0, volume / bed_area, np.nan)
    return {"wet_area": wet_area, "volume": volume, "bed_area": bed_area,
            "hydraulic_radius": radius}


def write_table(out: str | Path, cell_ids: np.ndarray, stages: np.ndarray,
                tables: dict[str, np.ndarray]) -> Path:
    """Long table (cell-major, then stage) -> ``out/cell_stage.parquet``."""
    import pandas as pd

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    n_cells, n_stages = tables["volume"].shape
    frame = pd.DataFrame({
        "cell_id": np.repeat(np.asarray(cell_ids), n_stages),
        "stage": np.tile(stages, n_cells),
        **{name: tables[name].ravel() for name in TABLE_COLUMNS[2:]},
    })
    path = out / "cell_stage.parquet"
    frame.to_parquet(path, index=False)
    return path


def _pixel_area(dem: str | Path) -> float:
    import rasterio

    with rasterio.open(dem) as src:
        return abs(src.transform.a * src.transform.e - src.transform.b * src.transform.d)


# --------------------------------------------------------------------------- pipelines
def exactextract_pipeline(
    dem: str | Path,
    cells: str | Path,
    stages: np.ndarray,
    *,
    out: str | Path,
    id_field: str = "cell_id",
    batch: int = 20_000,
    strategy: str = "raster-sequential",
) -> dict:
    """Exact coverage + values from exactextract, numpy per cell, Parquet out.

    Cells go to exactextract in batches of ``batch`` (bounds the memory of the pixel
    lists).  ``strategy="raster-sequential"`` (documented exactextract option) reads the
    rasters chunk by chunk; on these cases it takes about a quarter of the CPU time of the
    default per-feature reads.
    """
    import geopandas as gpd
    from exactextract import exact_extract

    stages = np.asarray(stages, dtype=np.float64)
    timings = {}
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="ref_sf_", dir=Path(out).parent) as tmp:
        sf_path = write_surface_factor(dem, Path(tmp) / "surface_factor.tif")
        t1 = time.perf_counter()
        timings["surface_factor"] = t1 - t0
        frame = gpd.read_file(cells, engine="pyogrio")
        ids = frame[id_field].to_numpy()
        pixel_area = _pixel_area(dem)
        parts = {name: [] for name in TABLE_COLUMNS[2:]}
        t_extract = t_numpy = 0.0
        for start in range(0, len(frame), batch):
            chunk = frame.iloc[start : start + batch]
            ta = time.perf_counter()
            res = exact_extract(str(dem), chunk, ["coverage", "values", "weights"],
                                weights=str(sf_path), strategy=strategy, output="pandas")
            tb = time.perf_counter()
            tables = cell_tables(
                zip(res["coverage"], res["values"], res["weights"], strict=True),
                stages, pixel_area, len(chunk),
            )
            for name in parts:
                parts[name].append(tables[name])
            t_extract += tb - ta
            t_numpy += time.perf_counter() - tb
        timings["exact_extract"] = t_extract
        timings["numpy_per_cell"] = t_numpy
    t2 = time.perf_counter()
    write_table(out, ids, stages, {k: np.concatenate(v) for k, v in parts.items()})
    timings["write"] = time.perf_counter() - t2
    return timings


def rasterstats_pipeline(
    dem: str | Path,
    cells: str | Path,
    stages: np.ndarray,
    *,
    out: str | Path,
    id_field: str = "cell_id",
) -> dict:
    """rasterstats zonal_stats (pixel-centre rule) with a custom statistic, numpy per cell."""
    import geopandas as gpd
    from rasterstats import zonal_stats

    stages = np.asarray(stages, dtype=np.float64)
    timings = {}
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="ref_sf_", dir=Path(out).parent) as tmp:
        sf_path = write_surface_factor(dem, Path(tmp) / "surface_factor.tif")
        t1 = time.perf_counter()
        timings["surface_factor"] = t1 - t0
        frame = gpd.read_file(cells, engine="pyogrio")
        ids = frame[id_field].to_numpy()
        geoms = list(frame.geometry)
        pixel_area = _pixel_area(dem)

        def pixels(masked):  # custom statistic: the cell's pixel values
            return masked.compressed()

        # boundless=False: every cell lies inside the DEM, and the default boundless read
        # costs about three times the CPU time
        z_stats = zonal_stats(geoms, str(dem), stats="count", add_stats={"pixels": pixels},
                              boundless=False)
        s_stats = zonal_stats(geoms, str(sf_path), stats="count", add_stats={"pixels": pixels},
                              boundless=False)
        t2 = time.perf_counter()
        timings["zonal_stats"] = t2 - t1

        def per_cell():
            for zs, ss in zip(z_stats, s_stats, strict=True):
                z = zs["pixels"] if zs["pixels"] is not None else np.empty(0)
                s = ss["pixels"] if ss["pixels"] is not None else np.empty(0)
                yield np.ones(z.size), z, s

        tables = cell_tables(per_cell(), stages, pixel_area, len(geoms))
        t3 = time.perf_counter()
        timings["numpy_per_cell"] = t3 - t2
    write_table(out, ids, stages, tables)
    timings["write"] = time.perf_counter() - t3
    return timings


def floor_pipeline(dem: str | Path, cells: str | Path | None = None, stages=None, *,
                   out: str | Path | None = None, **_: object) -> dict:
    """Read the whole DEM and sort its pixels once (no cells, no tables)."""
    import rasterio

    t0 = time.perf_counter()
    with rasterio.open(dem) as src:
        z = src.read(1)
    t1 = time.perf_counter()
    z = np.sort(z, axis=None)
    t2 = time.perf_counter()
    return {"read": t1 - t0, "sort": t2 - t1, "checksum": float(z[z.size // 2])}


PIPELINES = {
    "exactextract": exactextract_pipeline,
    "rasterstats": rasterstats_pipeline,
    "floor": floor_pipeline,
}


def main() -> None:
    from ntrans.stages import parse_spec

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("pipeline", choices=sorted(PIPELINES))
    parser.add_argument("--dem", required=True, type=Path)
    parser.add_argument("--cells", required=True, type=Path)
    parser.add_argument("--stages", required=True, help="start:stop:step or a comma list")
    parser.add_argument("--out", required=True, type=Path)
    parser.add_argument("--id-field", default="cell_id")
    args = parser.parse_args()
    t0 = time.perf_counter()
    timings = PIPELINES[args.pipeline](args.dem, args.cells, parse_spec(args.stages),
                                       out=args.out, id_field=args.id_field)
    print(f"{args.pipeline}: {time.perf_counter() - t0:.2f} s  {timings}")


if __name__ == "__main__":
    main()
