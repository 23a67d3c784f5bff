"""Tests of ntrans.adjust.adjust_roughness: the whole job on small DEMs built in the test."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import shapely
from conftest import (
    METRES_PER_UNIT,
    grid_polygons,
    metres_per,
    write_cells,
    write_dem,
    write_in_units,
)

from ntrans.adjust import CLASS_COLUMNS, adjust_roughness
from ntrans.errors import DryWetMismatchWarning, InputError, NtransWarning, RoughnessError

FACE_CONTRACT = ["face_id", "stage", "n_ratio", "conveyance_source", "conveyance_target",
                 "stage_bias_unadjusted", "stage_bias_adjusted"]  # DESIGN.md section 4


def channel_dem(size: int = 40) -> np.ndarray:
    """A north-south trapezoidal channel (bottom 6 m wide at z 10, banks 1:2 up to 12)."""
    x = np.arange(size) + 0.5
    z = np.where(np.abs(x - 20) < 3, 0.0, np.minimum(2.0, (np.abs(x - 20) - 3) * 0.5))
    return np.tile(z, (size, 1)) + 10.0


@pytest.fixture
def flat_case(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", np.full((20, 20), 10.0))
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 10.0))
    return dem, cells


@pytest.fixture
def channel_case(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", channel_dem())
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(4, 4, 10.0))
    polys = [shapely.box(0, 0, 16, 40), shapely.box(16, 0, 24, 40), shapely.box(24, 0, 40, 40)]
    classes = write_cells(tmp_path / "classes.gpkg", polys, id_field=None,
                          attributes={"kind": ["grass", "channel", "grass"]})
    table = tmp_path / "n.csv"
    table.write_text("class,n,surface\nchannel,0.03,channel_clean\ngrass,0.035,pasture_short_grass\n")
    return dem, cells, classes, table


def _quiet(**kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DryWetMismatchWarning)
        return adjust_roughness(**kw)


PAIRS = [
    {"source": "flat", "target": "subgrid", "closure": "lumped"},
    {"source": "flat", "target": "subgrid", "closure": "strip"},
    {"source": "flat", "target": "subgrid", "closure": "cell"},
    {"source": "subgrid", "target": "flat", "closure": "lumped"},
    {"source": "subgrid", "target": "flat", "closure": "strip"},
    {"source": "subgrid", "target": "subgrid", "closure": "strip", "source_closure": "lumped"},
]


@pytest.mark.parametrize("pair", PAIRS)
def test_flat_dem_identity(flat_case, tmp_path, pair):
    dem, cells = flat_case
    res = adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, depths="0.5,1,2", **pair)
    table = pd.read_csv(tmp_path / "out" / "n_by_class.csv")
    # geometry identity: flat terrain gives every family the same conveyance
    assert table["n_target"].iloc[0] == pytest.approx(0.03, rel=1e-6)  # solver tolerance
    faces = pd.read_parquet(tmp_path / "out" / "face_adjustment.parquet")
    np.testing.assert_allclose(faces["n_ratio"], 1.0, rtol=1e-12)  # geometry identity
    np.testing.assert_allclose(faces["stage_bias_unadjusted"], 0.0, atol=1e-6)  # bisection tol.
    cells_t = pd.read_parquet(tmp_path / "out" / "cell_adjustment.parquet")
    np.testing.assert_allclose(cells_t["n_ratio"], 1.0, rtol=1e-12)  # geometry identity
    assert res.summary["target"]["closure"] == (pair["closure"] if pair["target"] == "subgrid"
                                                else "flat")


def test_channel_outputs_and_contract(channel_case, tmp_path):
    dem, cells, classes, table = channel_case
    out = tmp_path / "out"
    res = _quiet(dem=dem, cells=cells, out=out, classes=classes, class_field="kind",
                 n_table=table, depths="0.5:2.5:0.5", csv=True)
    names = {p.name for p in res.files}
    assert {"n_by_class.csv", "face_adjustment.parquet", "cell_adjustment.parquet", "cells.gpkg",
            "faces.gpkg", "adjust_summary.json", "face_adjustment.csv"} <= names
    frame = pd.read_csv(out / "n_by_class.csv")
    assert list(frame.columns) == list(CLASS_COLUMNS)
    assert sorted(frame["class"]) == ["channel", "grass"]
    faces = pd.read_parquet(out / "face_adjustment.parquet")
    assert set(FACE_CONTRACT) <= set(faces.columns)
    # n_ratio is NaN exactly where one family is dry (DESIGN.md 4)
    dry = (faces["conveyance_source"] <= 0) | (faces["conveyance_target_unadjusted"] <= 0)
    assert faces["n_ratio"].isna().equals(dry)
    summary = json.loads((out / "adjust_summary.json").read_text())
    assert summary["composite"] == "horton_einstein" and len(summary["cautions"]) == 3
    assert res.text.splitlines()[-1].startswith("Caution:")
    assert frame["weight_share"].sum() == pytest.approx(1.0)  # shares of one total


def test_channel_fit_lowers_conveyance_misfit(channel_case, tmp_path):
    dem, cells, classes, table = channel_case
    _quiet(dem=dem, cells=cells, out=tmp_path / "out", classes=classes, class_field="kind",
           n_table=table, depths="1.5,2,2.5")
    faces = pd.read_parquet(tmp_path / "out" / "face_adjustment.parquet")
    both = faces["n_ratio"].notna()
    f = faces[both]
    w = f["conveyance_source"] / f.groupby("depth")["conveyance_source"].transform("sum")
    before = np.sum(w * np.log(f["conveyance_target_unadjusted"] / f["conveyance_source"]) ** 2)
    after = np.sum(w * np.log(f["conveyance_target"] / f["conveyance_source"]) ** 2)
    # the fit minimises exactly this weighted log misfit, starting from n carried over
    assert after <= before
    assert after < 0.9 * before  # the channel faces pull the fit away from n_source


def test_reproducible(channel_case, tmp_path):
    dem, cells, classes, table = channel_case
    for name in ("a", "b"):
        _quiet(dem=dem, cells=cells, out=tmp_path / name, classes=classes, class_field="kind",
               n_table=table, depths="0.5:2:0.5")
    assert (tmp_path / "a" / "n_by_class.csv").read_bytes() == \
        (tmp_path / "b" / "n_by_class.csv").read_bytes()


def test_water_surface_window(flat_case, tmp_path):
    dem, cells = flat_case
    ws = write_dem(tmp_path / "ws.tif", np.full((20, 20), 11.5))
    _quiet(dem=dem, cells=cells, out=tmp_path / "out", n=0.03, water_surface=[ws])
    faces = pd.read_parquet(tmp_path / "out" / "face_adjustment.parquet")
    np.testing.assert_allclose(faces["stage"], 11.5)  # the raster's value everywhere
    cells_t = pd.read_parquet(tmp_path / "out" / "cell_adjustment.parquet")
    np.testing.assert_allclose(cells_t["stage"], 11.5)
    np.testing.assert_allclose(faces["n_ratio"], 1.0, rtol=1e-12)  # geometry identity


def test_class_raster_input(flat_case, tmp_path):
    dem, cells = flat_case
    codes = np.ones((20, 20))
    codes[:, 10:] = 2
    raster = write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    table = tmp_path / "n.csv"
    table.write_text("class,n\n1,0.03\n2,0.06\n")
    res = _quiet(dem=dem, cells=cells, out=tmp_path / "out", class_raster=raster, n_table=table,
                 depths="1")
    assert res.classes["class"].tolist() == ["1", "2"]
    # geometry identity on flat terrain: each class keeps its n
    np.testing.assert_allclose(res.classes["n_target"], [0.03, 0.06], rtol=1e-5)


def _nothing_written(out):
    return not out.exists() and not [p for p in out.parent.iterdir()
                                     if p.name.startswith(f".{out.name}")]


@pytest.mark.parametrize(
    ("rows", "polys", "kinds", "extra"),
    [
        # class missing from the table (both listed)
        ("class,n\na,0.03\n", [(0, 0, 10, 20), (10, 0, 20, 10), (10, 10, 20, 20)], ["a", "b", "c"], {}),
        ("class,n\na,0.03\nb,0\n", [(0, 0, 10, 20), (10, 0, 20, 20)], ["a", "b"], {}),  # n <= 0
        ("class,n\na,0.03\nb,x\n", [(0, 0, 10, 20), (10, 0, 20, 20)], ["a", "b"], {}),  # not a number
        ("class,n\na,0.03\nb,0.04\n", [(0, 0, 12, 20), (8, 0, 20, 20)], ["a", "b"], {}),  # overlap
        ("class,n\na,0.03\n", [(100, 100, 120, 120)], ["a"], {"default_class": "a"}),  # misses mesh
        ("class,n\na,0.03\n", [(0, 0, 10, 20)], ["a"], {}),  # half the mesh uncovered
    ],
)
def test_bad_roughness_nothing_written(flat_case, tmp_path, rows, polys, kinds, extra):
    dem, cells = flat_case
    table = tmp_path / "n.csv"
    table.write_text(rows)
    classes = write_cells(tmp_path / "classes.gpkg", [shapely.box(*p) for p in polys],
                          id_field=None, attributes={"kind": kinds})
    out = tmp_path / "out"
    with pytest.raises(RoughnessError) as err:
        adjust_roughness(dem, cells, out=out, classes=classes, class_field="kind", n_table=table,
                         depths="1", **extra)
    if kinds == ["a", "b", "c"]:
        assert "'b'" in str(err.value) and "'c'" in str(err.value)  # all missing listed
    assert _nothing_written(out)


@pytest.mark.parametrize(
    "kw",
    [
        {"source": "flat", "target": "flat"},
        {"depths": "1", "stages": "11"},
        {"source_closure": "strip"},
        {"composite": "average"},
        {"snap_tolerance": -1.0},  # the shared job setup checks it for every job
        {"face_spacing": 0.0},
        {"tile_size": 0},
    ],
)
def test_bad_options(flat_case, tmp_path, kw):
    dem, cells = flat_case
    args = {"depths": "1", **kw}
    with pytest.raises(InputError):
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, **args)
    assert _nothing_written(tmp_path / "out")


def _not_reached(*args, **kwargs):
    raise AssertionError("the tiles' passes started")


def test_class_raster_gap_needs_default(flat_case, tmp_path, monkeypatch):
    import ntrans.adjust as adjust_module

    dem, cells = flat_case
    codes = np.ones((20, 20))
    codes[:, 15:] = 0  # a quarter of the mesh without a class (nodata)
    raster = write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    table = tmp_path / "n.csv"
    table.write_text("class,n\n1,0.03\n")
    with monkeypatch.context() as patch:  # refused before the tiles' statistics pass
        patch.setattr(adjust_module, "_run_tiles", _not_reached)
        with pytest.raises(RoughnessError, match="about 25% of the mesh ground .* "
                           r"\(--default-class; default_class in a project file\)"):
            adjust_roughness(dem, cells, out=tmp_path / "out", class_raster=raster,
                             n_table=table, depths="1")
    assert _nothing_written(tmp_path / "out")
    res = _quiet(dem=dem, cells=cells, out=tmp_path / "out", class_raster=raster, n_table=table,
                 depths="1", default_class="1")
    assert res.classes["class"].tolist() == ["1"]


@pytest.mark.parametrize("closure", ["lumped", "strip"])
def test_threads_same_result_to_the_bit(channel_case, tmp_path, closure):
    dem, cells, classes, table = channel_case
    kw = {"dem": dem, "cells": cells, "classes": classes, "class_field": "kind", "n_table": table,
          "depths": "0.5,1,2", "tile_size": 16, "closure": closure}
    _quiet(out=tmp_path / "one", threads=1, **kw)
    _quiet(out=tmp_path / "two", threads=2, **kw)
    # same tiles, same arithmetic, results taken in tile order
    assert (tmp_path / "one" / "n_by_class.csv").read_bytes() == \
        (tmp_path / "two" / "n_by_class.csv").read_bytes()
    for name in ("face_adjustment.parquet", "cell_adjustment.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "one" / name),
                                      pd.read_parquet(tmp_path / "two" / name),
                                      check_exact=True)


def test_a_flat_pond_level_stays_exact_whatever_the_tiling(tmp_path):
    """Under a water surface that is level over a cell, the cell's stage is that level
    exactly (its lowest value plus a zero mean excess), so a pond flattened in the DEM at
    the same level stays dry at every tile size: a stage a last bit off would count all
    its pixels as wet.  Every output then agrees across tilings to round-off (1e-7 for the
    stage solver's tolerance, relative to the stage bias)."""
    y, x = np.mgrid[0:40, 0:40] + 0.5
    z = 10.0 + 0.05 * x
    pond = (x > 4) & (x < 36) & (y > 4) & (y < 36)
    z[pond] = 10.0  # flattened water body
    dem = write_dem(tmp_path / "dem.tif", z)
    surface = write_dem(tmp_path / "ws.tif", np.where(pond, 10.0, 12.0))
    # 9.7 m cells off the pixel grid: plan areas with fractions in every window
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(4, 4, 9.7, origin=(0.35, 0.45)))
    tables = {}
    for tile in (7, 13, 64):
        out = tmp_path / f"t{tile}"
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NtransWarning)
            _quiet(dem=dem, cells=cells, out=out, n=0.03, water_surface=[surface],
                   tile_size=tile)
        cell = pd.read_parquet(out / "cell_adjustment.parquet").set_index("cell_id")
        inner = cell.loc[[6, 7, 10, 11]]  # wholly inside the pond
        assert (inner["stage"] == 10.0).all()
        tables[tile] = {name: pd.read_parquet(out / name).sort_values(
            [c for c in ("face_id", "cell_id") if c in pd.read_parquet(out / name).columns][:1])
            .reset_index(drop=True)
            for name in ("face_adjustment.parquet", "cell_adjustment.parquet")}
        tables[tile]["n_by_class"] = (out / "n_by_class.csv").read_bytes()
    for tile in (7, 13):
        assert tables[tile]["n_by_class"] == tables[64]["n_by_class"]
        for name in ("face_adjustment.parquet", "cell_adjustment.parquet"):
            pd.testing.assert_frame_equal(tables[tile][name], tables[64][name],
                                          check_exact=False, rtol=1e-7, atol=1e-7)


