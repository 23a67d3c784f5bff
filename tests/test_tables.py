"""``build_tables``: the ``ntrans tables`` job end to end on small DEMs and meshes."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio
import shapely
from conftest import (
    METRES_PER_UNIT,
    grid_polygons,
    metres_per,
    tilted_plane,
    write_cells,
    write_dem,
    write_in_units,
)

from ntrans.errors import (
    CoarseFaceSpacingWarning,
    FlatElevationWarning,
    InputError,
    MeshGapWarning,
    OutputExistsError,
    PartialCoverageWarning,
    StageSpecError,
)
from ntrans.outputs import read_table_metadata
from ntrans.tables import (
    CELL_STAGE_COLUMNS,
    CELL_SUMMARY_COLUMNS,
    FACE_STAGE_COLUMNS,
    FACE_SUMMARY_COLUMNS,
    build_tables,
)

# DESIGN.md section 4: the columns users rely on
CONTRACT_CELL = ["cell_id", "stage", "wet_area", "volume", "bed_area", "hydraulic_radius",
                 "flat_elevation", "flat_depth", "flat_hydraulic_radius"]
CONTRACT_FACE = ["face_id", "cell_a", "cell_b", "stage", "length", "flow_area",
                 "wetted_perimeter", "top_width", "hydraulic_radius"]


def bumpy(rows: int, cols: int) -> np.ndarray:
    """A smooth terrain with a valley and bumps (elevations 9..13 m), 1 m pixels."""
    y, x = np.mgrid[0:rows, 0:cols] + 0.5
    return 10.0 + 0.05 * x + 1.5 * np.sin(x / 5.0) * np.cos(y / 7.0) + 0.02 * (y - rows / 2) ** 2 / 4


@pytest.fixture
def case(tmp_path):
    """40 x 40 m bumpy DEM; 3 x 3 cells of 12 m from (2.3, 1.7): not aligned to pixels."""
    z = bumpy(40, 40)
    dem = write_dem(tmp_path / "dem.tif", z, dtype="float64")
    polys = grid_polygons(3, 3, 12.0, origin=(2.3, 1.7))
    cells = write_cells(tmp_path / "cells.gpkg", polys)
    return dem, cells, z, polys


def _read(out):
    cell = pd.read_parquet(out / "cell_stage.parquet")
    face = pd.read_parquet(out / "face_stage.parquet")
    return cell, face


def test_contract_columns_and_units(case, tmp_path):
    dem, cells, _, _ = case
    out = tmp_path / "out"
    res = build_tables(dem, cells, out=out, stages="10:12:0.5", csv=True)
    assert res.out == out.absolute()
    cell, face = _read(out)
    assert list(cell.columns) == list(CELL_STAGE_COLUMNS)
    assert list(face.columns) == list(FACE_STAGE_COLUMNS)
    assert set(CONTRACT_CELL) <= set(cell.columns)
    assert set(CONTRACT_FACE) <= set(face.columns)
    for name, columns in (("cell_stage.parquet", cell.columns), ("face_stage.parquet", face.columns)):
        units = read_table_metadata(out / name)["units"]
        assert set(columns) <= set(units)
        assert units["stage"] == "m"
    cell_units = read_table_metadata(out / "cell_stage.parquet")["units"]
    assert (cell_units["volume"], cell_units["wet_area"]) == ("m3", "m2")
    face_units = read_table_metadata(out / "face_stage.parquet")["units"]
    assert (face_units["flow_area"], face_units["conveyance_lumped"]) == ("m2", "m3/s")
    assert len(cell) == 9 * 5
    # 3 x 3 grid: 12 shared borders; each of the 8 outer cells has one connected
    # boundary piece (a corner cell's two outer sides form one line)
    faces_gpkg = pyogrio.read_dataframe(out / "faces.gpkg")
    assert list(faces_gpkg.columns[:-1]) == list(FACE_SUMMARY_COLUMNS)
    assert len(faces_gpkg) == 20
    assert int(faces_gpkg["cell_b"].isna().sum()) == 8
    assert len(face) == 20 * 5
    assert face["cell_b"].isna().sum() == 8 * 5
    cells_gpkg = pyogrio.read_dataframe(out / "cells.gpkg")
    assert list(cells_gpkg.columns[:-1]) == list(CELL_SUMMARY_COLUMNS)
    assert sorted(cells_gpkg["cell_id"]) == list(range(1, 10))
    np.testing.assert_allclose(cells_gpkg["covered_fraction"], 1.0, rtol=1e-12)  # all inside
    csv = pd.read_csv(out / "cell_stage.csv")
    np.testing.assert_allclose(csv["volume"], cell["volume"], rtol=1e-12)  # round-trip digits
    assert (out / "tables_summary.json").is_file()
    assert {p.name for p in res.files} >= {"cell_stage.parquet", "face_stage.parquet",
                                           "cells.gpkg", "faces.gpkg", "cell_stage.csv",
                                           "face_stage.csv"}


def test_volume_against_brute_force(case, tmp_path):
    dem, cells, z, polys = case
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, stages="10.5,11.5,12.5", faces=False)
    cell = pd.read_parquet(out / "cell_stage.parquet")
    pixels = np.array([shapely.box(c, 39 - r, c + 1, 40 - r)
                       for r in range(40) for c in range(40)], dtype=object)
    zf = z.ravel()
    for cid, poly in enumerate(polys, start=1):
        frac = shapely.area(shapely.intersection(pixels, poly))  # plan area per pixel, m2
        assert np.count_nonzero(frac) >= 100
        for stage in (10.5, 11.5, 12.5):
            vol = np.sum(frac * np.clip(stage - zf, 0, None))
            wet = np.sum(frac * (zf < stage))
            row = cell[(cell.cell_id == cid) & (cell.stage == stage)].iloc[0]
            # independent brute force (shapely intersection per pixel x depth).  Both
            # use the same piecewise-constant terrain, so only round-off separates them
            # (measured 2e-15); 1e-9 is far inside the 2 % the issue allows.
            assert row.volume == pytest.approx(vol, rel=1e-9, abs=1e-9)
            assert row.wet_area == pytest.approx(wet, rel=1e-9, abs=1e-9)


def test_flat_dem_subgrid_equals_flat(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", np.full((30, 30), 5.0))
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 3, 9.0, origin=(1.5, 1.5)))
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, stages="5.5:7:0.5")
    cell, face = _read(out)
    # geometry identity: on a flat bed the subgrid cell is the flat cell (to round-off)
    np.testing.assert_allclose(cell.flat_elevation, 5.0, rtol=1e-12)
    np.testing.assert_allclose(cell.volume, cell.flat_volume, rtol=1e-9)
    np.testing.assert_allclose(cell.wet_area, cell.flat_wet_area, rtol=1e-9)
    np.testing.assert_allclose(cell.bed_area, cell.wet_area, rtol=1e-12)
    np.testing.assert_allclose(cell.hydraulic_radius, cell.flat_hydraulic_radius, rtol=1e-9)
    np.testing.assert_allclose(cell.wet_area, 81.0, rtol=1e-9)  # 9 m x 9 m cells
    np.testing.assert_allclose(cell.volume, 81.0 * (cell.stage - 5.0), rtol=1e-9)
    # geometry identity: a flat face is a rectangle L x h with P = L
    np.testing.assert_allclose(face.flow_area, face.flat_flow_area, rtol=1e-9)
    np.testing.assert_allclose(face.flow_area, face.length * (face.stage - 5.0), rtol=1e-9)
    np.testing.assert_allclose(face.wetted_perimeter, face.length, rtol=1e-9)
    np.testing.assert_allclose(face.top_width, face.length, rtol=1e-9)
    np.testing.assert_allclose(face.hydraulic_radius, face.flat_depth, rtol=1e-9)
    # published formula, Manning: K = A R^(2/3) at n = 1 is the same for all three closures
    np.testing.assert_allclose(face.conveyance_lumped, face.conveyance_flat, rtol=1e-9)
    np.testing.assert_allclose(face.conveyance_strip, face.conveyance_flat, rtol=1e-9)
    np.testing.assert_allclose(
        face.conveyance_flat, face.length * (face.stage - 5.0) ** (5.0 / 3.0), rtol=1e-9
    )


#: (horizontal, vertical) units of the same terrain and mesh; None: vertical as horizontal
UNIT_CASES = [("metre", "foot"), ("foot", None), ("foot", "metre"), ("us_survey_foot", None),
              ("us_survey_foot", "metre"), ("metre", "us_survey_foot")]
#: Manning unit factor k per horizontal unit: 1.0 SI, 1.486 ft^(1/3)/s in US customary
#: units (Manning's equation in US customary units, Chow 1959, Open-Channel Hydraulics,
#: section 5-6, from memory; it rounds the exact (1 / 0.3048)^(1/3) = 1.48592)
MANNING_K = {"metre": 1.0, "foot": 1.486, "us_survey_foot": 1.486}


@pytest.mark.parametrize("horizontal, vertical", UNIT_CASES)
def test_same_terrain_in_other_units_converts_by_the_unit_factors(tmp_path, horizontal,
                                                                   vertical):
    z = bumpy(40, 40)
    polys = grid_polygons(3, 3, 12.0, origin=(2.3, 1.7))
    stages_m = [10.5, 11.5, 12.5]
    dem_m, cells_m = write_in_units(tmp_path / "m", z, polys)
    build_tables(dem_m, cells_m, out=tmp_path / "m" / "out", stages=",".join(map(repr, stages_m)))
    dem, cells = write_in_units(tmp_path / "u", z, polys, horizontal=horizontal, vertical=vertical)
    fz = METRES_PER_UNIT[vertical or horizontal]  # metres per vertical unit (by definition)
    fl = METRES_PER_UNIT[horizontal]  # metres per horizontal unit
    build_tables(dem, cells, out=tmp_path / "u" / "out", vertical_units=vertical,
                 stages=",".join(repr(s / fz) for s in stages_m))
    k = MANNING_K[horizontal]
    for name in ("cell_stage.parquet", "face_stage.parquet"):
        ref = pd.read_parquet(tmp_path / "m" / "out" / name)
        got = pd.read_parquet(tmp_path / "u" / "out" / name)
        ref_units = read_table_metadata(tmp_path / "m" / "out" / name)["units"]
        units = read_table_metadata(tmp_path / "u" / "out" / name)["units"]
        assert len(got) == len(ref)
        for col in (c for c in got.columns if got[c].dtype.kind == "f"):
            to_si = metres_per(units[col], foot=fl if horizontal != "metre" else fz)
            if col.startswith("conveyance_"):
                assert (ref_units[col], units[col]) == ("m3/s", f"{'m' if fl == 1 else 'ft'}3/s")
                # K / k = A R^(2/3) is a length^(8/3) (Manning's equation): it converts by
                # the length factor alone; 1e-9 is round-off of the scaled coordinates
                np.testing.assert_allclose(got[col] / k * fl ** (8 / 3), ref[col], rtol=1e-9,
                                           atol=1e-9, err_msg=col)
                # as labelled, a discharge: equal in m3/s up to k's rounding (1.486 vs
                # 1.48592, 5.4e-5 relative)
                np.testing.assert_allclose(got[col] * to_si, ref[col], rtol=6e-5, atol=1e-9,
                                           err_msg=col)
            else:
                # every other length, area and volume is what its label says
                np.testing.assert_allclose(got[col] * to_si, ref[col] * metres_per(
                    ref_units[col], 1.0), rtol=1e-9, atol=1e-9, err_msg=col)


@pytest.mark.parametrize(
    ("window", "reference"),
    [({"depths": "0.5:2:0.5"}, "at the reference depth, 1.25 m above the cell's lowest"),
     ({"stages": "10:12:0.5"}, "at the reference stage, 11 m")],
)
def test_layers_say_what_each_column_holds_with_its_unit(case, tmp_path, window, reference):
    # cells.gpkg and faces.gpkg carry their columns' meanings in gpkg_data_columns, as
    # the adjustment's layers do: bed_factor here is taken at one reference level, the
    # adjustment's bed_factor is a median over its window, and without a description
    # the two read as the same figure
    import json

    from ntrans.outputs import column_descriptions_of

    dem, cells, _, _ = case
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, **window)
    cell_texts = column_descriptions_of(out / "cells.gpkg", "cells")
    face_texts = column_descriptions_of(out / "faces.gpkg", "faces")
    assert set(cell_texts) == set(CELL_SUMMARY_COLUMNS)
    assert set(face_texts) == set(FACE_SUMMARY_COLUMNS)
    assert reference in cell_texts["bed_factor"]
    assert cell_texts["bed_factor"].endswith("(dimensionless)")
    assert cell_texts["z_min"].endswith("(m)") and cell_texts["area"].endswith("(m2)")
    assert face_texts["low_point"].endswith("(m)") and "top width" in face_texts["perimeter_ratio"]
    summary = json.loads((out / "tables_summary.json").read_text())
    assert (summary["cell_layer"], summary["face_layer"]) == (cell_texts, face_texts)


def test_tilted_plane_bed_factor(tmp_path):
    z = tilted_plane(30, 30, sx=0.3, sy=0.4)
    dem = write_dem(tmp_path / "dem.tif", z, dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 12.0, origin=(3.0, 3.0)))
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, depths="0.5:2:0.5", faces=False)
    cell = pd.read_parquet(out / "cell_stage.parquet")
    wet = cell[cell.wet_area > 0]
    # geometry identity: on a plane s = sqrt(1 + 0.3^2 + 0.4^2) = 1/cos(theta) (Horn exact)
    np.testing.assert_allclose(wet.bed_area / wet.wet_area, np.sqrt(1.25), rtol=1e-9)
    gpkg = pyogrio.read_dataframe(out / "cells.gpkg")
    np.testing.assert_allclose(gpkg.bed_factor, np.sqrt(1.25), rtol=1e-9)


def test_depth_mode(case, tmp_path):
    dem, cells, _, _ = case
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, depths="0:1:0.25", elevation_rule="min")
    cell, face = _read(out)
    gpkg = pyogrio.read_dataframe(out / "cells.gpkg").set_index("cell_id")
    depths = np.array([0, 0.25, 0.5, 0.75, 1.0])
    for cid, rows in cell.groupby("cell_id"):
        # stage = cell's lowest terrain + depth, by definition of --depths
        np.testing.assert_allclose(rows.stage, gpkg.loc[cid, "z_min"] + depths, rtol=1e-12)
        np.testing.assert_allclose(rows.depth, depths, atol=1e-12)
        # flat bed at the cell's minimum (rule min): flat depth = depth
        np.testing.assert_allclose(rows.flat_depth, depths, atol=1e-12)
    assert np.all(cell[cell.depth == 0].volume == 0)  # nothing below the lowest point
    faces_gpkg = pyogrio.read_dataframe(out / "faces.gpkg")
    low = dict(zip(faces_gpkg.face_id, faces_gpkg.low_point, strict=True))
    np.testing.assert_allclose(face.stage - face.face_id.map(low), face.depth, atol=1e-12)
    np.testing.assert_allclose(face.depth.to_numpy().reshape(-1, 5), np.tile(depths, (20, 1)),
                               atol=1e-12)


def test_elevation_field_rule(case, tmp_path):
    dem, _, _, polys = case
    cells = write_cells(tmp_path / "f.gpkg", polys, attributes={"bed": np.arange(9) + 10.0})
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, stages="12", elevation_rule="field", elevation_field="bed")
    cell, face = _read(out)
    np.testing.assert_allclose(cell.sort_values("cell_id").flat_elevation, np.arange(9) + 10.0)
    np.testing.assert_allclose(cell.sort_values("cell_id").flat_depth,
                               np.clip(12 - (np.arange(9) + 10.0), 0, None))
    # default face rule "higher": the higher of the two flat cell beds (boundary: its cell)
    inner = face[face.cell_b.notna()]
    np.testing.assert_allclose(inner.flat_bed, np.maximum(inner.cell_a, inner.cell_b) + 9.0)


def test_partial_coverage_warns(tmp_path):
    z = bumpy(30, 30)
    z[:, 20:] = np.nan  # the right third is nodata
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 3, 10.0))
    out = tmp_path / "out"
    with pytest.warns(PartialCoverageWarning, match="3 cells lie wholly outside"):
        res = build_tables(dem, cells, out=out, stages="11")
    assert res.n_partial == 3
    gpkg = pyogrio.read_dataframe(out / "cells.gpkg").set_index("cell_id")
    np.testing.assert_allclose(gpkg.loc[[3, 6, 9], "covered_fraction"], 0.0, atol=1e-12)
    np.testing.assert_allclose(gpkg.loc[[1, 2, 4, 5, 7, 8], "covered_fraction"], 1.0, rtol=1e-12)


def _jittered_grid(seed: int = 3) -> list[shapely.Polygon]:
    """3 x 3 cells of 10 m whose corners each move up to 3 cm on their own, so that
    neighbours' borders are apart or overlap by up to about 6 cm."""
    rng = np.random.default_rng(seed)
    return [shapely.Polygon(np.asarray(c.exterior.coords)[:-1] + rng.uniform(-0.03, 0.03, (4, 2)))
            for c in grid_polygons(3, 3, 10.0, origin=(1.0, 1.0))]


