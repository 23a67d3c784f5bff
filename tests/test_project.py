"""Tests of ntrans.project: project-file validation, template, and the whole run."""

from __future__ import annotations

import html
import inspect
import json
import logging
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import shapely
from conftest import grid_polygons, write_cells, write_dem

from ntrans import project as proj
from ntrans.errors import (
    InputFileError,
    NtransWarning,
    OutputError,
    OutputExistsError,
    ProjectFileError,
    RoughnessError,
)

BASE = """
[inputs]
dem = "dem.tif"
cells = "cells.gpkg"
n = 0.03

[window]
depths = "0.25:1:0.25"
"""


def _write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ---------------------------------------------------------------------------- validation


def test_minimal_project_resolves_paths_against_the_file(tmp_path):
    (tmp_path / "sub").mkdir()
    path = _write(tmp_path / "sub", BASE)
    project = proj.load_project(path)
    assert project.inputs["dem"] == (tmp_path / "sub" / "dem.tif").resolve()
    assert project.inputs["n"] == 0.03
    assert project.window == {"depths": "0.25:1:0.25"}
    assert project.out == (tmp_path / "sub" / "p-bundle")
    assert project.parameters()["inputs"]["dem"] == str((tmp_path / "sub" / "dem.tif").resolve())


def test_template_is_a_valid_project(tmp_path):
    path = proj.write_project_template(tmp_path / "job.toml")
    project = proj.load_project(path)
    assert project.families["target"] == "subgrid"
    assert project.window == {"depths": "0.25:3:0.25"}
    assert project.out == (tmp_path / "job-bundle").resolve()
    text = path.read_text(encoding="utf-8")
    for table in proj.SCHEMA:
        assert f"[{table}]" in text
    with pytest.raises(OutputExistsError):
        proj.write_project_template(path)
    proj.write_project_template(path, overwrite=True)


def _template_values(text: str) -> dict[tuple[str, str], list[object]]:
    """Every value the template gives or names for each key: ``(table, key) -> values``.

    A key line is ``key = value`` or ``# key = value`` (an example), with an optional
    comment; the comment and the lines ``#   # ...`` that continue it may list the
    alternatives as ``a | b | c``.
    """
    import re
    import tomllib

    values: dict[tuple[str, str], list[object]] = {}
    table, last = None, None
    for line in text.splitlines():
        header = re.match(r"^\[(\w+)\]", line)
        if header:
            table, last = header.group(1), None
            continue
        key_line = re.match(r"^#?\s*(\w+)\s*=\s*(.+?)\s*(?:#\s*(.*))?$", line)
        more = re.match(r"^#\s+#\s*(.*)$", line)
        if key_line and table is not None:
            key, value, comment = key_line.groups()
            last = (table, key)
            values[last] = [tomllib.loads(f"v = {value}")["v"]]
        elif more and last is not None:
            comment = more.group(1)
        else:
            last = None
            continue
        for run in re.findall(r"\w+(?:\s*\|\s*\w+)+", comment or ""):
            values[last] += [word.strip() for word in run.split("|")]
    return values


def test_every_value_the_template_names_is_accepted(tmp_path):
    """Each value the template gives or names in its comments, for every key, loads,
    and the library takes the choices it names (the template is parsed, so a value added
    to it later is checked too)."""
    from ntrans.adjust import _families
    from ntrans.inputs import open_dem

    path = proj.write_project_template(tmp_path / "job.toml")
    text = path.read_text(encoding="utf-8")
    import tomllib

    base = tomllib.loads(text)
    found = _template_values(text)
    for table, keys in proj.SCHEMA.items():  # every key of the schema the template shows
        for key in keys:
            if f"{key} =" in text:
                assert (table, key) in found, f"{table}.{key} not read from the template"
    assert ("families", "source_closure") in found and ("inputs", "vertical_units") in found
    dem = write_dem(tmp_path / "dem.tif", np.ones((4, 4)))
    library = {  # choices the project loader passes on unchanged, checked by the library
        ("inputs", "vertical_units"): lambda v: open_dem(dem, vertical_units=v),
        ("families", "source_closure"): lambda v: _families("subgrid", "subgrid", "lumped", v),
        ("families", "closure"): lambda v: _families("flat", "subgrid", v, None),
    }
    for (table, key), values in found.items():
        assert table in proj.SCHEMA and key in proj.SCHEMA[table], f"{table}.{key} unknown"
        for value in values:
            data = {t: dict(v) for t, v in base.items()}
            if (table, key) in {("window", "depths"), ("window", "stages")}:
                data["window"] = {}
            data.setdefault(table, {})[key] = value
            proj.parse_project(data, base=tmp_path)  # raises ProjectFileError if refused
            if (table, key) in library:
                library[(table, key)](value)  # raises InputError if refused


