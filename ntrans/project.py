"""Project files: the whole job (tables, adjustment, maps, plots, report, bundle) in one run.

A project file is TOML.  Its keys are the keyword names of the Python API
(:func:`ntrans.build_tables`, :func:`ntrans.adjust_roughness`), grouped in tables::

    [inputs]    dem, cells, cells_layer, id_field, n, classes, classes_layer, class_field,
                n_table, n_field, class_raster, default_class, overlap_rule, water_surface,
                vertical_units, elevation_field
    [families]  source, target, closure, source_closure, composite, elevation_rule, face_rule
    [window]    depths | stages
    [outputs]   out, csv, zip, overwrite
    [run]       coverage, tile_size, threads, workers, scheduler, face_spacing,
                snap_tolerance

Paths are relative to the project file.  :func:`load_project` validates the file: an
unknown key, a value of the wrong type or a value outside its choices raises
:class:`~ntrans.errors.ProjectFileError` naming the key and what is allowed.

:func:`run_project` writes one handover bundle folder (atomically: all or nothing)::

    tables/           cell and face stage tables (build_tables)
    adjust/           n per class, per-face adjustment (adjust_roughness)
    maps/             GeoTIFF maps on the DEM grid, faces.gpkg, PNG quick-looks
    plots/            PNG figures
    report.html       self-contained report
    n_by_class.csv    the answer, copied to the top
    manifest.json     inputs, parameters, versions, outputs with SHA-256

and, when ``zip = true``, ``<out>.zip`` beside the folder.
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import logging
import os
import shutil
import time
import tomllib
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .cautions import CAUTIONS
from .errors import (
    OutputError,
    OutputExistsError,
    ProjectFileError,
    closest_name,
    collect_warnings,
)
from .memory import release_free_memory

logger = logging.getLogger(__name__)

# ----------------------------------------------------------------------------- schema

FAMILIES: tuple[str, ...] = ("flat", "subgrid")
CLOSURES: tuple[str, ...] = ("lumped", "strip", "cell")
OVERLAP_RULES: tuple[str, ...] = ("error", "first", "last", "max_n")
COMPOSITES: tuple[str, ...] = ("horton_einstein", "pavlovskii", "lotter")
ELEVATION_RULES: tuple[str, ...] = ("mean", "min", "median", "centroid", "field")
FACE_RULES: tuple[str, ...] = ("higher", "mean", "min", "profile_mean")
COVERAGE_MODES: tuple[str, ...] = ("exact", "centre")
VERTICAL_UNITS: tuple[str, ...] = ("metre", "foot", "us_survey_foot")
#: Id columns tried when no id_field is given (the same as ntrans.inputs').
ID_FIELD_CANDIDATES: tuple[str, ...] = ("cell_id", "cellid", "id", "fid", "objectid", "ogc_fid")


@dataclass(frozen=True)
class Key:
    """One project-file key: accepted TOML types, choices, whether it is a path."""

    types: tuple[type, ...]
    expected: str
    choices: tuple[str, ...] | None = None
    path: bool = False
    positive: bool = False


_STR = Key((str,), "a string")
_PATH = Key((str,), "a path (string)", path=True)
_PATHS = Key((str, list), "a path or a list of paths", path=True)
_FLOAT_POS = Key((int, float), "a number", positive=True)
_INT_POS = Key((int,), "an integer", positive=True)
_BOOL = Key((bool,), "true or false")
_SPEC = Key((str, int, float, list), "a SPEC string 'start:stop:step', a number or a list of numbers")


def _choice(choices: tuple[str, ...]) -> Key:
    return Key((str,), "a string", choices=choices)


SCHEMA: dict[str, dict[str, Key]] = {
    "inputs": {
        "dem": _PATH,
        "cells": _PATH,
        "cells_layer": _STR,
        "id_field": _STR,
        "n": _FLOAT_POS,
        "classes": _PATH,
        "classes_layer": _STR,
        "class_field": _STR,
        "n_table": _PATH,
        "n_field": _STR,
        "class_raster": _PATH,
        "default_class": Key((str, int), "a class name (string or integer)"),
        "overlap_rule": _choice(OVERLAP_RULES),
        "water_surface": _PATHS,
        "vertical_units": _choice(VERTICAL_UNITS),
        "elevation_field": _STR,
    },
    "families": {
        "source": _choice(FAMILIES),
        "target": _choice(FAMILIES),
        "closure": _choice(CLOSURES),
        "source_closure": _choice(CLOSURES),
        "composite": _choice(COMPOSITES),
        "elevation_rule": _choice(ELEVATION_RULES),
        "face_rule": _choice(FACE_RULES),
    },
    "window": {
        "depths": _SPEC,
        "stages": _SPEC,
    },
    "outputs": {
        "out": _PATH,
        "csv": _BOOL,
        "zip": _BOOL,
        "overwrite": _BOOL,
    },
    "run": {
        "coverage": _choice(COVERAGE_MODES),
        "tile_size": _INT_POS,
        "threads": _INT_POS,
        "workers": _INT_POS,
        "scheduler": _STR,
        "face_spacing": _FLOAT_POS,
        "snap_tolerance": Key((int, float), "a number"),
    },
}

REQUIRED: dict[str, tuple[str, ...]] = {"inputs": ("dem", "cells")}

_TOML_TYPE_NAMES = {
    str: "a string",
    int: "an integer",
    float: "a number with a fraction",
    bool: "a boolean",
    list: "an array",
    dict: "a table",
}


def _found_type(value: Any) -> str:
    for kind, name in _TOML_TYPE_NAMES.items():
        if type(value) is kind:
            return name
    return f"a {type(value).__name__}"


# ------------------------------------------------------------------------ project file


@dataclass(frozen=True)
class Project:
    """A validated project file: one dict per table, paths made absolute.

    Attributes
    ----------
    path : the project file.
    inputs, families, window, outputs, run : the keys given in each table (validated,
        paths resolved against the project file's folder).
    """

    path: Path
    inputs: dict[str, Any]
    families: dict[str, Any]
    window: dict[str, Any]
    outputs: dict[str, Any]
    run: dict[str, Any]

    @property
    def out(self) -> Path:
        """The bundle folder (default: ``<project stem>-bundle`` beside the project file)."""
        out = self.outputs.get("out")
        return Path(out) if out else self.path.with_name(self.path.stem + "-bundle")

    def parameters(self) -> dict[str, Any]:
        """Every key of the project, grouped by table (paths as strings), for the manifest."""
        return {
            name: {k: _as_plain(v) for k, v in getattr(self, name).items()}
            for name in SCHEMA
        }

    def options(self) -> dict[str, Any]:
        """All keys of all tables in one flat dict (keyword name -> value)."""
        flat: dict[str, Any] = {}
        for name in SCHEMA:
            flat.update(getattr(self, name))
        return flat


def _as_run(parameters: dict[str, Any], out: Path, overwrite: bool) -> dict[str, Any]:
    """The project's parameters with the output folder and overwrite the run used (a call
    or ``--out`` / ``--overwrite`` may override the file's)."""
    outputs = {**parameters.get("outputs", {}), "out": str(out), "overwrite": bool(overwrite)}
    return {**parameters, "outputs": outputs}


def _as_plain(value: Any) -> Any:
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, list):
        return [_as_plain(v) for v in value]
    return value