def test_borders_cut_by_small_gaps_warn_with_a_tolerance_that_joins_them(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", bumpy(32, 32))
    cells = write_cells(tmp_path / "cells.gpkg", _jittered_grid())
    # the default tolerance (1 % of the 1 m pixel) leaves some shared borders open
    with pytest.warns(MeshGapWarning, match=r"snap tolerance \(0.01 m, 1 % of a pixel\)") as rec:
        build_tables(dem, cells, out=tmp_path / "a", stages="11")
    line = str(rec[0].message)
    suggested = float(line.split("give a snap tolerance of about ")[1].split(" m ")[0])
    assert "--snap-tolerance" in line and 0.01 < suggested <= 0.2
    # the tolerance the warning gives joins every border: the grid's 12 interior borders
    # are faces and the boundary faces trace only the outline (4 sides of 30 m, give or
    # take the 3 cm the corners moved)
    with warnings.catch_warnings():
        warnings.simplefilter("error", MeshGapWarning)
        build_tables(dem, cells, out=tmp_path / "b", stages="11", snap_tolerance=suggested)
    faces = pyogrio.read_dataframe(tmp_path / "b" / "faces.gpkg")
    assert faces.cell_b.notna().sum() == 12
    assert faces.length[faces.cell_b.isna()].sum() == pytest.approx(120.0, abs=0.5)


@pytest.mark.parametrize(("spacing", "warns"), [(2.0, True), (0.5, False), (0.25, False)])
def test_face_spacing_coarser_than_half_a_pixel_warns(case, tmp_path, spacing, warns):
    # 1 m pixels: profiles sampled every 2 m miss terrain the default 0.5 m sees
    dem, cells, _, _ = case
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        build_tables(dem, cells, out=tmp_path / "out", stages="11", face_spacing=spacing)
    found = [w for w in caught if issubclass(w.category, CoarseFaceSpacingWarning)]
    assert len(found) == (1 if warns else 0)
    if warns:
        assert "give 0.5 m or less" in str(found[0].message)


def test_an_exact_mesh_does_not_warn_of_gaps(case, tmp_path):
    dem, cells, _, _ = case
    with warnings.catch_warnings():
        warnings.simplefilter("error", MeshGapWarning)
        build_tables(dem, cells, out=tmp_path / "out", stages="11")


def test_a_dem_of_scaled_integers_gives_the_tables_of_its_elevations(case, tmp_path):
    # the same terrain stored as int16 centimetres with the GeoTIFF scale 0.01 (GDAL:
    # elevation = stored * scale + offset) gives the float DEM's tables, to the centimetre
    _, cells, z, _ = case
    stored = write_dem(tmp_path / "cm.tif", np.round(z * 100.0), dtype="int16", nodata=-32768)
    with rasterio.open(stored, "r+") as dst:
        dst.scales = (0.01,)
    rounded = write_dem(tmp_path / "m.tif", np.round(z * 100.0) / 100.0, dtype="float64")
    build_tables(stored, cells, out=tmp_path / "a", stages="10:13:1")
    build_tables(rounded, cells, out=tmp_path / "b", stages="10:13:1")
    (a, _), (b, _) = _read(tmp_path / "a"), _read(tmp_path / "b")
    for column in ("wet_area", "volume", "bed_area", "flat_elevation"):
        np.testing.assert_allclose(a[column], b[column], rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize(("gap", "nodata", "dtype"), [
    (-3.4028234663852886e38, None, "float32"),  # float32's lowest, declared nowhere
    (-32767.0, -9999.0, "float32"),              # a declared value the gaps do not hold
    (-99999.0, None, "float64"),
])
def test_undeclared_nodata_under_the_cells_is_refused(case, tmp_path, gap, nodata, dtype):
    _, cells, z, _ = case
    z = z.copy()
    z[5:9, 5:9] = gap
    dem = write_dem(tmp_path / "dem.tif", z, nodata=nodata, dtype=dtype)
    out = tmp_path / "out"
    with pytest.raises(InputError, match=r"lower than any terrain on Earth.*-a_nodata"):
        build_tables(dem, cells, out=out, stages="11")
    assert not out.exists()


@pytest.mark.parametrize("shift", [-440.0, 4000.0])  # the Dead Sea shore; a high plateau
def test_terrain_far_below_or_above_sea_level_is_accepted(case, tmp_path, shift):
    _, cells, z, _ = case
    dem = write_dem(tmp_path / "dem.tif", z + shift, dtype="float64")
    res = build_tables(dem, cells, out=tmp_path / "out", stages=str(11 + shift))
    assert res.n_cells == 9


def test_a_dem_of_only_nodata_under_the_mesh_is_refused(tmp_path):
    # nodata over the whole mesh, terrain only beside it: every table would be empty
    z = bumpy(30, 30)
    z[:, :20] = np.nan
    dem = write_dem(tmp_path / "dem.tif", z)
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 2, 10.0))
    out = tmp_path / "out"
    with pytest.raises(InputError, match=r"none of the 4 cells lies over valid terrain"):
        build_tables(dem, cells, out=out, stages="11")
    assert not out.exists()


