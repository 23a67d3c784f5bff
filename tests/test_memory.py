"""Tests of ntrans.memory: returning freed heap memory to the OS."""

from __future__ import annotations

import contextlib
import platform

import numpy as np
import pytest

from ntrans.memory import release_free_memory


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="malloc_trim is glibc's")
def test_release_free_memory_trims_on_glibc():
    blocks = [np.ones(1000) for _ in range(1000)]  # many small heap blocks, then freed
    del blocks
    assert release_free_memory() is True
    assert release_free_memory() is True  # repeatable at any time


@pytest.mark.skipif(platform.libc_ver()[0] == "glibc", reason="the no-op path")
def test_release_free_memory_is_a_no_op_elsewhere(monkeypatch):
    import sys

    monkeypatch.delitem(sys.modules, "pyarrow", raising=False)
    assert release_free_memory() is False


def test_release_free_memory_empties_arrows_pool_when_arrow_is_loaded(monkeypatch):
    # pyarrow's pool (mimalloc / jemalloc) keeps freed Parquet buffers: after the run's
    # table reads it held about 340 MB at 10^8 pixels
    import sys
    import types

    import ntrans.memory as memory

    released = []
    pool = types.SimpleNamespace(release_unused=lambda: released.append(True))
    fake = types.SimpleNamespace(default_memory_pool=lambda: pool)
    monkeypatch.setitem(sys.modules, "pyarrow", fake)
    monkeypatch.setattr(memory, "_libc", lambda: None)
    assert release_free_memory() is True
    assert released == [True]


_CYCLES = """
import resource, sys
import numpy as np
from ntrans.memory import keep_freed_memory
if sys.argv[1] == "keep":
    assert keep_freed_memory() is True
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(20):  # what tiles do: several arrays of a few MB, used, then freed
    arrays = [np.ones(1 << 20) for _ in range(4)]  # 4 x 8 MB
    del arrays
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="mallopt is glibc's")
def test_keep_freed_memory_stops_refaulting_freed_arrays():
    """Page faults counted by the kernel (getrusage): reused blocks do not fault again."""
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}

    def faults(mode: str) -> int:
        out = subprocess.run([sys.executable, "-c", _CYCLES, mode], env=env, check=True,
                             capture_output=True, text=True).stdout
        return int(out.split()[-1])

    default, kept = faults("default"), faults("keep")
    # default glibc returns the 32 MB freed each cycle and faults it in again (20 cycles);
    # kept, only the first cycle faults: a factor of about 20, asserted with room
    assert kept * 4 < default


def test_keep_freed_memory_leaves_an_environment_setting_alone(monkeypatch):
    from ntrans import memory

    monkeypatch.setenv("MALLOC_TRIM_THRESHOLD_", "131072")
    memory.keep_freed_memory.cache_clear()
    try:
        assert memory.keep_freed_memory() is False
    finally:
        memory.keep_freed_memory.cache_clear()


@pytest.mark.parametrize("enabled_before", [True, False])
@pytest.mark.parametrize("fail", [False, True])
def test_collection_paused_restores_the_collector(enabled_before, fail):
    """Off inside the block, back to its earlier state after it, also after an error."""
    import gc

    from ntrans.memory import collection_paused

    was = gc.isenabled()
    try:
        (gc.enable if enabled_before else gc.disable)()
        with contextlib.suppress(RuntimeError), collection_paused():
            assert not gc.isenabled()
            if fail:
                raise RuntimeError("inside")
        assert gc.isenabled() is enabled_before
    finally:
        (gc.enable if was else gc.disable)()


def test_mesh_job_runs_without_collections(tmp_path, builders):
    """Reading 3,600 cells and building their faces: over 100 collections unpaused (about
    113 here), at most one paused (the collector may run once as it is switched back on,
    inside the call); collection is on again afterwards."""
    import gc

    from ntrans.tables import prepare_mesh_job

    dem = builders.write_dem(tmp_path / "dem.tif", builders.tilted_plane(120, 120))
    cells = builders.write_cells(tmp_path / "cells.gpkg", builders.grid_polygons(60, 60, 2.0))
    options = dict(id_field=None, vertical_units=None, elevation_rule="mean",
                   elevation_field=None, face_spacing=None, snap_tolerance=None, tile_size=64)
    seen: list[int] = []

    def watch(phase, info):
        if phase == "start":
            seen.append(info["generation"])

    gc.callbacks.append(watch)
    try:
        paused = prepare_mesh_job(dem, cells, **options)
        n_paused = len(seen)
        prepare_mesh_job.__wrapped__(dem, cells, **options)  # the same work, unpaused
    finally:
        gc.callbacks.remove(watch)
    assert paused.mesh.n_faces > 7000
    assert n_paused <= 1
    assert len(seen) - n_paused > 20
    assert gc.isenabled()
