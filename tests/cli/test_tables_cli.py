"""``ntrans tables`` on the command line: help, success, and every user error -> exit 2."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import shapely
from click.testing import CliRunner

from cli.main import cli
from ntrans.cautions import CAUTIONS
from ntrans.errors import CRSError, GeometryRepairedWarning, InputError, NtransError

OPTIONS = [
    "--dem", "--cells", "--cells-layer", "--id-field", "--stages", "--depths", "--vertical-units", "--coverage",
    "--elevation-rule", "--elevation-field", "--face-rule", "--face-spacing",
    "--snap-tolerance", "--out", "--overwrite", "--csv", "--tile-size", "--workers",
    "--scheduler",
]


@pytest.fixture
def runner():
    return CliRunner()


@pytest.fixture
def inputs(tmp_path, builders):
    """A 20 x 20 m plane (1 m pixels) and a 2 x 2 grid of 10 m cells."""
    dem = builders.write_dem(tmp_path / "dem.tif", builders.tilted_plane(20, 20))
    cells = builders.write_cells(tmp_path / "cells.gpkg", builders.grid_polygons(2, 2, 10.0))
    return dem, cells


def _args(dem, cells, out, *extra):
    return ["-q", "tables", "--dem", str(dem), "--cells", str(cells), "--out", str(out),
            "--depths", "0:1:0.5", *extra]


def _nothing_written(out: Path) -> bool:
    siblings = [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")]
    return not out.exists() and not siblings


def _one_error_line(result) -> str:
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("ntrans: error: ")
    return lines[0]


def test_help_lists_every_option_with_units(runner):
    result = runner.invoke(cli, ["tables", "--help"])
    assert result.exit_code == 0
    text = " ".join(result.output.split())
    for name in OPTIONS:
        assert name in text, name
    # units are stated for lengths, elevations and areas
    assert "vertical units" in text
    assert "horizontal CRS units" in text
    assert "DEM pixels" in text


def test_success_prints_outputs_and_cautions(runner, inputs, tmp_path):
    dem, cells = inputs
    out = tmp_path / "out"
    result = runner.invoke(cli, _args(dem, cells, out, "--csv"))
    assert result.exit_code == 0, result.output
    for name in ("cell_stage.parquet", "face_stage.parquet", "cells.gpkg", "faces.gpkg",
                 "cell_stage.csv"):
        assert (out / name).is_file()
        assert name in result.stdout
    assert str(out.absolute()) in result.stdout
    text = " ".join(result.stdout.split())
    for sentence in CAUTIONS:
        assert sentence in text


def test_stages_and_depths_are_exclusive(runner, inputs, tmp_path):
    dem, cells = inputs
    out = tmp_path / "out"
    result = runner.invoke(cli, _args(dem, cells, out, "--stages", "10:12:1"))
    assert result.exit_code == 2
    assert _nothing_written(out)


def _geographic(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)), pixel_size=0.001,
                      origin=(10.0, 50.0), crs="EPSG:4326")
    cells = b.write_cells(tmp_path / "c.gpkg", [shapely.box(10, 49.995, 10.005, 50)],
                          crs="EPSG:4326")
    return dem, cells, CRSError


def _no_crs(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)), crs=None)
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(1, 1, 10.0))
    return dem, cells, CRSError


def _empty_layer(tmp_path, b):
    import geopandas as gpd

    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    frame = gpd.GeoDataFrame({"cell_id": np.array([], dtype=np.int64)},
                             geometry=gpd.GeoSeries([], crs="EPSG:32633"), crs="EPSG:32633")
    cells = tmp_path / "c.gpkg"
    frame.to_file(cells, driver="GPKG", engine="pyogrio", geometry_type="Polygon")
    return dem, cells, InputError


def _points(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    cells = b.write_cells(tmp_path / "c.gpkg", [shapely.Point(5, 5), shapely.Point(6, 6)])
    return dem, cells, InputError


def _duplicate_ids(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(2, 1, 5.0), ids=[7, 7])
    return dem, cells, InputError


def _overlapping(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    cells = b.write_cells(tmp_path / "c.gpkg", [shapely.box(0, 0, 6, 6), shapely.box(3, 3, 9, 9)])
    return dem, cells, InputError


def _outside(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    cells = b.write_cells(tmp_path / "c.gpkg", [shapely.box(100, 100, 110, 110)])
    return dem, cells, InputError


def _only_nodata_under_the_cells(tmp_path, b):
    # the cells lie over the DEM's extent, but every pixel there is nodata
    dem = b.write_dem(tmp_path / "dem.tif", np.full((10, 10), np.nan))
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(2, 2, 5.0))
    return dem, cells, InputError


def _two_layers(tmp_path, b):
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)))
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(2, 2, 5.0), layer="cells")
    b.write_cells(cells, [shapely.box(0, 0, 10, 10)], layer="landcover")
    return dem, cells, InputError


def _web_mercator_at_45_degrees(tmp_path, b):
    # lengths 41 % too long there (Mercator scale sec 45 deg = 1.414)
    x, y = 1_113_194.9, 5_621_521.5  # 10 deg E, 45 deg N
    dem = b.write_dem(tmp_path / "dem.tif", np.ones((10, 10)), crs="EPSG:3857",
                      origin=(x, y + 10.0))
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(1, 1, 10.0, origin=(x, y)),
                          crs="EPSG:3857")
    return dem, cells, CRSError


def _unreadable(tmp_path, b):
    dem = tmp_path / "dem.tif"
    dem.write_text("not a raster")
    cells = b.write_cells(tmp_path / "c.gpkg", b.grid_polygons(1, 1, 10.0))
    return dem, cells, OSError


@pytest.mark.parametrize(
    "make",
    [_geographic, _no_crs, _empty_layer, _points, _duplicate_ids, _overlapping, _outside,
     _only_nodata_under_the_cells, _two_layers, _web_mercator_at_45_degrees, _unreadable],
    ids=["geographic-crs", "no-crs", "empty-layer", "not-polygons", "duplicate-ids",
         "overlapping", "no-cell-on-dem", "only-nodata", "several-layers", "web-mercator",
         "unreadable"],
)
def test_user_errors_exit_2_one_line_nothing_written(runner, tmp_path, builders, make):
    dem, cells, error_class = make(tmp_path, builders)
    out = tmp_path / "out"
    result = runner.invoke(cli, _args(dem, cells, out))
    assert result.exit_code == 2, result.output
    _one_error_line(result)
    assert _nothing_written(out)
    # the same input through --debug raises the library's error class with its traceback
    debug = runner.invoke(cli, ["--debug", *_args(dem, cells, out)])
    assert isinstance(debug.exception, NtransError)
    assert isinstance(debug.exception, error_class)
    assert debug.exc_info[2] is not None
    assert _nothing_written(out)


def test_existing_output_needs_overwrite(runner, inputs, tmp_path):
    dem, cells = inputs
    out = tmp_path / "out"
    out.mkdir()
    (out / "tables_summary.json").write_text("{}")  # an earlier tables run
    (out / "keep.txt").write_text("old")
    result = runner.invoke(cli, _args(dem, cells, out))
    assert result.exit_code == 2
    assert "--overwrite" in _one_error_line(result)
    assert sorted(p.name for p in out.iterdir()) == ["keep.txt", "tables_summary.json"]
    result = runner.invoke(cli, _args(dem, cells, out, "--overwrite"))
    assert result.exit_code == 0, result.output
    assert not (out / "keep.txt").exists()
    assert (out / "cell_stage.parquet").is_file()


def test_overwrite_refuses_a_folder_that_is_not_ntrans_output(runner, inputs, tmp_path):
    dem, cells = inputs
    out = tmp_path / "danger"
    (out / "important").mkdir(parents=True)
    (out / "important" / "model.hdf").write_text("data")
    result = runner.invoke(cli, _args(dem, cells, out, "--overwrite"))
    assert result.exit_code == 2
    line = _one_error_line(result)
    assert "does not look like ntrans output" in line and "remove it yourself" in line
    assert (out / "important" / "model.hdf").read_text() == "data"
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["cells.gpkg", "danger",
                                                                 "dem.tif"])


def test_invalid_polygon_repaired_with_warning(runner, tmp_path, builders):
    dem = builders.write_dem(tmp_path / "dem.tif", builders.tilted_plane(20, 20))
    bowtie = shapely.Polygon([(0, 0), (10, 10), (10, 0), (0, 10)])  # self-intersecting
    cells = builders.write_cells(tmp_path / "c.gpkg", [bowtie, shapely.box(10, 0, 20, 10)])
    out = tmp_path / "out"
    # the group routes warnings to the log (stderr); pytest intercepts them first here
    with pytest.warns(GeometryRepairedWarning):
        result = runner.invoke(cli, _args(dem, cells, out))
    assert result.exit_code == 0, result.output
    assert (out / "cell_stage.parquet").is_file()


def test_cells_layer_names_the_layer_to_read(runner, tmp_path, builders):
    dem = builders.write_dem(tmp_path / "dem.tif", builders.tilted_plane(20, 20))
    both = builders.write_cells(tmp_path / "both.gpkg", [shapely.box(0, 0, 20, 20)],
                                layer="landcover")
    builders.write_cells(both, builders.grid_polygons(2, 2, 10.0), layer="cells")
    out = tmp_path / "out"
    result = runner.invoke(cli, _args(dem, both, out))
    assert result.exit_code == 2
    line = _one_error_line(result)
    assert "landcover" in line and "--cells-layer" in line
    result = runner.invoke(cli, _args(dem, both, out, "--cells-layer", "cells"))
    assert result.exit_code == 0, result.output
    assert "4 cells" in result.stdout
