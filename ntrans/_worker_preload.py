"""Loaded once by the process that forks local Dask workers (``forkserver``).

Every worker forked from it starts with the libraries and the tile code imported, instead
of importing them itself, and with the allocator set to reuse freed arrays
(:func:`ntrans.memory.keep_freed_memory`; a fork inherits the setting).  Added to Dask's
own preload list by :func:`ntrans.cluster._preload_forkserver`.
"""

from __future__ import annotations

import distributed  # noqa: F401

from . import _kernels, engine, mesh  # noqa: F401  (the tile and face-block code)
from .memory import keep_freed_memory

keep_freed_memory()