def _check_value(table: str, key: str, value: Any, spec: Key, base: Path) -> Any:
    where = f"{table}.{key}"
    ok = any(type(value) is t for t in spec.types)
    if not ok and float in spec.types and type(value) is int:
        ok = True
    if not ok:
        raise ProjectFileError(
            f"key {where} is {_found_type(value)} ({value!r}) but must be {spec.expected}; "
            "fix it in the project file"
        )
    if spec.choices is not None and value not in spec.choices:
        raise ProjectFileError(
            f"key {where} = {value!r} is not a valid choice; use one of: "
            + ", ".join(spec.choices)
        )
    if spec.positive and not value > 0:
        raise ProjectFileError(f"key {where} = {value!r} must be greater than zero")
    if isinstance(value, list):
        if spec.path:
            if not value or not all(isinstance(v, str) for v in value):
                raise ProjectFileError(
                    f"key {where} must be a non-empty list of path strings; fix it in the project file"
                )
            return [_resolve(base, v) for v in value]
        if not value or not all(type(v) in (int, float) for v in value):
            raise ProjectFileError(
                f"key {where} must be a non-empty list of numbers; fix it in the project file"
            )
        return [float(v) for v in value]
    if spec.path:
        return _resolve(base, value)
    return value


def _resolve(base: Path, value: str) -> Path:
    p = Path(os.path.expanduser(value))
    return p if p.is_absolute() else (base / p).resolve()


@contextlib.contextmanager
def _info_silenced(name: str) -> Iterator[None]:
    """Logger ``name`` passes warnings and errors only, within the block (for a quick
    early read of inputs that the job reads, and logs, again)."""
    log = logging.getLogger(name)
    level = log.level
    log.setLevel(max(level, logging.WARNING))
    try:
        yield
    finally:
        log.setLevel(level)


def _did_you_mean(name: str, valid: list[str], form: str) -> str:
    """`` (did you mean 'x'?)`` for the valid name nearest ``name`` (any case), else ``""``."""
    near = closest_name(name, valid, cutoff=0.6)
    return f" (did you mean {form.format(near)}?)" if near else ""


