"""The committed demo scenario (invented Ornelle River, Pellbrook reach) in ``data_demo/``.

Checks that the files exist and open, that their CRS, units and geometry are what the
data_demo README promises, that the n table stays inside the published ranges, and that
``data_demo/make_demo.py`` regenerates exactly what is committed.
"""

from __future__ import annotations

import importlib.util
import sqlite3
from contextlib import closing
from pathlib import Path
from types import ModuleType

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from rasterio.features import shapes

DEMO = Path(__file__).resolve().parents[1] / "data_demo"
FILES = ("dem.tif", "cells.gpkg", "landcover.gpkg", "n_table.csv", "water_surface.tif")
CLASSES = {"channel", "grass", "crops", "woods", "urban"}

#: Chow (1959), Open-Channel Hydraulics, Table 5-6: Manning's n (min, max) per surface,
#: from memory as marked in METHODS.md.  Keys are the surface labels of the n table.
CHOW_1959_RANGES = {
    "channel_clean": (0.025, 0.033),  # main channel, clean, straight
    "channel_winding": (0.033, 0.045),  # main channel, winding, pools and shoals
    "channel_sluggish_weedy": (0.050, 0.080),  # sluggish, weedy, deep pools
    "pasture_short_grass": (0.025, 0.035),  # pasture, short grass
    "pasture_high_grass": (0.030, 0.050),  # pasture, high grass
    "cultivated_mature_crops": (0.030, 0.050),  # cultivated, mature field crops
    "light_brush_trees": (0.040, 0.080),  # light brush and trees, summer
    "medium_dense_brush": (0.070, 0.160),  # medium to dense brush, summer
    "heavy_timber": (0.080, 0.120),  # heavy timber, flow below branches
    "concrete_float": (0.013, 0.016),  # concrete, float finish
}

# Relative tolerance for comparing summed areas: float64 round-off over a few thousand
# polygons of ~1e3 m2 with UTM-sized coordinates stays far below 1e-9.
AREA_RTOL = 1e-9


def _load_generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_demo", DEMO / "make_demo.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def generator() -> ModuleType:
    return _load_generator()