def test_nanmedian_rows_without_values_is_nan_and_quiet():
    from ntrans.adjust import _nanmedian_rows

    values = np.array([[1.0, np.nan, 3.0], [np.nan, np.nan, np.nan], [np.inf, 2.0, 0.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no "All-NaN slice" warning
        got = _nanmedian_rows(values)
    np.testing.assert_array_equal(got, [2.0, np.nan, 2.0])  # numpy's nanmedian where defined


def test_scheduler_same_result(channel_case, tmp_path):
    from distributed import LocalCluster

    dem, cells, classes, table = channel_case
    kw = {"dem": dem, "cells": cells, "classes": classes, "class_field": "kind", "n_table": table,
          "depths": "1,2", "tile_size": 16}
    _quiet(out=tmp_path / "local", **kw)
    # an in-process cluster (threads) keeps the test fast; the code path is the same
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster:
        _quiet(out=tmp_path / "dask", scheduler=cluster.scheduler_address, **kw)
    # same tiles, same order, same arithmetic
    assert (tmp_path / "local" / "n_by_class.csv").read_bytes() == \
        (tmp_path / "dask" / "n_by_class.csv").read_bytes()
    a = pd.read_parquet(tmp_path / "local" / "face_adjustment.parquet")
    b = pd.read_parquet(tmp_path / "dask" / "face_adjustment.parquet")
    pd.testing.assert_frame_equal(a, b)


@pytest.mark.parametrize("available, warns", [(1.5e9, True), (10**13, False), (None, False)])
def test_warns_up_front_when_memory_looks_short(flat_case, tmp_path, monkeypatch, available,
                                               warns):
    import ntrans.adjust as adjust_module
    from ntrans.errors import MemoryEstimateWarning

    # a 2 GB estimate: above 90 % of 1.5 GB (a warning) but not above twice it (refused)
    monkeypatch.setattr(adjust_module, "estimated_peak_bytes", lambda *a, **k: 2e9)
    monkeypatch.setattr(adjust_module, "available_memory", lambda: available)
    dem, cells = flat_case
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, depths="0.5,1,2",
                         source="flat", target="subgrid", closure="lumped")
    memory = [w for w in caught if issubclass(w.category, MemoryEstimateWarning)]
    assert len(memory) == int(warns)
    if warns:
        # one sentence saying what to change; the job still runs (an estimate, not a limit)
        assert "(--threads 1) with a smaller --tile-size" in str(memory[0].message)
        assert (tmp_path / "out" / "n_by_class.csv").exists()


def test_refuses_up_front_what_could_not_fit_in_memory(flat_case, tmp_path, monkeypatch):
    # more than twice the memory available: the job could not finish, so it stops before
    # the tile passes with one sentence and writes nothing
    import ntrans.adjust as adjust_module
    from ntrans.errors import InputError

    monkeypatch.setattr(adjust_module, "available_memory", lambda: 10_000)
    dem, cells = flat_case
    with pytest.raises(InputError, match="give fewer window stages"):
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, depths="0.5,1,2",
                         source="flat", target="subgrid", closure="lumped")
    assert not (tmp_path / "out").exists()


def test_warns_before_the_fit_when_its_mixed_entries_look_short(flat_case, tmp_path,
                                                                 monkeypatch):
    # item-stages wet in several classes are kept one by one for the fit: their number is
    # known once the statistics are in, and a second warning says so before the fit
    import ntrans.adjust as adjust_module
    from ntrans.errors import MemoryEstimateWarning

    dem, cells = flat_case
    codes = 1 + (np.add.outer(np.arange(20), np.arange(20)) // 3) % 2  # diagonal stripes
    raster = write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    table = tmp_path / "n.csv"
    table.write_text("class,n\n1,0.03\n2,0.06\n")
    monkeypatch.setattr(adjust_module, "available_memory", lambda: 1_000)
    monkeypatch.setattr(adjust_module, "estimated_peak_bytes", lambda *a, **k: 1_500.0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        adjust_roughness(dem, cells, out=tmp_path / "out", class_raster=raster, n_table=table,
                         depths="0.5,1", source="flat", target="subgrid", closure="lumped")
    memory = [str(w.message) for w in caught if issubclass(w.category, MemoryEstimateWarning)]
    assert len(memory) == 2 and "wet in several classes" in memory[1]
    assert (tmp_path / "out" / "n_by_class.csv").exists()  # an estimate, not a limit


def test_available_memory_is_a_positive_byte_count_or_unknown():
    from ntrans.memory import available_memory

    value = available_memory()
    assert value is None or value > 0


# --------------------------------------------------------------------------- input checks


def _mesh_never_read(monkeypatch):
    """Make reading the mesh fail the test: a check must come before it."""
    import ntrans.tables

    def refuse(*args, **kwargs):
        raise AssertionError("the mesh was read before the roughness inputs were checked")

    monkeypatch.setattr(ntrans.tables, "prepare_mesh_job", refuse)


@pytest.mark.parametrize("bad", ["35", "12", "0.0004"])
def test_n_outside_the_fit_bounds_refused_before_any_work(flat_case, tmp_path, monkeypatch, bad):
    dem, cells = flat_case
    _mesh_never_read(monkeypatch)
    out = tmp_path / "out"
    with pytest.raises(RoughnessError):
        adjust_roughness(dem, cells, out=out, n=bad, depths="1")
    table = tmp_path / "n.csv"
    table.write_text(f"class,n\na,0.03\nb,{bad}\n")
    classes = write_cells(tmp_path / "classes.gpkg", [shapely.box(0, 0, 10, 20),
                                                      shapely.box(10, 0, 20, 20)],
                          id_field=None, attributes={"kind": ["a", "b"]})
    with pytest.raises(RoughnessError):
        adjust_roughness(dem, cells, out=out, classes=classes, class_field="kind", n_table=table,
                         depths="1")
    assert _nothing_written(out)


def test_missing_class_and_default_class_refused_before_any_work(flat_case, tmp_path,
                                                                  monkeypatch):
    dem, cells = flat_case
    _mesh_never_read(monkeypatch)
    table = tmp_path / "n.csv"
    table.write_text("class,n\na,0.03\nb,0.04\n")
    classes = write_cells(tmp_path / "classes.gpkg", [shapely.box(0, 0, 10, 20)],
                          id_field=None, attributes={"kind": ["a"]})
    with pytest.raises(RoughnessError) as err:
        adjust_roughness(dem, cells, out=tmp_path / "out", classes=classes, class_field="kind",
                         n_table=table, default_class="bb", depths="1")
    assert str(err.value).startswith("default class 'bb' is not in the n table")


def _surface(tmp_path, value, **kw):
    return write_dem(tmp_path / "ws.tif", np.full((20, 20), value), **kw)


@pytest.mark.parametrize(
    "window",
    [
        "below",      # a depth grid given as a water surface: 2 m, the terrain at 10 m
        "nodata",     # the raster covers the mesh but holds no value there
        "away",       # the raster lies 1 km east of the mesh
        "stages",     # stages below the terrain
        "zero_depth",  # depths of zero wet nothing
    ],
)
def test_window_that_wets_nothing_is_refused_before_anything_is_written(flat_case, tmp_path,
                                                                        window):
    dem, cells = flat_case
    kw: dict = {
        "below": {"water_surface": [_surface(tmp_path, 2.0)]},
        "nodata": {"water_surface": [_surface(tmp_path, np.nan)]},
        "away": {"water_surface": [_surface(tmp_path, 11.5, origin=(1000.0, 20.0))]},
        "stages": {"stages": "0:5:1"},
        "zero_depth": {"depths": "0"},
    }[window]
    out = tmp_path / "out"
    with pytest.raises(InputError):
        adjust_roughness(dem, cells, out=out, n=0.03, **kw)
    assert _nothing_written(out)


@pytest.mark.parametrize("window", [{"stages": "11"}, {"depths": "0.5"}])
@pytest.mark.parametrize("coverage", ["exact", "centre"])
def test_a_dem_of_only_nodata_under_the_mesh_is_refused_as_such(tmp_path, window, coverage):
    # the cells lie over the DEM's extent, every pixel is nodata: the sentence names the
    # DEM and its nodata value, not the window
    dem = write_dem(tmp_path / "dem.tif", np.full((20, 20), np.nan))
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 10.0))
    out = tmp_path / "out"
    with pytest.raises(InputError, match=r"none of the 4 cells lies over valid terrain.*"
                                         r"nodata \(-9999\)"):
        _quiet(dem=dem, cells=cells, out=out, n=0.03, coverage=coverage, **window)
    assert _nothing_written(out)


def test_undeclared_nodata_under_the_mesh_is_refused(tmp_path):
    z = np.full((20, 20), 10.0)
    z[3:6, 3:6] = -32767.0  # gaps that hold a value the file does not declare
    dem = write_dem(tmp_path / "dem.tif", z, nodata=-9999.0)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 10.0))
    out = tmp_path / "out"
    with pytest.raises(InputError, match=r"-32767 m under the cells, lower than any terrain"):
        _quiet(dem=dem, cells=cells, out=out, n=0.03, depths="0.5")
    assert _nothing_written(out)


