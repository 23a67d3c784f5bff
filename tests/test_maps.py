"""Tests of ntrans.maps and ntrans.plots: per-cell summaries, rasters on the DEM grid, PNGs."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from conftest import grid_polygons, tilted_plane, write_dem

from ntrans import maps, plots

# --------------------------------------------------------------------- per-cell summaries


def test_friction_factor_picks_the_reference_stage_of_each_cell():
    # Two cells, three stages each, rows deliberately shuffled.
    frame = pd.DataFrame(
        {
            "cell_id": [2, 1, 1, 2, 1, 2],
            "stage": [11.0, 10.0, 11.0, 10.0, 12.0, 12.0],
            "wet_area": [50.0, 0.0, 40.0, 10.0, 100.0, 100.0],
            "bed_area": [60.0, 0.0, 44.0, 10.0, 120.0, 101.0],
        }
    )
    top = maps.cell_friction_factor(frame, reference_index=-1)
    assert top.to_dict() == pytest.approx({1: 1.2, 2: 1.01})  # 120/100, 101/100 by hand
    first = maps.cell_friction_factor(frame, reference_index=0)
    assert np.isnan(first[1])  # dry at its first stage: no factor
    assert first[2] == pytest.approx(1.0)  # 10 / 10
    middle = maps.cell_friction_factor(frame, reference_index=1)
    assert middle.to_dict() == pytest.approx({1: 1.1, 2: 1.2})  # 44/40, 60/50


def test_median_of_faces_counts_a_face_for_both_cells():
    faces = pd.DataFrame({"face_id": [0, 1, 2], "cell_a": [1, 1, 2], "cell_b": [2, None, 3]})
    values = pd.DataFrame(
        {
            "face_id": [0, 0, 1, 1, 2, 2],
            "n_ratio": [0.8, 0.9, 1.0, np.nan, 0.5, 0.7],
        }
    )
    med = maps.cell_median_of_faces(values, faces, value="n_ratio")
    # cell 1: faces 0 and 1 -> {0.8, 0.9, 1.0}; cell 2: faces 0, 2 -> {0.8, 0.9, 0.5, 0.7};
    # cell 3: face 2 -> {0.5, 0.7}  (medians by hand)
    assert med.to_dict() == pytest.approx({1: 0.9, 2: 0.75, 3: 0.6})
    per_face = maps.face_median(values, value="n_ratio")
    assert per_face.to_dict() == pytest.approx({0: 0.85, 1: 1.0, 2: 0.6})


# ----------------------------------------------------------------------- painting, rasters


def _grid_case(tmp_path):
    z = tilted_plane(20, 30)
    z[0, 0] = np.nan
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = grid_polygons(3, 2, size=10.0)  # 3 x 2 cells of 10 m over a 30 x 20 m DEM
    return dem, z, cells


def test_paint_puts_each_cell_value_on_its_pixels(tmp_path):
    dem, z, cells = _grid_case(tmp_path)
    with rasterio.open(dem) as src:
        index = maps.cell_index_grid(cells, transform=src.transform, shape=src.shape)
    values = np.arange(len(cells), dtype=float) * 10.0
    grid = maps.paint(index, values)
    assert grid.shape == z.shape
    # every pixel centre lies in exactly one cell: 6 cells x 100 pixels each (geometry)
    assert np.bincount(index.ravel()).tolist() == [100] * 6
    for i, poly in enumerate(cells):
        x, y = shapely.get_coordinates(shapely.centroid(poly))[0]
        row, col = int(20 - y), int(x)
        assert grid[row, col] == values[i]
    outside = maps.paint(np.full((2, 2), -1), values)
    assert np.isnan(outside).all()


def test_maps_share_the_dem_grid_and_crs(tmp_path):
    dem, z, cells = _grid_case(tmp_path)
    values = pd.DataFrame(
        {
            "friction_factor": np.linspace(1.0, 1.5, 6),
            "n_ratio": [0.8, 0.9, np.nan, 1.0, 1.1, 0.7],
            "stage_bias": [-0.2, 0.1, 0.0, 0.3, -0.05, 0.2],
        }
    )
    with rasterio.open(dem) as src:
        transform, crs, shape = src.transform, src.crs, src.shape
    written = maps.write_maps(tmp_path / "maps", cell_values=values, cell_geometry=cells,
                              elevation=z, transform=transform, crs=crs, quicklooks=False)
    assert written == {}  # PNGs are checked in the rerun test
    for name in ("friction_factor", "n_ratio", "stage_bias"):
        with rasterio.open(tmp_path / "maps" / f"{name}.tif") as out:
            assert out.transform == transform
            assert out.shape == shape
            assert out.crs == crs
            assert out.nodata == maps.NODATA
            assert out.profile["tiled"] and out.block_shapes[0] == (256, 256)
            assert out.compression.name.lower() == "deflate"
            data = out.read(1, masked=True)
        expected = maps.paint(
            maps.cell_index_grid(cells, transform=transform, shape=shape),
            values[name].to_numpy(),
        )
        np.testing.assert_array_equal(data.mask, np.isnan(expected))
        np.testing.assert_allclose(data.filled(np.nan), expected, rtol=1e-7)  # float32 storage


def test_maps_are_byte_identical_on_rerun(tmp_path):
    dem, z, cells = _grid_case(tmp_path)
    values = pd.DataFrame({"stage_bias": np.linspace(-0.3, 0.3, 6)})
    with rasterio.open(dem) as src:
        grid = {"transform": src.transform, "crs": src.crs}
    for name in ("a", "b"):
        maps.write_maps(tmp_path / name, cell_values=values, cell_geometry=cells,
                        elevation=z, **grid)
    assert (tmp_path / "a" / "stage_bias.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    for file in ("stage_bias.tif", "stage_bias.png"):
        assert (tmp_path / "a" / file).read_bytes() == (tmp_path / "b" / file).read_bytes()
    png = (tmp_path / "a" / "stage_bias.png").read_bytes()
    assert b"Software" not in png and b"Creation" not in png  # no version, no time stamp


def test_face_layer_carries_the_values(tmp_path):
    lines = gpd.GeoDataFrame(
        {"face_id": [1, 0], "cell_a": [1, 1], "cell_b": [2, None]},
        geometry=[shapely.LineString([(10, 0), (10, 10)]), shapely.LineString([(0, 0), (0, 10)])],
        crs="EPSG:32633",
    )
    values = pd.DataFrame({"n_ratio": [0.9, 0.8]}, index=pd.Index([0, 1], name="face_id"))
    path = maps.write_face_layer(tmp_path / "faces.gpkg", lines, values)
    back = gpd.read_file(path)
    assert back["face_id"].tolist() == [0, 1]
    assert back["n_ratio"].tolist() == pytest.approx([0.9, 0.8])
    assert back.crs.to_epsg() == 32633
    assert set(back.geom_type) == {"LineString"}


@pytest.mark.parametrize("altitude", [30.0, 45.0, 60.0])
def test_hillshade_of_flat_ground_is_sine_of_sun_altitude(altitude):
    z = np.full((5, 6), 3.0)
    z[2, 2] = np.nan
    shade = maps.hillshade(z, dx=1.0, dy=1.0, altitude=altitude)
    # Lambert shading of a horizontal surface: sin(altitude)  (geometry identity)
    expected = np.sin(np.radians(altitude))
    assert np.nanmax(np.abs(shade - expected)) < 1e-12  # exact arithmetic, rounding only
    assert np.isnan(shade[2, 2])


@pytest.mark.parametrize(("span", "length"), [(30.0, 5.0), (160.0, 20.0), (1800.0, 200.0), (7.0, 1.0)])
def test_scale_bar_lengths_are_round(span, length):
    assert maps._nice_length(span) == length


# ---------------------------------------------------------------------------------- plots


def test_ratio_bands_quantiles_by_hand():
    frame = pd.DataFrame(
        {
            "class": ["a"] * 5 + ["b"] * 2,
            "depth": [1.0] * 5 + [1.0, 1.0],
            "n_ratio": [0.5, 0.6, 0.7, 0.8, 0.9, 1.0, np.nan],
        }
    )
    bands = plots.ratio_bands(frame, x="depth")
    a = bands[bands["class"] == "a"].iloc[0]
    # linear-interpolated quantiles of 0.5..0.9: 10 % -> 0.54, 90 % -> 0.86 (by hand)
    assert (a["p10"], a["p50"], a["p90"], a["count"]) == pytest.approx((0.54, 0.7, 0.86, 5))
    b = bands[bands["class"] == "b"].iloc[0]
    assert b["count"] == 1 and b["p50"] == 1.0


def test_representative_cells_largest_median_smallest():
    factor = pd.Series([1.3, 1.0, np.nan, 1.1, 1.05], index=[10, 11, 12, 13, 14])
    assert plots.representative_cells(factor) == {
        "largest bed factor": 10,
        "median bed factor": 14,
        "smallest bed factor": 11,
    }
    assert plots.representative_cells(pd.Series([1.2], index=[5])) == {"largest bed factor": 5}


def test_plots_write_deterministic_pngs(tmp_path):
    rng = np.random.default_rng(1)
    frame = pd.DataFrame({"class": np.repeat(["a", "b"], 30),
                          "depth": np.tile(np.repeat([0.5, 1.0, 1.5], 10), 2),
                          "n_ratio": rng.normal(0.9, 0.05, 60)})
    curve = pd.DataFrame({"stage": [0.0, 1.0, 2.0], "volume": [0.0, 1.0, 4.0],
                          "flat_volume": [0.0, 2.0, 4.0], "hydraulic_radius": [0.0, 0.8, 1.7],
                          "flat_hydraulic_radius": [0.0, 1.0, 2.0]})
    single = plots.plot_class_ratios(tmp_path / "c.png", plots.ratio_bands(frame, x="depth"))
    assert single.read_bytes()[:4] == b"\x89PNG"
    outputs = {}
    for name in ("a", "b"):
        outputs[name] = [
            plots.plot_stage_bias(tmp_path / name / "h.png", plots.stage_bias_histogram(
                rng.normal(0.2, 0.1, 50) * 0 + 0.1, np.zeros(50))),
            plots.plot_cell_curves(tmp_path / name / "k.png", {"one": curve}),
        ]
    for first, second in zip(outputs["a"], outputs["b"], strict=True):
        assert first.read_bytes() == second.read_bytes()
        assert first.read_bytes()[:4] == b"\x89PNG"


def test_class_ratio_panels_show_one_depth_as_a_dot_and_say_why_one_is_empty(tmp_path,
                                                                           monkeypatch):
    bands = pd.DataFrame({
        "class": ["many", "many", "one", "one", "gap", "gap", "gap", "none"],
        # "one": a depth without a ratio, then one with; "gap": two ratios around a depth
        # without one (a line broken at the gap would draw nothing)
        "depth": [0.5, 1.0, 1.0, 1.5, 0.5, 1.0, 1.5, 1.0],
        "p10": [0.8, 0.9, np.nan, 150.0, 0.9, np.nan, 1.1, np.nan],
        "p50": [0.9, 1.0, np.nan, 160.0, 1.0, np.nan, 1.2, np.nan],
        "p90": [1.0, 1.1, np.nan, 170.0, 1.1, np.nan, 1.3, np.nan],
        "count": [5, 5, 0, 1, 3, 0, 3, 0],
    })
    figures = []
    saved = plots._save
    monkeypatch.setattr(plots, "_save", lambda fig, path: (figures.append(fig), saved(fig, path))[1])
    plots.plot_class_ratios(tmp_path / "c.png", bands)
    panels = {ax.get_title(): ax for ax in figures[0].axes if ax.get_visible()}
    markers = {title: [line.get_marker() for line in ax.get_lines() if len(line.get_xdata()) > 0
                       and line.get_linestyle() != "--"] for title, ax in panels.items()}
    assert markers["many"] == ["None"]  # a line through its depths
    assert markers["one"] == ["o"]  # one depth: a dot (a line of one point draws nothing)
    assert markers["none"] == []
    medians = [line for line in panels["gap"].get_lines() if line.get_linestyle() != "--"]
    assert [list(line.get_ydata()) for line in medians] == [[1.0, 1.2]]  # joined, no gap
    assert any("wet in both families" in text.get_text() for text in panels["none"].texts)
    assert not panels["many"].texts


def test_maps_painted_window_by_window_are_the_whole_grid_painted(tmp_path, monkeypatch):
    # the GeoTIFFs are painted in windows, each window rasterising only the cells over
    # it; every pixel must get the cell one rasterisation of the whole grid gives it (the
    # same pixel-centre rule on the same grid: identity), across window edges that cut
    # cells, and the DEM is read (decimated) only for the quick-looks
    rows, cols = 530, 610
    z = tilted_plane(rows, cols)
    dem = write_dem(tmp_path / "dem.tif", z)
    rng = np.random.default_rng(3)
    points = shapely.points(rng.uniform(0, cols, 400), rng.uniform(0, rows, 400))
    cells = list(shapely.voronoi_polygons(shapely.multipoints(points),
                                          extend_to=shapely.box(0, 0, cols, rows)).geoms)
    cells = [shapely.intersection(c, shapely.box(0, 0, cols, rows)) for c in cells]
    values = pd.DataFrame({"n_ratio": rng.uniform(0.7, 1.3, len(cells)),
                           "stage_bias": rng.normal(0.0, 0.2, len(cells))})
    with rasterio.open(dem) as src:
        transform, crs, shape = src.transform, src.crs, src.shape
    monkeypatch.setattr(maps, "MAP_WINDOW", 256)  # 3 x 3 windows
    monkeypatch.setattr(maps, "QUICKLOOK_MAX", 200)  # quick-looks from every 4th pixel
    drawn = {}
    original = maps.quicklook_png

    def spy(path, values, *, elevation, transform, **kwargs):
        drawn[path.stem] = (values.shape, elevation.shape, transform.a)
        return original(path, values, elevation=elevation, transform=transform, **kwargs)

    monkeypatch.setattr(maps, "quicklook_png", spy)
    written = maps.write_maps(tmp_path / "maps", cell_values=values, cell_geometry=cells,
                              elevation=dem, transform=transform, crs=crs)
    whole = maps.cell_index_grid(cells, transform=transform, shape=shape)
    assert (whole >= 0).all()  # every pixel centre in one cell
    for name in ("n_ratio", "stage_bias"):
        with rasterio.open(tmp_path / "maps" / f"{name}.tif") as out:
            data = out.read(1)
        np.testing.assert_array_equal(data, maps.paint(whole, values[name].to_numpy()))
        assert written[name].exists()
        # the quick-look's grid: every 4th pixel, ceil(530 / 4) x ceil(610 / 4)
        assert drawn[name] == ((133, 153), (133, 153), 4.0)


@pytest.mark.parametrize("high", [1.05, 1.1, 1.6, 2.0, 35.0, 160.0])
def test_ratio_ticks_are_symmetric_about_one_in_log(high):
    ticks = maps._ratio_ticks(high)
    assert 1.0 in ticks and len(ticks) <= 7
    assert all(1.0 / high * (1 - 1e-3) <= t <= high * (1 + 1e-9) for t in ticks)
    ups = [t for t in ticks if t > 1.0]
    downs = sorted((t for t in ticks if t < 1.0), reverse=True)
    np.testing.assert_allclose([1.0 / t for t in downs], ups, rtol=2e-3)  # labels rounded


@pytest.mark.parametrize(("scale", "centre"), [("ratio", 1.0), ("diverging", 0.0)])
def test_quicklook_colours_centre_ratios_on_one_and_signed_values_on_zero(tmp_path, monkeypatch,
                                                                           scale, centre):
    import matplotlib.figure

    rng = np.random.default_rng(3)
    values = np.exp(rng.normal(0.0, 0.3, (40, 50))) if scale == "ratio" else rng.normal(0, 1, (40, 50))
    norms = []
    savefig = matplotlib.figure.Figure.savefig

    def capture(fig, *args, **kwargs):
        norms.extend(im.norm for ax in fig.axes for im in ax.get_images())
        return savefig(fig, *args, **kwargs)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", capture)
    maps.quicklook_png(tmp_path / "q.png", values, elevation=np.zeros((40, 50)),
                       transform=rasterio.Affine(2.0, 0, 0, 0, -2.0, 100.0), title="t",
                       label="l", scale=scale)
    norm = norms[-1]  # the values' layer, over the hillshade
    if scale == "ratio":
        assert type(norm).__name__ == "LogNorm"
        assert norm.vmin * norm.vmax == pytest.approx(1.0)  # 1 / b .. b: centred on 1 in log
        assert norm.vmax >= 1.1
    else:
        assert norm.vcenter == centre and norm.vmin == -norm.vmax


#: a polygon with two holes, one of them a triangle
HOLED = shapely.Polygon([(5, 5), (25, 5), (25, 25), (5, 25)],
                        [[(8, 8), (14, 8), (14, 14), (8, 14)], [(17.5, 17.5), (22, 17.5), (22, 22)]])


def test_polygon_mappings_are_the_geo_interface():
    # reference: each geometry's own __geo_interface__ (the GeoJSON-like mapping rasterio
    # makes of it), compared as JSON (tuples and lists write the same)
    import json

    line = shapely.LineString([(0, 0), (3, 4)])
    geoms = np.array([shapely.box(0, 0, 1, 2), None, shapely.Polygon(), HOLED,
                      shapely.MultiPolygon([shapely.box(30, 0, 31, 1), HOLED]), line,
                      shapely.MultiPolygon(), shapely.box(2, 2, 3, 3)], dtype=object)
    got = maps.polygon_mappings(geoms)
    assert len(got) == geoms.size
    for geom, mapping in zip(geoms, got, strict=True):
        if geom is None or geom.is_empty:
            assert mapping is None
        elif geom is line:
            assert mapping is line  # not a polygon: left to rasterio as it is
        else:
            want = geom.__geo_interface__
            assert mapping["type"] == want["type"]
            assert json.dumps(mapping["coordinates"]) == json.dumps(want["coordinates"])
    assert maps.polygon_mappings(np.array([], dtype=object)) == []


@pytest.mark.parametrize("batch", [1, 7, 16_384])
def test_cells_burnt_in_batches_are_one_rasterisation(monkeypatch, batch):
    # reference: rasterio's rasterize of every cell in one call (a later cell wins a
    # pixel); overlapping squares make the order matter, a None and an empty polygon
    # are skipped without shifting the indexes
    from affine import Affine
    from rasterio import features

    rng = np.random.default_rng(5)
    corners = rng.uniform(0, 40, (60, 2))
    cells = [shapely.box(x, y, x + rng.uniform(2, 9), y + rng.uniform(2, 9)) for x, y in corners]
    cells[3], cells[10] = None, shapely.Polygon()
    cells[20], cells[30] = HOLED, shapely.MultiPolygon([shapely.box(41, 41, 46, 44), HOLED])
    transform, shape = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 50.0), (50, 50)  # 1 m pixels
    monkeypatch.setattr(maps, "RASTERIZE_BATCH", batch)
    got = maps.cell_index_grid(cells, transform=transform, shape=shape)
    shapes = [(g, i + 1) for i, g in enumerate(cells) if g is not None and not g.is_empty]
    want = features.rasterize(shapes, out_shape=shape, transform=transform, fill=0,
                              dtype="int32") - 1
    np.testing.assert_array_equal(got, want)
    assert (got == 59).any() and not (got == 3).any()


def test_face_layer_from_wkb_is_the_face_layer_from_geometry(tmp_path):
    # the run reads the face lines as WKB (no geometry objects) and writes them back with
    # their values: the same layer as from the GeoDataFrame, read back
    import geopandas as gpd

    from ntrans.outputs import read_encoded_layer, write_geopackage

    lines = [shapely.LineString([(i, 0), (i, 1 + i % 3)]) for i in range(12)]
    order = np.random.default_rng(2).permutation(12)  # a layer not in face id order
    faces = gpd.GeoDataFrame({"face_id": order, "cell_a": order + 100,
                              "cell_b": np.where(order % 4 == 0, np.nan, order + 200),
                              "length": 1.0 + order},
                             geometry=[lines[i] for i in order], crs="EPSG:32633")
    write_geopackage(faces, tmp_path / "faces.gpkg", "faces")
    values = pd.DataFrame({"n_ratio_median": np.linspace(0.8, 1.2, 10)},
                          index=pd.Index(np.arange(10), name="face_id"))  # two faces without
    maps.write_face_layer(tmp_path / "a.gpkg", faces, values)
    maps.write_face_layer(tmp_path / "b.gpkg", read_encoded_layer(tmp_path / "faces.gpkg"),
                          values)
    a, b = gpd.read_file(tmp_path / "a.gpkg"), gpd.read_file(tmp_path / "b.gpkg")
    assert b["face_id"].tolist() == list(range(12))
    pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
    assert a.crs == b.crs
    assert shapely.equals_exact(a.geometry.to_numpy(), b.geometry.to_numpy(), 0.0).all()


def test_face_layer_keeps_integer_cell_ids_exact_and_describes_its_columns(tmp_path):
    # the boundary faces leave cell_b empty: read back through NumPy such a column turned
    # float, and the bundle's maps/faces.gpkg stored ids as REAL (2^62 + 1 became 2^62)
    import sqlite3

    from ntrans.outputs import column_descriptions_of, read_encoded_layer, write_geopackage

    big = 2**62 + 1
    faces = pd.DataFrame({"face_id": np.arange(3, dtype=np.int64),
                          "cell_a": pd.array([big, big, big + 2], dtype="Int64"),
                          "cell_b": pd.array([None, big + 2, big + 4], dtype="Int64"),
                          "length": [1.0, 2.0, 3.0]})
    lines = [shapely.LineString([(i, 0), (i, 1)]) for i in range(3)]
    write_geopackage(gpd.GeoDataFrame(faces, geometry=lines, crs="EPSG:32633"),
                     tmp_path / "faces.gpkg", "faces")
    values = pd.DataFrame({"n_ratio_median": [0.9, 1.1, np.nan],
                           "stage_bias_unadjusted_median": [0.1, -0.2, np.nan]},
                          index=pd.Index(np.arange(3), name="face_id"))
    out = maps.write_face_layer(tmp_path / "map_faces.gpkg",
                                read_encoded_layer(tmp_path / "faces.gpkg"), values,
                                descriptions=maps.face_layer_descriptions("ft"))
    with sqlite3.connect(out) as db:
        types = {row[1]: row[2] for row in db.execute('PRAGMA table_info("faces")')}
        rows = db.execute("SELECT cell_a, cell_b FROM faces ORDER BY face_id").fetchall()
    assert (types["face_id"], types["cell_a"], types["cell_b"]) == ("INTEGER",) * 3
    assert rows == [(big, None), (big, big + 2), (big + 2, big + 4)]
    texts = column_descriptions_of(out, "faces")
    assert set(texts) == {"face_id", "cell_a", "cell_b", "length", "n_ratio_median",
                          "stage_bias_unadjusted_median"}
    assert texts["stage_bias_unadjusted_median"].endswith("(ft)")


def test_map_compressed_on_every_core_is_the_one_thread_file(tmp_path, monkeypatch):
    """GDAL's multi-threaded block compression writes the same GeoTIFF, byte for byte, as
    one thread (file reproducibility: the manifest hashes every map)."""
    from affine import Affine

    rng = np.random.default_rng(0)
    cells = rng.uniform(0.5, 2.0, 2000).astype(np.float32)
    rows, cols = 700, 900  # several 256-pixel blocks, partial ones at the edges
    index = (np.arange(rows)[:, None] // 20) * 50 + np.arange(cols)[None, :] // 20
    grid = cells[index % cells.size]
    grid[:, :30] = np.nan
    transform = Affine(1.0, 0.0, 500000.0, 0.0, -1.0, 6000000.0)
    many = maps.write_geotiff(tmp_path / "many.tif", grid, transform=transform,
                              crs="EPSG:32633")
    assert maps._map_profile(rows, cols, transform, None)["num_threads"] == "ALL_CPUS"
    one_thread = maps._map_profile

    def profile(*args):
        p = one_thread(*args)
        p.pop("num_threads")
        return p

    monkeypatch.setattr(maps, "_map_profile", profile)
    one = maps.write_geotiff(tmp_path / "one.tif", grid, transform=transform,
                             crs="EPSG:32633")
    assert many.read_bytes() == one.read_bytes()


@pytest.mark.parametrize(("fit_domain", "says", "never"), [
    ("faces", "over the cell's faces", "cell's own"),
    ("cells", "the cell's own values", "faces"),
])
def test_band_descriptions_say_what_a_cell_value_is_a_median_of(tmp_path, fit_domain, says,
                                                                 never):
    dem, z, cells = _grid_case(tmp_path)
    values = pd.DataFrame({"n_ratio": np.linspace(0.8, 1.2, 6),
                           "stage_bias": np.linspace(-0.3, 0.3, 6)})
    with rasterio.open(dem) as src:
        grid = {"transform": src.transform, "crs": src.crs}
    maps.write_maps(tmp_path / "maps", cell_values=values, cell_geometry=cells, elevation=z,
                    quicklooks=False, fit_domain=fit_domain, **grid)
    for name in ("n_ratio", "stage_bias"):
        with rasterio.open(tmp_path / "maps" / f"{name}.tif") as out:
            text = out.descriptions[0]
        assert says in text and never not in text, text
        label = maps.map_texts(name, fit_domain)[1]
        assert never not in label, label


def test_map_texts_refuse_an_unknown_fit_domain():
    with pytest.raises(ValueError, match="faces' or 'cells"):
        maps.map_texts("n_ratio", "edges")
