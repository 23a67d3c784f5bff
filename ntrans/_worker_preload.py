"""Loaded once by the process that forks local Dask workers (``forkserver``).

Every worker forked from it starts with the libraries and the tile code imported, instead
of importing them itself.  Added to Dask's own preload list by
:func:`ntrans.cluster._preload_forkserver`.
"""

from __future__ import annotations

import distributed  # noqa: F401

from . import _kernels, engine, mesh  # noqa: F401  (the tile and face-block code)
