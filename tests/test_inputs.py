"""Tests of ntrans.inputs: DEM, cells, water surfaces, output-over-input guard."""

from __future__ import annotations

import logging
import pickle
import re
import warnings
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from affine import Affine
from conftest import (
    PLANE_SX,
    PLANE_SY,
    grid_polygons,
    tilted_plane,
    write_cells,
    write_dem,
)

from ntrans.errors import (
    CRSError,
    GeometryError,
    GeometryRepairedWarning,
    InputError,
    InputFileError,
    NtransError,
    OutputError,
    ProjectionScaleWarning,
)
from ntrans.inputs import (
    CellLayer,
    DemInfo,
    check_output_not_input,
    check_water_surfaces_reach,
    length_scale_error,
    open_dem,
    open_water_surface,
    read_cells,
    read_water_surfaces,
    sample_water_surface,
)

US_FOOT = 1200.0 / 3937.0  # metres per US survey foot (definition)
INT_FOOT = 0.3048  # metres per international foot (definition)


def assert_one_sentence(message: str, first_word: str | None = None) -> None:
    """Messages are one sentence: one line, no inner full stop, no final full stop."""
    assert "\n" not in message
    text = message.replace("e.g. ", "")
    assert ". " not in text and not text.endswith(".")
    assert "; " in message  # what was found; what to do
    if first_word is not None:
        assert message.split()[0] == first_word


# --------------------------------------------------------------------------- open_dem


def test_open_dem_reads_grid_and_units(tmp_dem: Path) -> None:
    dem = open_dem(tmp_dem)
    assert isinstance(dem, DemInfo)
    assert (dem.width, dem.height) == (30, 30)
    assert dem.shape == (30, 30)
    assert dem.horizontal_unit == dem.vertical_unit == "metre"
    assert dem.z_to_xy == 1.0
    assert dem.manning_k == 1.0  # SI Manning factor, DESIGN.md section 2
    assert dem.pixel_size == (1.0, 1.0)
    assert dem.pixel_area == 1.0
    assert tuple(dem.bounds) == (0.0, 0.0, 30.0, 30.0)
    assert dem.nodata == -9999.0
    assert dem.dtype == "float32"
    assert dem.crs.to_epsg() == 32633


def test_dem_info_pickles(tmp_dem: Path) -> None:
    """DemInfo travels to Dask workers by pickle."""
    dem = open_dem(tmp_dem)
    again = pickle.loads(pickle.dumps(dem))
    np.testing.assert_array_equal(again.read_window(0, 0, 5, 5), dem.read_window(0, 0, 5, 5))
    assert again.transform == dem.transform


@pytest.mark.parametrize(
    ("crs", "unit", "factor", "k"),
    [
        ("EPSG:32633", "metre", 1.0, 1.0),
        ("+proj=utm +zone=33 +datum=WGS84 +units=us-ft +no_defs", "foot", US_FOOT, 1.486),
        ("+proj=utm +zone=33 +datum=WGS84 +units=ft +no_defs", "foot", INT_FOOT, 1.486),
        ("EPSG:2263", "foot", US_FOOT, 1.486),  # NY Long Island, US survey foot
    ],
)
def test_open_dem_units(tmp_path: Path, crs: str, unit: str, factor: float, k: float) -> None:
    path = write_dem(tmp_path / "d.tif", np.ones((4, 4)), crs=crs, origin=(1000.0, 5000.0))
    dem = open_dem(path)
    assert dem.horizontal_unit == dem.vertical_unit == unit
    assert dem.manning_k == k  # Manning k: 1.0 SI, 1.486 US customary (DESIGN.md section 2)
    assert dem.xy_metres_per_unit == pytest.approx(factor, rel=1e-12)  # float of a definition
    assert dem.z_to_xy == 1.0


@pytest.mark.parametrize(
    ("crs", "vertical", "z_to_xy"),
    [
        ("EPSG:32633", "foot", INT_FOOT),  # vertical foot in metre plan: 0.3048 m per ft
        ("EPSG:32633", "ft", INT_FOOT),
        ("EPSG:32633", "metre", 1.0),
        ("EPSG:2263", "metre", 1.0 / US_FOOT),  # metres into US survey feet
        ("EPSG:2263", "feet", 1.0),  # the same foot as the plan unit
        ("EPSG:32633", "us_survey_foot", US_FOOT),  # 1200/3937 m per US survey foot
        ("EPSG:2263", "us_survey_foot", 1.0),  # the plan unit itself
        ("+proj=utm +zone=33 +datum=WGS84 +units=ft +no_defs", "us_survey_foot",
         US_FOOT / INT_FOOT),  # US survey feet into international feet
    ],
)
def test_open_dem_vertical_units(tmp_path: Path, crs: str, vertical: str, z_to_xy: float) -> None:
    path = write_dem(tmp_path / "d.tif", np.ones((4, 4)), crs=crs, origin=(1000.0, 5000.0))
    dem = open_dem(path, vertical_units=vertical)
    assert dem.z_to_xy == pytest.approx(z_to_xy, rel=1e-12)  # ratio of unit definitions
    # conveyance is of degree 5/3 in depths (K = k A R^(2/3), A = L x depth): depths
    # converted to the plan unit, then Manning's k of the plan unit (DESIGN.md section 2)
    k = 1.0 if crs == "EPSG:32633" else 1.486
    assert dem.conveyance_factor == pytest.approx(k * z_to_xy ** (5 / 3), rel=1e-12)


def test_open_dem_vertical_unit_from_compound_crs(tmp_path: Path) -> None:
    # UTM 18N (metre) + NAVD88 height in US survey feet
    path = write_dem(tmp_path / "d.tif", np.ones((4, 4)), crs="EPSG:26918+6360",
                     origin=(500000.0, 4500000.0))
    with rasterio.open(path) as src:
        compound = pyproj.CRS.from_wkt(src.crs.to_wkt()).is_compound
    if not compound:
        pytest.skip("this GDAL build does not keep a vertical CRS in GeoTIFF")
    dem = open_dem(path)
    assert dem.horizontal_unit == "metre"
    assert dem.vertical_unit == "foot"
    assert dem.z_to_xy == pytest.approx(US_FOOT, rel=1e-12)  # US survey foot definition


def test_open_dem_bad_vertical_unit(tmp_dem: Path) -> None:
    with pytest.raises(InputError, match="metre, foot, us_survey_foot"):
        open_dem(tmp_dem, vertical_units="yard")


def _dem_at(tmp_path: Path, crs: str, lon: float, lat: float, *, size: float = 10.0) -> Path:
    """A 4 x 4 DEM in ``crs`` whose centre lies at (lon, lat) (WGS 84 degrees)."""
    x, y = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(lon, lat)
    return write_dem(tmp_path / "d.tif", np.ones((4, 4)), crs=crs, pixel_size=size,
                     origin=(x - 2 * size, y + 2 * size))


@pytest.mark.parametrize(
    ("crs", "lon", "lat"),
    [
        ("EPSG:32633", 18.0, 0.5),  # UTM 33N at its zone edge, 3 deg from the central meridian
        ("EPSG:32633", 15.0, 45.0),  # on the central meridian (scale 0.9996)
        ("EPSG:2263", -73.9, 40.75),  # NY Long Island state plane, US survey feet
        ("EPSG:27700", -2.0, 54.0),  # British National Grid
        ("EPSG:3857", 10.0, 0.5),  # Web Mercator next to the equator is true to 0.004 %
    ],
    ids=["utm-zone-edge", "utm-central-meridian", "state-plane-foot", "national-grid",
         "web-mercator-equator"],
)
def test_open_dem_true_scale_projections_pass_silently(tmp_path: Path, crs: str, lon: float,
                                                       lat: float) -> None:
    path = _dem_at(tmp_path, crs, lon, lat)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning of any kind
        dem = open_dem(path)
    # UTM at 3 deg from its central meridian on the equator: k = 0.9996 (1 + (3 deg in
    # radians)^2 / 2) = 1.00097 (Snyder 1987, USGS PP 1395, eq. 8-11, leading terms);
    # the other grids are closer still
    error = length_scale_error(dem.crs, (dem.bounds.left + dem.bounds.right) / 2,
                               (dem.bounds.bottom + dem.bounds.top) / 2)
    assert error is not None and error < 0.0011


