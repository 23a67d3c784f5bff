"""``ntrans adjust`` on the command line: help, success, bad roughness -> exit 2, one line."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import shapely
from click.testing import CliRunner

from cli.main import cli
from ntrans.cautions import CAUTIONS
from ntrans.translate import FLAG_MEANINGS

OPTIONS = ["--dem", "--cells", "--cells-layer", "--n", "--classes", "--classes-layer",
           "--class-field", "--n-table", "--n-field",
           "--class-raster", "--default-class", "--overlap-rule", "--from", "--to", "--closure",
           "--source-closure", "--composite", "--depths", "--stages", "--water-surface", "--out",
           "--overwrite", "--csv"]


@pytest.fixture
def runner():
    return CliRunner()


@pytest.fixture
def inputs(tmp_path, builders):
    """A flat 20 x 20 m DEM at z = 10 (1 m pixels) and a 2 x 2 grid of 10 m cells."""
    dem = builders.write_dem(tmp_path / "dem.tif", np.full((20, 20), 10.0))
    cells = builders.write_cells(tmp_path / "cells.gpkg", builders.grid_polygons(2, 2, 10.0))
    return dem, cells


def _nothing_written(out: Path) -> bool:
    siblings = [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")]
    return not out.exists() and not siblings


def _one_error_line(result) -> str:
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("ntrans: error: ")
    return lines[0]


def test_help_lists_options(runner):
    result = runner.invoke(cli, ["adjust", "--help"])
    assert result.exit_code == 0
    for name in OPTIONS:
        assert name in result.output, name


def test_uniform_n_run_prints_summary(runner, inputs, tmp_path):
    dem, cells = inputs
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--n", "0.03", "--depths", "0.5,1", "--out", str(out),
                                 "--to", "subgrid", "--closure", "strip"])
    assert result.exit_code == 0, result.stderr
    assert f"wrote {out}" in result.output
    assert CAUTIONS[0] in result.output
    table = pd.read_csv(out / "n_by_class.csv")
    assert table["n_target"].iloc[0] == pytest.approx(0.03, rel=1e-6)  # geometry identity, flat DEM
    # the flags printed are explained right below the table (four cells: too few faces)
    assert "few_faces" in table["flags"].iloc[0]
    assert "flags:" in result.output
    printed = " ".join(result.output.split())
    assert f"few_faces: {FLAG_MEANINGS['few_faces']}" in printed
    assert "at_bound:" not in printed


def _two_classes(builders, tmp_path, **kw):
    """Class polygons 'a' (west half) and 'b' (east half) with their n table."""
    classes = builders.write_cells(tmp_path / "classes.gpkg",
                                   [shapely.box(0, 0, 10, 20), shapely.box(10, 0, 20, 20)],
                                   id_field=None, attributes={"kind": ["a", "b"]}, **kw)
    table = tmp_path / "n.csv"
    table.write_text("class,n\na,0.03\nb,0.05\n")
    return classes, table


def test_class_polygons_run(runner, inputs, tmp_path, builders):
    dem, cells = inputs
    classes, table = _two_classes(builders, tmp_path)
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--classes", str(classes), "--class-field", "kind",
                                 "--n-table", str(table), "--stages", "11", "--out", str(out)])
    assert result.exit_code == 0, result.stderr
    assert sorted(pd.read_csv(out / "n_by_class.csv")["class"]) == ["a", "b"]


def test_class_polygons_from_a_file_of_several_layers(runner, inputs, tmp_path, builders):
    dem, cells = inputs
    # the cells and the class polygons in one GeoPackage
    both = builders.write_cells(tmp_path / "both.gpkg", builders.grid_polygons(2, 2, 10.0),
                                layer="mesh")
    builders.write_cells(both, [shapely.box(0, 0, 10, 20), shapely.box(10, 0, 20, 20)],
                         id_field=None, attributes={"kind": ["a", "b"]}, layer="landcover")
    table = tmp_path / "n.csv"
    table.write_text("class,n\na,0.03\nb,0.05\n")
    out = tmp_path / "out"
    args = ["-q", "adjust", "--dem", str(dem), "--cells", str(both), "--cells-layer", "mesh",
            "--classes", str(both), "--class-field", "kind", "--n-table", str(table),
            "--stages", "11", "--out", str(out)]
    result = runner.invoke(cli, args)
    assert result.exit_code == 2
    line = _one_error_line(result)
    assert "--classes-layer" in line and "mesh" in line and "landcover" in line
    assert _nothing_written(out)
    result = runner.invoke(cli, [*args, "--classes-layer", "landcover"])
    assert result.exit_code == 0, result.stderr
    assert sorted(pd.read_csv(out / "n_by_class.csv")["class"]) == ["a", "b"]


def test_class_polygons_without_crs_exit_2(runner, inputs, tmp_path, builders):
    dem, cells = inputs
    classes, table = _two_classes(builders, tmp_path, crs=None)
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--classes", str(classes), "--class-field", "kind",
                                 "--n-table", str(table), "--stages", "11", "--out", str(out)])
    assert result.exit_code == 2
    assert "no CRS" in _one_error_line(result)
    assert _nothing_written(out)


@pytest.mark.parametrize(
    ("rows", "polys", "kinds", "words"),
    [
        ("class,n\na,0.03\n", [(0, 0, 10, 20), (10, 0, 20, 10), (10, 10, 20, 20)], ["a", "b", "c"],
         "classes ['b', 'c']"),  # every missing class listed
        ("class,n\na,0.03\nb,-1\n", [(0, 0, 10, 20), (10, 0, 20, 20)], ["a", "b"], "the n table"),
        ("class,n\na,0.03\nb,x\n", [(0, 0, 10, 20), (10, 0, 20, 20)], ["a", "b"], "the n table"),
        ("class,n\na,0.03\nb,0.04\n", [(0, 0, 12, 20), (8, 0, 20, 20)], ["a", "b"], "overlapping pairs"),
        ("class,n\na,0.03\n", [(100, 100, 120, 120)], ["a"], "the class polygons do not"),
    ],
)
def test_bad_roughness_exit_2(runner, inputs, tmp_path, builders, rows, polys, kinds, words):
    dem, cells = inputs
    table = tmp_path / "n.csv"
    table.write_text(rows)
    classes = builders.write_cells(tmp_path / "classes.gpkg", [shapely.box(*p) for p in polys],
                                   id_field=None, attributes={"kind": kinds})
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--classes", str(classes), "--class-field", "kind",
                                 "--n-table", str(table), "--depths", "1", "--out", str(out),
                                 "--default-class", "a"])
    assert result.exit_code == 2
    line = _one_error_line(result)
    assert words in line
    assert _nothing_written(out)


UNIFORM_N = "the uniform n (--n; n in a project file)"  # names the option and the key


@pytest.mark.parametrize(("value", "start"), [
    ("0", UNIFORM_N), ("-0.02", UNIFORM_N), ("abc", UNIFORM_N),
    # outside the fit's bounds (0.005-1): said with the value given
    ("35", f"{UNIFORM_N} gives n 35"), ("0.0004", f"{UNIFORM_N} gives n 0.0004"),
])
def test_bad_uniform_n_exit_2(runner, inputs, tmp_path, value, start):
    dem, cells = inputs
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--n", value, "--depths", "1", "--out", str(out)])
    assert result.exit_code == 2
    assert _one_error_line(result).startswith(f"ntrans: error: {start}")
    assert _nothing_written(out)


def test_window_wetting_nothing_exit_2(runner, inputs, tmp_path):
    dem, cells = inputs  # flat terrain at z = 10
    out = tmp_path / "out"
    result = runner.invoke(cli, ["-q", "adjust", "--dem", str(dem), "--cells", str(cells),
                                 "--n", "0.03", "--stages", "0:5:1", "--out", str(out)])
    assert result.exit_code == 2
    assert _one_error_line(result).startswith("ntrans: error: the window's stages (0 to 5 m)")
    assert _nothing_written(out)


def test_window_required(runner, inputs, tmp_path):
    dem, cells = inputs
    result = runner.invoke(cli, ["adjust", "--dem", str(dem), "--cells", str(cells), "--n", "0.03",
                                 "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    assert _nothing_written(tmp_path / "out")