def test_water_surface_off_the_mesh_refused_before_the_tile_passes(flat_case, tmp_path,
                                                                    monkeypatch):
    import ntrans.adjust as adjust_module

    def refuse(*args, **kwargs):
        raise AssertionError("a tile pass ran")

    monkeypatch.setattr(adjust_module, "_run_tiles", refuse)
    dem, cells = flat_case
    ws = _surface(tmp_path, 11.5, origin=(1000.0, 20.0))
    with pytest.raises(InputError) as err:
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, water_surface=[ws])
    assert str(err.value).startswith("water surface 'ws' lies off the mesh everywhere")


@pytest.mark.parametrize(
    ("depth", "units", "deep"),
    [
        (1.5, None, False),
        (29.0, None, False),
        (40.0, None, True),      # 40 m over the terrain: more than the 30 m limit
        (40.0, "foot", False),   # 40 ft = 12.2 m
        (110.0, "foot", True),   # 110 ft = 33.5 m
    ],
)
def test_deep_window_warns(flat_case, tmp_path, depth, units, deep):
    from ntrans.errors import DeepWindowWarning

    dem, cells = flat_case
    ws = _surface(tmp_path, 10.0 + depth)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, water_surface=[ws],
                         vertical_units=units)
    found = [w for w in caught if issubclass(w.category, DeepWindowWarning)]
    assert len(found) == int(deep)