def parse_project(data: Mapping[str, Any], *, base: str | os.PathLike[str], path: str | os.PathLike[str] = "project.toml") -> Project:
    """Validate an already-parsed project mapping; relative paths resolve against ``base``.

    Raises
    ------
    ProjectFileError
        Unknown table or key, wrong type, value outside its choices, missing required
        key, or not exactly one of ``[window] depths`` / ``stages``.
    """
    base_path = Path(base).resolve()
    tables: dict[str, dict[str, Any]] = {name: {} for name in SCHEMA}
    for table, content in data.items():
        if table not in SCHEMA:
            home = [t for t, keys in SCHEMA.items() if table in keys]
            if home:
                raise ProjectFileError(
                    f"key {table!r} stands above every table header; move it under [{home[0]}]"
                )
            raise ProjectFileError(
                f"unknown table or top-level key {table!r}{_did_you_mean(table, list(SCHEMA), '[{}]')}; "
                "valid tables: " + ", ".join(f"[{t}]" for t in SCHEMA)
            )
        if not isinstance(content, dict):
            raise ProjectFileError(
                f"{table!r} is {_found_type(content)} but must be a table [{table}]; "
                "put its keys under a [" + table + "] header"
            )
        valid = SCHEMA[table]
        for key, value in content.items():
            if key not in valid:
                home = [t for t, keys in SCHEMA.items() if key in keys]
                hint = (f" (it belongs under [{home[0]}])" if home
                        else _did_you_mean(key, list(valid), "{!r}"))
                raise ProjectFileError(
                    f"unknown key {key!r} in [{table}]{hint}; valid keys of [{table}]: "
                    + ", ".join(valid)
                )
            tables[table][key] = _check_value(table, key, value, valid[key], base_path)
    for table, keys in REQUIRED.items():
        for key in keys:
            if key not in tables[table]:
                raise ProjectFileError(f"key {table}.{key} is required; add it to the project file")
    window = tables["window"]
    if ("depths" in window) == ("stages" in window):
        raise ProjectFileError(
            "the [window] table needs exactly one of depths or stages, e.g. depths = \"0.25:3:0.25\""
        )
    for key in ("depths", "stages"):
        if key in window:
            from .errors import StageSpecError
            from .stages import parse_spec

            try:
                parse_spec(window[key], key[:-1])
            except StageSpecError as exc:
                raise ProjectFileError(f"key window.{key}: {exc}") from exc
    return Project(Path(path).resolve(), **tables)


def load_project(path: str | os.PathLike[str]) -> Project:
    """Read and validate a TOML project file.

    Raises
    ------
    InputFileError
        The file does not exist.
    ProjectFileError
        The file is not valid TOML or fails validation (see :func:`parse_project`).
    """
    from .errors import InputFileError

    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"project file {str(p)!r} does not exist; create one with ntrans init")
    raw = p.read_bytes()
    # a byte-order mark, as some editors write, is dropped; UTF-16 is known by its mark
    encoding = "utf-16" if raw.startswith((b"\xff\xfe", b"\xfe\xff")) else "utf-8-sig"
    try:
        text = raw.decode(encoding)
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise ProjectFileError(
            f"project file {str(p)!r} is not UTF-8 text (line {line} holds a character in "
            "another encoding); save it as UTF-8"
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        hint = ("; write paths with forward slashes (a backslash in a double-quoted string "
                "starts an escape)" if "Unescaped '\\'" in str(exc) else "")
        raise ProjectFileError(f"project file {str(p)!r} is not valid TOML: {exc}{hint}") from exc
    return parse_project(data, base=p.resolve().parent, path=p)


# ---------------------------------------------------------------------------- template

TEMPLATE = """\
# ntrans project file (TOML).  Run it with:  ntrans run {name}
# Keys are the keyword names of the Python API (build_tables, adjust_roughness).
# Paths are relative to this file; write them with forward slashes, also on Windows.
# Lengths are in the DEM's horizontal CRS units, elevations and depths in its vertical units.

[inputs]
dem = "dem.tif"                 # terrain raster (GeoTIFF), projected CRS
cells = "cells.gpkg"            # mesh cells as polygons, same CRS as the DEM
# cells_layer = "cells"         # layer of the cells file to read (when it holds several)
# id_field = "cell_id"          # attribute with unique cell ids (default: the first of
#                               # {id_fields} there is,
#                               # any case; else the feature order from 0)
# Roughness: one of the following
# n = 0.035                     # one Manning's n everywhere
classes = "landcover.gpkg"      # roughness class polygons ...
class_field = "landcover"       # ... their class attribute ...
n_table = "n_table.csv"         # ... and a CSV with columns class, n (optional surface)
#                                 (names match the classes exactly, case included,
#                                 codes by number: 7 = 07 = 7.0; n in s/m^(1/3), 0.005 to 1,
#                                 with a decimal point; separator , or ; or tab)
# classes_layer = "landcover"   # layer of the classes file to read (when it holds several)
# n_field = "n"                 # or: polygons that carry their own n
# class_raster = "classes.tif"  # or: an integer class raster (with n_table)
# default_class = "pasture"     # class for ground no polygon (or raster code) covers
# water_surface = "wse.tif"     # calibrated water surface(s) of the source model (or a list)
#                                 (elevations, not depths, in the DEM's vertical unit)
# vertical_units = "metre"      # metre | foot | us_survey_foot (default: as horizontal)
# elevation_field = "bed_z"     # flat bed elevation attribute (with elevation_rule = "field")

[families]
source = "flat"                 # model family the n values were calibrated in: flat | subgrid
target = "subgrid"              # model family they are carried to: flat | subgrid
closure = "lumped"              # friction closure of the target: {closures}
# source_closure = "lumped"     # closure of the source when both families are subgrid:
#                               # {closures} (default lumped)
composite = "horton_einstein"   # composite n along a face: {composites}
elevation_rule = "mean"         # flat cell bed: {elevation_rules}
face_rule = "higher"            # flat face bed: {face_rules}

[window]
# The calibrated range: exactly one of
depths = "0.25:3:0.25"          # depths above each cell's / face's low point (start:stop:step or list)
# stages = "101:104:0.5"        # water-surface elevations

[outputs]
out = "{stem}-bundle"           # bundle folder (written whole or not at all)
csv = false                     # also write every table as CSV
zip = false                     # also write <out>.zip beside the folder
overwrite = false               # replace an earlier bundle (never a folder of other files)

[run]
coverage = "exact"              # pixel-to-cell weights: exact | centre
tile_size = 512                 # tile edge in DEM pixels (bounds memory)
# threads = 2                   # tiles at once in this process (default: one per core, up to 4)
# workers = 4                   # local worker processes (default: this process)
# snap_tolerance = 0.05         # cell borders closer than this count as shared (default:
#                               # 1 % of a pixel; raise it when a mesh gap warning says so)
"""


def write_project_template(path: str | os.PathLike[str], *, overwrite: bool = False) -> Path:
    """Write a commented project-file template to ``path`` (``ntrans init``).

    Raises
    ------
    OutputExistsError
        ``path`` exists and ``overwrite`` is false.
    """
    p = Path(path)
    if p.exists() and not overwrite:
        raise OutputExistsError(f"{str(p)!r} already exists; choose another name or pass "
                                "--overwrite (overwrite=True from Python) to replace it")
    if p.exists() and p.is_dir():
        raise OutputError(f"{str(p)!r} is a folder; give a file name such as project.toml")
    text = TEMPLATE.format(
        name=p.name,
        stem=p.stem,
        closures=" | ".join(CLOSURES),
        id_fields=", ".join(ID_FIELD_CANDIDATES),
        composites=" | ".join(COMPOSITES),
        elevation_rules=" | ".join(ELEVATION_RULES),
        face_rules=" | ".join(FACE_RULES),
    )
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(text, encoding="utf-8")
    return p


# --------------------------------------------------------------------------------- run


@dataclass
class RunResult:
    """What :func:`run_project` wrote.

    Attributes
    ----------
    folder : the bundle folder.
    report : ``report.html`` inside it.
    manifest : ``manifest.json`` inside it.
    zip : the zip beside the folder, or None.
    n_by_class : the per-class table (a pandas DataFrame).
    files : every file of the bundle, relative POSIX paths.
    summary : key figures (dict) used by the report and the command line.
    """

    folder: Path
    report: Path
    manifest: Path
    zip: Path | None
    n_by_class: Any
    files: list[str] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)