@pytest.mark.parametrize("lat", [45.0, 8.0, -30.0])
def test_length_scale_error_of_web_mercator_is_the_secant_of_latitude(lat: float) -> None:
    # Mercator point scale k = h = sec(latitude) (Snyder 1987, Map Projections - A Working
    # Manual, USGS Professional Paper 1395, eq. 7-3); at 45 deg 1/cos(45 deg) = 1.414.
    # Web Mercator's spherical formulas on WGS 84 latitudes give that same sec(latitude)
    x, y = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3857",
                                       always_xy=True).transform(10.0, lat)
    expected = 1.0 / np.cos(np.radians(lat)) - 1.0
    assert length_scale_error("EPSG:3857", x, y) == pytest.approx(expected, rel=1e-6)  # rounding


def test_open_dem_refuses_web_mercator_away_from_the_equator(tmp_path: Path) -> None:
    path = _dem_at(tmp_path, "EPSG:3857", 10.0, 45.0)
    with pytest.raises(CRSError) as info:
        open_dem(path)
    message = str(info.value)
    assert "41 %" in message  # sec 45 deg = 1.414: lengths 41 % too long
    assert "EPSG:32632" in message  # the UTM zone of 10 deg E, north
    assert_one_sentence(message, "DEM")
    assert open_dem(path, check_scale=False).crs.to_epsg() == 3857  # the check alone refuses


def test_open_dem_warns_of_a_small_but_noticeable_scale_error(tmp_path: Path) -> None:
    # Web Mercator at 8 deg: sec 8 deg = 1.0098, lengths 1 % too long (between 0.5 and 2 %)
    path = _dem_at(tmp_path, "EPSG:3857", 10.0, 8.0)
    with pytest.warns(ProjectionScaleWarning, match="0.98 %"):
        open_dem(path)


def _rotated(tmp_path: Path) -> Path:
    return write_dem(tmp_path / "d.tif", np.ones((4, 4)),
                     transform=Affine.rotation(10) @ Affine(1, 0, 0, 0, -1, 4))


def _south_up(tmp_path: Path) -> Path:
    return write_dem(tmp_path / "d.tif", np.ones((4, 4)),
                     transform=Affine(1, 0, 100, 0, 1, 200))


def _text_file(tmp_path: Path) -> Path:
    path = tmp_path / "d.tif"
    path.write_text("not a raster\n")
    return path


def _without_geotransform(tmp_path: Path) -> Path:
    path = tmp_path / "d.tif"
    with warnings.catch_warnings():  # writing an ungeoreferenced file on purpose
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with rasterio.open(path, "w", driver="GTiff", width=4, height=4, count=1,
                           dtype="float32", crs="EPSG:32633") as dst:
            dst.write(np.ones((1, 4, 4), dtype="float32"))
    return path