@pytest.mark.parametrize("coverage", ["exact", "centre"])
def test_cells_over_nodata_warn_and_carry_their_covered_fraction(tmp_path, coverage):
    import pyogrio

    from ntrans.errors import PartialCoverageWarning
    from ntrans.tables import build_tables

    z = np.full((20, 30), 10.0)
    z[:, 25:] = np.nan   # the right column of cells half over nodata
    z[10:, 20:] = np.nan  # and its lower cell (rows 10-19 are y 0-10) wholly
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 2, 10.0))
    with pytest.warns(PartialCoverageWarning) as adj:
        _quiet(dem=dem, cells=cells, out=tmp_path / "adj", n=0.03, depths="1",
               coverage=coverage)
    with pytest.warns(PartialCoverageWarning) as tab:
        build_tables(dem, cells, out=tmp_path / "tab", depths="1", coverage=coverage)
    # the same sentence from both jobs: one cell wholly, one partly without terrain
    assert [str(w.message) for w in adj] == [str(w.message) for w in tab]
    assert str(adj[0].message).startswith("2 cells lie outside the DEM or over nodata, "
                                          "1 wholly and 1 partly")
    a = pyogrio.read_dataframe(tmp_path / "adj" / "cells.gpkg").set_index("cell_id")
    t = pyogrio.read_dataframe(tmp_path / "tab" / "cells.gpkg").set_index("cell_id")
    # geometry identity: cell 6 (x 20-30, y 10-20) has half its area over pixels with
    # terrain, cell 3 (x 20-30, y 0-10) none
    np.testing.assert_allclose(a.loc[[3, 6], "covered_fraction"], [0.0, 0.5], atol=1e-12)
    np.testing.assert_array_equal(a["covered_fraction"], t["covered_fraction"])
    summary = json.loads((tmp_path / "adj" / "adjust_summary.json").read_text())
    assert summary["partial_cells"] == 2 and summary["cells_without_terrain"] == 1


