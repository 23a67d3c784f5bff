"""Command-line options shared by several commands, defined once.

Each name below is a decorator adding one ``click`` option; the option's Python name is
the library's keyword name, so ``build_tables(**kwargs)`` takes them as they come.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from typing import Any

import click

F = Callable[..., Any]

dem = click.option(
    "--dem",
    required=True,
    type=click.Path(dir_okay=False, path_type=str),
    help="Terrain raster (GeoTIFF) in a projected CRS; horizontal units (metre or foot) "
    "come from the CRS, elevations in the vertical units.",
)

cells = click.option(
    "--cells",
    required=True,
    type=click.Path(path_type=str),
    help="Mesh cells as polygons (GeoPackage, Shapefile, ...) in the DEM's CRS.",
)

cells_layer = click.option(
    "--cells-layer",
    default=None,
    metavar="NAME",
    help="Layer of --cells to read, when the file holds several (e.g. a GeoPackage with "
    "more than the mesh).",
)

id_field = click.option(
    "--id-field",
    default=None,
    metavar="NAME",
    help="Attribute holding unique cell ids (default: the first of cell_id, cellid, id, "
    "fid, objectid, ogc_fid there is, any case, else the feature order from 0).",
)


stages = click.option(
    "--stages",
    default=None,
    metavar="SPEC",
    help="Water-surface elevations to tabulate, in the DEM's vertical units: "
    "start:stop:step (stop included when on the grid) or a comma list.  "
    "Give exactly one of --stages and --depths.",
)

depths = click.option(
    "--depths",
    default=None,
    metavar="SPEC",
    help="Depths to tabulate, in the DEM's vertical units, above each cell's and each "
    "face's lowest terrain point: start:stop:step or a comma list.  "
    "Give exactly one of --stages and --depths.",
)

vertical_units = click.option(
    "--vertical-units",
    type=click.Choice(["metre", "foot", "us_survey_foot"]),
    default=None,
    help="Units of the DEM's elevations when they differ from the CRS's horizontal "
    "units (default: the same as horizontal).  'foot' is the CRS's foot when it is in "
    "feet, else the international foot (0.3048 m); 'us_survey_foot' is 1200/3937 m.",
)

coverage = click.option(
    "--coverage",
    type=click.Choice(["exact", "centre"]),
    default="exact",
    show_default=True,
    help="How a cell takes a pixel: 'exact' by the fraction of the pixel's plan area "
    "(square CRS units) it covers, 'centre' wholly when the pixel centre is inside.",
)

elevation_rule = click.option(
    "--elevation-rule",
    type=click.Choice(["mean", "min", "median", "centroid", "field"]),
    default="mean",
    show_default=True,
    help="Flat-cell bed elevation (vertical units): terrain mean, min or median over the "
    "cell (area-weighted), terrain at the centroid, or the --elevation-field attribute.",
)

elevation_field = click.option(
    "--elevation-field",
    default=None,
    metavar="NAME",
    help="Cell attribute with the flat bed elevation (vertical units) from the source "
    "model; used with --elevation-rule field.",
)

face_rule = click.option(
    "--face-rule",
    type=click.Choice(["higher", "mean", "min", "profile_mean"]),
    default="higher",
    show_default=True,
    help="Flat-face bed elevation (vertical units): the higher, mean or lower of the two "
    "adjacent flat-cell elevations (the one that has one when the other cell has none), "
    "or the mean of the face's terrain profile.",
)

face_spacing = click.option(
    "--face-spacing",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    metavar="LENGTH",
    help="Profile sampling step along faces, in horizontal CRS units "
    "(default: half a pixel; a coarser step warns).",
)

snap_tolerance = click.option(
    "--snap-tolerance",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    metavar="LENGTH",
    help="Distance in horizontal CRS units within which cell borders count as shared "
    "(default: 1% of the pixel size).",
)

out = click.option(
    "--out",
    required=True,
    type=click.Path(file_okay=False, path_type=str),
    help="Output folder (written whole or not at all).",
)

overwrite = click.option(
    "--overwrite",
    is_flag=True,
    default=False,
    help="Replace the output folder if it exists and is empty or an earlier ntrans "
    "output (never a folder of other files).",
)

csv = click.option(
    "--csv",
    is_flag=True,
    default=False,
    help="Also write every Parquet table as CSV beside it (the same name with .csv; an "
    "empty field is a missing value).",
)

tile_size = click.option(
    "--tile-size",
    type=click.IntRange(min=1),
    default=512,
    show_default=True,
    metavar="PIXELS",
    help="Tile edge in DEM pixels; cells are processed tile by tile, which bounds memory.",
)

workers = click.option(
    "--workers",
    type=click.IntRange(min=1),
    default=None,
    metavar="N",
    help="Run tiles on a local Dask cluster of N worker processes (default: this process, "
    "which already uses one tile thread per core up to 4; a local cluster pays off only "
    "beyond that).",
)

threads = click.option(
    "--threads",
    type=click.IntRange(min=1),
    default=None,
    metavar="N",
    help="Run N tiles (and blocks of the face build) at once in this process (default: "
    "one per core, up to 4; 1 runs them one at a time); the same results, and memory "
    "grows by one tile's work per thread.",
)

scheduler = click.option(
    "--scheduler",
    default=None,
    metavar="ADDRESS",
    help="Run tiles on an existing Dask scheduler, e.g. tcp://host:8786.",
)


def tables_options(func: F) -> F:
    """Every option of the ``tables`` job, in --help order."""
    for deco in reversed(
        [
            dem,
            cells,
            cells_layer,
            id_field,
            stages,
            depths,
            vertical_units,
            coverage,
            elevation_rule,
            elevation_field,
            face_rule,
            face_spacing,
            snap_tolerance,
            out,
            overwrite,
            csv,
            tile_size,
            threads,
            workers,
            scheduler,
        ]
    ):
        func = deco(func)
    return func


def check_stages_or_depths(stages_value: str | None, depths_value: str | None) -> None:
    """Exactly one of --stages / --depths; a usage error (exit 2) otherwise."""
    if (stages_value is None) == (depths_value is None):
        raise click.UsageError("give exactly one of --stages and --depths")


# ------------------------------------------------------------------ logging and errors

VERBOSE_HELP = "More log lines (repeat for debug logs)."
QUIET_HELP = "Only warnings and errors; no progress bars."
DEBUG_HELP = "Show the full traceback on errors."


def set_verbosity(ctx: click.Context, *, verbose: int = 0, quiet: bool = False,
                  debug: bool = False) -> None:
    """Add ``-v`` / ``-q`` / ``--debug`` to what the command line already asked for and
    apply the result: the log level, progress bars, tracebacks, the warning format.

    Both the command group (``ntrans -q run ...``) and every command (``ntrans run ...
    -q``) call it; the context's ``meta`` is shared between them, so the flags add up
    wherever they were given (``-q`` wins over ``-v``).
    """
    import logging
    import warnings

    meta = ctx.meta
    meta["ntrans.verbose"] = int(meta.get("ntrans.verbose", 0)) + int(verbose)
    meta["ntrans.quiet"] = bool(meta.get("ntrans.quiet", False)) or bool(quiet)
    meta["ntrans.debug"] = bool(meta.get("ntrans.debug", False)) or bool(debug)
    if meta["ntrans.quiet"]:
        level = logging.WARNING
    else:
        level = logging.INFO if meta["ntrans.verbose"] == 0 else logging.DEBUG
    logging.getLogger().setLevel(level)
    warnings.formatwarning = located_warning if meta["ntrans.debug"] else one_line_warning
    # a local Dask cluster logs its start and every worker at INFO: shown with -vv only.
    # Dask reads its logging levels from the environment when it is imported (later, and
    # in the worker processes); a level the user set there is kept
    if DASK_LOG_ENV not in os.environ or meta.get("ntrans.dask_log_env"):
        os.environ[DASK_LOG_ENV] = "info" if level <= logging.DEBUG else "warning"
        meta["ntrans.dask_log_env"] = True


#: environment variable that sets the level of Dask's ``distributed`` loggers
DASK_LOG_ENV = "DASK_LOGGING__DISTRIBUTED"


def one_line_warning(message, category, filename, lineno, line=None) -> str:
    """Format a warning as one line (the log record adds the level)."""
    return f"{category.__name__}: {message}"


def located_warning(message, category, filename, lineno, line=None) -> str:
    """Format a warning as one line with its origin (``--debug``)."""
    return f"{category.__name__}: {message} ({filename}:{lineno})"


def _verbosity_callback(ctx: click.Context, param: click.Parameter, value: Any) -> None:
    if value:
        set_verbosity(ctx, **{str(param.name): value})


def verbosity(func: F) -> F:
    """``-v`` / ``-q`` / ``--debug`` after a command's name too (``ntrans run x.toml -q``),
    doing what they do before it."""
    for deco in reversed(
        [
            click.option("-v", "--verbose", count=True, expose_value=False,
                         callback=_verbosity_callback, help=VERBOSE_HELP),
            click.option("-q", "--quiet", is_flag=True, expose_value=False,
                         callback=_verbosity_callback, help=QUIET_HELP),
            click.option("--debug", is_flag=True, expose_value=False,
                         callback=_verbosity_callback, help=DEBUG_HELP),
        ]
    ):
        func = deco(func)
    return func
