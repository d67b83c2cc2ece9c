"""Checks at the public boundary: conversions and the messages that name the fix."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from hiddenlens._core.validation import (
    as_dtype,
    as_float_tensor,
    as_sequences,
    check_finite,
    describe,
)


@pytest.mark.parametrize("given, expected", [
    ("float32", torch.float32), ("float64", torch.float64), (torch.float64, torch.float64),
    (np.float32, torch.float32), (np.dtype("float64"), torch.float64), ("double", torch.float64),
])
def test_as_dtype(given, expected):
    assert as_dtype(given) is expected


@pytest.mark.parametrize("given", ["float16", torch.bfloat16, torch.int32, "cheese", None])
def test_as_dtype_refuses(given):
    with pytest.raises(ValueError, match=r"dtype must be float32 or float64, got .*; pass "
                                         r"dtype=torch\.float64"):
        as_dtype(given)


def test_as_float_tensor_copies_and_converts():
    a = np.arange(6, dtype=np.float64).reshape(2, 3)
    t = as_float_tensor(a, "x", torch.float32)
    assert t.dtype == torch.float32 and t.device.type == "cpu"
    t[0, 0] = 99
    assert a[0, 0] == 0  # a copy, never a view of the caller's data
    src = torch.ones(2, requires_grad=True)
    out = as_float_tensor(src, "x", torch.float64)
    assert not out.requires_grad and out.dtype == torch.float64
    out[0] = 5
    assert src[0].item() == 1
    # byte orders and widths torch cannot read directly
    np.testing.assert_array_equal(as_float_tensor(np.ones(3, ">f4"), "x", torch.float32), 1)
    np.testing.assert_array_equal(as_float_tensor(np.ones(3, np.float16), "x", torch.float32), 1)
    np.testing.assert_array_equal(as_float_tensor(np.ones((3, 2))[:, 0], "x", torch.float32), 1)


def test_as_float_tensor_refuses():
    with pytest.raises(TypeError, match=r"x must hold floating-point numbers, got a numpy array "
                                        r"of dtype int32; convert it explicitly, e\.g\. "
                                        r"x\.astype\(np\.float32\)"):
        as_float_tensor(np.zeros(3, np.int32), "x", torch.float32)
    with pytest.raises(TypeError, match=r"got a tensor of dtype torch\.int64.*x\.float\(\)"):
        as_float_tensor(torch.zeros(3, dtype=torch.int64), "x", torch.float32)
    with pytest.raises(TypeError, match=r"x must be a torch tensor or a numpy array, got float"):
        as_float_tensor(1.0, "x", torch.float32)
    with pytest.raises(ValueError, match="x is on the 'meta' device and holds no data"):
        as_float_tensor(torch.zeros(3, device="meta"), "x", torch.float32)


def test_check_finite_names_the_first_bad_index():
    t = torch.zeros(2, 3, 4)
    check_finite(t, "t")
    t[1, 2, 0] = -float("inf")
    t[1, 2, 3] = float("nan")
    with pytest.raises(ValueError, match=r"t contains NaN or Inf \(first at index \(1, 2, 0\)\); "
                                         r"clean or mask the data"):
        check_finite(t, "t")


def test_as_sequences():
    assert as_sequences(np.zeros((4, 2), np.float32), 2, torch.float32).shape == (1, 4, 2)
    assert as_sequences(np.zeros((3, 4, 0)), 0, torch.float64).shape == (3, 4, 0)
    with pytest.raises(ValueError, match=r"u has 3 features but the map expects 2; pass u of "
                                         r"shape \(B, T, 2\)"):
        as_sequences(np.zeros((1, 4, 3)), 2, torch.float32, name="u", what="the map")
    with pytest.raises(ValueError, match=r"inputs must have shape \(B, T, 2\) or \(T, 2\) "
                                         r"\(batch first\), got tensor of shape \(5,\)"):
        as_sequences(torch.zeros(5), 2, torch.float32)


def test_describe():
    assert describe(np.zeros((2, 3), np.int8)) == "array of shape (2, 3) and dtype int8"
    assert describe(torch.zeros(1)) == "tensor of shape (1,) and dtype float32"
    assert describe([1]) == "list"