def _accepted(func: Callable[..., Any], options: Mapping[str, Any]) -> dict[str, Any]:
    """The options ``func`` takes as keywords (all of them if it takes ``**kwargs``)."""
    params = inspect.signature(func).parameters
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values()):
        return dict(options)
    return {k: v for k, v in options.items() if k in params}


def _call_kwargs(func: Callable[..., Any], options: Mapping[str, Any]) -> dict[str, Any]:
    kwargs = _accepted(func, options)
    return {k: (str(v) if isinstance(v, Path) else [str(x) for x in v] if isinstance(v, list) and v and isinstance(v[0], Path) else v) for k, v in kwargs.items()}


@contextlib.contextmanager
def fixed_gdal_dates() -> Iterator[None]:
    """Freeze the date GDAL writes into GeoPackages, so reruns give identical bytes."""
    import pyogrio

    key, value = "OGR_CURRENT_DATE", "2000-01-01T00:00:00.000Z"
    old_env = os.environ.get(key)
    old_cfg = pyogrio.get_gdal_config_option(key)
    os.environ[key] = value
    pyogrio.set_gdal_config_options({key: value})
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options({key: old_cfg})
        if old_env is None:
            os.environ.pop(key, None)
        else:
            os.environ[key] = old_env


@contextlib.contextmanager
def _step(name: str, timings: dict[str, float]) -> Iterator[None]:
    logger.info("%s ...", name)
    start = time.perf_counter()
    yield
    timings[name] = time.perf_counter() - start
    logger.info("%s done in %.1f s", name, timings[name])
    release_free_memory()  # what the step freed goes back before the next one