def _ground_control_points_only(tmp_path: Path) -> Path:
    from rasterio.control import GroundControlPoint

    path = tmp_path / "d.tif"
    corners = [(0, 0, 500.0, 1004.0), (0, 4, 504.0, 1004.0), (4, 0, 500.0, 1000.0),
               (4, 4, 504.0, 1000.0)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with rasterio.open(path, "w", driver="GTiff", width=4, height=4, count=1,
                           dtype="float32") as dst:
            dst.write(np.ones((1, 4, 4), dtype="float32"))
            dst.gcps = ([GroundControlPoint(row=r, col=c, x=x, y=y) for r, c, x, y in corners],
                        rasterio.crs.CRS.from_epsg(32633))
    return path


@pytest.mark.parametrize(
    ("make", "error", "words"),
    [
        (_without_geotransform, InputError, "has no geotransform"),
        (_ground_control_points_only, InputError, "ground control points"),
    ],
    ids=["no-geotransform", "gcps-only"],
)
def test_open_dem_names_missing_georeferencing(tmp_path: Path, make, error, words) -> None:
    # before, these were refused as 'not stored north-up' or as having no CRS
    path = make(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with pytest.raises(error, match=words) as info:
            open_dem(path)
    assert_one_sentence(str(info.value), "DEM")


@pytest.mark.parametrize(
    ("make", "error"),
    [
        (lambda p: p / "missing.tif", InputFileError),
        (_text_file, InputFileError),
        (lambda p: write_dem(p / "d.tif", np.ones((4, 4)), crs=None), CRSError),
        (lambda p: write_dem(p / "d.tif", np.ones((4, 4)), crs="EPSG:4326", pixel_size=0.001,
                             origin=(15.0, 45.0)), CRSError),
        (lambda p: write_dem(p / "d.tif", np.ones((4, 4)),
                             crs="+proj=utm +zone=33 +datum=WGS84 +units=km +no_defs"), CRSError),
        (_rotated, InputError),
        (_south_up, InputError),
    ],
    ids=["missing", "not-a-raster", "no-crs", "geographic", "kilometre", "rotated", "south-up"],
)
def test_open_dem_errors(tmp_path: Path, make, error: type[NtransError]) -> None:
    path = make(tmp_path)
    before = sorted(tmp_path.iterdir())
    with pytest.raises(error) as info:
        open_dem(path)
    assert sorted(tmp_path.iterdir()) == before  # nothing written
    assert_one_sentence(str(info.value), "DEM")


def test_open_dem_multiband_uses_band_one(tmp_path: Path, caplog) -> None:
    data = np.stack([np.full((3, 3), 1.0), np.full((3, 3), 2.0)])
    path = write_dem(tmp_path / "d.tif", data)
    with caplog.at_level(logging.WARNING, logger="ntrans.inputs"):
        dem = open_dem(path)
    assert "only band 1" in caplog.text
    np.testing.assert_array_equal(dem.read_window(0, 0, 3, 3), 1.0)


# --------------------------------------------------------------------------- read_window


@pytest.mark.parametrize(
    ("nodata", "dtype"),
    [(-9999.0, "float32"), (None, "float32"), (float("nan"), "float64"), (-32768, "int16")],
)
def test_read_window_nodata_round_trip(tmp_path: Path, nodata, dtype: str) -> None:
    array = np.arange(20, dtype=float).reshape(4, 5) + 100.0
    array[1, 2] = np.nan
    array[3, 0] = np.nan
    path = write_dem(tmp_path / "d.tif", array, nodata=nodata, dtype=dtype)
    if nodata is None:  # float32 NaN written as is: NaN must stay NaN
        pass
    dem = open_dem(path)
    got = dem.read_window(0, 0, 4, 5)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(array))
    np.testing.assert_array_equal(got[~np.isnan(got)], array[~np.isnan(array)])
    assert got.dtype == np.float64


def test_rasters_kept_open_read_the_same_and_close_after(tmp_path: Path) -> None:
    from ntrans.inputs import rasters_kept_open

    array = np.arange(48, dtype=float).reshape(6, 8)
    path = write_dem(tmp_path / "d.tif", array)
    dem = open_dem(path)
    windows = [(-1, -1, 4, 4), (2, 3, 4, 5), (0, 0, 6, 8), (5, 7, 3, 3)]
    apart = [dem.read_window(*w) for w in windows]
    with rasters_kept_open():
        with rasters_kept_open():  # nested blocks share the outer one's handles
            kept = [dem.read_window(*w) for w in windows]
        kept.append(dem.read_window(*windows[0]))
    for a, b in zip(apart, kept, strict=False):
        np.testing.assert_array_equal(a, b)  # same pixels, NaN outside included
    np.testing.assert_array_equal(kept[-1], apart[0])
    # after the block nothing is held open: a rewritten file is read afresh
    write_dem(path, array + 1.0)
    np.testing.assert_array_equal(dem.read_window(0, 0, 6, 8), array + 1.0)


def test_read_window_outside_is_nan(tmp_path: Path) -> None:
    array = np.arange(12, dtype=float).reshape(3, 4)
    dem = open_dem(write_dem(tmp_path / "d.tif", array))
    got = dem.read_window(-1, -2, 5, 8)
    assert got.shape == (5, 8)
    np.testing.assert_array_equal(got[1:4, 2:6], array)
    outside = np.ones((5, 8), dtype=bool)
    outside[1:4, 2:6] = False
    assert np.isnan(got[outside]).all()
    assert np.isnan(dem.read_window(10, 10, 2, 2)).all()  # wholly outside
    assert dem.read_window(0, 0, 0, 3).shape == (0, 3)


@pytest.mark.parametrize(("scale", "offset", "dtype"),
                         [(0.01, 0.0, "int16"), (0.001, 40.0, "int16"), (0.5, -3.0, "float32")])
def test_read_window_applies_the_band_scale_and_offset(tmp_path: Path, scale: float,
                                                       offset: float, dtype: str) -> None:
    # GDAL's convention: a stored value v stands for v * scale + offset (an int16 DEM of
    # centimetres has scale 0.01); the nodata value is compared as stored
    elevation = np.array([[41.23, 42.5, 57.01], [44.0, np.nan, 45.67]])
    stored = np.round((elevation - offset) / scale)
    path = write_dem(tmp_path / "d.tif", stored, nodata=-32768, dtype=dtype)
    with rasterio.open(path, "r+") as dst:
        dst.scales = (scale,)
        dst.offsets = (offset,)
    got = open_dem(path).read_window(0, 0, 2, 3)
    assert np.isnan(got[1, 1]) and np.isnan(got).sum() == 1
    np.testing.assert_allclose(got, elevation, atol=scale)  # to the stored step


def test_read_window_gdal_mask(tmp_path: Path) -> None:
    """A GDAL per-dataset mask (no nodata value) is honoured."""
    path = write_dem(tmp_path / "d.tif", np.full((3, 3), 5.0), nodata=None)
    mask = np.full((3, 3), 255, dtype=np.uint8)
    mask[0, 0] = 0
    with rasterio.open(path, "r+") as dst:
        dst.write_mask(mask)
    got = open_dem(path).read_window(0, 0, 3, 3)
    assert np.isnan(got[0, 0])
    assert np.isnan(got).sum() == 1


def test_window_transform_and_bounds(tmp_dem: Path) -> None:
    dem = open_dem(tmp_dem)
    t = dem.window_transform(3, 4)
    assert (t.c, t.f) == (4.0, 27.0)  # 30 - 3 rows of 1 m
    assert dem.window_for_bounds((4.0, 20.0, 10.0, 27.0)) == (3, 4, 7, 6)
    assert dem.window_for_bounds((4.2, 20.5, 9.5, 26.9), pad=1) == (2, 3, 9, 8)
    assert dem.window_for_bounds((-5.0, 0.0, 1.0, 35.0)) == (-5, -5, 35, 6)


# --------------------------------------------------------------------------- read_cells


def test_read_cells_basic(tmp_dem: Path, tmp_cells: Path) -> None:
    dem = open_dem(tmp_dem)
    cells = read_cells(tmp_cells, dem=dem)
    assert isinstance(cells, CellLayer)
    assert len(cells) == 9
    assert cells.id_field == "cell_id"
    assert cells.ids.dtype == np.int64
    np.testing.assert_array_equal(cells.ids, np.arange(1, 10))
    assert list(cells.frame.index) == list(range(9))
    np.testing.assert_array_equal(cells.frame["cell_id"].to_numpy(), cells.ids)
    assert cells.covered_fraction is None
    expected = grid_polygons(3, 3, 10.0)
    assert all(shapely.equals(cells.geometry, expected))
    assert pyproj.CRS(cells.frame.crs).equals(dem.horizontal_crs)


@pytest.mark.parametrize("suffix", [".gpkg", ".shp", ".geojson", ".fgb"])
def test_read_cells_formats(tmp_path: Path, tmp_dem: Path, suffix: str) -> None:
    path = write_cells(tmp_path / f"c{suffix}", grid_polygons(3, 3, 10.0), ids=[11, 12, 13, 21,
                       22, 23, 31, 32, 33], attributes={"landuse": list("abcabcabc")})
    cells = read_cells(path, dem=open_dem(tmp_dem))
    np.testing.assert_array_equal(cells.ids, [11, 12, 13, 21, 22, 23, 31, 32, 33])
    assert list(cells.frame["landuse"]) == list("abcabcabc")
    # polygons come back identical up to ring orientation / start vertex
    assert all(shapely.equals(cells.geometry, grid_polygons(3, 3, 10.0)))


def test_read_cells_geoparquet(tmp_path: Path, tmp_dem: Path) -> None:
    """A GeoParquet mesh is read (with pyarrow; GDAL's Parquet driver is often missing),
    and a Parquet file without geometry is refused in one sentence."""
    import geopandas as gpd
    import pandas as pd

    path = tmp_path / "c.parquet"
    gpd.GeoDataFrame({"cell_id": [11, 12, 13, 21, 22, 23, 31, 32, 33]},
                     geometry=grid_polygons(3, 3, 10.0), crs="EPSG:32633").to_parquet(path)
    cells = read_cells(path, dem=open_dem(tmp_dem))
    np.testing.assert_array_equal(cells.ids, [11, 12, 13, 21, 22, 23, 31, 32, 33])
    assert all(shapely.equals(cells.geometry, grid_polygons(3, 3, 10.0)))
    plain = tmp_path / "plain.parquet"
    pd.DataFrame({"cell_id": [1]}).to_parquet(plain)
    with pytest.raises(InputFileError) as info:
        read_cells(plain, dem=open_dem(tmp_dem))
    assert_one_sentence(str(info.value), "cells")


def test_read_cells_shapefile_not_in_utf8(tmp_path: Path, tmp_dem: Path) -> None:
    """A Windows-1252 Shapefile without its .cpg loads with its text intact: Shapefiles
    are read without Arrow, which would pass the bytes on as invalid UTF-8."""
    import geopandas as gpd

    path = tmp_path / "c.shp"
    names = ["Müller", "Ødegård"] + ["x"] * 7
    gpd.GeoDataFrame({"cell_id": range(1, 10), "owner": names},
                     geometry=grid_polygons(3, 3, 10.0), crs="EPSG:32633").to_file(
        path, engine="pyogrio", encoding="cp1252")
    path.with_suffix(".cpg").unlink()
    cells = read_cells(path, dem=open_dem(tmp_dem))
    np.testing.assert_array_equal(cells.ids, np.arange(1, 10))
    assert list(cells.frame["owner"])[:2] == ["Müller", "Ødegård"]


def test_read_cells_flatgeobuf_spatial_index(tmp_path: Path, tmp_dem: Path) -> None:
    """An indexed FlatGeobuf returns features in index order: ids stay with their polygon."""
    import geopandas as gpd

    polys = grid_polygons(3, 3, 10.0)
    path = tmp_path / "c.fgb"
    gpd.GeoDataFrame({"cell_id": range(1, 10)}, geometry=polys, crs="EPSG:32633").to_file(
        path, engine="pyogrio", layer_options={"SPATIAL_INDEX": "YES"})
    cells = read_cells(path, dem=open_dem(tmp_dem))
    assert sorted(cells.ids.tolist()) == list(range(1, 10))
    expected = np.array(polys, dtype=object)[cells.ids - 1]
    assert all(shapely.equals(cells.geometry, expected))


#: UTM 33N on the international ellipsoid, its datum shift given only as three numbers:
#: PROJ cannot say how accurate that shift is
_OWN_DATUM = "+proj=utm +zone=33 +ellps=intl +towgs84=-87,-98,-121,0,0,0,0 +units=m +no_defs"


@pytest.mark.parametrize(("crs", "warns"), [
    (_OWN_DATUM, True),   # a datum shift of unknown accuracy
    ("EPSG:4326", False),  # the DEM's own datum: a conversion, exact
])
def test_read_cells_warns_of_a_coarse_datum_shift(tmp_path: Path, tmp_dem: Path, crs: str,
                                                  warns: bool) -> None:
    import geopandas as gpd

    from ntrans.errors import ReprojectionAccuracyWarning

    frame = gpd.GeoDataFrame({"cell_id": range(1, 10)}, geometry=grid_polygons(3, 3, 10.0),
                             crs="EPSG:32633").to_crs(crs)
    path = tmp_path / "c.gpkg"
    frame.to_file(path, engine="pyogrio")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        read_cells(path, dem=open_dem(tmp_dem))
    found = [w for w in caught if issubclass(w.category, ReprojectionAccuracyWarning)]
    assert len(found) == (1 if warns else 0)
    if warns:
        assert "unknown accuracy" in str(found[0].message)


def test_transformation_accuracy_is_that_of_the_datum_shift() -> None:
    from ntrans.inputs import transformation_accuracy

    # EPSG states the accuracy of every datum transformation; a conversion is exact
    found = transformation_accuracy(pyproj.CRS("EPSG:4326"), pyproj.CRS("EPSG:32633"), 15, 45)
    assert found is not None and found[1] == 0.0
    found = transformation_accuracy(pyproj.CRS(_OWN_DATUM), pyproj.CRS("EPSG:32633"),
                                    500_000, 5_000_000)
    assert found is not None and found[1] < 0  # unknown


def test_read_cells_reprojects(tmp_path: Path, tmp_dem: Path) -> None:
    """Cells drawn in another CRS are moved into the DEM's CRS."""
    dem_crs = "EPSG:32633"
    polys = grid_polygons(3, 3, 10.0, origin=(500000.0, 5000000.0))
    dem = open_dem(write_dem(tmp_path / "d.tif", np.ones((30, 30)),
                             origin=(500000.0, 5000030.0), crs=dem_crs))
    to_ll = pyproj.Transformer.from_crs(dem_crs, "EPSG:4326", always_xy=True)
    ll = [shapely.transform(p, lambda xy: np.column_stack(to_ll.transform(xy[:, 0], xy[:, 1])))
          for p in polys]
    path = write_cells(tmp_path / "c.gpkg", ll, crs="EPSG:4326")
    cells = read_cells(path, dem=dem)
    got = shapely.get_coordinates(cells.geometry)
    want = shapely.get_coordinates(np.array(polys, dtype=object))
    # double round trip through geographic coordinates: well below a millimetre
    np.testing.assert_allclose(got, want, atol=1e-3)


@pytest.mark.parametrize(
    ("columns", "id_field", "expected_field", "expected_ids"),
    [
        ({"id": [5, 6, 7]}, None, "id", [5, 6, 7]),
        ({"ID": [5, 6, 7]}, None, "ID", [5, 6, 7]),
        ({"cell_id": [1, 2, 3], "id": [5, 6, 7]}, None, "cell_id", [1, 2, 3]),
        ({"name": ["a", "b", "c"]}, None, "cell_id", [0, 1, 2]),  # row numbers
        ({"name": ["a", "b", "c"]}, "name", "name", ["a", "b", "c"]),
        ({"code": [1.0, 2.0, 3.0]}, "code", "code", [1, 2, 3]),  # whole floats -> int64
    ],
)
def test_read_cells_id_field(tmp_path, tmp_dem, columns, id_field, expected_field,
                             expected_ids) -> None:
    path = write_cells(tmp_path / "c.gpkg", grid_polygons(3, 1, 10.0), id_field=None,
                       attributes=columns)
    cells = read_cells(path, dem=open_dem(tmp_dem), id_field=id_field)
    assert cells.id_field == expected_field
    assert cells.ids.tolist() == expected_ids
    assert cells.frame[expected_field].tolist() == expected_ids
    if isinstance(expected_ids[0], str):
        assert cells.ids.dtype == object
    else:
        assert cells.ids.dtype == np.int64


def test_read_cells_gpkg_fid(tmp_path: Path, tmp_dem: Path) -> None:
    path = write_cells(tmp_path / "c.gpkg", grid_polygons(3, 1, 10.0), id_field=None,
                       attributes={"name": ["a", "b", "c"]})
    cells = read_cells(path, dem=open_dem(tmp_dem), id_field="fid")
    assert cells.ids.tolist() == [1, 2, 3]  # GeoPackage feature ids start at 1


def _bowtie(x0: float, y0: float) -> shapely.Polygon:
    return shapely.Polygon([(x0, y0), (x0 + 2, y0 + 2), (x0 + 2, y0), (x0, y0 + 2)])


BAD_CELLS = {
    "missing-file": ("missing.gpkg", None, {}, InputFileError),
    "empty-layer": ("c.gpkg", [], {}, GeometryError),
    "null-geometry": ("c.gpkg", [shapely.box(0, 0, 5, 5), None], {}, GeometryError),
    "empty-geometry": ("c.gpkg", [shapely.box(0, 0, 5, 5), shapely.Polygon()], {}, GeometryError),
    "points": ("c.gpkg", [shapely.Point(1, 1), shapely.Point(2, 2)], {}, GeometryError),
    "lines": ("c.gpkg", [shapely.LineString([(0, 0), (5, 5)])], {}, GeometryError),
    "no-crs": ("c.shp", grid_polygons(2, 1, 5.0), {"crs": None}, CRSError),
    "duplicate-ids": ("c.gpkg", grid_polygons(3, 1, 5.0), {"ids": [1, 2, 1]}, InputError),
    "null-id": ("c.gpkg", grid_polygons(2, 1, 5.0), {"ids": ["a", None]}, InputError),
    "fractional-id": ("c.gpkg", grid_polygons(2, 1, 5.0), {"ids": [1.5, 2.0]}, InputError),
    "overlap": ("c.gpkg", [shapely.box(0, 0, 10, 10), shapely.box(5, 0, 15, 10)], {},
                GeometryError),
    "contained": ("c.gpkg", [shapely.box(0, 0, 10, 10), shapely.box(2, 2, 4, 4)], {},
                  GeometryError),
    "duplicate-polygon": ("c.gpkg", [shapely.box(0, 0, 10, 10)] * 2, {}, GeometryError),
    "off-the-dem": ("c.gpkg", grid_polygons(2, 2, 5.0, origin=(100.0, 100.0)), {}, InputError),
    "zero-area": ("c.gpkg", [shapely.box(0, 0, 5, 5),
                             shapely.Polygon([(6, 6), (7, 7), (8, 8)])], {}, GeometryError),
}


@pytest.mark.parametrize("case", list(BAD_CELLS))
def test_read_cells_errors(tmp_path: Path, tmp_dem: Path, case: str) -> None:
    name, polygons, options, error = BAD_CELLS[case]
    folder = tmp_path / "cells"
    folder.mkdir()
    path = folder / name
    if polygons is not None:
        if polygons:
            write_cells(path, polygons, **options)
        else:  # an empty layer needs an explicit geometry type
            import geopandas as gpd

            gpd.GeoDataFrame({"cell_id": []}, geometry=gpd.GeoSeries([], crs="EPSG:32633")).to_file(
                path, engine="pyogrio", geometry_type="Polygon"
            )
    before = sorted(folder.iterdir())
    dem = open_dem(tmp_dem)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GeometryRepairedWarning)
        with pytest.raises(error) as info:
            read_cells(path, dem=dem)
    assert sorted(folder.iterdir()) == before  # nothing written
    assert_one_sentence(str(info.value))