def test_output_exists_and_overwrite(case, tmp_path):
    dem, cells, _, _ = case
    out = tmp_path / "out"
    build_tables(dem, cells, out=out, stages="10")  # an earlier run
    (out / "old.txt").write_text("x")
    with pytest.raises(OutputExistsError):
        build_tables(dem, cells, out=out, stages="11")
    assert (out / "old.txt").exists()
    build_tables(dem, cells, out=out, stages="11", overwrite=True)
    assert not (out / "old.txt").exists()
    assert (out / "cell_stage.parquet").exists()


@pytest.mark.parametrize("threads", [1, 2])
def test_atomic_output_on_error(case, tmp_path, monkeypatch, threads):
    import ntrans.engine as engine

    dem, cells, _, _ = case
    calls = {"n": 0}
    real = engine.run_tile

    def failing(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("disk on fire")
        return real(*args, **kwargs)

    monkeypatch.setattr(engine, "run_tile", failing)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        build_tables(dem, cells, out=out, stages="11", tile_size=8, threads=threads)
    # one thread stops at the failing tile; with two, tiles already handed out finish
    assert calls["n"] == 3 if threads == 1 else calls["n"] >= 3
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


@pytest.mark.parametrize("available, outcome", [(10**13, "runs"), (None, "runs"),
                                                ("just short", "warns"), (10_000, "refused")])
def test_memory_of_many_stages_is_checked_before_the_tiles(case, tmp_path, monkeypatch,
                                                          available, outcome):
    """A tile's stage rows grow with the stages: far more than the memory available is
    refused before the tiles run (it could not finish), a little more gives a warning."""
    import warnings

    import ntrans.tables as tables_module
    from ntrans.errors import InputError, MemoryEstimateWarning

    dem, cells, _, _ = case
    stages = "9:13:0.01"  # 401 stages
    if available == "just short":  # the estimate lies between 90 % and twice what is there
        need = tables_module.TABLE_BASE_BYTES + tables_module.estimated_stage_rows_bytes(
            [9 + 24], 401, 1)  # one tile: 9 cells and their 24 faces
        available = int(need / 1.5)
    monkeypatch.setattr(tables_module, "available_memory", lambda: available)
    out = tmp_path / "out"
    if outcome == "refused":
        with pytest.raises(InputError, match="give fewer stages"):
            build_tables(dem, cells, out=out, stages=stages)
        assert not out.exists()
        return
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        build_tables(dem, cells, out=out, stages=stages)
    memory = [w for w in caught if issubclass(w.category, MemoryEstimateWarning)]
    assert len(memory) == int(outcome == "warns")
    assert (out / "cell_stage.parquet").exists()


def test_stage_rows_estimate_takes_the_largest_tiles_in_flight():
    from ntrans.tables import TABLE_BYTES_PER_ITEM_STAGE, estimated_stage_rows_bytes

    got = estimated_stage_rows_bytes([5, 50, 20, 40], 10, 2)
    assert got == TABLE_BYTES_PER_ITEM_STAGE * (50 + 40) * 10
    assert estimated_stage_rows_bytes([], 10, 4) == 0.0


def test_bad_stage_spec_writes_nothing(case, tmp_path):
    dem, cells, _, _ = case
    with pytest.raises(StageSpecError):
        build_tables(dem, cells, out=tmp_path / "out", stages="11", depths="1")
    assert not (tmp_path / "out").exists()


def test_cells_partly_off_the_dem(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", bumpy(20, 20), dtype="float64")
    # the left column of cells hangs 5 m off the DEM's west edge
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 2, 10.0, origin=(-5.0, 0.0)))
    with pytest.warns(PartialCoverageWarning, match="4 cells lie partly outside"):
        build_tables(dem, cells, out=tmp_path / "out", stages="11", tile_size=4)
    gpkg = pyogrio.read_dataframe(tmp_path / "out" / "cells.gpkg").set_index("cell_id")
    # geometry identity: half of a 10 m x 10 m cell lies over the 20 m DEM
    np.testing.assert_allclose(gpkg.loc[[1, 4], "covered_fraction"], 0.5, rtol=1e-12)
    np.testing.assert_allclose(gpkg.loc[[1, 4], "covered_area"], 50.0, rtol=1e-12)
    # the right column hangs 5 m off the east edge
    np.testing.assert_allclose(gpkg.loc[[3, 6], "covered_fraction"], 0.5, rtol=1e-12)
    np.testing.assert_allclose(gpkg.loc[[2, 5], "covered_fraction"], 1.0, rtol=1e-12)