def run_project(
    path: str | os.PathLike[str],
    *,
    out: str | os.PathLike[str] | None = None,
    overwrite: bool | None = None,
    progress: bool = False,
) -> RunResult:
    """Run the whole job of a project file into one handover bundle folder.

    Parameters
    ----------
    path
        The TOML project file.
    out
        Bundle folder (default: the project's ``outputs.out``).
    overwrite
        Replace an existing bundle folder (default: the project's ``outputs.overwrite``).
    progress
        Show a progress bar per step on stderr.

    Returns
    -------
    RunResult
        The bundle folder, report, manifest, optional zip and the per-class table.

    Raises
    ------
    ProjectFileError
        The project file is invalid.
    OutputExistsError
        The bundle folder (or its zip) exists and overwrite is false.
    OutputError
        The bundle folder or zip exists but is not an earlier ntrans output (never
        replaced), or would replace an input.
    RoughnessError
        A class (or the default class) is missing from the n table, or an n is not a
        Manning's n, or a class raster clearly leaves mesh ground without a class and
        no default class is given; checked before the stage tables.

    The adjusted n values are a starting point for calibration in the target model, not a
    substitute for it; a qualified engineer must review them; local codes, agency guidance
    and licensed practice take precedence (:data:`ntrans.cautions.CAUTIONS`).
    """
    import pandas as pd

    from . import bundle
    from .adjust import adjust_roughness
    from .inputs import open_dem, read_cell_outlines
    from .outputs import OutputFolder
    from .roughness import check_class_raster_holes, check_roughness_inputs
    from .tables import build_tables

    project = load_project(path)
    if overwrite is None:
        overwrite = bool(project.outputs.get("overwrite", False))
    target = Path(out) if out is not None else project.out
    options = project.options()
    for key in ("out", "zip", "overwrite", "dem", "cells"):
        options.pop(key, None)
    dem, cells = str(project.inputs["dem"]), str(project.inputs["cells"])

    @functools.cache
    def dem_info() -> Any:
        return open_dem(dem, vertical_units=options.get("vertical_units"), check_scale=False)
    timings: dict[str, float] = {}
    logger.info("project %s -> %s", project.path, target)
    if project.outputs.get("zip", False):  # before the run, as the folder is checked
        bundle.check_zip_target(target, overwrite=overwrite)
    # the classes against the n table, before the stage tables take their minutes
    check_roughness_inputs(**_call_kwargs(check_roughness_inputs, options))
    # and a class raster's holes under the mesh (the DEM and mesh read only if it has any)
    with _info_silenced("ntrans.inputs"):  # the stage tables read and log them again
        check_class_raster_holes(
            options.get("class_raster"),
            lambda: read_cell_outlines(cells, dem=dem_info(), layer=options.get("cells_layer")),
            dem_info, default_class=options.get("default_class"))

    with fixed_gdal_dates(), OutputFolder(
        target, overwrite=overwrite, inputs=[*_input_paths(project), project.path]
    ) as folder:
        tmp = Path(folder.path)
        with _step("inputs checksums", timings):
            inputs = _describe_inputs(project)
        # the steps' warnings reach the caller as they happen and the report from here
        with collect_warnings() as caught:
            with _step("stage tables", timings):
                kw = _call_kwargs(build_tables, options)
                kw.update(out=str(tmp / "tables"), overwrite=True, progress=progress)
                effective = {"build_tables": _effective(build_tables, kw)}
                build_tables(dem, cells, **kw)
            with _step("roughness adjustment", timings):
                kw = _call_kwargs(adjust_roughness, options)
                if "water_surface" in kw:  # the rasters are the window of the fit
                    kw.pop("depths", None)
                    kw.pop("stages", None)
                kw.update(out=str(tmp / "adjust"), overwrite=True, progress=progress)
                effective["adjust_roughness"] = _effective(adjust_roughness, kw)
                adjust_roughness(dem, cells, **kw)
        notes = list(dict.fromkeys(text for _, text in caught))  # each once, in order
        step_seconds = _strip_timings(tmp)
        with _step("maps, plots and report", timings):
            summary = _products(project, tmp, inputs=inputs, notes=notes, progress=progress)
        shutil.copyfile(tmp / "adjust" / "n_by_class.csv", tmp / "n_by_class.csv")
        for entry in inputs:
            if entry.get("role") == "dem":
                entry["units"] = {k: summary.get("units", {}).get(k)
                                  for k in ("horizontal", "vertical")}
        with _step("manifest", timings):
            bundle.write_manifest(
                tmp,
                inputs=inputs,
                parameters={**_as_run(project.parameters(), target, overwrite),
                            "effective": effective},
                units=summary.get("units", {}),
                extra={
                    "project_file": {
                        "path": str(project.path),
                        "sha256": bundle.sha256_file(project.path),
                        "size": project.path.stat().st_size,
                    },
                    "run_seconds": {**step_seconds, **{k: round(v, 3) for k, v in timings.items()}},
                    # with every copy of the bundle, whichever file is passed on
                    "cautions": list(CAUTIONS),
                },
            )
    final = Path(folder.final)
    zip_path = None
    if project.outputs.get("zip", False):
        with _step("zip", timings):
            try:
                zip_path = bundle.write_zip(final)
            except BaseException as exc:
                exc.add_note(f"the bundle was written to {final}, its zip was not")
                raise
    n_by_class = pd.read_csv(final / "n_by_class.csv")
    files = bundle.list_files(final)
    summary["timings"] = timings
    logger.info("bundle written: %s (%d files)", final, len(files))
    return RunResult(final, final / "report.html", final / bundle.MANIFEST_NAME, zip_path,
                     n_by_class, files, summary)


def _effective(func: Callable[..., Any], kwargs: Mapping[str, Any]) -> dict[str, Any]:
    """Every keyword of ``func`` with the value it runs with (given or default)."""
    skip = {"dem", "cells", "out", "progress", "overwrite"}
    values: dict[str, Any] = {}
    for name, param in inspect.signature(func).parameters.items():
        if name in skip or param.kind is not inspect.Parameter.KEYWORD_ONLY:
            continue
        default = None if param.default is inspect.Parameter.empty else param.default
        values[name] = kwargs.get(name, default)
    return values


#: Keys of the step summaries that hold run times (they vary from run to run): moved
#: from the summary files into the manifest so every other output stays reproducible.
_TIMING_KEYS = ("seconds", "elapsed", "elapsed_seconds", "runtime", "run_seconds", "created",
                "created_utc", "time")


def _strip_timings(folder: Path) -> dict[str, Any]:
    import json

    moved: dict[str, Any] = {}
    for path in sorted(folder.glob("*/*_summary.json")):
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except ValueError:
            continue
        if not isinstance(data, dict):
            continue
        found = {k: data.pop(k) for k in _TIMING_KEYS if k in data}
        if found:
            moved[path.parent.name] = found
            path.write_text(json.dumps(data, indent=2) + "\n", encoding="utf-8")
    return moved


