"""Shared test helpers: tiny DEMs and cell layers written to ``tmp_path``.

Plain functions (import them with ``from conftest import write_dem, ...`` from any test
module under ``tests/``; from sub-folders the ``builders`` fixture gives the same
functions without an import):

- :func:`write_dem` -- a GeoTIFF from a numpy array (NaN -> nodata).
- :func:`write_cells` -- a polygon layer (driver chosen by suffix) from shapely polygons.
- :func:`grid_polygons` -- ``nx * ny`` square cells, row-major from the lower left.
- :func:`tilted_plane` -- elevations of a plane at the pixel centres of a grid.
- :func:`write_in_units` -- one terrain and mesh written with lengths and elevations in
  metres, international feet or US survey feet; :func:`metres_per` reads a unit label.

Fixtures: ``tmp_dem`` (30 x 30 pixels of 1 m, plane z = 10 + 0.1 x + 0.05 y, EPSG:32633,
lower-left corner at (0, 0)) and ``tmp_cells`` (a 3 x 3 grid of 10 m cells over it, ids
1..9 in field ``cell_id``, GeoPackage).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine

DRIVERS = {
    ".gpkg": "GPKG",
    ".shp": "ESRI Shapefile",
    ".geojson": "GeoJSON",
    ".json": "GeoJSON",
    ".fgb": "FlatGeobuf",
}

#: Tilted plane of the ``tmp_dem`` fixture: z = PLANE_Z0 + PLANE_SX * x + PLANE_SY * y.
PLANE_Z0, PLANE_SX, PLANE_SY = 10.0, 0.1, 0.05


def tilted_plane(
    rows: int,
    cols: int,
    *,
    pixel_size: float = 1.0,
    origin: tuple[float, float] | None = None,
    z0: float = PLANE_Z0,
    sx: float = PLANE_SX,
    sy: float = PLANE_SY,
) -> np.ndarray:
    """Elevations ``z0 + sx * x + sy * y`` at the pixel centres of a north-up grid.

    ``origin`` is the top-left corner (default ``(0, rows * pixel_size)``, so the grid's
    lower-left corner is at (0, 0)).  Returns ``(rows, cols)`` float64.
    """
    x0, y0 = origin if origin is not None else (0.0, rows * pixel_size)
    x = x0 + (np.arange(cols) + 0.5) * pixel_size
    y = y0 - (np.arange(rows) + 0.5) * pixel_size
    return z0 + sx * x[None, :] + sy * y[:, None]


def write_dem(
    path: str | Path,
    array: np.ndarray,
    *,
    pixel_size: float = 1.0,
    origin: tuple[float, float] | None = None,
    crs: str | None = "EPSG:32633",
    nodata: float | None = -9999.0,
    dtype: str = "float32",
    transform: Affine | None = None,
) -> Path:
    """Write ``array`` (rows, cols) or (bands, rows, cols) as a GeoTIFF and return its path.

    ``origin`` is the top-left corner (default: lower-left corner at (0, 0)).  NaN in the
    array is written as ``nodata`` (when not None).  ``crs=None`` writes no CRS;
    ``transform`` overrides ``pixel_size``/``origin`` (e.g. a rotated grid).
    """
    path = Path(path)
    data = np.asarray(array, dtype=np.float64)
    if data.ndim == 2:
        data = data[None]
    bands, rows, cols = data.shape
    if transform is None:
        x0, y0 = origin if origin is not None else (0.0, rows * pixel_size)
        transform = Affine(pixel_size, 0.0, x0, 0.0, -pixel_size, y0)
    if nodata is not None:
        data = np.where(np.isnan(data), nodata, data)
    profile = {
        "driver": "GTiff",
        "width": cols,
        "height": rows,
        "count": bands,
        "dtype": dtype,
        "transform": transform,
        "nodata": nodata,
    }
    if crs is not None:
        profile["crs"] = crs
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype(dtype))
    return path


def write_cells(
    path: str | Path,
    polygons: Sequence[object],
    ids: Sequence[object] | None = None,
    *,
    crs: str | None = "EPSG:32633",
    id_field: str | None = "cell_id",
    driver: str | None = None,
    layer: str | None = None,
    attributes: dict[str, Sequence[object]] | None = None,
) -> Path:
    """Write shapely geometries (None allowed) as a vector layer and return its path.

    ``ids`` default to 1..n in column ``id_field`` (``id_field=None``: no id column).
    The driver follows the suffix (.gpkg, .shp, .geojson/.json, .fgb) unless given;
    FlatGeobuf is written without spatial index so that features keep their order.
    ``crs=None`` writes no CRS.  ``attributes`` adds further columns.
    """
    import geopandas as gpd

    path = Path(path)
    columns: dict[str, object] = {}
    if id_field is not None:
        columns[id_field] = list(ids) if ids is not None else list(range(1, len(polygons) + 1))
    for name, values in (attributes or {}).items():
        columns[name] = list(values)
    frame = gpd.GeoDataFrame(columns, geometry=gpd.GeoSeries(list(polygons)), crs=crs)
    driver = driver or DRIVERS[path.suffix.lower()]
    # FlatGeobuf reorders features by its spatial index; keep the given order instead
    options = {"SPATIAL_INDEX": "NO"} if driver == "FlatGeobuf" else {}
    with warnings.catch_warnings():  # writing without a CRS on purpose is fine here
        warnings.filterwarnings("ignore", message=".*crs.* was not provided")
        frame.to_file(path, driver=driver, layer=layer, engine="pyogrio", layer_options=options)
    return path


def grid_polygons(
    nx: int, ny: int, size: float, origin: tuple[float, float] = (0.0, 0.0)
) -> list[shapely.Polygon]:
    """``nx * ny`` square boxes of side ``size``, row-major from the lower-left ``origin``."""
    x0, y0 = origin
    return [
        shapely.box(x0 + i * size, y0 + j * size, x0 + (i + 1) * size, y0 + (j + 1) * size)
        for j in range(ny)
        for i in range(nx)
    ]


#: Metres per length unit, exact by definition: the international foot is 0.3048 m (the
#: 1959 international yard and pound agreement), the US survey foot 1200/3937 m.
METRES_PER_UNIT = {"metre": 1.0, "foot": 0.3048, "us_survey_foot": 1200.0 / 3937.0}
#: UTM zone 33N (the fixtures' EPSG:32633) with its lengths in each unit.
UNIT_CRS = {
    "metre": "EPSG:32633",
    "foot": "+proj=utm +zone=33 +datum=WGS84 +units=ft +no_defs",
    "us_survey_foot": "+proj=utm +zone=33 +datum=WGS84 +units=us-ft +no_defs",
}


def write_in_units(
    folder: str | Path,
    elevation_m: np.ndarray,
    polygons_m: Sequence[shapely.Geometry],
    *,
    horizontal: str = "metre",
    vertical: str | None = None,
) -> tuple[Path, Path]:
    """A DEM of 1 m pixels (lower-left corner at (0, 0)) and its cells, written with x/y in
    ``horizontal`` units (CRS :data:`UNIT_CRS`) and elevations in ``vertical`` units (default:
    the horizontal ones).  Returns ``(dem, cells)`` paths in ``folder``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    to_xy = 1.0 / METRES_PER_UNIT[horizontal]
    to_z = 1.0 / METRES_PER_UNIT[vertical or horizontal]
    rows = np.shape(elevation_m)[0]
    dem = write_dem(folder / "dem.tif", np.asarray(elevation_m, dtype=float) * to_z,
                    pixel_size=to_xy, origin=(0.0, rows * to_xy), crs=UNIT_CRS[horizontal],
                    dtype="float64")
    polygons = [shapely.transform(p, lambda xy: xy * to_xy) for p in polygons_m]
    cells = write_cells(folder / "cells.gpkg", polygons, crs=UNIT_CRS[horizontal])
    return dem, cells