def test_read_cells_missing_id_field(tmp_path: Path, tmp_dem: Path) -> None:
    path = write_cells(tmp_path / "c.gpkg", grid_polygons(2, 1, 5.0), layer="mesh")
    with pytest.raises(InputError) as info:
        read_cells(path, dem=open_dem(tmp_dem), id_field="zone")
    assert "cell_id" in str(info.value)  # lists the fields there are
    assert "layer 'mesh'" in str(info.value)  # and says which layer they are of
    assert_one_sentence(str(info.value), "id")


def test_read_cells_unreadable(tmp_path: Path, tmp_dem: Path) -> None:
    path = tmp_path / "c.gpkg"
    path.write_bytes(b"\x00garbage" * 10)
    with pytest.raises(InputFileError):
        read_cells(path, dem=open_dem(tmp_dem))


def test_read_cells_layers(tmp_path: Path, tmp_dem: Path) -> None:
    path = tmp_path / "c.gpkg"
    write_cells(path, [shapely.Point(1, 1)], layer="gauges")
    write_cells(path, grid_polygons(2, 1, 5.0), layer="mesh")
    dem = open_dem(tmp_dem)
    assert len(read_cells(path, dem=dem, layer="mesh")) == 2
    assert len(read_cells(path, dem=dem, layer=1)) == 2
    with pytest.raises(GeometryError):
        read_cells(path, dem=dem, layer="gauges")
    with pytest.raises(InputError):
        read_cells(path, dem=dem, layer="nothing")