@pytest.mark.parametrize("coverage", ["exact", "centre"])
def test_covered_fraction_counts_only_nodata_and_off_the_dem(tmp_path, coverage):
    z = bumpy(20, 20)
    z[:, 12:15] = np.nan  # x 12-15 m is nodata
    dem = write_dem(tmp_path / "dem.tif", z, dtype="float64")
    # 10 m cells from x = -5: the west column hangs 5 m off the DEM, the east one 5 m
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(3, 2, 10.0, origin=(-5.0, 0.0)))
    with pytest.warns(PartialCoverageWarning, match="6 cells lie partly outside"):
        build_tables(dem, cells, out=tmp_path / "out", stages="11", coverage=coverage)
    gpkg = pyogrio.read_dataframe(tmp_path / "out" / "cells.gpkg").set_index("cell_id")
    # geometry identity on pixel-aligned cells, under either rule: west cells half off the
    # DEM (0.5), middle cells x 5-15 with 3 of 10 m over nodata (0.7), east cells x 15-25
    # half off the DEM (0.5)
    np.testing.assert_allclose(gpkg.loc[[1, 4, 2, 5, 3, 6], "covered_fraction"],
                               [0.5, 0.5, 0.7, 0.7, 0.5, 0.5], rtol=1e-12)


def test_centre_rule_finds_cells_off_pixel_lines_wholly_covered(case, tmp_path):
    dem, _, _, _ = case
    # 10.6 m cells off the pixel lines: 100, 110 or 121 pixel centres each, never the
    # polygon's 112.36 m2, and all of them over the 40 m DEM's terrain
    polys = grid_polygons(3, 3, 10.6, origin=(2.3, 1.7))
    cells = write_cells(tmp_path / "cells.gpkg", polys)
    with warnings.catch_warnings():
        warnings.simplefilter("error", PartialCoverageWarning)
        res = build_tables(dem, cells, out=tmp_path / "out", stages="11", coverage="centre")
    assert res.n_partial == 0
    gpkg = pyogrio.read_dataframe(tmp_path / "out" / "cells.gpkg")
    np.testing.assert_array_equal(gpkg["covered_fraction"], 1.0)