def test_template_names_the_id_fields_looked_for(tmp_path):
    from ntrans.inputs import ID_FIELD_CANDIDATES

    text = proj.write_project_template(tmp_path / "job.toml").read_text(encoding="utf-8")
    comment = text[text.index("# id_field"):text.index("# Roughness")]
    for name in ID_FIELD_CANDIDATES:
        assert name in comment
    assert "feature order" in comment


@pytest.mark.parametrize(
    ("extra", "words"),
    [
        ('[inputs]\ndem = "d.tif"\ncells = "c.gpkg"\ncolour = "red"\n', ["colour", "class_field"]),
        ('[run]\ncores = 4\n', ["cores", "[run]", "tile_size", "threads", "workers"]),
        ('[extras]\na = 1\n', ["extras", "[inputs]", "[window]"]),
    ],
)
def test_unknown_key_names_it_and_the_valid_keys(tmp_path, extra, words):
    text = BASE.replace('[inputs]\ndem = "dem.tif"\ncells = "cells.gpkg"\nn = 0.03\n', "") + extra
    with pytest.raises(ProjectFileError) as info:
        proj.load_project(_write(tmp_path, text))
    for word in words:
        assert word in str(info.value)


@pytest.mark.parametrize(
    ("line", "table", "words"),
    [
        ('tile_size = "big"', "run", ["run.tile_size", "a string", "an integer"]),
        ("tile_size = true", "run", ["run.tile_size", "a boolean", "an integer"]),
        ("tile_size = 2.5", "run", ["run.tile_size", "fraction", "an integer"]),
        ("zip = 1", "outputs", ["outputs.zip", "an integer", "true or false"]),
        ("source = 3", "families", ["families.source", "an integer", "a string"]),
    ],
)
def test_wrong_type_names_key_found_and_expected(tmp_path, line, table, words):
    with pytest.raises(ProjectFileError) as info:
        proj.load_project(_write(tmp_path, BASE + f"\n[{table}]\n{line}\n"))
    for word in words:
        assert word in str(info.value)


@pytest.mark.parametrize(
    ("line", "table", "choices"),
    [
        ('closure = "round"', "families", proj.CLOSURES),
        ('target = "mesh"', "families", proj.FAMILIES),
        ('composite = "mean"', "families", proj.COMPOSITES),
        ('coverage = "some"', "run", proj.COVERAGE_MODES),
    ],
)
def test_bad_choice_lists_the_valid_choices(tmp_path, line, table, choices):
    with pytest.raises(ProjectFileError) as info:
        proj.load_project(_write(tmp_path, BASE + f"\n[{table}]\n{line}\n"))
    for choice in choices:
        assert choice in str(info.value)


@pytest.mark.parametrize(
    "window",
    ["", '[window]\ndepths = "0:1:0.5"\nstages = "1,2"\n', '[window]\ndepths = "1:0:0.5"\n',
     "[window]\nstages = []\n"],
)
def test_window_needs_exactly_one_valid_spec(tmp_path, window):
    text = BASE.split("[window]")[0] + window
    with pytest.raises(ProjectFileError):
        proj.load_project(_write(tmp_path, text))


def test_window_accepts_a_number_list(tmp_path):
    text = BASE.split("[window]")[0] + "[window]\nstages = [10, 10.5, 11]\n"
    assert proj.load_project(_write(tmp_path, text)).window == {"stages": [10.0, 10.5, 11.0]}


@pytest.mark.parametrize(
    "text",
    ['[inputs]\ndem = "d.tif"\n[window]\ndepths = "0:1:1"\n', "[inputs\ndem = 1\n",
     '[inputs]\ndem = "d.tif"\ncells = "c"\nn = -0.1\n[window]\ndepths = "1"\n',
     'inputs = "dem.tif"\n'],
)
def test_missing_required_bad_toml_and_bad_values(tmp_path, text):
    with pytest.raises(ProjectFileError):
        proj.load_project(_write(tmp_path, text))