def test_read_cells_from_several_layers_needs_the_layer_name(tmp_path: Path,
                                                             tmp_dem: Path) -> None:
    # two polygon layers: neither may be taken for the cells without being named
    path = tmp_path / "c.gpkg"
    write_cells(path, [shapely.box(0, 0, 30, 30)], id_field=None, layer="landcover",
                attributes={"landcover": ["grass"]})
    write_cells(path, grid_polygons(3, 3, 10.0), layer="cells")
    dem = open_dem(tmp_dem)
    with pytest.raises(InputError) as info:
        read_cells(path, dem=dem)
    message = str(info.value)
    assert "landcover" in message and "cells" in message and "--cells-layer" in message
    assert_one_sentence(message, "cells")
    assert len(read_cells(path, dem=dem, layer="cells")) == 9


def test_read_cells_skips_tables_without_geometry(tmp_path: Path, tmp_dem: Path) -> None:
    import pandas as pd
    import pyogrio

    path = write_cells(tmp_path / "c.gpkg", grid_polygons(3, 3, 10.0), layer="cells")
    pyogrio.write_dataframe(pd.DataFrame({"note": ["made by hand"]}), path, layer="notes")
    assert len(pyogrio.list_layers(path)) == 2
    assert len(read_cells(path, dem=open_dem(tmp_dem))) == 9  # the one layer with geometry


@pytest.mark.parametrize(
    ("name", "where"),
    [
        # a GeoPackage numbers its features from 1 (fid): the 2nd and 4th are 2 and 4
        ("c.gpkg", "features 2, 4 by GeoPackage fid"),
        # GeoJSON has no fid column: positions from 0
        ("c.geojson", "features at positions 1, 3 counted from 0"),
    ],
)
def test_read_cells_null_ids_say_how_to_find_them(tmp_path: Path, tmp_dem: Path, name: str,
                                                  where: str) -> None:
    path = write_cells(tmp_path / name, grid_polygons(2, 2, 5.0), ids=["a", None, "c", None])
    with pytest.raises(InputError) as info:
        read_cells(path, dem=open_dem(tmp_dem))
    assert where in str(info.value)
    assert_one_sentence(str(info.value), "id")


def test_read_cells_repairs_invalid(tmp_path: Path, tmp_dem: Path) -> None:
    polys = [shapely.box(0, 0, 5, 5), _bowtie(10, 10), shapely.box(20, 20, 25, 25)]
    path = write_cells(tmp_path / "c.gpkg", polys, ids=["a", "b", "c"])
    with pytest.warns(GeometryRepairedWarning, match="b"):
        cells = read_cells(path, dem=open_dem(tmp_dem))
    assert shapely.is_valid(cells.geometry).all()
    assert cells.geometry[1].geom_type == "MultiPolygon"
    # two triangles of base 2 and height 1: 2 * (2 * 1 / 2) = 2 (geometry identity)
    assert cells.geometry[1].area == pytest.approx(2.0, abs=1e-12)  # float rounding only
    assert cells.geometry[0].equals(polys[0])


def test_read_cells_overlap_within_tolerance(tmp_path: Path, tmp_dem: Path) -> None:
    """Slivers from digitising below the tolerance are accepted."""
    polys = [shapely.box(0, 0, 10, 10), shapely.box(9.95, 0, 20, 10)]  # 0.5 % of 100 m2
    path = write_cells(tmp_path / "c.gpkg", polys)
    dem = open_dem(tmp_dem)
    assert len(read_cells(path, dem=dem)) == 2
    with pytest.raises(GeometryError):
        read_cells(path, dem=dem, overlap_tolerance=0.001)


@pytest.mark.parametrize("offset, overlapping", [(5.0, True), (10.0, False)])
def test_read_cells_overlap_check_in_background(tmp_path: Path, tmp_dem: Path, offset,
                                                overlapping) -> None:
    """The background check finds the same overlap, when the caller asks for it."""
    polys = [shapely.box(0, 0, 10, 10), shapely.box(offset, 0, offset + 10, 10)]
    dem = open_dem(tmp_dem)
    cells = read_cells(write_cells(tmp_path / "c.gpkg", polys), dem=dem,
                       overlaps_in_background=True)
    assert len(cells) == 2  # the layer comes back at once
    if overlapping:
        with pytest.raises(GeometryError):
            cells.finish_checks()
    else:
        cells.finish_checks()
    cells.finish_checks()  # reported once; later calls have nothing left to wait for
    cells.raise_if_checks_failed()


def test_read_cells_non_conforming_mesh(tmp_path: Path, tmp_dem: Path) -> None:
    """A refined (quadtree-like) mesh with hanging nodes is no overlap; a sliver is."""
    polys = [shapely.box(0, 0, 10, 10), shapely.box(10, 0, 15, 5), shapely.box(15, 0, 20, 5),
             shapely.box(10, 5, 15, 10), shapely.box(15, 5, 20, 10)]
    dem = open_dem(tmp_dem)
    assert len(read_cells(write_cells(tmp_path / "a.gpkg", polys), dem=dem)) == 5
    polys[3] = shapely.box(9.0, 5, 15, 10)  # reaches 1 m into the big cell: 5 m2 of 30 m2
    with pytest.raises(GeometryError, match="1/4"):  # names the offending id pair
        read_cells(write_cells(tmp_path / "b.gpkg", polys), dem=dem)


def _grid3() -> list:
    """A 3 x 3 grid of 10 m squares; the centre one (index 4) has only shared edges."""
    return [shapely.box(10 * c, 10 * r, 10 * c + 10, 10 * r + 10)
            for r in range(3) for c in range(3)]


@pytest.mark.parametrize(
    "case, flagged",
    [
        ("grid", {0, 1, 2, 3, 5, 6, 7, 8}),  # the outer border is not shared
        ("centre reversed", {0, 1, 2, 3, 5, 6, 7, 8}),  # ring direction does not matter
        ("centre duplicated", set(range(10))),  # each edge three times
        ("centre split", set(range(10))),  # hanging nodes: no exact partner
        ("hole filled", {0}),  # a hole filled by a cell is shared like any edge
        ("multipart", {0, 1, 2, 3, 5, 6, 7, 8}),  # a one-part MultiPolygon is read the same
    ],
)
@pytest.mark.parametrize("hash_path", ["hash", "collisions"])
def test_edges_not_shared(case: str, flagged: set, hash_path: str, monkeypatch) -> None:
    """Geometry identity: in a coverage every interior edge appears twice, once per direction."""
    import ntrans.inputs as inputs
    from ntrans.inputs import _edges_not_shared

    if hash_path == "collisions":  # every edge gets hash 0: the exact sort takes over
        monkeypatch.setattr(inputs, "_HASH_MULTIPLIER", np.uint64(0))

    polys = _grid3()
    if case == "centre reversed":
        polys[4] = shapely.reverse(polys[4])
    elif case == "centre duplicated":
        polys.append(polys[4])
    elif case == "centre split":
        polys[4] = shapely.box(10, 10, 20, 15)
        polys.append(shapely.box(10, 15, 20, 20))
    elif case == "hole filled":
        polys = [shapely.box(0, 0, 30, 30).difference(shapely.box(10, 10, 20, 20)),
                 shapely.box(10, 10, 20, 20)]
    elif case == "multipart":
        polys[4] = shapely.MultiPolygon([polys[4]])
    got = _edges_not_shared(np.array(polys, dtype=object))
    assert set(np.flatnonzero(got).tolist()) == flagged


