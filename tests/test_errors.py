"""Tests of ntrans.errors: the job's warnings reach a collector whatever the process's
warning filters hold."""

from __future__ import annotations

import warnings

import pytest

from ntrans.errors import DryWetMismatchWarning, NtransWarning, collect_warnings, warn


def test_collected_warnings_do_not_depend_on_the_filters():
    # another thread's warnings.catch_warnings() can leave "ignore everything" behind
    # (it is not thread-safe); the collector still gets every ntrans warning, in order
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with collect_warnings() as outer:
            warn("first", DryWetMismatchWarning)
            with collect_warnings() as inner:
                warn("second", NtransWarning)
            warn("third", NtransWarning)
    assert [m for _, m in outer] == ["first", "second", "third"]
    assert inner == [(NtransWarning, "second")]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        warn("after", NtransWarning)  # nothing collects once closed
    assert len(outer) == 3 and len(inner) == 1


def test_warn_also_goes_through_python_warnings():
    with pytest.warns(DryWetMismatchWarning, match="wet in one family"):
        warn("12 face-stages are wet in one family and dry in the other",
             DryWetMismatchWarning)