def test_centre_rule_finds_cells_off_pixel_lines_wholly_covered(tmp_path):
    import pyogrio

    from ntrans.errors import PartialCoverageWarning

    dem = write_dem(tmp_path / "dem.tif", channel_dem())
    # 9.3 m cells off the pixel lines over the 40 m DEM: 81, 90 or 100 pixel centres
    # each, never the polygon's 86.49 m2, and all of them over terrain
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 3, 9.3, origin=(2.3, 1.7)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", PartialCoverageWarning)
        _quiet(dem=dem, cells=cells, out=tmp_path / "adj", n=0.03, depths="1",
               coverage="centre")
    a = pyogrio.read_dataframe(tmp_path / "adj" / "cells.gpkg")
    np.testing.assert_array_equal(a["covered_fraction"], 1.0)


#: (horizontal, vertical) units of the same terrain and mesh; None: vertical as horizontal
UNIT_CASES = [("metre", "foot"), ("foot", None), ("foot", "metre"), ("us_survey_foot", None)]
#: Manning unit factor k per horizontal unit: 1.0 SI, 1.486 ft^(1/3)/s in US customary
#: units (Manning's equation in US customary units, Chow 1959, Open-Channel Hydraulics,
#: section 5-6, from memory; it rounds the exact (1 / 0.3048)^(1/3) = 1.48592)
MANNING_K = {"metre": 1.0, "foot": 1.486, "us_survey_foot": 1.486}