@pytest.fixture(scope="module")
def regenerated(generator: ModuleType, tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    generator.build(out)
    return out


@pytest.fixture(scope="module")
def dem() -> dict:
    with rasterio.open(DEMO / "dem.tif") as src:
        return {"z": src.read(1, masked=True), "profile": src.profile, "bounds": src.bounds,
                "crs": src.crs, "res": src.res, "units": src.units}


@pytest.fixture(scope="module")
def cells() -> gpd.GeoDataFrame:
    return gpd.read_file(DEMO / "cells.gpkg", layer="cells")


@pytest.fixture(scope="module")
def landcover() -> gpd.GeoDataFrame:
    return gpd.read_file(DEMO / "landcover.gpkg", layer="landcover")


@pytest.fixture(scope="module")
def n_table() -> pd.DataFrame:
    return pd.read_csv(DEMO / "n_table.csv", keep_default_na=False)


# ----------------------------------------------------------------------------- files


@pytest.mark.parametrize("name", FILES)
def test_committed_file_exists_and_is_small(name: str) -> None:
    path = DEMO / name
    assert path.is_file()
    assert 0 < path.stat().st_size < 3_000_000  # committed files stay small (brief: < 3 MB)


def test_dem_is_projected_metres_2m(dem: dict) -> None:
    assert dem["crs"].to_epsg() == 32630
    assert dem["crs"].is_projected
    assert dem["crs"].linear_units in ("metre", "meter")
    assert dem["res"] == (2.0, 2.0)
    assert dem["z"].shape == (600, 900)
    assert dem["units"] == ("metre",)
    prof = dem["profile"]
    assert prof["dtype"] == "float32" and prof["nodata"] == -9999.0
    assert prof["compress"] == "deflate" and prof["tiled"] and prof["blockxsize"] == 256


def test_dem_has_a_small_data_gap_in_one_corner(dem: dict) -> None:
    mask = np.ma.getmaskarray(dem["z"])
    share = mask.mean()
    assert 0.001 < share < 0.01  # a patch of a few hundred to a few thousand pixels
    rows, cols = np.nonzero(mask)
    assert rows.min() > 500 and cols.min() > 800  # south-east corner only
    assert not np.any(dem["z"].compressed() == -9999.0)  # nodata never read as elevation


def test_dem_elevations_plausible(dem: dict) -> None:
    z = dem["z"].compressed()
    assert 38.0 < z.min() and z.max() < 60.0  # valley floor ~43-46 m, sides up to ~57 m
    assert np.allclose(z, np.round(z, 2), atol=1e-4)  # stored to 1 cm (float32 round-off)


def test_water_surface_grid_and_wet_extent(dem: dict) -> None:
    with rasterio.open(DEMO / "water_surface.tif") as src:
        ws = src.read(1)
        assert src.crs == dem["crs"]
        assert src.res == (4.0, 4.0)  # deliberately coarser than the DEM
        assert tuple(src.bounds) == tuple(dem["bounds"])
        assert np.isnan(src.nodata)
    wet = np.isfinite(ws)
    assert 0.3 < wet.mean() < 0.8  # part of the valley is flooded, not all of it
    ground = dem["z"].filled(np.nan).reshape(300, 2, 450, 2).mean(axis=(1, 3))
    # Wet only where the surface is above the 4 m block-mean ground (construction rule,
    # 1 cm threshold, then rounded to 1 cm).
    assert np.all(ws[wet] - ground[wet] > 0.0)
    assert not np.any(wet & np.isnan(ground))


# ----------------------------------------------------------------------------- cells


def test_cells_layer_basics(cells: gpd.GeoDataFrame, dem: dict) -> None:
    assert cells.crs.to_epsg() == 32630
    assert 2000 <= len(cells) <= 6000
    assert cells["cell_id"].dtype.kind == "i"
    assert cells["cell_id"].is_unique
    geoms = cells.geometry.values
    assert np.all(shapely.is_valid(geoms))
    assert np.all(shapely.get_type_id(geoms) == 3)  # plain polygons
    xmin, ymin, xmax, ymax = shapely.total_bounds(geoms)
    b = dem["bounds"]
    # A margin between mesh and DEM edge, so boundary cells sit on terrain.
    assert b.left < xmin and b.bottom < ymin and xmax < b.right and ymax < b.top


def test_cells_tile_the_domain_without_overlaps(cells: gpd.GeoDataFrame) -> None:
    geoms = cells.geometry.values
    union = shapely.union_all(geoms)
    total = shapely.area(geoms).sum()
    # Geometry identity: no overlaps <=> sum of areas == area of the union;
    # no gaps <=> the union fills its (rectangular) domain.
    assert total == pytest.approx(union.area, rel=AREA_RTOL)
    assert union.area == pytest.approx(shapely.envelope(union).area, rel=AREA_RTOL)


def test_cells_share_borders_exactly(cells: gpd.GeoDataFrame) -> None:
    geoms = cells.geometry.values
    left, right = shapely.STRtree(geoms).query(geoms, predicate="intersects")
    pair = left < right
    inter = shapely.intersection(geoms[left[pair]], geoms[right[pair]])
    # Neighbours meet along lines or points, never over an area (shared vertices exact).
    assert np.all(shapely.area(inter) == 0.0)
    assert np.count_nonzero(shapely.get_dimensions(inter) == 1) > len(geoms)  # ~3 per cell


def test_cells_finer_along_the_channel(cells: gpd.GeoDataFrame,
                                       landcover: gpd.GeoDataFrame) -> None:
    geoms = cells.geometry.values
    size = np.sqrt(shapely.area(geoms))
    channel = shapely.union_all(landcover.geometry.values[landcover["landcover"] == "channel"])
    dist = shapely.distance(shapely.centroid(geoms), channel)
    near, far = np.median(size[dist == 0.0]), np.median(size[dist > 200.0])
    assert 8.0 <= near <= 12.0  # brief: ~8-12 m cells in the channel
    assert 30.0 <= far <= 50.0  # brief: ~30-50 m cells on the far floodplain


def test_some_cells_reach_over_the_data_gap(cells: gpd.GeoDataFrame) -> None:
    with rasterio.open(DEMO / "dem.tif") as src:
        gap = src.read_masks(1) == 0
        polys = [shapely.geometry.shape(g) for g, v in
                 shapes(gap.astype("uint8"), mask=gap, transform=src.transform) if v == 1]
    hit = shapely.intersects(cells.geometry.values, shapely.union_all(polys))
    assert 1 <= hit.sum() <= 20  # a few cells only


# ----------------------------------------------------------------------------- roughness


def test_landcover_tiles_the_dem(landcover: gpd.GeoDataFrame, dem: dict) -> None:
    assert landcover.crs.to_epsg() == 32630
    assert set(landcover["landcover"]) == CLASSES
    geoms = landcover.geometry.values
    assert np.all(shapely.is_valid(geoms))
    union = shapely.union_all(geoms)
    extent = shapely.box(*dem["bounds"])
    # Geometry identity: non-overlapping and together covering the DEM extent.
    assert shapely.area(geoms).sum() == pytest.approx(union.area, rel=AREA_RTOL)
    assert union.area == pytest.approx(extent.area, rel=AREA_RTOL)


def test_landcover_classes_all_in_n_table(landcover: gpd.GeoDataFrame,
                                          n_table: pd.DataFrame) -> None:
    assert list(n_table.columns) == ["class", "n", "surface"]
    assert n_table["class"].is_unique
    assert set(landcover["landcover"]) <= set(n_table["class"])


def test_n_values_inside_published_ranges(n_table: pd.DataFrame) -> None:
    for row in n_table.itertuples():
        lo, hi = CHOW_1959_RANGES[row.surface]  # Chow (1959) Table 5-6, from memory
        assert lo <= row.n <= hi, row


def test_surface_keys_known_to_the_library(n_table: pd.DataFrame) -> None:
    from ntrans.roughness import PUBLISHED_N_RANGES

    assert set(n_table["surface"]) <= set(PUBLISHED_N_RANGES)
    for key, (lo, hi) in CHOW_1959_RANGES.items():  # same table on both sides
        assert PUBLISHED_N_RANGES[key][0] == lo and PUBLISHED_N_RANGES[key][2] == hi


# ----------------------------------------------------------------------------- generator


def test_generator_reproduces_committed_rasters(regenerated: Path) -> None:
    for name in ("dem.tif", "water_surface.tif"):
        with rasterio.open(DEMO / name) as a, rasterio.open(regenerated / name) as b:
            pa, pb = dict(a.profile), dict(b.profile)
            na, nb = pa.pop("nodata"), pb.pop("nodata")
            assert pa == pb
            assert na == nb or (np.isnan(na) and np.isnan(nb))
            np.testing.assert_array_equal(a.read(1), b.read(1))  # exact, NaN == NaN


@pytest.mark.parametrize(("name", "field"), [("cells.gpkg", "cell_id"),
                                             ("landcover.gpkg", "landcover")])
def test_generator_reproduces_committed_layers(regenerated: Path, name: str, field: str) -> None:
    layer = name.removesuffix(".gpkg")
    a = gpd.read_file(DEMO / name, layer=layer)
    b = gpd.read_file(regenerated / name, layer=layer)
    assert a.crs == b.crs
    assert a[field].tolist() == b[field].tolist()
    assert np.all(shapely.equals_exact(a.geometry.values, b.geometry.values, tolerance=0.0))


def test_generator_reproduces_committed_n_table(regenerated: Path) -> None:
    assert (regenerated / "n_table.csv").read_bytes() == (DEMO / "n_table.csv").read_bytes()


def test_generator_leaves_project_file_alone(regenerated: Path) -> None:
    assert not (regenerated / "project.toml").exists()


def test_writers_are_byte_identical(generator: ModuleType, tmp_path: Path) -> None:
    frame = gpd.GeoDataFrame({"cell_id": np.array([1, 2], dtype=np.int32)},
                             geometry=[shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1)],
                             crs="EPSG:32630")
    data = np.arange(12, dtype=float).reshape(3, 4)
    for run in ("a", "b"):
        (tmp_path / run).mkdir()
        generator.write_layer(tmp_path / run / "x.gpkg", "x", frame)
        generator.write_raster(tmp_path / run / "x.tif", data, 2.0, -9999.0)
    for name in ("x.gpkg", "x.tif"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_committed_files_carry_no_clock_time() -> None:
    for name in ("cells.gpkg", "landcover.gpkg"):
        with closing(sqlite3.connect(f"file:{DEMO / name}?mode=ro", uri=True)) as con:
            stamps = {r[0] for r in con.execute("SELECT last_change FROM gpkg_contents")}
        assert stamps == {"2026-01-01T00:00:00.000Z"}
    for name in ("dem.tif", "water_surface.tif"):
        with rasterio.open(DEMO / name) as src:
            assert "TIFFTAG_DATETIME" not in src.tags()
