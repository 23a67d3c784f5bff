"""Memory between the phases of a job: give freed memory back, tell what is available.

Reading a mesh and building its faces create and free millions of small geometry
objects; the C allocator keeps the freed space in the process, where it counts towards
resident memory while the next phase allocates its large arrays elsewhere.  On glibc
``malloc_trim`` returns it; elsewhere this is a no-op.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools
import logging

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
    """Return freed heap memory to the OS (glibc); True if anything could be done."""
    libc = _libc()
    if libc is None:
        return False
    libc.malloc_trim(0)
    return True


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
