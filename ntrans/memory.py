"""Memory between the phases of a job: give freed memory back, reuse it within a phase,
tell what is available.

Reading a mesh and building its faces create and free millions of small geometry
objects; the C allocator keeps the freed space in the process, where it counts towards
resident memory while the next phase allocates its large arrays elsewhere.  On glibc
``malloc_trim`` returns it; elsewhere this is a no-op.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import functools
import gc
import logging
import os
from collections.abc import Iterator

log = logging.getLogger(__name__)


@functools.lru_cache(maxsize=1)
def _libc():
    try:  # the C library this process runs on (no search: find_library runs ldconfig)
        libc = ctypes.CDLL(None)
        libc.malloc_trim  # noqa: B018  (glibc only)
        return libc
    except (OSError, AttributeError, TypeError):
        pass
    name = ctypes.util.find_library("c")
    if name is None:
        return None
    try:
        libc = ctypes.CDLL(name)
        libc.malloc_trim  # noqa: B018  (glibc only)
    except (OSError, AttributeError):
        return None
    return libc


def release_free_memory() -> bool:
    """Return freed heap memory to the OS: glibc's heap and, when pyarrow is loaded, its
    own memory pool (mimalloc or jemalloc, which keep freed Parquet buffers); True if
    anything could be done."""
    import sys

    done = False
    arrow = sys.modules.get("pyarrow")
    if arrow is not None:
        arrow.default_memory_pool().release_unused()
        done = True
    libc = _libc()
    if libc is not None:
        libc.malloc_trim(0)
        done = True
    return done


#: glibc ``mallopt`` parameters
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
#: arrays up to this size come from the heap, where freed space is reused
HEAP_BLOCK_LIMIT = 32 << 20
#: freed heap space kept for reuse instead of being returned to the OS at once
KEEP_FREED = 128 << 20


@functools.lru_cache(maxsize=1)
def keep_freed_memory() -> bool:
    """Let the allocator reuse freed arrays up to 32 MB instead of returning them (glibc).

    Tiles allocate and free arrays of a few MB each, tile after tile.  By default glibc
    returns such blocks to the OS when they are freed, and every new array then
    page-faults its memory in again: on the 10^7-pixel benchmark case that was about 40 %
    of the page faults and 0.1-0.2 s of system time per run (peak resident memory +35 MB
    with the change).  This sets ``M_MMAP_THRESHOLD`` to 32 MB and ``M_TRIM_THRESHOLD``
    to 128 MB for the whole process, once; :func:`release_free_memory` still returns
    everything between phases.  Left alone when either is set in the environment
    (``MALLOC_MMAP_THRESHOLD_``, ``MALLOC_TRIM_THRESHOLD_``) and off glibc; returns
    True when set.
    """
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or "MALLOC_TRIM_THRESHOLD_" in os.environ:
        return False
    libc = _libc()
    if libc is None or not hasattr(libc, "mallopt"):
        return False
    ok = libc.mallopt(_M_MMAP_THRESHOLD, HEAP_BLOCK_LIMIT) == 1
    ok = libc.mallopt(_M_TRIM_THRESHOLD, KEEP_FREED) == 1 and ok
    log.debug("allocator keeps freed blocks up to %d MB for reuse: %s", HEAP_BLOCK_LIMIT >> 20, ok)
    return ok


@contextlib.contextmanager
def collection_paused() -> Iterator[None]:
    """Pause Python's cyclic garbage collector for the block (also as a decorator).

    Reading a mesh and building its faces create hundreds of thousands of geometry
    objects that all live on, and every full collection walks all of them: on the
    10^7-pixel benchmark case six full collections took 0.4-0.6 s while the faces were
    built.  Nothing is lost: whatever the phase leaves in reference cycles is collected
    once the collector is switched back on at the end (also after an error, and only if
    it was on before); the tiles run with it on.
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def available_memory() -> int | None:
    """Bytes the operating system can still give to programs (Linux ``MemAvailable``);
    None where this is not known."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None