@pytest.mark.parametrize("coverage", ["exact", "centre"])
def test_centre_rule_coverage_near_the_exact_one_off_pixel_lines(tmp_path, coverage):
    z = bumpy(20, 20)
    z[:, 14:] = np.nan  # x 14-20 m is nodata
    dem = write_dem(tmp_path / "dem.tif", z, dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 1, 9.3, origin=(-3.7, 2.2)))
    with pytest.warns(PartialCoverageWarning, match="2 cells lie partly outside"):
        build_tables(dem, cells, out=tmp_path / "out", stages="11", coverage=coverage)
    gpkg = pyogrio.read_dataframe(tmp_path / "out" / "cells.gpkg").set_index("cell_id")
    # geometry identity: cell 1 (x -3.7-5.6) has 5.6 of 9.3 m over the DEM, cell 2
    # (x 5.6-14.9) 8.4 of 9.3 m over terrain; the centre rule counts whole pixel
    # columns, so it may be off by up to one pixel column's share (1 / 9.3)
    expected = [5.6 / 9.3, 8.4 / 9.3]
    tol = 1e-12 if coverage == "exact" else 1.0 / 9.3
    np.testing.assert_allclose(gpkg.loc[[1, 2], "covered_fraction"], expected, atol=tol)


def _centroid_over_nodata(tmp_path):
    """20 m DEM, 2 x 2 cells of 10 m; the four pixels around cell 1's centroid (5, 5)
    are nodata."""
    z = bumpy(20, 20)
    z[14:16, 4:6] = np.nan  # rows 14-15 are y 4-6, columns 4-5 are x 4-6
    return write_dem(tmp_path / "dem.tif", z, dtype="float64"), grid_polygons(2, 2, 10.0)