@pytest.mark.parametrize("horizontal, vertical", UNIT_CASES)
def test_same_terrain_in_other_units_converts_by_the_unit_factors(tmp_path, horizontal,
                                                                   vertical):
    z = channel_dem()
    polys = grid_polygons(4, 4, 10.0)
    depths_m = [0.5, 1.0, 1.5]
    fz = METRES_PER_UNIT[vertical or horizontal]  # metres per vertical unit (by definition)
    fl = METRES_PER_UNIT[horizontal]  # metres per horizontal unit
    runs = {}
    for name, units, factor in (("m", {}, 1.0),
                                ("u", {"horizontal": horizontal, "vertical": vertical}, fz)):
        dem, cells = write_in_units(tmp_path / name, z, polys, **units)
        runs[name] = _quiet(dem=dem, cells=cells, out=tmp_path / name / "out", n=0.035,
                            vertical_units=units.get("vertical"),
                            depths=",".join(repr(d / factor) for d in depths_m))
    k = MANNING_K[horizontal]
    assert runs["u"].summary["manning_k"] == k
    # the fit depends on ratios of conveyances only: the same n in every unit
    np.testing.assert_allclose(runs["u"].classes["n_target"], runs["m"].classes["n_target"],
                               rtol=1e-9)
    for table, units_key, power in (("face_adjustment", "units", 8 / 3),
                                    ("cell_adjustment", "cell_units", 11 / 3)):
        ref = pd.read_parquet(tmp_path / "m" / "out" / f"{table}.parquet")
        got = pd.read_parquet(tmp_path / "u" / "out" / f"{table}.parquet")
        ref_units, units = runs["m"].summary[units_key], runs["u"].summary[units_key]
        assert len(got) == len(ref)
        for col in (c for c in got.columns if got[c].dtype.kind == "f"):
            to_si = metres_per(units[col], foot=fl if horizontal != "metre" else fz)
            if col.startswith("conveyance"):
                # K / k is a length^(8/3) on faces (A R^(2/3), Manning's equation) and a
                # length^(11/3) on cells (V R^(2/3)): it converts by the length factor
                # alone; 1e-9 is round-off of the scaled coordinates
                np.testing.assert_allclose(got[col] / k * fl ** power, ref[col], rtol=1e-9,
                                           atol=1e-9, err_msg=col)
                # as labelled (m3/s, ft3/s; m4/s, ft4/s): equal up to k's rounding
                # (1.486 vs 1.48592, 5.4e-5 relative)
                np.testing.assert_allclose(got[col] * to_si, ref[col], rtol=6e-5, atol=1e-9,
                                           err_msg=col)
            else:
                # stages, depths and stage bias in their labelled unit, ratios equal;
                # 1e-7 covers the stage solver's tolerance (1e-9 x depth)
                np.testing.assert_allclose(got[col] * to_si, ref[col] * metres_per(
                    ref_units[col], 1.0), rtol=1e-9, atol=1e-7, err_msg=col)
    # n_by_class.csv's columns carry their units in the summary too: every column labelled,
    # n in s/m^(1/3) whatever the DEM's units (k carries them), the stage errors in Z, and
    # each number converts by its label (same tolerances as above)
    ref_units, units = runs["m"].summary["class_units"], runs["u"].summary["class_units"]
    assert list(units) == list(CLASS_COLUMNS)
    assert list(runs["u"].summary["class_descriptions"]) == list(CLASS_COLUMNS)
    assert units["n_target"] == ref_units["n_target"] == "s/m^(1/3)"
    assert units["bias_adjusted_median"] == runs["u"].summary["units"]["stage"]
    ref, got = runs["m"].classes, runs["u"].classes
    for col in (c for c in CLASS_COLUMNS if got[c].dtype.kind == "f"):
        np.testing.assert_allclose(got[col] * metres_per(units[col], fz),
                                   ref[col] * metres_per(ref_units[col], 1.0), rtol=1e-9,
                                   atol=1e-7, err_msg=col)


@pytest.mark.parametrize("closure", ["lumped", "cell"])
def test_cell_layer_holds_the_fit_domains_medians_and_says_which(channel_case, tmp_path,
                                                                  closure):
    import geopandas as gpd

    from ntrans.maps import cell_median_of_faces
    from ntrans.outputs import column_descriptions_of

    dem, cells, classes, table = channel_case
    out = tmp_path / "out"
    res = _quiet(dem=dem, cells=cells, out=out, classes=classes, class_field="kind",
                 n_table=table, depths="0.5:2.5:0.5", closure=closure)
    layer = gpd.read_file(out / "cells.gpkg").set_index("cell_id")
    faces = pd.read_parquet(out / "face_adjustment.parquet")
    own = pd.read_parquet(out / "cell_adjustment.parquet").groupby("cell_id")
    described = column_descriptions_of(out / "cells.gpkg", "cells")
    # the cell's own ratio (equal cell conveyance) is always there, under its own name
    np.testing.assert_allclose(layer["n_ratio_cell_median"],
                               own["n_ratio"].median().reindex(layer.index), rtol=1e-12)
    if res.summary["fit_domain"] == "faces":
        # the median over every row of every face of the cell, as maps/n_ratio.tif shows
        for column, source in (("n_ratio_median", "n_ratio"),
                               ("stage_bias_unadjusted_median", "stage_bias_unadjusted")):
            expected = cell_median_of_faces(faces, faces.drop_duplicates("face_id"),
                                            value=source).reindex(layer.index)
            assert expected.notna().any()
            np.testing.assert_allclose(layer[column], expected, rtol=1e-12)
            assert "every face of the cell" in described[column]
        assert "can differ from n_ratio_median" in described["n_ratio_cell_median"]
    else:
        np.testing.assert_allclose(layer["n_ratio_median"], layer["n_ratio_cell_median"],
                                   rtol=1e-12)
        np.testing.assert_allclose(layer["stage_bias_unadjusted_median"],
                                   own["stage_bias_unadjusted"].median().reindex(layer.index),
                                   rtol=1e-12)
        assert layer["stage_bias_unadjusted_median"].notna().any()
        assert "cell's own" in described["n_ratio_median"]
        assert "face" not in described["stage_bias_unadjusted_median"]
    assert res.summary["cell_layer"] == described


@pytest.mark.parametrize("closure", ["lumped", "cell"])
def test_cell_table_says_when_its_stage_errors_are_empty(channel_case, tmp_path, closure):
    # the stage errors are solved on the fit domain only: with faces fitted the cell
    # table's columns are empty throughout, and their description has to say why
    from ntrans.outputs import read_table_metadata

    dem, cells, classes, table = channel_case
    out = tmp_path / "out"
    res = _quiet(dem=dem, cells=cells, out=out, classes=classes, class_field="kind",
                 n_table=table, depths="0.5:2.5:0.5", closure=closure)
    rows = pd.read_parquet(out / "cell_adjustment.parquet")
    described = read_table_metadata(out / "cell_adjustment.parquet")["description"]
    for column in ("stage_bias_unadjusted", "stage_bias_adjusted"):
        if res.summary["fit_domain"] == "faces":
            assert rows[column].isna().all()
            assert "empty here" in described[column]
            assert "face_adjustment.parquet" in described[column]
        else:
            assert rows[column].notna().any()
            assert "empty" not in described[column]