def _input_paths(project: Project) -> list[Path]:
    paths: list[Path] = []
    for value in project.inputs.values():
        if isinstance(value, Path):
            paths.append(value)
        elif isinstance(value, list):
            paths.extend(v for v in value if isinstance(v, Path))
    return paths


def _describe_inputs(project: Project) -> list[dict[str, Any]]:
    from .bundle import describe_input

    entries = []
    for key in ("dem", "cells", "classes", "n_table", "class_raster", "water_surface"):
        value = project.inputs.get(key)
        if value is None:
            continue
        for i, item in enumerate(value if isinstance(value, list) else [value]):
            role = key if not isinstance(value, list) else f"{key}[{i}]"
            entries.append(describe_input(item, role=role))
    return entries


def _products(
    project: Project,
    folder: Path,
    *,
    inputs: list[dict[str, Any]],
    notes: list[str],
    progress: bool,
) -> dict[str, Any]:
    """Maps, plots and the report from the tables in ``folder``; returns the summary."""
    data = _gather(project, folder)
    release_free_memory()  # the table reads' buffers, before the maps
    data["notes"] = list(notes)
    steps = ["maps", "plots", "report"]
    images: dict[str, Any] = {}
    for name in _steps_bar(steps, enabled=progress):
        logger.info("writing %s", name)
        if name == "maps":
            images.update(_write_maps(data, folder / "maps"))
        elif name == "plots":
            images.update(_write_plots(data, folder / "plots"))
        else:
            from .report import write_report

            context = _report_context(project, data)
            context["inputs"] = [
                {"role": e["role"], "path": Path(e["path"]).name, "sha256": e["sha256"]}
                for e in inputs
            ]
            write_report(folder / "report.html", context, images)
    return data["summary"]


def _steps_bar(steps: list[str], *, enabled: bool) -> Iterator[str]:
    """Yield ``steps``, with a progress bar on stderr when ``enabled``."""
    if not enabled:
        yield from steps
        return
    from tqdm.auto import tqdm

    bar = tqdm(steps, desc="maps, plots, report", unit="step", leave=False, dynamic_ncols=True)
    for name in bar:
        bar.set_postfix_str(name)
        yield name


# ----------------------------------------------------------------- gathering the results


def _read_json(path: Path) -> dict[str, Any]:
    import json

    if not path.is_file():
        return {}
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except ValueError:
        return {}


def _gather(project: Project, folder: Path) -> dict[str, Any]:
    """The figures of the maps, plots and report from the tables and adjust steps' files.

    The layers (one row per cell or face) are read whole; the adjustment tables (one row
    per item and window stage) only in passes of a row group at a time
    (:mod:`ntrans.summaries`), so memory does not grow with the number of stages.
    """
    import geopandas as gpd
    import numpy as np
    import pandas as pd

    from . import summaries
    from .outputs import read_encoded_layer

    tables, adjust = folder / "tables", folder / "adjust"
    tsum = _read_json(tables / "tables_summary.json")
    asum = _read_json(adjust / "adjust_summary.json")
    cells = gpd.read_file(tables / "cells.gpkg")
    faces = None  # the face lines as WKB: they are only written back, with the face values
    if (tables / "faces.gpkg").is_file():
        faces = read_encoded_layer(tables / "faces.gpkg", ["face_id", "cell_a", "cell_b", "length"])
    domain = asum.get("fit_domain", "faces")
    face_path = adjust / "face_adjustment.parquet"
    cell_path = adjust / "cell_adjustment.parquet"
    by_cells = domain == "cells" and cell_path.is_file()
    n_by_class = pd.read_csv(adjust / "n_by_class.csv", keep_default_na=False,
                             na_values=["", "nan", "NaN"])
    if "flags" in n_by_class.columns:
        n_by_class["flags"] = n_by_class["flags"].fillna("").astype(str)
    ids = cells["cell_id"].to_numpy()

    # per-cell map values, in the order of cells.gpkg
    factor = pd.Series(cells["bed_factor"].to_numpy(dtype=float), index=ids)
    cell_values = pd.DataFrame({"friction_factor": factor.to_numpy()})
    # the fit domain's medians per cell, as the adjustment wrote them in its cells.gpkg
    # (over the cell's faces, or the cell's own with friction per cell): the maps show
    # the same numbers under the same names
    import pyogrio

    per_cell = {"n_ratio_median": "n_ratio", "stage_bias_unadjusted_median": "stage_bias"}
    fitted = pyogrio.read_dataframe(adjust / "cells.gpkg", read_geometry=False,
                                    columns=["cell_id", *per_cell])
    fitted = fitted.set_index("cell_id").reindex(ids)
    for column, name in per_cell.items():
        cell_values[name] = (fitted[column].to_numpy(dtype=float) if column in fitted.columns
                             else np.nan)
    cols = ["n_ratio", "stage_bias_unadjusted", "stage_bias_adjusted"]
    face_values = summaries.item_medians(face_path, key="face_id", values=cols,
                                         first=["dominant_class"])
    face_values = face_values.rename(columns={c: f"{c}_median" for c in cols})

    # the rows the class fit used: per face-stage, or per cell-stage with cell friction
    fit_path = cell_path if by_cells else face_path
    item = "cell" if by_cells else "face"
    bands, bands_x = None, None
    if "n_ratio" in summaries.table_columns(fit_path):
        bands_x = "depth" if summaries.any_finite(fit_path, "depth") else "stage"
        bands = summaries.class_ratio_bands(fit_path, x=bands_x,
                                            round_x=6 if bands_x == "depth" else None)
    bias_stats, bias_histogram = summaries.stage_bias_figures(fit_path)

    mode = tsum.get("stage_mode", "depth" if "depths" in project.window else "stage")
    units = {
        "horizontal": tsum.get("horizontal_unit", "metre"),
        "vertical": tsum.get("vertical_unit", "metre"),
        # which foot, for the report (the short names above make the unit symbols)
        "horizontal_name": tsum.get("horizontal_unit_name"),
        "vertical_name": tsum.get("vertical_unit_name"),
    }
    units["manning_k"] = asum.get("manning_k", 1.486 if units["horizontal"] == "foot" else 1.0)
    summary = {
        "units": units,
        "cells": int(len(cells)),
        "faces": int(len(faces.frame)) if faces is not None else int(len(face_values)),
        # stages per item: in the calibration window (one per water-surface raster), and
        # in the stage tables
        "stages": _window_size(asum.get("window")),
        "table_stages": len(tsum.get("stage_values", [])) or None,
        "classes": int(len(n_by_class)),
        "reference": tsum.get("reference"),
        "stage_mode": mode,
        "fit_domain": domain,
        **bias_stats,
    }
    return {
        "tables_summary": tsum,
        "adjust_summary": asum,
        "cell_stage_path": tables / "cell_stage.parquet",
        "cells": cells,
        "faces": faces,
        "item": item,
        "class_bands": bands,
        "class_bands_x": bands_x,
        "stage_bias_histogram": bias_histogram,
        "n_by_class": n_by_class,
        "cell_values": cell_values,
        "face_values": face_values,
        "friction_factor": factor,
        "summary": summary,
    }


