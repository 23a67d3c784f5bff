"""Tests of ntrans.memory: returning freed heap memory to the OS."""

from __future__ import annotations

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
def test_release_free_memory_is_a_no_op_elsewhere():
    assert release_free_memory() is False