@pytest.mark.parametrize("multiplier", [None, 0, 1])  # None: the module's; 0, 1: collisions
@pytest.mark.parametrize("seed", [0, 1])
def test_group_equal_matches_unique(multiplier, seed: int, monkeypatch) -> None:
    """Groups of equal tuples are those np.unique finds, whatever the hash does; -0.0
    equals 0.0 (a shared vertex at a zero coordinate may carry either sign)."""
    import ntrans.inputs as inputs

    if multiplier is not None:
        monkeypatch.setattr(inputs, "_HASH_MULTIPLIER", np.uint64(multiplier))
    rng = np.random.default_rng(seed)
    values = [rng.integers(0, 3, 500).astype(float) * 0.1 for _ in range(4)]  # many repeats
    for v in values:  # half the zeros negative
        v[(v == 0) & (rng.random(500) < 0.5)] = -0.0
    order, new = inputs._group_equal(values)
    tuples = np.stack(values, axis=1)[order]
    assert sorted(order.tolist()) == list(range(500))
    # each group is one tuple, and each tuple one group
    assert np.array_equal(new[1:], (tuples[1:] != tuples[:-1]).any(axis=1))
    assert new.sum() == np.unique(tuples, axis=0).shape[0]


@pytest.mark.parametrize("block", [1, 2, 4, 9])
def test_edges_not_shared_in_slabs_flags_more_never_less(block: int) -> None:
    """Slabs of a few polygons only add flags (edges on a slab border find no partner)."""
    from ntrans.inputs import _edges_not_shared

    polys = np.array(_grid3() + [shapely.box(25, 5, 35, 15)], dtype=object)  # 10 overlaps 5
    whole = _edges_not_shared(polys)
    slabs = _edges_not_shared(polys, block=block)
    assert not (whole & ~slabs).any()
    assert slabs[[5, 9]].all()  # the overlapping pair is flagged either way


def test_overlap_found_across_slab_borders(monkeypatch) -> None:
    import ntrans.inputs as inputs

    monkeypatch.setattr(inputs, "EDGE_SCREEN_POLYGONS", 2)
    polys = _grid3()
    polys[4] = shapely.box(10, 10, 23, 20)  # reaches 3 m into cell 5: 30 m2 of 100 m2
    with pytest.raises(GeometryError, match="5/6"):
        inputs._check_overlaps(np.array(polys, dtype=object), np.arange(1, 10), 0.01)


def _voronoi_cells(n: int, seed: int) -> list:
    """A conforming mesh: the Voronoi cells of ``n`` random points, clipped to 100 x 100."""
    rng = np.random.default_rng(seed)
    points = shapely.multipoints(rng.uniform(0, 100, (n, 2)))
    frame = shapely.box(0, 0, 100, 100)
    cells = shapely.get_parts(shapely.voronoi_polygons(points, extend_to=frame))
    return list(shapely.intersection(cells, frame))


def _worst_overlap(polys: list, tolerance: float):
    """Brute force over every pair: (fraction, i, j) of the largest overlap beyond the
    tolerance (shared area over the smaller cell's area), or None."""
    worst = None
    for a in range(len(polys)):
        for b in range(a + 1, len(polys)):
            shared = polys[a].intersection(polys[b]).area
            fraction = shared / min(polys[a].area, polys[b].area)
            if fraction > tolerance and (worst is None or fraction > worst[0]):
                worst = (fraction, a, b)
    return worst


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("change", ["none", "grown", "duplicate", "inside", "shifted",
                                    "second mesh"])
def test_check_overlaps_matches_brute_force(seed: int, change: str) -> None:
    """The screened check raises exactly when some pair overlaps beyond the tolerance
    (geometry identity: every pair's shared area, computed by brute force).  It names
    the worst pair first where a cell along a border that is not shared holds it; two
    whole meshes over one square are reported by their border cells (every interior
    edge of each is shared), which overlap too."""
    import ntrans.inputs as inputs

    polys = _voronoi_cells(40, seed)
    k = 7
    if change == "grown":
        polys[k] = polys[k].buffer(1.5)
    elif change == "duplicate":
        polys.append(polys[k])
    elif change == "inside":
        polys.append(polys[k].centroid.buffer(0.5))
    elif change == "shifted":  # a cell slid sideways by 20 % of its width
        x0, _, x1, _ = polys[k].bounds
        polys[k] = shapely.affinity.translate(polys[k], 0.2 * (x1 - x0), 0)
    elif change == "second mesh":  # another conforming mesh over the same square
        polys += _voronoi_cells(25, seed + 10)
    ids = np.arange(1, len(polys) + 1)
    worst = _worst_overlap(polys, 0.01)
    if worst is None:
        inputs._check_overlaps(np.array(polys, dtype=object), ids, 0.01)
        assert change == "none"
        return
    _, a, b = worst
    with pytest.raises(GeometryError, match=r"pairs (\d+)/(\d+) ") as raised:
        inputs._check_overlaps(np.array(polys, dtype=object), ids, 0.01)
    named = re.search(r"pairs (\d+)/(\d+) ", str(raised.value)).groups()
    a_named, b_named = (int(v) - 1 for v in named)
    shared = polys[a_named].intersection(polys[b_named]).area
    assert shared / min(polys[a_named].area, polys[b_named].area) > 0.01  # a real overlap
    if change != "second mesh":
        assert (a_named, b_named) == (a, b)


def test_read_cells_keeps_cells_off_the_dem(tmp_path: Path, tmp_dem: Path) -> None:
    polys = [shapely.box(0, 0, 10, 10), shapely.box(25, 25, 35, 35), shapely.box(50, 50, 60, 60)]
    cells = read_cells(write_cells(tmp_path / "c.gpkg", polys), dem=open_dem(tmp_dem))
    assert cells.ids.tolist() == [1, 2, 3]


def test_read_cells_string_ids(tmp_path: Path, tmp_dem: Path) -> None:
    path = write_cells(tmp_path / "c.fgb", grid_polygons(2, 1, 5.0), ids=["x1", "x2"])
    cells = read_cells(path, dem=open_dem(tmp_dem))
    assert cells.ids.dtype == object
    assert cells.ids.tolist() == ["x1", "x2"]


# --------------------------------------------------------------------------- water surfaces


def test_water_surface_same_grid(tmp_path: Path, tmp_dem: Path) -> None:
    dem = open_dem(tmp_dem)
    ws_values = tilted_plane(30, 30, z0=12.0)
    ws_values[0, 0] = np.nan
    ws = open_water_surface(write_dem(tmp_path / "peak.tif", ws_values), dem=dem)
    assert ws.name == "peak"
    got = ws.on_dem_window(dem, -1, -1, 4, 4)
    assert np.isnan(got[0, :]).all() and np.isnan(got[:, 0]).all()  # outside the raster
    assert np.isnan(got[1, 1])  # nodata pixel
    np.testing.assert_allclose(got[1:, 1:].ravel()[1:], ws_values[:3, :3].ravel()[1:],
                               rtol=1e-6)  # float32 storage


def test_water_surface_sample_points(tmp_path: Path, tmp_dem: Path) -> None:
    dem = open_dem(tmp_dem)
    ws_values = tilted_plane(30, 30, z0=12.0)
    ws_values[10, 10] = np.nan  # pixel covering x in [10, 11], y in [19, 20]
    path = write_dem(tmp_path / "ws.tif", ws_values, dtype="float64")
    x = np.array([5.3, 14.9, 10.5, -1.0, 20.0, 0.2])
    y = np.array([7.7, 22.1, 19.5, 5.0, 40.0, 29.9])
    got = sample_water_surface(path, dem, x, y)
    plane = 12.0 + PLANE_SX * x + PLANE_SY * y
    # bilinear interpolation reproduces a plane exactly (geometry identity); 1e-9 = rounding
    np.testing.assert_allclose(got[[0, 1]], plane[[0, 1]], atol=1e-9)
    assert np.isnan(got[2])  # own pixel is nodata
    assert np.isnan(got[3]) and np.isnan(got[4])  # outside
    # corner pixel: its three other neighbours lie outside, so the renormalised weights
    # leave the own pixel's (centre) value
    assert got[5] == pytest.approx(ws_values[0, 0], abs=1e-9)  # float64 storage
    nearest = sample_water_surface(path, dem, x, y, method="nearest")
    centres = 12.0 + PLANE_SX * (np.floor(x[:2]) + 0.5) + PLANE_SY * (np.floor(y[:2]) + 0.5)
    np.testing.assert_allclose(nearest[:2], centres, atol=1e-9)  # pixel-centre value


