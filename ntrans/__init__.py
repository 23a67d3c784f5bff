"""ntrans: carry Manning's n between flat-cell and subgrid-terrain 2-D flood models.

The public API (each command of the ``ntrans`` command line is one of these):

- :func:`build_tables` -- cell and face stage tables (``ntrans tables``)
- :func:`adjust_roughness` -- equivalent n per roughness class (``ntrans adjust``)
- :func:`run_project` -- the whole job from a project file (``ntrans run``)
- :func:`verify_bundle` -- check a handover bundle (``ntrans verify``)

Adjusted n values are a starting point for calibration, not a substitute for it; a
qualified engineer must review them; local codes, agency guidance and licensed practice
take precedence.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

_LAZY = {
    "build_tables": "ntrans.tables",
    "adjust_roughness": "ntrans.adjust",
    "run_project": "ntrans.project",
    "write_project_template": "ntrans.project",
    "verify_bundle": "ntrans.bundle",
    "run_demo": "ntrans.demo",
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'ntrans' has no attribute {name!r}")