@pytest.mark.parametrize(
    "encode",
    [lambda t: "\ufeff".encode() + t.encode("utf-8"),  # byte-order mark, as Notepad writes
     lambda t: t.replace("\n", "\r\n").encode("utf-8"),
     lambda t: t.encode("utf-16")],
    ids=["bom", "crlf", "utf16"],
)
def test_project_file_from_windows_editors_is_read(tmp_path, encode):
    (tmp_path / "p.toml").write_bytes(encode(BASE.replace("dem.tif", "Höhe dem.tif")))
    project = proj.load_project(tmp_path / "p.toml")
    assert project.inputs["dem"] == (tmp_path / "Höhe dem.tif").resolve()


def test_project_file_in_another_encoding_names_the_line(tmp_path):
    text = BASE.replace('n = 0.03', 'n = 0.03\nclasses = "forêt.gpkg"')
    (tmp_path / "p.toml").write_bytes(text.encode("latin-1"))
    with pytest.raises(ProjectFileError, match="not UTF-8 text \\(line 6 .*save it as UTF-8"):
        proj.load_project(tmp_path / "p.toml")


@pytest.mark.parametrize(
    ("text", "words"),
    [
        (BASE.replace("depths =", "depth ="), ["'depth'", "did you mean 'depths'"]),
        (BASE + "[family]\nsource = \"flat\"\n", ["'family'", "did you mean [families]"]),
        (BASE.replace("dem =", "DEM ="), ["'DEM'", "did you mean 'dem'"]),
        (BASE + "[run]\nn_table = \"n.csv\"\n", ["'n_table'", "belongs under [inputs]"]),
        ('dem = "dem.tif"\n' + BASE.replace('dem = "dem.tif"\n', ""),
         ["'dem'", "move it under [inputs]"]),
    ],
    ids=["typo", "table_typo", "case", "wrong_table", "above_headers"],
)
def test_misspelt_or_misplaced_key_names_the_right_one(tmp_path, text, words):
    with pytest.raises(ProjectFileError) as info:
        proj.load_project(_write(tmp_path, text))
    for word in words:
        assert word in str(info.value)


def test_missing_project_file_is_an_input_file_error(tmp_path):
    with pytest.raises(InputFileError):
        proj.load_project(tmp_path / "absent.toml")


def test_keys_and_choices_match_the_library():
    """Project keys are API keyword names; choices equal the library's own lists."""
    from ntrans import adjust, engine, inputs, roughness, tables
    from ntrans.translate import COMPOSITES

    api = set(inspect.signature(tables.build_tables).parameters) | set(
        inspect.signature(adjust.adjust_roughness).parameters
    )
    for table, keys in proj.SCHEMA.items():
        for key in keys:
            if key != "zip":  # the zip is the bundle's own option
                assert key in api, f"{table}.{key} is not a keyword of the API"
    assert set(proj.CLOSURES) == set(adjust.SUBGRID_CLOSURES)
    assert set(proj.FAMILIES) == set(adjust.FAMILIES)
    assert set(proj.COMPOSITES) == set(COMPOSITES)
    assert set(proj.ELEVATION_RULES) == set(engine.ELEVATION_RULES)
    assert set(proj.FACE_RULES) == set(engine.FACE_RULES)
    assert set(proj.COVERAGE_MODES) == set(engine.COVERAGE_MODES)
    assert set(proj.OVERLAP_RULES) == set(roughness.OVERLAP_RULES)
    assert set(proj.VERTICAL_UNITS) == set(inputs.VERTICAL_UNITS)
    assert proj.ID_FIELD_CANDIDATES == inputs.ID_FIELD_CANDIDATES


# ------------------------------------------------------------------------------ the run