@pytest.mark.parametrize("face_rule", ["higher", "mean", "min"])
def test_centroid_over_nodata_warns_and_faces_take_the_other_cell(tmp_path, face_rule):
    dem, polys = _centroid_over_nodata(tmp_path)
    cells = write_cells(tmp_path / "cells.gpkg", polys)
    out = tmp_path / "out"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PartialCoverageWarning)  # the four nodata pixels
        with pytest.warns(FlatElevationWarning, match="^1 cell has no flat elevation because "
                          "the terrain at its centroid is nodata or outside the DEM"):
            build_tables(dem, cells, out=out, stages="12", elevation_rule="centroid",
                         face_rule=face_rule)
    cell, face = _read(out)
    flat = cell.groupby("cell_id").flat_elevation.first()
    assert np.isnan(flat[1]) and np.isfinite(flat[[2, 3, 4]]).all()
    beside = face[(face.cell_a == 1) & face.cell_b.notna()]
    assert len(beside) == 2
    # a face beside cell 1 takes its other cell's flat elevation under every rule
    np.testing.assert_allclose(beside.flat_bed, flat[beside.cell_b.astype(int)].to_numpy(),
                               rtol=1e-12)
    # its boundary faces have no flat cell beside them at all
    assert face[(face.cell_a == 1) & face.cell_b.isna()].flat_bed.isna().all()


