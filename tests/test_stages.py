"""Stage and depth specifications (ntrans.stages)."""

import numpy as np
import pytest

from ntrans.errors import InputError, StageSpecError
from ntrans.stages import StageSpec, parse_spec


@pytest.mark.parametrize(
    ("spec", "expected"),
    [
        ("10:12:0.5", [10.0, 10.5, 11.0, 11.5, 12.0]),  # stop on the grid is included
        ("10:11.9:0.5", [10.0, 10.5, 11.0, 11.5]),  # stop off the grid is not
        ("0:0.3:0.1", [0.0, 0.1, 0.2, 0.3]),  # 0.3/0.1 = 2.9999999999999996 in floats: still included
        ("3,1,2", [1.0, 2.0, 3.0]),  # lists are sorted
        ("1, 1, 2", [1.0, 2.0]),  # and made unique
        ("-2.5", [-2.5]),
        (4.0, [4.0]),
        ([2, 1], [1.0, 2.0]),
    ],
)
def test_parse_spec(spec, expected):
    # float tolerance: values built as start + k*step differ from decimal literals by round-off only
    np.testing.assert_allclose(parse_spec(spec), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize(
    "spec", ["", "1:2", "1:2:0", "1:2:-1", "2:1:0.5", "a:b:c", "1,x", "nan", "0:1e9:1e-3"]
)
def test_parse_spec_rejects(spec):
    with pytest.raises(StageSpecError):
        parse_spec(spec)


@pytest.mark.parametrize(
    ("options", "first_words"),
    [({"depths": "3:1:1"}, "depth range '3:1:1'"), ({"stages": "3:1:1"}, "stage range '3:1:1'"),
     ({"depths": "1,x"}, "depth list '1,x'"), ({"stages": ""}, "the stage specification")],
)
def test_errors_name_depths_or_stages_as_given(options, first_words):
    with pytest.raises(StageSpecError) as caught:
        StageSpec.from_options(**options)
    assert str(caught.value).startswith(first_words)


def test_stage_spec_errors_are_value_errors():
    # one hierarchy: a stage error is an InputError and a builtin ValueError
    with pytest.raises(ValueError):
        parse_spec("oops")
    assert issubclass(StageSpecError, InputError)


def test_from_options_needs_exactly_one():
    with pytest.raises(StageSpecError):
        StageSpec.from_options()
    with pytest.raises(StageSpecError):
        StageSpec.from_options(stages="1:2:1", depths="1:2:1")
    with pytest.raises(StageSpecError):
        StageSpec.from_options(depths="-1,1")


def test_for_items_absolute_and_depth():
    low = np.array([10.0, 12.5, np.nan])
    absolute = StageSpec.from_options(stages="11,13").for_items(low)
    np.testing.assert_array_equal(absolute, [[11, 13], [11, 13], [11, 13]])
    depth = StageSpec.from_options(depths="0.5,1").for_items(low)
    np.testing.assert_array_equal(depth[:2], [[10.5, 11.0], [13.0, 13.5]])
    assert np.isnan(depth[2]).all()  # no terrain, no stage: never a fake elevation