def _unit_symbol(unit: str) -> str:
    return {"metre": "m", "foot": "ft", "us_survey_foot": "ft"}.get(str(unit), str(unit))


def _write_maps(data: dict[str, Any], folder: Path) -> dict[str, Path]:
    import rasterio

    from .maps import write_maps

    dem_path = data["tables_summary"].get("dem")
    with rasterio.open(dem_path) as src:  # the maps read it window by window themselves
        transform, crs = src.transform, src.crs
    units = data["summary"]["units"]
    faces = data["faces"]
    written = write_maps(
        folder,
        cell_values=data["cell_values"],
        cell_geometry=data["cells"].geometry.to_numpy(),
        elevation=dem_path,
        transform=transform,
        crs=crs,
        length_unit=_unit_symbol(units["horizontal"]),
        vertical_unit=_unit_symbol(units["vertical"]),
        faces=faces,
        face_values=data["face_values"] if faces is not None else None,
        fit_domain="cells" if data["item"] == "cell" else "faces",
    )
    written.pop("faces", None)
    return written


def _write_plots(data: dict[str, Any], folder: Path) -> dict[str, Path]:
    from .plots import plot_cell_curves, plot_class_ratios, plot_stage_bias, representative_cells

    units = data["summary"]["units"]
    z = _unit_symbol(units["vertical"])
    xy = _unit_symbol(units["horizontal"])
    item = data["item"]
    images: dict[str, Path] = {}
    if data["class_bands"] is not None:
        x = data["class_bands_x"]
        label = (f"depth above the {item}'s low point ({z})" if x == "depth"
                 else f"stage ({z})")
        images["class_ratios"] = plot_class_ratios(
            folder / "n_ratio_by_class.png", data["class_bands"], x=x, x_label=label,
            item=item)
    if data["stage_bias_histogram"] is not None:
        images["stage_bias_hist"] = plot_stage_bias(
            folder / "stage_bias_histograms.png", data["stage_bias_histogram"], unit=z,
            item=item)
    picks = representative_cells(data["friction_factor"])
    cell_stage = _rows_of_cells(data["cell_stage_path"], list(picks.values()))
    curves = {}
    for label, cell in picks.items():
        rows = cell_stage[cell_stage["cell_id"] == cell].copy()
        if "flat_volume" not in rows.columns:
            area = float(rows["wet_area"].max()) if len(rows) else 0.0
            rows["flat_volume"] = area * rows["flat_depth"]
        curves[f"cell {cell} ({label})"] = rows
    images["cell_curves"] = plot_cell_curves(folder / "representative_cells.png", curves,
                                             length_unit=xy, vertical_unit=z)
    return images


def _rows_of_cells(path: Path, cells: list[Any]) -> Any:
    """The stage table's rows of these cells only (in file order), one row group read at
    a time, not the whole table."""
    from .summaries import rows_with

    return rows_with(path, "cell_id", [c.item() if hasattr(c, "item") else c for c in cells])


def _window_text(project: Project) -> str:
    for key in ("depths", "stages"):
        if key in project.window:
            value = project.window[key]
            text = ", ".join(f"{v:g}" for v in value) if isinstance(value, list) else str(value)
            return f"{key} {text}"
    return ""