def metres_per(label: str, foot: float) -> float:
    """SI factor of a column unit label such as ``m``, ``ft2*m``, ``m3/s`` or ``ft4/s``:
    the value times this factor is in metres to the label's powers (per second), with
    ``foot`` metres per ``ft``.  Labels without lengths (``1``, ``""``) give 1."""
    factor = 1.0
    for part in label.removesuffix("/s").split("*"):
        unit = part.rstrip("0123456789")
        power = int(part[len(unit):] or 1)
        factor *= {"m": 1.0, "ft": foot}.get(unit, 1.0) ** power
    return factor


@pytest.fixture
def builders() -> SimpleNamespace:
    """The helper functions of this module, for tests that cannot import ``conftest``."""
    return SimpleNamespace(
        write_dem=write_dem,
        write_cells=write_cells,
        grid_polygons=grid_polygons,
        tilted_plane=tilted_plane,
    )


@pytest.fixture
def tmp_dem(tmp_path: Path) -> Path:
    """30 x 30 one-metre pixels, plane z = 10 + 0.1 x + 0.05 y, EPSG:32633, corner (0, 0)."""
    return write_dem(tmp_path / "dem.tif", tilted_plane(30, 30))


@pytest.fixture
def tmp_cells(tmp_path: Path) -> Path:
    """3 x 3 grid of 10 m cells covering ``tmp_dem`` exactly, ids 1..9 (GeoPackage)."""
    return write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 3, 10.0))