def test_water_surface_other_crs(tmp_path: Path) -> None:
    """Points are reprojected into the water-surface raster's CRS before sampling."""
    dem = open_dem(write_dem(tmp_path / "d.tif", np.ones((20, 20)), pixel_size=10.0,
                             origin=(500000.0, 5000200.0), crs="EPSG:32633"))
    to_b = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:3035", always_xy=True)
    bx, by = to_b.transform([499900.0, 500300.0], [5000300.0, 4999900.0])
    x0, y1 = min(bx), max(by)
    rows = cols = 60
    size = (max(bx) - x0) / cols + 1.0
    b_plane = tilted_plane(rows, cols, pixel_size=size, origin=(0.0, rows * size), z0=3.0,
                           sx=0.01, sy=-0.02)
    ws_path = write_dem(tmp_path / "ws.tif", b_plane, pixel_size=size, origin=(x0, y1),
                        crs="EPSG:3035", dtype="float64")
    x = np.array([500050.0, 500120.0, 500190.0])
    y = np.array([5000020.0, 5000100.0, 5000170.0])
    got = sample_water_surface(ws_path, dem, x, y)
    px, py = to_b.transform(x, y)
    expected = 3.0 + 0.01 * (np.asarray(px) - x0) - 0.02 * (np.asarray(py) - (y1 - rows * size))
    # bilinear is exact on a plane (geometry identity); tolerance = float rounding
    np.testing.assert_allclose(got, expected, atol=1e-7)
    on_grid = open_water_surface(ws_path, dem=dem).on_dem_window(dem, 0, 0, 20, 20)
    assert on_grid.shape == (20, 20) and np.isfinite(on_grid).all()


def test_read_water_surfaces_names_and_errors(tmp_path: Path, tmp_dem: Path) -> None:
    dem = open_dem(tmp_dem)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    p1 = write_dem(tmp_path / "a" / "peak.tif", np.ones((3, 3)))
    p2 = write_dem(tmp_path / "b" / "peak.tif", np.ones((3, 3)))
    assert [w.name for w in read_water_surfaces([p1, p2], dem=dem)] == ["peak", "peak_2"]
    with pytest.raises(InputFileError):
        read_water_surfaces([tmp_path / "none.tif"], dem=dem)
    with pytest.raises(CRSError):
        read_water_surfaces([write_dem(tmp_path / "x.tif", np.ones((3, 3)), crs=None)], dem=dem)
    with pytest.raises(InputError):
        read_water_surfaces([], dem=dem)


@pytest.mark.parametrize(
    ("origin", "crs", "reaches"),
    [
        ((0.0, 30.0), "EPSG:32633", True),        # on the DEM
        ((25.0, 55.0), "EPSG:32633", True),       # overlaps one corner of the mesh
        ((30.0, 30.0), "EPSG:32633", False),      # touches the mesh's east edge only
        ((1000.0, 30.0), "EPSG:32633", False),    # 1 km east
        ((0.0, 30.0), "EPSG:32632", False),       # the same numbers in the next UTM zone
    ],
)
def test_water_surface_off_the_mesh_is_refused(tmp_path: Path, tmp_dem: Path, origin, crs,
                                                reaches) -> None:
    dem = open_dem(tmp_dem)
    ws = read_water_surfaces([write_dem(tmp_path / "ws.tif", np.full((30, 30), 12.0),
                                        origin=origin, crs=crs)], dem=dem)
    mesh = (0.0, 0.0, 30.0, 30.0)
    if reaches:
        check_water_surfaces_reach(ws, dem, mesh)
        return
    with pytest.raises(InputError) as err:
        check_water_surfaces_reach(ws, dem, mesh)
    assert_one_sentence(str(err.value), "water")


# --------------------------------------------------------------------------- output guard


@pytest.mark.parametrize(
    ("out", "inputs"),
    [
        ("dem.tif", ["dem.tif"]),  # the output folder is the input file
        ("data", ["data/cells.gpkg"]),  # replacing the folder would delete the input
        (".", ["cells.gpkg"]),
        ("model.gdb/out", ["model.gdb"]),  # inside a folder-style dataset
    ],
)
def test_check_output_not_input_refuses(tmp_path: Path, out: str, inputs: list[str]) -> None:
    with pytest.raises(OutputError):
        check_output_not_input(tmp_path / out, [tmp_path / p for p in inputs])


def test_check_output_not_input_allows(tmp_path: Path) -> None:
    check_output_not_input(tmp_path / "out", [tmp_path / "dem.tif", None, "/vsimem/x.tif",
                                              tmp_path / "outside" / "c.gpkg"])


# --------------------------------------------------------------------------- window reads


def _raster(path, values, dtype, nodata, *, mask=None):
    profile = {"driver": "GTiff", "width": values.shape[1], "height": values.shape[0],
               "count": 1, "dtype": dtype, "crs": "EPSG:32633", "nodata": nodata,
               "transform": Affine(1.0, 0.0, 0.0, 0.0, -1.0, float(values.shape[0]))}
    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True), rasterio.open(path, "w", **profile) as dst:
        dst.write(values.astype(dtype), 1)
        if mask is not None:
            dst.write_mask(mask)
    return str(path)


@pytest.mark.parametrize(
    "dtype, nodata, mask",
    [
        ("float32", -9999.0, False),
        ("float32", -3.4e38, False),  # not a float32 value: GDAL masks float32(-3.4e38)
        ("float32", float("nan"), False),
        ("float32", None, False),  # no mask: NaN pixels stay NaN
        ("float64", -9999.0, False),
        ("int16", -32768, False),
        ("uint8", 0, False),
        ("float32", None, True),  # an internal mask band (per dataset)
    ],
)
def test_window_read_masks_what_gdal_masks(tmp_path, dtype, nodata, mask):
    from ntrans.inputs import _read_band1

    rng = np.random.default_rng(3)
    values = rng.integers(1, 200, size=(20, 30)).astype(np.float64)
    if nodata is not None and not (isinstance(nodata, float) and np.isnan(nodata)):
        values[::4, ::3] = nodata
    if dtype.startswith("float"):
        values[5, 6] = np.nan  # inside the window read below
    band_mask = None
    if mask:
        band_mask = np.full(values.shape, 255, dtype=np.uint8)
        band_mask[5:9, 10:14] = 0
    path = _raster(tmp_path / "d.tif", values, dtype, nodata, mask=band_mask)
    got = _read_band1(path, 2, 3, 15, 25, (20, 30))
    # reference: GDAL's own mask, through rasterio's masked read
    with rasterio.open(path) as src:
        ref = src.read(1, masked=True)
    want = np.ma.filled(ref.astype(np.float64), np.nan)[2:17, 3:28]
    np.testing.assert_array_equal(got, want)
    assert np.isnan(got).any() == (nodata is not None or mask or dtype.startswith("float"))


def test_nodata_no_pixel_of_the_type_can_hold_masks_nothing():
    from ntrans.inputs import _equals_nodata

    raw = np.array([0, 7, 255], dtype=np.uint8)
    assert _equals_nodata(raw, -9999.0) is None  # outside uint8
    assert _equals_nodata(raw, 7.5) is None  # not an integer
    assert _equals_nodata(raw, float("nan")) is None  # integers are never NaN
    np.testing.assert_array_equal(_equals_nodata(raw, 7.0), [False, True, False])
    f32 = np.array([np.float32(-3.4e38), -3.4e38, 1.0], dtype=np.float32)
    np.testing.assert_array_equal(_equals_nodata(f32, -3.4e38), [True, True, False])


