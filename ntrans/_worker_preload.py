"""Loaded once by the process that forks local Dask workers (``forkserver``).

Every worker forked from it starts with the libraries imported and the compiled kernels
loaded, instead of paying for both itself (about 2.5 s of CPU per worker).
"""

from __future__ import annotations

import distributed  # noqa: F401

from . import engine, tables  # noqa: F401
from ._kernels import warm_up

warm_up()