def write_small_project(folder: Path, *, out: str = "bundle", extra: str = "") -> Path:
    """A 40 x 30 m valley (1 m pixels), 4 x 3 cells of 10 m, two land-cover classes."""
    folder.mkdir(parents=True, exist_ok=True)
    x = np.arange(40) + 0.5
    y = 30 - (np.arange(30) + 0.5)
    xx, yy = np.meshgrid(x, y)
    z = 10.0 + 0.01 * xx + 0.1 * np.abs(yy - 15.0) - 1.0 * np.exp(-(((yy - 15.0) / 3.0) ** 2))
    write_dem(folder / "dem.tif", z)
    write_cells(folder / "cells.gpkg", grid_polygons(4, 3, 10.0))
    write_cells(
        folder / "landcover.gpkg",
        [shapely.box(0, 10, 40, 20), shapely.box(0, 0, 40, 10).union(shapely.box(0, 20, 40, 30))],
        ids=None, id_field=None, attributes={"landcover": ["channel", "grass"]},
    )
    (folder / "n_table.csv").write_text("class,n\nchannel,0.035\ngrass,0.030\n", encoding="utf-8")
    text = f"""
[inputs]
dem = "dem.tif"
cells = "cells.gpkg"
classes = "landcover.gpkg"
class_field = "landcover"
n_table = "n_table.csv"

[families]
source = "flat"
target = "subgrid"
closure = "lumped"

[window]
depths = "0.25:1.5:0.25"

[outputs]
out = "{out}"
{extra}
"""
    return _write(folder, text, "project.toml")


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    """The same small project run twice into two bundles (and a zip for the first)."""
    root = tmp_path_factory.mktemp("runs")
    project = write_small_project(root / "a", extra="zip = true")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", NtransWarning)
        first = proj.run_project(project)
    first.summary["caught"] = [str(w.message) for w in caught if issubclass(w.category, NtransWarning)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NtransWarning)
        second = proj.run_project(project, out=root / "a" / "second")
    return first, second


def test_bundle_holds_every_part(two_runs):
    result, _ = two_runs
    files = set(result.files)
    for name in ("report.html", "n_by_class.csv", "manifest.json", "tables/cell_stage.parquet",
                 "tables/face_stage.parquet", "tables/cells.gpkg", "tables/faces.gpkg",
                 "adjust/n_by_class.csv", "adjust/face_adjustment.parquet",
                 "maps/friction_factor.tif", "maps/n_ratio.tif", "maps/stage_bias.tif",
                 "maps/friction_factor.png", "maps/faces.gpkg",
                 "plots/n_ratio_by_class.png", "plots/stage_bias_histograms.png",
                 "plots/representative_cells.png"):
        assert name in files, name
    assert result.zip is not None and result.zip.is_file()
    assert (result.folder / "n_by_class.csv").read_bytes() == (
        result.folder / "adjust" / "n_by_class.csv"
    ).read_bytes()
    assert sorted(result.n_by_class["class"]) == ["channel", "grass"]
    # nothing left behind by the atomic folder
    assert not [p for p in result.folder.parent.iterdir() if p.name.startswith(".bundle")]


def test_manifest_hashes_every_output_and_input(two_runs):
    import hashlib

    result, _ = two_runs
    manifest = json.loads(result.manifest.read_text())
    listed = {e["path"]: e for e in manifest["outputs"]}
    assert set(listed) == set(result.files) - {"manifest.json"}
    for rel, entry in listed.items():
        assert entry["sha256"] == hashlib.sha256((result.folder / rel).read_bytes()).hexdigest()
    roles = {e["role"]: e for e in manifest["inputs"]}
    assert set(roles) == {"dem", "cells", "classes", "n_table"}
    assert roles["dem"]["crs"]["epsg"] == 32633
    assert roles["cells"]["features"] == 12
    assert manifest["parameters"]["families"]["closure"] == "lumped"
    assert manifest["parameters"]["window"]["depths"] == "0.25:1.5:0.25"
    effective = manifest["parameters"]["effective"]
    assert effective["build_tables"]["coverage"] == "exact"  # a default, recorded too
    assert effective["adjust_roughness"]["composite"] == "horton_einstein"
    assert effective["adjust_roughness"]["class_field"] == "landcover"
    assert roles["dem"]["units"] == {"horizontal": "metre", "vertical": "metre"}
    assert "ntrans" in manifest["versions"] and "rasterio" in manifest["versions"]
    from ntrans.cautions import CAUTIONS

    assert manifest["cautions"] == list(CAUTIONS)  # travel with the bundle's hashes
    assert proj.load_project(manifest["project_file"]["path"]).families["target"] == "subgrid"


def test_manifest_records_the_output_folder_the_run_used(two_runs):
    # the second run's out argument overrides the project file's: the manifest records
    # where the bundle went, not where the file pointed
    first, second = two_runs
    for result in (first, second):
        outputs = json.loads(result.manifest.read_text())["parameters"]["outputs"]
        assert Path(outputs["out"]).resolve() == result.folder.resolve()