def test_empty_elevation_field_warns(case, tmp_path):
    dem, _, _, polys = case
    bed = np.arange(9) + 10.0
    bed[[2, 6]] = np.nan
    cells = write_cells(tmp_path / "f.gpkg", polys, attributes={"bed": bed})
    with pytest.warns(FlatElevationWarning, match="^2 cells have no flat elevation because "
                      "their 'bed' attribute is empty \\(first: 3, 7\\)"):
        build_tables(dem, cells, out=tmp_path / "out", stages="12", elevation_rule="field",
                     elevation_field="bed")


def test_terrain_statistics_rules_do_not_warn_of_flat_elevations(tmp_path):
    dem, polys = _centroid_over_nodata(tmp_path)
    cells = write_cells(tmp_path / "cells.gpkg", polys)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PartialCoverageWarning)
        warnings.simplefilter("error", FlatElevationWarning)
        build_tables(dem, cells, out=tmp_path / "out", stages="12")


@pytest.mark.parametrize("rule", ["mean", "centroid"])
def test_elevation_rules_on_a_plane(tmp_path, rule):
    z = tilted_plane(30, 30, sx=0.2, sy=-0.1)
    dem = write_dem(tmp_path / "dem.tif", z, dtype="float64")
    polys = grid_polygons(2, 2, 10.0, origin=(5.0, 5.0))  # pixel-aligned squares
    cells = write_cells(tmp_path / "cells.gpkg", polys)
    build_tables(dem, cells, out=tmp_path / "out", stages="12", elevation_rule=rule, faces=False)
    cell = pd.read_parquet(tmp_path / "out" / "cell_stage.parquet").sort_values("cell_id")
    cx = shapely.get_x(shapely.centroid(polys))
    cy = shapely.get_y(shapely.centroid(polys))
    # geometry identity: on a plane, a square's mean and centre elevation coincide
    # (the median is a pixel value, the lower median, so it is not part of this identity)
    expected = 10.0 + 0.2 * cx - 0.1 * cy
    np.testing.assert_allclose(cell.flat_elevation, expected, rtol=1e-12)


def test_text_ids(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", bumpy(20, 20), dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", grid_polygons(2, 1, 10.0), ids=["west", "east"],
                        id_field="name")
    build_tables(dem, cells, out=tmp_path / "out", depths="0.5", id_field="name")
    cell, face = _read(tmp_path / "out")
    assert sorted(cell.cell_id) == ["east", "west"]
    inner = face[face.cell_b.notna()]
    assert len(inner) == 1 and {inner.cell_a.iloc[0], inner.cell_b.iloc[0]} == {"east", "west"}
    assert face.cell_b.isna().sum() == 2  # one boundary piece per cell