def test_centroid_over_nodata_warns(tmp_path):
    from ntrans.errors import FlatElevationWarning, PartialCoverageWarning

    z = np.full((20, 20), 10.0)
    z[14:16, 4:6] = np.nan  # the four pixels around cell 1's centroid (5, 5)
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 10.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PartialCoverageWarning)
        with pytest.warns(FlatElevationWarning, match="^1 cell has no flat elevation .*"
                          r"\(first: 1\)"):
            _quiet(dem=dem, cells=cells, out=tmp_path / "adj", n=0.03, depths="1",
                   elevation_rule="centroid")


@pytest.mark.parametrize("kw, setting", [
    ({"source": "flat", "target": "flat"}, "(--from subgrid or --to subgrid; source or target "
                                           "in a project file)"),
    ({"source_closure": "strip"}, "(--from subgrid --to subgrid; source and target in a "
                                  "project file)"),
])
def test_family_mistakes_name_the_option_and_the_project_key(flat_case, tmp_path, kw, setting):
    dem, cells = flat_case
    with pytest.raises(InputError) as err:
        adjust_roughness(dem, cells, out=tmp_path / "out", n=0.03, depths="1", **kw)
    assert setting in str(err.value)


def test_water_surface_stage_of_a_face_is_its_length_weighted_mean(tmp_path):
    """A face's stage from a water-surface raster is the mean of the surface along the
    line, weighted by length, whatever the density of its profile stations (a segment
    crossing pixel-centre rows and columns carries more stations than one along them)."""
    margin = 3.0  # raster beyond the mesh: bilinear sampling is exact on a plane only
    rows, cols = 36, 46  # between the outermost pixel centres
    origin = (-margin, 30.0 + margin)
    x = -margin + np.arange(cols) + 0.5
    y = 30.0 + margin - np.arange(rows) - 0.5
    dem = write_dem(tmp_path / "dem.tif", np.zeros((rows, cols)), origin=origin)
    plane = 1.0 + 0.05 * x[None, :] + 0.02 * y[:, None]
    ws = write_dem(tmp_path / "ws.tif", plane, origin=origin, dtype="float64")
    # two cells split by a skew line: boundary chains mix axis-aligned and skew segments
    left = shapely.Polygon([(0, 0), (13, 0), (27, 30), (0, 30)])
    right = shapely.Polygon([(13, 0), (40, 0), (40, 30), (27, 30)])
    cells = write_cells(tmp_path / "cells.gpkg", [left, right])
    _quiet(dem=dem, cells=cells, out=tmp_path / "out", n=0.03, water_surface=[ws])
    import geopandas as gpd

    lines = gpd.read_file(tmp_path / "out" / "faces.gpkg").set_index("face_id").geometry
    faces = pd.read_parquet(tmp_path / "out" / "face_adjustment.parquet")
    for face_id, stage in zip(faces["face_id"], faces["stage"], strict=True):
        xy = np.asarray(lines[face_id].coords)
        length = np.hypot(*np.diff(xy, axis=0).T)
        mid = 0.5 * (xy[1:] + xy[:-1])
        # geometry identity: the mean of a linear function along a segment is its value at
        # the midpoint; along a polyline, the length-weighted mean of those
        expected = np.sum(length * (1.0 + 0.05 * mid[:, 0] + 0.02 * mid[:, 1])) / length.sum()
        assert stage == pytest.approx(expected, abs=1e-9)  # round-off


# --- closed-form channel, end to end (DEM -> profiles -> flat beds -> fit -> tables) -------

#: trapezoidal channel along x: bottom 4 m, side slope 2:1, 1.5 m deep, axis at y = 15.5,
#: in level ground at z = 0; cells 10 m x 30 m across it (1 m pixels; the kinks of the
#: section lie on pixel centres, so the bilinear profile is the section exactly)
B, SIDE, DEEP, AXIS, WIDTH = 4.0, 2.0, 1.5, 15.5, 30.0


def trapezoid_channel_case(tmp_path):
    margin = 2
    x = -margin + np.arange(40 + 2 * margin) + 0.5
    y = WIDTH + margin - np.arange(30 + 2 * margin) - 0.5
    dist = np.abs(y - AXIS)
    z = np.clip((dist - B / 2) / SIDE - DEEP, -DEEP, 0.0)
    dem = write_dem(tmp_path / "dem.tif", np.tile(z[:, None], (1, x.size)),
                    origin=(-margin, WIDTH + margin), dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg",
                        [shapely.box(10.0 * i, 0.0, 10.0 * (i + 1), WIDTH) for i in range(4)])
    return dem, cells


def channel_face_geometry(eta, lines):
    """Per face at stage eta > 0 (above the banks): flow area, wetted perimeter, strip
    integral of h^(5/3) and plan length, from the lines (segments across the channel at
    x = const, the others along level ground)."""
    top = B + 2 * SIDE * DEEP
    area_ch = (B + SIDE * DEEP) * DEEP  # Chow (1959) Table 2-1, trapezoid A = (b + zy) y
    per_ch = B + 2 * DEEP * np.sqrt(1 + SIDE**2)  # Chow (1959) Table 2-1, P = b + 2y sqrt(1+z^2)
    y = eta + DEEP
    # integral of h^(5/3) over the section (linear banks: [h^(8/3)] / ((8/3) slope))
    strip_ch = B * y ** (5 / 3) + 2 * SIDE * (y ** (8 / 3) - eta ** (8 / 3)) / (8 / 3)
    out = []
    for line in lines:
        xy = np.asarray(line.coords)
        seg = np.hypot(*np.diff(xy, axis=0).T)
        across = np.isclose(xy[1:, 0], xy[:-1, 0]) & np.isclose(seg, WIDTH)
        length = seg.sum()
        n_across = int(across.sum())
        level = length - n_across * top
        out.append((n_across * area_ch + length * eta,  # channel below the banks + L eta
                    n_across * per_ch + level,
                    n_across * strip_ch + level * eta ** (5 / 3),
                    length))
    return np.array(out)