def test_two_runs_give_identical_outputs_apart_from_the_time(two_runs):
    first, second = two_runs
    a = json.loads(first.manifest.read_text())
    b = json.loads(second.manifest.read_text())
    hashes_a = {e["path"]: e["sha256"] for e in a["outputs"]}
    hashes_b = {e["path"]: e["sha256"] for e in b["outputs"]}
    assert hashes_a == hashes_b
    for name in ("tables/cell_stage.parquet", "tables/face_stage.parquet",
                 "adjust/face_adjustment.parquet"):
        pd.testing.assert_frame_equal(pd.read_parquet(first.folder / name),
                                      pd.read_parquet(second.folder / name))


def test_run_bundle_verifies_and_rasters_share_the_dem_grid(two_runs):
    import rasterio

    from ntrans.bundle import verify_bundle

    result, _ = two_runs
    assert verify_bundle(result.folder).ok
    assert verify_bundle(result.zip).ok
    with rasterio.open(result.folder.parent / "dem.tif") as dem:
        grid = (dem.transform, dem.shape, dem.crs)
    for name in ("friction_factor", "n_ratio", "stage_bias"):
        with rasterio.open(result.folder / "maps" / f"{name}.tif") as out:
            assert (out.transform, out.shape, out.crs) == grid


def test_run_refuses_to_overwrite_without_permission(two_runs):
    result, _ = two_runs
    project = result.folder.parent / "project.toml"
    before = result.manifest.read_bytes()
    with pytest.raises(OutputExistsError):
        proj.run_project(project)
    assert result.manifest.read_bytes() == before


def test_warnings_of_the_run_reach_the_caller_and_the_report(two_runs):
    result, _ = two_runs
    text = result.report.read_text(encoding="utf-8")
    for message in result.summary["caught"]:
        assert html.escape(message) in text
    assert "data:image/png;base64," in text and "https://" not in text


@pytest.mark.parametrize(
    ("table", "extra"),
    [
        ("class,n\nchannel,0.035\n", ""),  # grass missing
        ("class,n\nchannel,0.035\ngrass,30\n", ""),  # a Strickler coefficient
        ("class,n\nchannel,0.035\ngrass,0.03\n", "default_class = \"gras\""),
    ],
)
def test_run_checks_the_n_table_before_the_stage_tables(tmp_path, monkeypatch, table, extra):
    from ntrans import tables
    from ntrans.errors import RoughnessError

    project = write_small_project(tmp_path)
    (tmp_path / "n_table.csv").write_text(table, encoding="utf-8")
    if extra:
        text = project.read_text().replace('n_table = "n_table.csv"',
                                           f'n_table = "n_table.csv"\n{extra}')
        project.write_text(text)

    def refuse(*args, **kwargs):
        raise AssertionError("the stage tables were built before the n table was checked")

    monkeypatch.setattr(tables, "build_tables", refuse)
    with pytest.raises(RoughnessError):
        proj.run_project(project)
    assert not (tmp_path / "bundle").exists()


def test_demo_project_is_valid_and_names_the_demo_files():
    from ntrans.demo import DEMO_FILES, demo_folder

    project = proj.load_project(demo_folder() / "project.toml")
    names = {p.name for p in project.inputs.values() if isinstance(p, Path)}
    assert names == set(DEMO_FILES)
    assert (project.families["source"], project.families["target"]) == ("flat", "subgrid")
    assert project.inputs["class_field"] == "landcover"


@pytest.mark.parametrize("overwrite", [None, True])  # None: the project file says true
def test_run_never_replaces_a_folder_of_other_files(tmp_path, overwrite):
    project = write_small_project(tmp_path, extra="overwrite = true")
    (tmp_path / "bundle" / "important").mkdir(parents=True)
    (tmp_path / "bundle" / "important" / "model.hdf").write_text("data")
    with pytest.raises(OutputError, match="does not look like ntrans output"):
        proj.run_project(project, overwrite=overwrite)
    assert (tmp_path / "bundle" / "important" / "model.hdf").read_text() == "data"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".bundle")]


