"""The run-option checker: one error type naming the option, the value and the range."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from caredecide.errors import ModelError, RunOptionError
from caredecide.options import check_choice, check_scalar


def test_whole_number_accepted_and_returned_as_int():
    assert check_scalar(np.int64(5), "chunk_size", int, min_val=1) == 5
    assert type(check_scalar(np.int64(5), "chunk_size", int, min_val=1)) is int


def test_float_option_accepts_int_and_returns_float():
    value = check_scalar(2, "tolerance", float, min_val=0.0, include_boundaries="neither")
    assert value == 2.0 and type(value) is float


@pytest.mark.parametrize(
    ("value", "target", "kwargs", "message"),
    [
        (
            True,
            int,
            {"min_val": 1},
            "max_iterations = True is not allowed; expected a whole number >= 1",
        ),
        (
            2.5,
            int,
            {"min_val": 1},
            "max_iterations = 2.5 is not allowed; expected a whole number >= 1",
        ),
        (0, int, {"min_val": 1}, "max_iterations = 0 is not allowed; expected a whole number >= 1"),
        ("7", int, {"min_val": 1}, "max_iterations = '7' is not allowed"),
        (
            0.0,
            float,
            {"min_val": 0.0, "include_boundaries": "neither"},
            "expected a finite number > 0$",
        ),
        (float("nan"), float, {}, "max_iterations = nan is not allowed; expected a finite number$"),
        (
            float("inf"),
            float,
            {"min_val": 0.0},
            "= inf is not allowed; expected a finite number >= 0",
        ),
        (11, int, {"min_val": 1, "max_val": 10}, r"expected a whole number in \[1, 10\]$"),
        (10, int, {"min_val": 1, "max_val": 10, "include_boundaries": "left"}, r"in \[1, 10\)$"),
        (None, int, {"min_val": 1}, "max_iterations = None is not allowed"),
    ],
)
def test_each_refusal_names_option_value_and_range(value, target, kwargs, message):
    with pytest.raises(RunOptionError, match=message) as info:
        check_scalar(value, "max_iterations", target, **kwargs)
    assert info.value.name == "max_iterations"
    assert not isinstance(info.value, ModelError)  # the model file is not at fault


def test_none_allowed_when_asked():
    assert check_scalar(None, "chunk_size", int, min_val=1, allow_none=True) is None
    with pytest.raises(RunOptionError, match=r"expected a whole number >= 1 \(or None"):
        check_scalar(0, "chunk_size", int, min_val=1, allow_none=True)


def test_choice():
    assert check_choice("serial", "map", ("serial", "dask")) == "serial"
    with pytest.raises(
        RunOptionError, match="map = 'threads' is not allowed; expected one of 'serial', 'dask'"
    ):
        check_choice("threads", "map", ("serial", "dask"))


@given(st.integers(min_value=-1000, max_value=1000), st.integers(min_value=-50, max_value=50))
def test_integer_range_property(value, low):
    # Accepted exactly when value >= low (a closed lower bound): common practice.
    if value >= low:
        assert check_scalar(value, "n", int, min_val=low) == value
    else:
        with pytest.raises(RunOptionError):
            check_scalar(value, "n", int, min_val=low)