def _window_size(window: Any) -> int | None:
    """Stages per item in the calibration window of ``adjust_summary.json``'s ``window``."""
    if not isinstance(window, dict):
        return None
    if window.get("mode") == "water_surface":
        return len(window.get("rasters", [])) or None
    return len(window.get("values", [])) or None


def _stage_counts(summary: Mapping[str, Any]) -> tuple[Any, Any]:
    """The report's stages per item in the window and, when the window is water-surface
    rasters, the levels of the stage tables (else None: the tables use the window)."""
    n, levels = summary.get("stages"), summary.get("table_stages")
    surfaces = summary.get("window_mode") == "water_surface"
    if n is None:
        return None, None
    if surfaces:
        window = (f"{n} (one per water-surface raster: each face and cell at its own stage "
                  "under it)")
    else:
        window = n
    table = None
    if surfaces and levels:
        kind = ("depths above each cell's and face's low point"
                if summary.get("stage_mode") == "depth" else "stages")
        table = f"{levels} {kind}"
    return window, table


def _report_context(project: Project, data: dict[str, Any]) -> dict[str, Any]:
    import math

    from .report import domain_words

    fam = project.families
    asum = data["adjust_summary"]
    tsum = data["tables_summary"]
    summary = data["summary"]
    z = _unit_symbol(summary["units"]["vertical"])
    reference = summary.get("reference")
    if reference is not None:
        reference = (
            f"depth {reference:g} {z} above each cell's low point"
            if summary.get("stage_mode") == "depth"
            else f"stage {reference:g} {z}"
        )
    classes = []
    for row in data["n_by_class"].to_dict(orient="records"):
        classes.append(
            {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in row.items()}
        )
    src = asum.get("source") if isinstance(asum.get("source"), dict) else {}
    tgt = asum.get("target") if isinstance(asum.get("target"), dict) else {}
    source = src.get("family", fam.get("source", "flat"))
    target = tgt.get("family", fam.get("target", "subgrid"))
    closure = tgt.get("closure", fam.get("closure", "lumped"))
    if target == "flat":  # the subgrid side is the source: name its closure
        closure = f"flat (source closure {src.get('closure', fam.get('closure', 'lumped'))})"
    window = _window_text(project)
    if isinstance(asum.get("window"), dict) and asum["window"].get("mode") == "water_surface":
        window = "water surface rasters " + ", ".join(asum["window"].get("rasters", []))
    words = domain_words(summary.get("fit_domain"))
    notes = list(data.get("notes", []))
    fit = asum.get("fit", {}) if isinstance(asum.get("fit"), dict) else {}
    if fit and not fit.get("success", True):
        notes.append("The class fit did not converge; treat the fitted n with extra care.")
    if summary.get("fit_domain") == "cells":
        notes.append("Friction is applied per cell in the subgrid family: the class fit used "
                     "cells, and the face values are shown for reference.")
    before = summary.get("stage_bias_unadjusted") or {}
    after = summary.get("stage_bias_adjusted") or {}
    # judge by the fit's own weighting (source conveyance) when it is known
    key = "weighted_mean_abs" if after.get("weighted_mean_abs") is not None else "mean_abs"
    what = ("conveyance-weighted mean absolute stage error" if key == "weighted_mean_abs"
            else "mean absolute stage error")
    if (before.get(key) is not None and after.get(key) is not None
            and after[key] > before[key]):
        wide = [str(row.get("class")) for row in classes
                if "wide_spread" in str(row.get("flags") or "").split(";")]
        if len(wide) == 1:
            review = f"review the class flagged wide_spread ({wide[0]}) before using its n"
        elif wide:
            review = (f"review the classes flagged wide_spread ({', '.join(wide)}) before "
                      "using their n")
        else:
            review = ("no class is flagged wide_spread, so review the stage errors per class "
                      "and the stage error map before using the n")
        notes.append(
            f"With the adjusted n the {what} is larger ({after[key]:.3g} {z}) than with n "
            f"carried over ({before[key]:.3g} {z}): one n per class does not fit these "
            f"{words['items']} well; {review}."
        )
    window_stages, table_stages = _stage_counts(
        {**summary, "window_mode": (asum.get("window") or {}).get("mode")
         if isinstance(asum.get("window"), dict) else None})
    return {
        "title": f"Manning's n carried from {source} to {target} cells",
        "project": project.path.name,
        "move": {
            "source": source,
            "target": target,
            "closure": closure,
            "source_closure": src.get("closure") if source == "subgrid" else None,
            "composite": asum.get("composite", fam.get("composite")),
            "elevation_rule": tsum.get("elevation_rule", fam.get("elevation_rule")),
            "face_rule": tsum.get("face_rule", fam.get("face_rule")),
            "window": window,
        },
        "units": summary["units"],
        "fit_domain": summary.get("fit_domain", "faces"),
        "counts": {"cells": summary.get("cells"), "faces": summary.get("faces"),
                   "stages": window_stages, "table_stages": table_stages,
                   "classes": summary.get("classes")},
        "classes": classes,
        "bias": {
            "before": summary.get("stage_bias_unadjusted"),
            "after": summary.get("stage_bias_adjusted"),
        },
        "inputs": [
            {"role": k, "path": Path(v).name if isinstance(v, Path) else v}
            for k, v in project.inputs.items()
            if isinstance(v, Path)
        ],
        "notes": notes,
        "reference": reference,
    }