@pytest.mark.parametrize(("overwrite", "error"), [(False, OutputExistsError), (True, OutputError)])
def test_run_refuses_a_zip_of_other_files_before_it_starts(tmp_path, monkeypatch, overwrite,
                                                           error):
    project = write_small_project(tmp_path, extra="zip = true")
    (tmp_path / "bundle.zip").write_bytes(b"someone's archive")

    def not_reached(*args, **kwargs):
        raise AssertionError("the run started")

    import ntrans.tables

    monkeypatch.setattr(ntrans.tables, "build_tables", not_reached)
    with pytest.raises(error, match="not the zip of an ntrans bundle"):
        proj.run_project(project, overwrite=overwrite)
    assert (tmp_path / "bundle.zip").read_bytes() == b"someone's archive"
    assert not (tmp_path / "bundle").exists()


def test_maps_show_the_cell_figures_of_the_adjustment_layer(two_runs):
    """maps/n_ratio.tif and maps/stage_bias.tif paint adjust/cells.gpkg's medians."""
    import geopandas as gpd
    import rasterio

    result, _ = two_runs
    layer = gpd.read_file(result.folder / "adjust" / "cells.gpkg")
    points = layer.geometry.representative_point()
    for name, column in (("n_ratio", "n_ratio_median"),
                         ("stage_bias", "stage_bias_unadjusted_median")):
        with rasterio.open(result.folder / "maps" / f"{name}.tif") as src:
            xy = list(zip(points.x, points.y, strict=True))
            painted = np.array([v[0] for v in src.sample(xy)], dtype=float)
            painted[painted == src.nodata] = np.nan
        expected = layer[column].to_numpy(dtype=float)
        assert np.isfinite(expected).any()
        np.testing.assert_allclose(painted, expected, rtol=1e-6)  # float32 storage


def _context_for(fit_domain, flags, window):
    """The report context of a run with these per-class flags and window (no files)."""
    from types import SimpleNamespace

    project = SimpleNamespace(families={}, path=Path("project.toml"), inputs={},
                              window={"depths": "0.25:3:0.25"})
    bias = {"weighted_mean_abs": 0.1, "mean_abs": 0.1}
    data = {
        "adjust_summary": {"fit_domain": fit_domain, "window": window},
        "tables_summary": {},
        "n_by_class": pd.DataFrame({"class": ["grass", "channel"], "flags": flags}),
        "summary": {"units": {"horizontal": "metre", "vertical": "metre"}, "cells": 4,
                    "faces": 12, "stages": proj._window_size(window), "table_stages": 12,
                    "stage_mode": "depth", "fit_domain": fit_domain,
                    "stage_bias_unadjusted": bias,
                    "stage_bias_adjusted": {**bias, "weighted_mean_abs": 0.2}},
    }
    return proj._report_context(project, data)


@pytest.mark.parametrize(("fit_domain", "flags", "says", "never"), [
    ("faces", ["", "wide_spread"], "fit these faces well; review the class flagged "
     "wide_spread (channel) before using its n.", "cells"),
    ("cells", ["", "dry_wet_mismatch:3"], "fit these cells well; no class is flagged "
     "wide_spread", "faces"),
])
def test_worse_fit_remark_names_the_items_and_only_flagged_classes(fit_domain, flags, says,
                                                                   never):
    window = {"mode": "depth", "values": [0.5, 1.0]}
    remark = _context_for(fit_domain, flags, window)["notes"][-1]
    assert says in remark and never not in remark, remark
    if "wide_spread" not in flags:
        assert "review the classes with a wide spread" not in remark


@pytest.mark.parametrize(("window", "stages", "levels"), [
    ({"mode": "water_surface", "rasters": ["event"]},
     "1 (one per water-surface raster: each face and cell at its own stage under it)",
     "12 depths above each cell's and face's low point"),
    ({"mode": "depth", "values": [0.5, 1.0, 2.0]}, 3, None),
])
def test_report_counts_the_window_stages_not_the_table_levels(window, stages, levels):
    counts = _context_for("faces", ["", ""], window)["counts"]
    assert counts["stages"] == stages and counts["table_stages"] == levels


def test_template_names_the_snap_tolerance_the_mesh_gap_warning_points_to(tmp_path):
    # the mesh gap warning tells a project's user to set snap_tolerance: the template
    # shows where, with a value that loads
    text = proj.write_project_template(tmp_path / "job.toml").read_text()
    line = next(s for s in text.splitlines() if s.startswith("# snap_tolerance ="))
    values = _template_values(text)
    assert ("run", "snap_tolerance") in values and "1 % of a pixel" in text
    assert line.split("=")[1].split("#")[0].strip() == "0.05"


