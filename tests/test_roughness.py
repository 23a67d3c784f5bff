"""Tests of ntrans.roughness: parsing, validation, class maps on a window."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import shapely
from affine import Affine

from ntrans.errors import (
    CRSError,
    InputError,
    InputFileError,
    RoughnessError,
    RoughnessRangeWarning,
)
from ntrans.roughness import (
    N_MAX,
    N_MIN,
    PUBLISHED_N_RANGES,
    check_roughness_inputs,
    class_at_points,
    class_index_on_window,
    load_roughness,
    polygon_model,
    raster_model,
    read_n_table,
    uniform_model,
)

MESH = shapely.box(0, 0, 10, 10)
TRANSFORM = Affine(1.0, 0.0, 0.0, 0.0, -1.0, 10.0)  # 10 x 10 pixels of 1 m, top at y = 10


def table(rows):
    names = [r[0] for r in rows]
    values = [r[1] for r in rows]
    surf = [r[2] if len(r) > 2 else None for r in rows]
    return names, values, surf


def two_halves():
    return np.array([shapely.box(0, 0, 5, 10), shapely.box(5, 0, 10, 10)], dtype=object)


def test_uniform_model():
    m = uniform_model("0.035")
    assert m.classes == ("all",) and m.n.tolist() == [0.035]
    idx = class_index_on_window(m, TRANSFORM, (3, 4))
    assert idx.shape == (3, 4) and np.all(idx == 0)


@pytest.mark.parametrize("bad", ["0", "-0.01", "abc", "nan", ""])
def test_uniform_model_bad_n(bad):
    with pytest.raises(RoughnessError):
        uniform_model(bad)


# n outside the class fit's bounds 0.005..1 (ntrans.translate.solve_class_n): a Strickler
# coefficient (35), a value in the wrong decimal place (0.0004), just past either bound
OUTSIDE_FIT = ["35", "12", "1.5", "1.0001", "0.0049", "0.0004"]


@pytest.mark.parametrize("bad", OUTSIDE_FIT)
def test_n_outside_the_fit_bounds_is_refused_everywhere(bad):
    with pytest.raises(RoughnessError) as err:
        uniform_model(bad)
    assert "Manning's n" in str(err.value)
    with pytest.raises(RoughnessError):
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.03"), ("b", bad)]), mesh_area=MESH)
    with pytest.raises(RoughnessError):
        polygon_model(two_halves(), np.zeros(2), n_values=np.array([0.03, bad], dtype=object),
                      mesh_area=MESH)


def test_strickler_coefficient_gets_its_reciprocal_named():
    with pytest.raises(RoughnessError) as err:
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.03"), ("b", "35")]), mesh_area=MESH)
    text = str(err.value)
    assert "class 'b'" in text and "0.0286" in text  # 1 / 35 to three figures


@pytest.mark.parametrize("value", [N_MIN, 0.3, 0.5, N_MAX])
def test_n_within_the_fit_bounds_is_accepted(value):
    # 0.5 and 1 are unusual (the range warning says so) but the fit can handle them
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RoughnessRangeWarning)
        assert uniform_model(value).n.tolist() == [value]


def test_polygons_rasterise_on_window():
    m = polygon_model(two_halves(), np.array(["grass", "channel"], dtype=object),
                      table=table([("channel", "0.03"), ("grass", "0.05")]), mesh_area=MESH)
    assert m.classes == ("channel", "grass")
    idx = class_index_on_window(m, TRANSFORM, (10, 10))
    assert np.all(idx[:, :5] == m.classes.index("grass"))
    assert np.all(idx[:, 5:] == m.classes.index("channel"))
    # segment midpoints: nearest pixel, -1 outside the window
    got = class_at_points(idx, TRANSFORM, np.array([2.2, 7.9, 11.0]), np.array([5.0, 1.0, 5.0]))
    assert got.tolist() == [1, 0, -1]


def test_missing_classes_listed_all():
    polys = np.array([shapely.box(0, 0, 5, 10), shapely.box(5, 0, 10, 5),
                      shapely.box(5, 5, 10, 10)], dtype=object)
    with pytest.raises(RoughnessError) as err:
        polygon_model(polys, np.array(["a", "b", "c"], dtype=object), table=table([("a", "0.03")]),
                      mesh_area=MESH)
    assert "'b'" in str(err.value) and "'c'" in str(err.value)


def test_missing_classes_differing_by_case_name_the_close_match():
    with pytest.raises(RoughnessError) as err:
        polygon_model(two_halves(), np.array(["grass", "channel"], dtype=object),
                      table=table([("Grass", "0.03"), ("Channel", "0.03")]), mesh_area=MESH)
    text = str(err.value)
    assert "case-sensitively" in text and "'Channel' for 'channel'" in text


@pytest.mark.parametrize("default", ["gras", "Grass", "pavement"])
def test_default_class_missing_from_the_table_is_named_as_such(default):
    with pytest.raises(RoughnessError) as err:
        polygon_model(two_halves(), np.array(["grass", "grass"], dtype=object),
                      table=table([("grass", "0.03"), ("woods", "0.06")]), mesh_area=MESH,
                      default_class=default)
    text = str(err.value)
    assert text.startswith(f"default class {default!r} is not in the n table")
    assert ("closest: 'grass'" in text) == (default != "pavement")


@pytest.mark.parametrize("bad", ["0", "-1", "x", "inf"])
def test_table_bad_n(bad):
    with pytest.raises(RoughnessError):
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.03"), ("b", bad)]), mesh_area=MESH)


def test_overlap_rules():
    polys = np.array([shapely.box(0, 0, 6, 10), shapely.box(4, 0, 10, 10)], dtype=object)
    labels = np.array(["a", "b"], dtype=object)
    tab = table([("a", "0.03"), ("b", "0.06")])
    # the message names the setting both ways: option and project-file key
    with pytest.raises(RoughnessError, match=r"first, last or max_n \(--overlap-rule; "
                       r"overlap_rule in a project file\)"):
        polygon_model(polys, labels, table=tab, mesh_area=MESH)
    col = 4  # pixel column 4 (x 4..5) lies in both polygons
    first = class_index_on_window(polygon_model(polys, labels, table=tab, overlap_rule="first",
                                                mesh_area=MESH), TRANSFORM, (10, 10))
    last = class_index_on_window(polygon_model(polys, labels, table=tab, overlap_rule="last",
                                               mesh_area=MESH), TRANSFORM, (10, 10))
    maxn = class_index_on_window(polygon_model(polys[::-1], labels[::-1], table=tab,
                                               overlap_rule="max_n", mesh_area=MESH),
                                 TRANSFORM, (10, 10))
    assert np.all(first[:, col] == 0) and np.all(last[:, col] == 1) and np.all(maxn[:, col] == 1)


def test_uncovered_ground_needs_default():
    polys = np.array([shapely.box(0, 0, 5, 10)], dtype=object)
    labels = np.array(["a"], dtype=object)
    with pytest.raises(RoughnessError) as err:
        polygon_model(polys, labels, table=table([("a", "0.03")]), mesh_area=MESH)
    assert "50%" in str(err.value)
    assert "(--default-class; default_class in a project file)" in str(err.value)
    m = polygon_model(polys, labels, table=table([("a", "0.03"), ("b", "0.05")]),
                      default_class="b", mesh_area=MESH)
    idx = class_index_on_window(m, TRANSFORM, (10, 10))
    assert np.all(idx[:, 5:] == m.classes.index("b"))


def test_layer_missing_mesh():
    polys = np.array([shapely.box(100, 100, 110, 110)], dtype=object)
    with pytest.raises(RoughnessError):
        polygon_model(polys, np.array(["a"], dtype=object), table=table([("a", "0.03")]),
                      mesh_area=MESH, default_class="a")


def test_range_warnings():
    # Chow (1959) Table 5-6, clean straight channel 0.025-0.033 [from memory, METHODS.md]
    assert PUBLISHED_N_RANGES["channel_clean"][0] == 0.025
    with pytest.warns(RoughnessRangeWarning):
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.05", "channel_clean"), ("b", "0.03")]), mesh_area=MESH)
    with pytest.warns(RoughnessRangeWarning):
        uniform_model(0.4)  # above 0.3
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.03", "channel_clean"), ("b", "0.03")]), mesh_area=MESH)


def test_unknown_surface():
    with pytest.raises(RoughnessError):
        polygon_model(two_halves(), np.array(["a", "b"], dtype=object),
                      table=table([("a", "0.03", "lawn"), ("b", "0.03")]), mesh_area=MESH)


def test_n_field_mode():
    m = polygon_model(two_halves(), np.zeros(2), n_values=np.array([0.05, 0.03], dtype=object),
                      mesh_area=MESH)
    assert m.classes == ("n=0.03", "n=0.05") and m.n.tolist() == [0.03, 0.05]
    with pytest.raises(RoughnessError):
        polygon_model(two_halves(), np.zeros(2), n_values=np.array([0.05, "x"], dtype=object),
                      mesh_area=MESH)


def test_raster_model_resampled_nearest():
    # 5 x 5 raster of 2 m pixels, codes 1 (left) / 7 (right), nodata 0 in one corner
    data = np.ones((5, 5), dtype=np.int32)
    data[:, 3:] = 7
    data[0, 0] = 0
    tr = Affine(2.0, 0.0, 0.0, 0.0, -2.0, 10.0)
    tab = table([("1", "0.03"), ("7", "0.08"), ("9", "0.05")])
    with pytest.raises(RoughnessError):
        raster_model(data, tr, "EPSG:32633", 0, table([("1", "0.03")]), mesh_bounds=(0, 0, 10, 10))
    m = raster_model(data, tr, "EPSG:32633", 0, tab, default_class="9", mesh_bounds=(0, 0, 10, 10))
    assert m.classes == ("1", "7", "9")
    idx = class_index_on_window(m, TRANSFORM, (10, 10), crs="EPSG:32633")
    assert np.all(idx[:, 6:] == 1) and np.all(idx[2:, :6] == 0)
    assert np.all(idx[:2, :2] == 2)  # nodata -> default class
    with pytest.raises(RoughnessError):
        raster_model(data, tr, "EPSG:32633", 0, tab, mesh_bounds=(100, 100, 110, 110))


@pytest.mark.parametrize("grid", ["same", "coarser_offset", "other_crs"])
def test_class_raster_file_read_by_window_is_the_whole_raster(tmp_path, grid):
    # a class raster file is never read whole: each window reads the pixels under it
    # (the window itself on the same grid; otherwise the part under it, then the same
    # nearest resampling).  Every window must get the class map the whole raster gives
    # (identity: the same pixels, the same resampling)
    import rasterio

    from ntrans.roughness import raster_file_model

    rng = np.random.default_rng(1)
    crs = "EPSG:32633"
    if grid == "same":
        tr, shape, file_crs = Affine(1.0, 0, 500_000.0, 0, -1.0, 5_100_000.0), (120, 150), crs
    elif grid == "coarser_offset":
        tr, shape, file_crs = Affine(2.5, 0, 499_990.3, 0, -2.5, 5_100_010.7), (60, 70), crs
    else:  # the neighbouring UTM zone: every window is resampled across a projection
        tr, shape, file_crs = Affine(2.0, 0, 1_102_000.0, 0, -2.0, 5_115_000.0), (150, 150), \
            "EPSG:32632"
        with rasterio.Env():
            from rasterio.warp import transform as warp

            x, y = warp(crs, file_crs, [500_000.0], [5_100_000.0])
        tr = Affine(2.0, 0, round(x[0]) - 60, 0, -2.0, round(y[0]) + 100)
    # patches of codes 3 / 5 / 8 and some nodata (0)
    codes = rng.choice([0, 3, 5, 8], size=(shape[0] // 5 + 1, shape[1] // 5 + 1),
                       p=[0.1, 0.3, 0.3, 0.3])
    data = np.kron(codes, np.ones((5, 5), dtype=np.int16))[:shape[0], :shape[1]].astype(np.int16)
    path = tmp_path / "classes.tif"
    with rasterio.open(path, "w", driver="GTiff", width=shape[1], height=shape[0], count=1,
                       dtype="int16", crs=file_crs, transform=tr, nodata=0) as dst:
        dst.write(data, 1)
    tab = table([("3", "0.03"), ("5", "0.05"), ("8", "0.08"), ("9", "0.1")])
    whole = raster_model(data, tr, file_crs, 0, tab, default_class="9")
    windowed = raster_file_model(path, tab, default_class="9")
    assert windowed.classes == whole.classes and windowed.default == whole.default
    dem = Affine(1.0, 0, 500_000.0, 0, -1.0, 5_100_000.0)
    for row, col, rows, cols in [(0, 0, 40, 50), (33, 71, 64, 48), (90, 120, 70, 70),
                                 (-10, -10, 30, 30), (0, 0, 0, 5)]:
        wt = dem @ Affine.translation(col, row)
        np.testing.assert_array_equal(
            class_index_on_window(windowed, wt, (rows, cols), crs=crs),
            class_index_on_window(whole, wt, (rows, cols), crs=crs))


def test_load_roughness_files(tmp_path):
    import geopandas as gpd

    gpd.GeoDataFrame({"kind": ["a", "b"]}, geometry=list(two_halves()), crs="EPSG:32633").to_file(
        tmp_path / "classes.gpkg")
    (tmp_path / "n.csv").write_text("class,n,surface\na,0.03,channel_clean\nb,0.045,\n")
    m = load_roughness(classes=tmp_path / "classes.gpkg", class_field="kind",
                       n_table=tmp_path / "n.csv", crs="EPSG:32633", mesh_area=MESH)
    assert m.classes == ("a", "b") and m.surface == ("channel_clean", None)
    with pytest.raises(RoughnessError):
        load_roughness(classes=tmp_path / "classes.gpkg", class_field="nope",
                       n_table=tmp_path / "n.csv", crs="EPSG:32633", mesh_area=MESH)
    with pytest.raises(RoughnessError):
        load_roughness(n=0.03, classes=tmp_path / "classes.gpkg")
    with pytest.raises(InputFileError):
        load_roughness(classes=tmp_path / "none.gpkg", class_field="kind", n_table=tmp_path / "n.csv")
    (tmp_path / "bad.csv").write_text("klass,n\na,0.03\n")
    with pytest.raises(RoughnessError):
        load_roughness(classes=tmp_path / "classes.gpkg", class_field="kind",
                       n_table=tmp_path / "bad.csv", mesh_area=MESH)


def _write_classes(path, *, crs="EPSG:32633", layer=None):
    import geopandas as gpd

    with warnings.catch_warnings():  # a layer without a CRS on purpose
        warnings.simplefilter("ignore", UserWarning)
        gpd.GeoDataFrame({"kind": ["a", "b"]}, geometry=list(two_halves()), crs=crs).to_file(
            path, layer=layer)
    return path


def test_class_polygons_without_crs_are_refused_like_cells(tmp_path):
    # cells without a CRS are refused (ntrans.inputs.read_cells); class polygons too,
    # instead of being taken to lie in the DEM's CRS
    path = _write_classes(tmp_path / "classes.gpkg", crs=None)
    (tmp_path / "n.csv").write_text("class,n\na,0.03\nb,0.045\n")
    with pytest.raises(CRSError) as info:
        load_roughness(classes=path, class_field="kind", n_table=tmp_path / "n.csv",
                       crs="EPSG:32633", mesh_area=MESH)
    assert str(info.value).startswith("class polygon layer")
    assert "no CRS" in str(info.value)


def test_class_polygons_reprojected_to_the_dem_crs(tmp_path):
    import geopandas as gpd

    # the same two halves drawn in UTM 33N, stored in UTM 34N: back in 33N where they were
    halves = gpd.GeoSeries(list(two_halves()), crs="EPSG:32633").to_crs("EPSG:32634")
    gpd.GeoDataFrame({"kind": ["a", "b"]}, geometry=halves).to_file(tmp_path / "c.gpkg")
    (tmp_path / "n.csv").write_text("class,n\na,0.03\nb,0.045\n")
    m = load_roughness(classes=tmp_path / "c.gpkg", class_field="kind",
                       n_table=tmp_path / "n.csv", crs="EPSG:32633", mesh_area=MESH)
    # a round trip through two transverse Mercator zones: within a micrometre
    assert shapely.equals_exact(m.polygons[np.argsort(m.polygon_class)][0],
                                two_halves()[0], tolerance=1e-6)


def test_class_polygons_from_several_layers_need_the_layer_name(tmp_path):
    path = tmp_path / "both.gpkg"
    _write_classes(path, layer="landcover")
    _write_classes(path, layer="other")
    (tmp_path / "n.csv").write_text("class,n\na,0.03\nb,0.045\n")
    kw = {"classes": path, "class_field": "kind", "n_table": tmp_path / "n.csv",
          "crs": "EPSG:32633", "mesh_area": MESH}
    with pytest.raises(InputError) as info:
        load_roughness(**kw)
    assert "landcover" in str(info.value) and "--classes-layer" in str(info.value)
    assert load_roughness(classes_layer="landcover", **kw).classes == ("a", "b")
    # the early check (before the mesh is read) asks for the layer the same way
    kw.pop("crs"), kw.pop("mesh_area")
    with pytest.raises(InputError, match="--classes-layer"):
        check_roughness_inputs(**kw)
    check_roughness_inputs(classes_layer="landcover", **kw)


@pytest.fixture
def class_files(tmp_path):
    import geopandas as gpd

    gpd.GeoDataFrame({"kind": ["a", "b"]}, geometry=list(two_halves()), crs="EPSG:32633").to_file(
        tmp_path / "classes.gpkg")
    return tmp_path / "classes.gpkg"


@pytest.mark.parametrize(
    ("rows", "extra", "ok"),
    [
        ("class,n\na,0.03\nb,0.04\n", {}, True),
        ("class,n\na,0.03\nb,0.04\nunused,x\n", {}, True),  # only classes in use count
        ("class,n\na,0.03\n", {}, False),  # b missing
        ("class,n\nA,0.03\nB,0.04\n", {}, False),  # case differs
        ("class,n\na,0.03\nb,35\n", {}, False),  # a Strickler coefficient
        ("class,n\na,0.03\nb,0.04\n", {"default_class": "c"}, False),
        ("class,n\na,0.03\nb,0.04\n", {"default_class": "a"}, True),
    ],
)
def test_check_roughness_inputs_matches_load_roughness(class_files, tmp_path, rows, extra, ok):
    (tmp_path / "n.csv").write_text(rows)
    kw = {"classes": class_files, "class_field": "kind", "n_table": tmp_path / "n.csv", **extra}
    if ok:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # the check itself never warns
            check_roughness_inputs(**kw)
        load_roughness(**kw, crs="EPSG:32633", mesh_area=MESH)
        return
    with pytest.raises(RoughnessError) as early:
        check_roughness_inputs(**kw)
    with pytest.raises(RoughnessError) as late:
        load_roughness(**kw, crs="EPSG:32633", mesh_area=MESH)
    assert str(early.value) == str(late.value)  # the same sentence before and after the mesh


def test_check_roughness_inputs_other_forms(tmp_path):
    check_roughness_inputs(n="0.03")
    with pytest.raises(RoughnessError):
        check_roughness_inputs(n="35")
    with pytest.raises(RoughnessError):
        check_roughness_inputs(n="0.03", class_raster=tmp_path / "codes.tif")
    codes = np.ones((4, 4), dtype=np.int16)
    codes[:, 2:] = 2
    import rasterio

    with rasterio.open(tmp_path / "codes.tif", "w", driver="GTiff", width=4, height=4, count=1,
                       dtype="int16", crs="EPSG:32633", transform=TRANSFORM, nodata=0) as dst:
        dst.write(codes, 1)
    (tmp_path / "n.csv").write_text("class,n\n1,0.03\n")
    with pytest.raises(RoughnessError) as err:
        check_roughness_inputs(class_raster=tmp_path / "codes.tif", n_table=tmp_path / "n.csv")
    assert "['2']" in str(err.value)
    (tmp_path / "n.csv").write_text("class,n\n1,0.03\n2,0.05\n")
    check_roughness_inputs(class_raster=tmp_path / "codes.tif", n_table=tmp_path / "n.csv")


def test_class_raster_codes_are_read_once_per_file_version(tmp_path, monkeypatch):
    # a job checks the codes before its long work and builds the class map later: the
    # raster is read once, and again only when the file has changed
    import os

    import rasterio

    import ntrans.inputs as inputs_module
    from ntrans.roughness import raster_file_codes

    def write(codes):
        with rasterio.open(tmp_path / "codes.tif", "w", driver="GTiff", width=4, height=4,
                           count=1, dtype="int16", crs="EPSG:32633", transform=TRANSFORM,
                           nodata=0) as dst:
            dst.write(codes, 1)

    write(np.full((4, 4), 3, dtype=np.int16))
    reads = []
    real = inputs_module._read_band1
    monkeypatch.setattr(inputs_module, "_read_band1", lambda *a: reads.append(1) or real(*a))
    assert raster_file_codes(tmp_path / "codes.tif").tolist() == [3.0]
    assert raster_file_codes(tmp_path / "codes.tif").tolist() == [3.0]
    assert len(reads) == 1
    write(np.full((4, 4), 5, dtype=np.int16))
    os.utime(tmp_path / "codes.tif", ns=(1, 1))  # another modification time for sure
    assert raster_file_codes(tmp_path / "codes.tif").tolist() == [5.0]
    assert len(reads) == 2


# ---------------------------------------------------------------------------------------
# n tables as spreadsheets and editors write them

N_ROWS = "class,n,surface\na,0.03,channel_clean\nb,0.045,\n"


@pytest.mark.parametrize(
    "raw",
    [
        ("\ufeff" + N_ROWS).encode("utf-8"),  # byte-order mark
        N_ROWS.replace("\n", "\r\n").encode("utf-8"),  # Windows line ends
        ("\ufeff" + N_ROWS.replace("\n", "\r\n")).encode("utf-8"),
        N_ROWS.encode("utf-16"),  # "Unicode text", with its byte-order mark
        N_ROWS.replace(",", ";").encode("utf-8"),  # semicolon-separated, decimal point
        N_ROWS.replace(",", "\t").encode("utf-8"),  # tab-separated
        b"Class , N , Surface\n a , 0.03 , channel_clean \nb,0.045,\n",  # spaces, header case
        b"# n per class, field visit\nclass,n,surface\n\na,0.03,channel_clean\n# b from photos\n"
        b"b,0.045,\n\n",  # comment and blank lines
        b"class,n,surface,note\na,0.03,channel_clean,x\nb,0.045,,\n,,,\n,,,\n",  # extra column,
        # rows of separators only
        (N_ROWS + "a,0.030,channel_clean\n").encode("utf-8"),  # the same row twice
    ],
    ids=["bom", "crlf", "bom_crlf", "utf16", "semicolon", "tab", "spaces", "comments",
         "extra_column", "same_row_twice"],
)
def test_n_table_variants_read_as_the_plain_table(tmp_path, raw):
    (tmp_path / "n.csv").write_bytes(raw)
    names, values, surfaces = read_n_table(tmp_path / "n.csv")
    assert names == ["a", "b"]
    assert [float(v) for v in values] == [0.03, 0.045]
    assert surfaces == ["channel_clean", None]


@pytest.mark.parametrize(
    ("raw", "words"),
    [
        (b"class,n\na,0,03\nb,0,045\n", ["line 2", "decimal point"]),
        (b"class;n\na;0,03\nb;0,045\n", ["a='0,03'", "decimal point"]),
        (b'class,n\na,"0,03"\nb,0.045\n', ["a='0,03'", "decimal point"]),
        (b"class,n\na,0.03,wet\nb,0.045\n", ["line 2", "3 fields", "header has 2"]),
        (b"class,n\na,0.03\nb,0.045\na,0.05\n", ["'a'", "line 2: n 0.03", "line 4: n 0.05"]),
        (b"a,0.03\nb,0.045\n", ["no header line", "class,n"]),
        (b"class,n\na,0.03\n,0.045\n", ["line 3", "no class name"]),
        ("class,n\nforêt,0.1\n".encode("latin-1"), ["not UTF-8", "CSV UTF-8"]),
        (b"PK\x03\x04\x14\x00\x06\x00", ["workbook", "save it as CSV"]),
        (b"", ["empty"]),
        (b"\n# only a comment\n", ["empty"]),
    ],
    ids=["decimal_comma", "semicolon_decimal_comma", "quoted_decimal_comma", "extra_field",
         "class_twice_differing", "no_header", "no_class_name", "latin1", "workbook", "empty",
         "comment_only"],
)
def test_n_table_mistakes_say_what_to_change(tmp_path, raw, words):
    (tmp_path / "n.csv").write_bytes(raw)
    with pytest.raises(RoughnessError) as err:
        check_roughness_inputs(classes=_write_classes(tmp_path / "c.gpkg"), class_field="kind",
                               n_table=tmp_path / "n.csv")
    for word in words:
        assert word in str(err.value)


def test_n_table_that_is_a_folder_says_so(tmp_path):
    with pytest.raises(InputFileError, match="is a folder"):
        read_n_table(tmp_path)


def _write_codes(path, codes, *, dtype="int16", nodata=0):
    import rasterio

    with rasterio.open(path, "w", driver="GTiff", width=codes.shape[1], height=codes.shape[0],
                       count=1, dtype=dtype, crs="EPSG:32633", transform=TRANSFORM,
                       nodata=nodata) as dst:
        dst.write(codes.astype(dtype), 1)
    return path


@pytest.mark.parametrize("spelling", ["{}", "0{}", "{}.0", " {} "])
def test_class_codes_match_table_rows_that_write_the_number_another_way(tmp_path, spelling):
    codes = np.ones((10, 10))
    codes[:, 5:] = 2
    raster = _write_codes(tmp_path / "codes.tif", codes)
    rows = "".join(f"{spelling.format(c)},{n}\n" for c, n in ((1, 0.03), (2, 0.05), (3, 0.07)))
    (tmp_path / "n.csv").write_text("class,n\n" + rows)
    check_roughness_inputs(class_raster=raster, n_table=tmp_path / "n.csv", default_class="3")
    m = load_roughness(class_raster=raster, n_table=tmp_path / "n.csv", default_class="3")
    assert m.classes == tuple(spelling.format(c).strip() for c in (1, 2, 3))
    np.testing.assert_array_equal(m.n, [0.03, 0.05, 0.07])
    index = class_index_on_window(m, TRANSFORM, (10, 10))
    assert set(np.unique(index[:, :5])) == {0} and set(np.unique(index[:, 5:])) == {1}
    # a numeric class attribute (here real numbers, as a float field holds) matches alike
    p = polygon_model(two_halves(), np.array([1.0, 2.0], dtype=object),
                      table=read_n_table(tmp_path / "n.csv"), mesh_area=MESH)
    assert p.classes == tuple(spelling.format(c).strip() for c in (1, 2))


def test_text_classes_and_code_written_twice_are_not_matched_by_number(tmp_path):
    # text labels match exactly: "01" and "1" may be different classes
    with pytest.raises(RoughnessError, match="missing from the n table"):
        polygon_model(two_halves(), np.array(["1", "2"], dtype=object),
                      table=table([("01", "0.03"), ("02", "0.05")]), mesh_area=MESH)
    codes = np.ones((10, 10))
    raster = _write_codes(tmp_path / "codes.tif", codes)
    (tmp_path / "n.csv").write_text("class,n\n01,0.03\n1.0,0.05\n")
    with pytest.raises(RoughnessError, match="class code 1 more than once"):
        check_roughness_inputs(class_raster=raster, n_table=tmp_path / "n.csv")


def test_class_raster_without_crs_is_refused_like_class_polygons(tmp_path):
    import rasterio

    path = tmp_path / "codes.tif"
    with warnings.catch_warnings():  # a raster without a CRS on purpose
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with rasterio.open(path, "w", driver="GTiff", width=10, height=10, count=1,
                           dtype="int16", transform=TRANSFORM, nodata=0) as dst:
            dst.write(np.ones((10, 10), dtype="int16"), 1)
    (tmp_path / "n.csv").write_text("class,n\n1,0.03\n")
    with pytest.raises(CRSError, match="class raster .* has no CRS"):
        load_roughness(class_raster=path, n_table=tmp_path / "n.csv", crs="EPSG:32633")
    with pytest.raises(CRSError, match="class raster .* has no CRS"):  # before long work
        check_roughness_inputs(class_raster=path, n_table=tmp_path / "n.csv")


@pytest.mark.parametrize("where, share", [
    ("under_mesh", 0.25),      # a quarter of the mesh ground: refused
    ("outside_mesh", None),    # holes beside the mesh are nobody's ground
    ("dem_nodata", None),      # nor holes where the terrain itself has no data
    ("none", None),
])
def test_class_raster_holes_are_refused_early_only_under_the_mesh_ground(tmp_path, where, share):
    from conftest import write_dem

    from ntrans.inputs import open_dem
    from ntrans.roughness import check_class_raster_holes

    z = np.full((10, 20), 5.0)       # 20 x 10 m of terrain, mesh on its left half
    codes = np.ones((10, 20))
    if where == "under_mesh":
        codes[5:, 5:10] = 0          # 25 of the mesh's 100 m2 (geometry: pixel count)
    elif where == "outside_mesh":
        codes[:, 12:] = 0
    elif where == "dem_nodata":
        codes[:, 7:10] = 0
        z[:, 7:10] = np.nan
    write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    dem = open_dem(write_dem(tmp_path / "dem.tif", z))
    mesh = np.array([shapely.box(0, 0, 5, 10), shapely.box(5, 0, 10, 10)])

    def not_needed():
        raise AssertionError("the mesh was read for a raster without holes")

    geoms = not_needed if where == "none" else mesh
    if share is None:
        check_class_raster_holes(tmp_path / "codes.tif", geoms, dem)
    else:
        # the estimate counts whole pixels by their centres: exact on this grid
        with pytest.raises(RoughnessError, match=rf"about {100 * share:g}% of the mesh ground"):
            check_class_raster_holes(tmp_path / "codes.tif", geoms, dem)
        check_class_raster_holes(tmp_path / "codes.tif", geoms, dem, default_class="1")


@pytest.mark.parametrize("kind", ["n_table", "class_raster", "classes"])
def test_missing_roughness_file_written_with_backslashes_gets_a_hint(tmp_path, kind):
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "x").write_text("")
    given = f"{tmp_path}/data\\x"  # exists with a forward slash
    hint = r"data/x' exists: write paths with forward slashes"
    with pytest.raises(InputFileError, match=hint):
        if kind == "n_table":
            read_n_table(given)
        elif kind == "class_raster":
            check_roughness_inputs(class_raster=given, n_table=tmp_path / "data" / "x")
        else:
            check_roughness_inputs(classes=given, class_field="c", n_table=tmp_path / "x")