@pytest.mark.parametrize(
    ("fractions", "partly", "wholly", "start"),
    [
        ([1.0, 1.0], 0, 0, None),
        ([1.0, 0.4, 0.0, 0.0], 1, 2, "3 cells lie outside the DEM or over nodata, 2 wholly and "
                                     "1 partly"),
        ([0.0, 1.0], 0, 1, "1 cell lies wholly outside"),
        ([0.5, 0.2, 1 - 1e-9], 2, 0, "2 cells lie partly outside"),  # 1e-9: round-off, whole
    ],
)
def test_partial_coverage_counts_wholly_and_partly(fractions, partly, wholly, start):
    from ntrans.tables import partial_coverage

    found = partial_coverage(np.arange(1, len(fractions) + 1), np.array(fractions))
    assert (found.partly, found.wholly) == (partly, wholly)
    message = found.message()
    assert (message is None) if start is None else message.startswith(start)


def _voronoi_cells(n: int, size: float, seed: int) -> list[shapely.Geometry]:
    rng = np.random.default_rng(seed)
    frame = shapely.box(1.0, 1.0, size - 1.0, size - 1.0)
    cells = shapely.get_parts(shapely.voronoi_polygons(
        shapely.multipoints(rng.uniform(1.0, size - 1.0, (n, 2))), extend_to=frame))
    return list(shapely.intersection(cells, frame))


@pytest.mark.parametrize("coverage", ["exact", "centre"])
def test_cells_wholly_over_terrain_have_covered_fraction_exactly_one(tmp_path, coverage):
    # a Voronoi mesh off the pixel lines, wholly inside a DEM without nodata: its pieces
    # of pixel add up to each cell's area only to round-off, yet every cell is whole, and
    # filtering covered_fraction < 1 must find none of them (as the warning finds none)
    dem = write_dem(tmp_path / "dem.tif", bumpy(40, 40), dtype="float64")
    cells = write_cells(tmp_path / "cells.gpkg", _voronoi_cells(60, 40.0, 5))
    out = tmp_path / "out"
    with warnings.catch_warnings():
        warnings.simplefilter("error", PartialCoverageWarning)
        build_tables(dem, cells, out=out, stages="11", coverage=coverage)
    layer = pyogrio.read_dataframe(out / "cells.gpkg")
    assert (layer.covered_fraction == 1.0).all()
    faces = pyogrio.read_dataframe(out / "faces.gpkg")
    assert (faces.covered_fraction == 1.0).all()
    # geometry identity: the covered area is still the polygon's area, to round-off
    if coverage == "exact":
        np.testing.assert_allclose(layer.covered_area, layer.area, rtol=1e-12)


@pytest.mark.parametrize(
    ("covered", "area", "expected"),
    [(100.0 * (1 - 1e-14), 100.0, 1.0),   # round-off: whole
     (100.0 * (1 + 1e-14), 100.0, 1.0),
     (99.999, 100.0, 0.99999),            # 1e-5 of the cell off the DEM: partly, as it is
     (40.0, 100.0, 0.4), (0.0, 100.0, 0.0), (0.0, 0.0, 0.0)],
)
def test_covered_fractions_are_one_within_round_off(covered, area, expected):
    from ntrans.tables import covered_fractions

    got = covered_fractions(np.array([covered]), np.array([area]))[0]
    if expected in (0.0, 1.0):
        assert got == expected  # exactly: users filter on it
    else:
        assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("covered", "assigned", "inside", "expected"),
    [
        (121.0, 121.0, 1.0, 1.0),    # more pixel centres than the polygon's area: whole
        (100.0, 100.0, 1.0, 1.0),    # fewer: whole too
        (70.0, 100.0, 1.0, 0.7),     # 30 of the 100 pixels given to it are nodata
        (50.0, 50.0, 0.5, 0.5),      # half the cell off the DEM, the rest over terrain
        (30.0, 60.0, 0.5, 0.25),     # both
        (0.0, 0.0, 1.0, 0.0),        # no pixel centre inside: no terrain
        (0.0, 0.0, 0.0, 0.0),        # wholly off the DEM
    ],
)
def test_centre_covered_fractions(covered, assigned, inside, expected):
    from ntrans.tables import centre_covered_fractions

    got = centre_covered_fractions(np.array([covered]), np.array([assigned]), np.array([inside]))
    np.testing.assert_allclose(got, [expected], rtol=1e-12)


@pytest.mark.parametrize(("vertical", "name"), [(None, "metre"),
                                                ("foot", "foot (international, 0.3048 m)"),
                                                ("us_survey_foot", "US survey foot (1200/3937 m)")])
def test_summary_says_which_foot(case, tmp_path, vertical, name):
    import json

    dem, cells, _, _ = case
    build_tables(dem, cells, out=tmp_path / "out", stages="11", vertical_units=vertical)
    summary = json.loads((tmp_path / "out" / "tables_summary.json").read_text())
    assert summary["vertical_unit_name"] == name
    assert summary["horizontal_unit_name"] == "metre"
