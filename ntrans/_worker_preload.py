"""Loaded once by the process that forks local Dask workers (``forkserver``).

Every worker forked from it starts with the libraries imported and the compiled kernels
loaded, instead of paying for both itself (about a second of CPU per worker).  Added to
Dask's own preload list by :func:`ntrans.cluster._preload_forkserver`.
"""

from __future__ import annotations

import distributed  # noqa: F401

from . import engine, mesh  # noqa: F401  (the tile and face-block code; not the job's)
from ._kernels import warm_up

warm_up()