@pytest.mark.parametrize("default", [None, '"1"'])
def test_run_refuses_class_raster_holes_under_the_mesh_before_the_stage_tables(
        tmp_path, monkeypatch, default):
    # a class raster without codes over a third of the mesh and no default class: refused
    # in seconds, before the stage tables; with a default class the run goes on
    project = write_small_project(tmp_path)
    codes = np.ones((30, 40))
    codes[:, 27:] = 0  # nodata
    write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    (tmp_path / "n_codes.csv").write_text("class,n\n1,0.03\n", encoding="utf-8")
    text = project.read_text(encoding="utf-8")
    text = text.replace('classes = "landcover.gpkg"\nclass_field = "landcover"\n'
                        'n_table = "n_table.csv"',
                        'class_raster = "codes.tif"\nn_table = "n_codes.csv"'
                        + (f"\ndefault_class = {default}" if default else ""))
    project.write_text(text, encoding="utf-8")

    class Reached(Exception):
        pass

    def reached(*args, **kwargs):
        raise Reached

    import ntrans.tables

    monkeypatch.setattr(ntrans.tables, "build_tables", reached)
    if default is None:
        with pytest.raises(RoughnessError, match=r"about 32.5% of the mesh ground has no class"
                           r".*\(--default-class; default_class in a project file\)"):
            proj.run_project(project)
    else:
        with pytest.raises(Reached):
            proj.run_project(project)


@pytest.mark.parametrize("line, hint", [
    ('dem = "data\\\\dem.tif"', "data/dem.tif' exists: write paths with forward slashes"),
    ("dem = 'data\\dem.tif'", "data/dem.tif' exists: write paths with forward slashes"),
    ('dem = "data\\new.tif"', "control character"),  # \n: a line break in the path
    ('dem = "data\\dem.tif"', "write paths with forward slashes"),  # \d: not TOML at all
    ('dem = "data/other.tif"', None),  # simply missing: no hint
])
def test_a_windows_path_in_a_project_file_gets_a_hint(tmp_path, line, hint):
    project = write_small_project(tmp_path)
    (tmp_path / "data").mkdir()
    (tmp_path / "dem.tif").rename(tmp_path / "data" / "dem.tif")
    text = project.read_text(encoding="utf-8").replace('dem = "dem.tif"', line)
    project.write_text(text, encoding="utf-8")
    with pytest.raises((InputFileError, ProjectFileError)) as err:
        proj.run_project(project)
    message = str(err.value)
    assert "does not exist" in message or "not valid TOML" in message
    if hint is None:
        assert "slashes" not in message and "control character" not in message
    else:
        assert hint in message


def test_early_class_raster_check_does_not_log_the_inputs_twice(tmp_path, monkeypatch, caplog):
    # a hole beside the mesh makes the check read the DEM and the cells (and find no
    # ground without a class); the job reads and logs them again, so the check's own
    # reads stay quiet
    project = write_small_project(tmp_path)
    codes = np.ones((30, 41))
    codes[:, 40] = 0  # nodata in a column east of the DEM and the mesh
    write_dem(tmp_path / "codes.tif", codes, nodata=0, dtype="int16")
    (tmp_path / "n_codes.csv").write_text("class,n\n1,0.03\n", encoding="utf-8")
    text = project.read_text(encoding="utf-8")
    text = text.replace('classes = "landcover.gpkg"\nclass_field = "landcover"\n'
                        'n_table = "n_table.csv"',
                        'class_raster = "codes.tif"\nn_table = "n_codes.csv"')
    project.write_text(text, encoding="utf-8")

    class Reached(Exception):
        pass

    def reached(*args, **kwargs):
        raise Reached

    import ntrans.roughness
    import ntrans.tables

    read = []
    holes = ntrans.roughness.class_raster_holes
    monkeypatch.setattr(ntrans.roughness, "class_raster_holes",
                        lambda path: read.append(path) or holes(path))
    monkeypatch.setattr(ntrans.tables, "build_tables", reached)
    caplog.set_level(logging.INFO, logger="ntrans")
    with pytest.raises(Reached):
        proj.run_project(project)
    assert read and read[0] is not None  # the raster has a hole: the DEM was read
    assert not [r for r in caplog.records if r.name == "ntrans.inputs"
                and r.levelno < logging.WARNING]
    assert logging.getLogger("ntrans.inputs").level == logging.NOTSET  # restored