@pytest.mark.parametrize("closure", ["lumped", "strip"])
def test_channel_ratios_bias_and_class_n_against_closed_form(tmp_path, closure):
    import geopandas as gpd
    from scipy.optimize import brentq

    dem, cells = trapezoid_channel_case(tmp_path)
    n_s = 0.03
    stages = [0.25, 0.5, 1.0]  # above the banks: both families wet on every face
    _quiet(dem=dem, cells=cells, out=tmp_path / "out", n=n_s, closure=closure,
           stages=",".join(map(str, stages)))
    faces = pd.read_parquet(tmp_path / "out" / "face_adjustment.parquet")
    lines = gpd.read_file(tmp_path / "out" / "faces.gpkg").set_index("face_id").geometry
    # flat bed of every face: the cells' mean terrain (mean rule, all cells alike), which
    # the pixel sum gives exactly here (section linear between pixel centres)
    z_flat = -(B + SIDE * DEEP) * DEEP / WIDTH

    def geometric(eta, face_lines):
        area, per, strip, length = channel_face_geometry(eta, face_lines).T
        if closure == "lumped":
            return area * (area / per) ** (2 / 3)  # Manning, K n = A R^(2/3)
        return strip  # divided conveyance, K n = sum h^(5/3) ds

    log_sum = weight_sum = 0.0
    for eta in stages:
        rows = faces[faces["stage"] == eta].sort_values("face_id")
        face_lines = [lines[f] for f in rows["face_id"]]
        length = channel_face_geometry(eta, face_lines)[:, 3]
        g_source = length * (eta - z_flat) ** (5 / 3)  # flat face, K n = L h^(5/3)
        ratio = geometric(eta, face_lines) / g_source  # equal conveyance at equal stage
        # boundary faces end 1e-5 m short of the corners (snap), hence rel 1e-6
        np.testing.assert_allclose(rows["n_ratio"], ratio, rtol=1e-6)
        np.testing.assert_allclose(rows["conveyance_source"], g_source / n_s, rtol=1e-6)
        for face_line, bias in zip(face_lines, rows["stage_bias_unadjusted"], strict=True):
            k_source = channel_face_geometry(eta, [face_line])[0, 3] * (eta - z_flat) ** (5 / 3)
            expected = brentq(lambda e, fl=face_line, ks=k_source: geometric(e, [fl])[0] - ks,
                              1e-6, 5.0) - eta
            assert bias == pytest.approx(expected, abs=1e-6)  # bisection tolerance
        # one class: the least-squares fit in ln K is the weighted mean of ln ratio, each
        # face weighing its share of the stage's source conveyance (DESIGN.md section 2)
        share = g_source / g_source.sum()
        log_sum += np.sum(share * np.log(ratio))
        weight_sum += share.sum()
    fitted = pd.read_csv(tmp_path / "out" / "n_by_class.csv")["n_target"].iloc[0]
    assert fitted == pytest.approx(n_s * np.exp(log_sum / weight_sum), rel=2e-6)  # 6 digits
    interior = faces["cell_b"].notna()
    if closure == "lumped":
        # equal flow area, more wetted perimeter: a lower n, and stages too high with n
        # carried over (DESIGN.md section 2); here n_t / n_s = (L / P)^(2/3) exactly
        p = WIDTH - (B + 2 * SIDE * DEEP) + B + 2 * DEEP * np.sqrt(1 + SIDE**2)
        np.testing.assert_allclose(faces.loc[interior, "n_ratio"], (WIDTH / p) ** (2 / 3),
                                   rtol=1e-12)
        assert (faces.loc[interior, "stage_bias_unadjusted"] > 0).all()
    else:
        # h^(5/3) is convex: the strip sum exceeds L hbar^(5/3) at equal flow area, so a
        # higher n (METHODS.md, divided conveyance), and stages too low with n carried over
        assert (faces.loc[interior, "n_ratio"] > 1).all()
        assert (faces.loc[interior, "stage_bias_unadjusted"] < 0).all()


def test_cell_closure_on_a_tilted_plane_against_closed_form(tmp_path):
    slope = 0.1
    margin = 2
    x = -margin + np.arange(40 + 2 * margin) + 0.5
    dem = write_dem(tmp_path / "dem.tif", np.tile(slope * x, (20 + 2 * margin, 1)),
                    origin=(-margin, 20 + margin), dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(4, 2, 10.0))
    _quiet(dem=dem, cells=cells, out=tmp_path / "out", n=0.04, closure="cell",
           stages="4.5,5,6")  # above the highest terrain (4): every cell wholly wet
    table = pd.read_parquet(tmp_path / "out" / "cell_adjustment.parquet")
    # geometry identity: on a plane A_bed = A_w sqrt(1 + s^2) and the flat cell at the mean
    # terrain holds the same volume, so at equal volume n_t / n_s = (A_w / A_bed)^(2/3)
    # (METHODS.md) and carrying n over the stage rises by hbar ((1 + s^2)^(1/5) - 1)
    np.testing.assert_allclose(table["n_ratio"], (1 + slope**2) ** (-1 / 3), rtol=1e-12)
    mean_z = slope * (10.0 * ((table["cell_id"] - 1) % 4) + 5.0)
    hbar = table["stage"] - mean_z
    np.testing.assert_allclose(table["stage_bias_unadjusted"],
                               hbar * ((1 + slope**2) ** 0.2 - 1), rtol=1e-6)  # bisection
    fitted = pd.read_csv(tmp_path / "out" / "n_by_class.csv")["n_target"].iloc[0]
    assert fitted == pytest.approx(0.04 * (1 + slope**2) ** (-1 / 3), rel=2e-6)  # 6 digits
