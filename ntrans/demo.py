"""The demo: the whole job on the invented river scenario in ``data_demo/``.

``data_demo/`` (beside the ``ntrans`` package in a source checkout) holds a made-up
river reach: a DEM, mesh cells, land-cover polygons with an n table, a water-surface
raster, and ``project.toml`` (flat cells -> subgrid terrain with a lumped hydraulic
radius, land-cover classes, eight depths from 0.25 to 3 m).  When the data files are absent but
``data_demo/make_demo.py`` is there, they are generated into a temporary folder first.
"""

from __future__ import annotations

import importlib.util
import logging
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

from .errors import InputFileError

logger = logging.getLogger(__name__)

DEMO_FILES: tuple[str, ...] = ("dem.tif", "cells.gpkg", "landcover.gpkg", "n_table.csv")
DEFAULT_OUT = "demo-out"


def demo_folder() -> Path:
    """The ``data_demo`` folder of the source checkout this package was imported from."""
    return Path(__file__).resolve().parent.parent / "data_demo"


def _generate(source: Path, into: Path) -> None:
    script = source / "make_demo.py"
    if not script.is_file():
        raise InputFileError(
            f"the demo data are not in {str(source)!r} and make_demo.py is missing; "
            "run the demo from a source checkout of ntrans"
        )
    spec = importlib.util.spec_from_file_location("_ntrans_make_demo", script)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    logger.info("generating the demo data into %s", into)
    module.build(into)


def run_demo_result(
    out: str | os.PathLike[str] | None = None, *, overwrite: bool = True, progress: bool = False
) -> Any:
    """Run the demo project into ``out`` (default ``./demo-out``); return the RunResult."""
    from .project import run_project

    source = demo_folder()
    project = source / "project.toml"
    if not project.is_file():
        raise InputFileError(
            f"the demo project {str(project)!r} is missing; run the demo from a source checkout"
        )
    target = Path(out if out is not None else DEFAULT_OUT)
    if all((source / name).is_file() for name in DEMO_FILES):
        return run_project(project, out=target, overwrite=overwrite, progress=progress)
    with tempfile.TemporaryDirectory(prefix="ntrans-demo-") as tmp:
        _generate(source, Path(tmp))
        shutil.copyfile(project, Path(tmp) / "project.toml")
        return run_project(Path(tmp) / "project.toml", out=target, overwrite=overwrite,
                           progress=progress)


def run_demo(
    out: str | os.PathLike[str] | None = None, *, overwrite: bool = True, progress: bool = False
) -> Path:
    """Run the whole job on the demo scenario into a fresh folder; return the report path.

    Parameters
    ----------
    out
        Bundle folder (default ``./demo-out``), replaced when ``overwrite`` and it is an
        earlier ntrans output (a folder of other files never is).
    overwrite
        Replace an existing folder.
    progress
        Show progress bars on stderr.

    >>> report = run_demo("demo-out")  # doctest: +SKIP
    """
    return run_demo_result(out, overwrite=overwrite, progress=progress).report