def test_cells_over_the_dem_by_interior_not_by_border(tmp_path, caplog):
    # geometry identity: a cell counts as over the DEM when its interior meets the DEM's
    # extent; one sharing only a border or a corner with it, or lying apart, does not
    dem = open_dem(write_dem(tmp_path / "d.tif", np.ones((4, 4))))
    x0, y0, x1, y1 = dem.bounds
    cells = [
        shapely.box(x0 + 1, y0 + 1, x0 + 2, y0 + 2),  # inside
        shapely.box(x1 - 1, y0 + 1, x1 + 1, y0 + 2),  # across the right border
        shapely.box(x1, y0 + 2.5, x1 + 1, y0 + 3),  # shares the right border only
        shapely.box(x0 - 1, y1, x0, y1 + 1),  # shares the top-left corner only
        shapely.box(x1 + 5, y1 + 5, x1 + 6, y1 + 6),  # apart
        shapely.Polygon([(x0 - 1, y0 + 2), (x0 + 0.5, y0 + 2), (x0 - 1, y0 + 3.5)]),  # into it
    ]
    path = write_cells(tmp_path / "c.gpkg", cells, ids=list(range(len(cells))))
    with caplog.at_level(logging.INFO, logger="ntrans"):
        layer = read_cells(path, dem=dem)
    assert len(layer.ids) == len(cells)  # all kept
    assert "3 cells lie wholly outside the DEM" in caplog.text
    with pytest.raises(InputError, match="none of the 3 cells"):
        read_cells(write_cells(tmp_path / "out.gpkg", cells[2:5], ids=[2, 3, 4]), dem=dem)


def test_cells_with_z_coordinates_are_read_in_plan(tmp_path):
    # cells drawn with elevations (PolygonZ) are used in plan: same area and same layer
    # as the same cells without Z
    dem = open_dem(write_dem(tmp_path / "d.tif", np.ones((4, 4))))
    x0, y0, _, _ = dem.bounds
    flat = [shapely.box(x0, y0, x0 + 2, y0 + 2), shapely.box(x0 + 2, y0, x0 + 4, y0 + 2)]
    with_z = [shapely.force_3d(g, 7.5) for g in flat]
    a = read_cells(write_cells(tmp_path / "z.gpkg", with_z), dem=dem)
    b = read_cells(write_cells(tmp_path / "f.gpkg", flat), dem=dem)
    assert not shapely.has_z(a.geometry).any()
    assert shapely.equals_exact(a.geometry, b.geometry, tolerance=0).all()


# --------------------------------------------------------------------------- raster sessions


@pytest.mark.parametrize("change", ["replace", "rewrite in place"])
def test_process_session_keeps_handles_and_never_reads_a_stale_file(
    tmp_path: Path, monkeypatch, change
) -> None:
    """A worker keeps the DEM open across tasks (one handle for many reads), yet a DEM
    replaced or rewritten at the same path is read afresh, not from the old handle."""
    import os
    import time

    import ntrans.inputs as inputs

    monkeypatch.setattr(inputs, "_process_session", None)
    path = write_dem(tmp_path / "dem.tif", np.full((20, 20), 1.0))
    info = open_dem(path)
    for _ in range(2):  # two tasks
        with inputs.rasters_kept_open_by_this_process():
            np.testing.assert_array_equal(info.read_window(0, 0, 5, 5), 1.0)
    session = inputs._process_session
    first = session.handles()
    assert len(first) == 1 and not first[0].closed  # kept after the block ended

    if change == "replace":
        write_dem(tmp_path / "new.tif", np.full((20, 20), 2.0))
        os.replace(tmp_path / "new.tif", path)
    else:
        time.sleep(0.01)  # a new modification time even on coarse clocks
        with rasterio.open(path, "r+") as dst:
            dst.write(np.full((1, 20, 20), 2.0, dtype="float32"))
        os.utime(path, ns=(time.time_ns(), time.time_ns() + 10**9))
    with inputs.rasters_kept_open_by_this_process():
        np.testing.assert_array_equal(info.read_window(0, 0, 5, 5), 2.0)
    assert first[0].closed and len(session.handles()) == 1  # the stale handle was closed
    session.close()


def test_process_session_keeps_a_few_rasters_open(tmp_path: Path, monkeypatch) -> None:
    """A worker serving job after job on other rasters keeps only the most recently used
    few open; reading a closed one again reopens it."""
    import ntrans.inputs as inputs

    monkeypatch.setattr(inputs, "_process_session", None)
    monkeypatch.setattr(inputs, "PROCESS_RASTERS_OPEN", 2)
    infos = [open_dem(write_dem(tmp_path / f"d{k}.tif", np.full((8, 8), float(k))))
             for k in range(3)]
    for k in (0, 1, 0, 2):  # d1 is then the least recently used
        with inputs.rasters_kept_open_by_this_process():
            np.testing.assert_array_equal(infos[k].read_window(0, 0, 2, 2), float(k))
    session = inputs._process_session
    kept = {Path(src.name).name for src in session.handles()}
    assert kept == {"d0.tif", "d2.tif"}
    with inputs.rasters_kept_open_by_this_process():
        np.testing.assert_array_equal(infos[1].read_window(0, 0, 2, 2), 1.0)
    assert {Path(src.name).name for src in session.handles()} == {"d2.tif", "d1.tif"}
    session.close()


def test_closed_handle_is_looked_up_again(tmp_path: Path) -> None:
    """A thread holding a handle that another thread closed (stale file, least recently
    used) reads through a fresh handle the session keeps, not an untracked one."""
    import ntrans.inputs as inputs

    path = str(write_dem(tmp_path / "d.tif", np.full((8, 8), 3.0)))
    session = inputs._OpenRasters()
    held = session._handle(path)
    held.close()  # as an eviction by another thread would
    assert held.read(lambda src: 1) == (False, None)
    value = session.read(path, lambda src: float(src.read(1)[0, 0]))
    assert value == 3.0
    assert len(session.handles()) == 1 and session._by_path[path] is not held
    session.close()


@pytest.mark.parametrize("threads", [1, 2, 3])
def test_geometry_test_in_chunks_matches_one_call(monkeypatch, threads: int) -> None:
    """Validity in chunks on threads is the validity of each polygon, in order."""
    import ntrans.cluster
    import ntrans.inputs as inputs

    monkeypatch.setattr(ntrans.cluster, "default_threads", lambda: threads)
    monkeypatch.setattr(inputs, "THREADED_GEOMETRY_MIN", 4)
    bowtie = shapely.Polygon([(0, 0), (1, 1), (1, 0), (0, 1)])  # self-intersecting
    polys = np.array([shapely.box(i, 0, i + 1, 1) if i % 5 else bowtie for i in range(23)],
                     dtype=object)
    got = inputs._chunked(shapely.is_valid, polys)
    assert got.tolist() == [bool(i % 5) for i in range(23)]


@pytest.mark.parametrize(("unit", "metres", "name"), [
    ("metre", 1.0, "metre"),
    ("foot", INT_FOOT, "foot (international, 0.3048 m)"),
    ("foot", US_FOOT, "US survey foot (1200/3937 m)"),
])
def test_unit_names_say_which_foot(unit, metres, name):
    # the two feet differ by 2 parts per million (definitions: 0.3048 m; 1200/3937 m)
    from ntrans.inputs import unit_name

    assert unit_name(unit, metres) == name


def test_crs_label_names_a_crs_without_a_name():
    import pyproj

    from ntrans.inputs import crs_label

    assert crs_label(pyproj.CRS("EPSG:32630")) == "'WGS 84 / UTM zone 30N' (EPSG:32630)"
    unnamed = pyproj.CRS.from_proj4("+proj=tmerc +lat_0=0 +lon_0=-3 +k=0.9996 +x_0=500000 "
                                    "+y_0=0 +ellps=WGS84 +units=us-ft +no_defs")
    label = crs_label(unnamed)
    assert "unknown" not in label.lower() and "US survey foot" in label
