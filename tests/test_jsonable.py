"""jsonable: one way to turn mixed Python/numpy results into strict JSON values."""

from __future__ import annotations

import json
import math

import numpy as np

from ergodex.jsonable import jsonable


def test_numpy_values_become_plain_python_and_strict_json_accepts_them():
    rng = np.random.default_rng(1)
    a = rng.normal(size=(2, 3))
    value = {
        "f": np.float64(1.5),
        "i": np.int64(7),
        "b": np.bool_(True),
        "s": np.str_("x"),
        "arr": a,
        "zero_d": np.array(2.5),
        "nested": ({"t": (1, np.float32(0.25))},),
        3: "int key",
    }
    out = jsonable(value)
    # json.dumps with allow_nan=False is the strict-JSON reference (RFC 8259 has no NaN)
    text = json.dumps(out, allow_nan=False)
    assert json.loads(text) == out
    assert type(out["f"]) is float and out["f"] == 1.5
    assert type(out["i"]) is int and out["i"] == 7
    assert out["b"] is True
    assert type(out["s"]) is str
    assert out["arr"] == a.tolist()  # exact: tolist keeps every double
    assert out["zero_d"] == 2.5
    assert out["nested"] == [{"t": [1, 0.25]}]
    assert out["3"] == "int key"


def test_non_finite_numbers_become_null():
    value = [math.nan, math.inf, -math.inf, np.float64("nan"), np.array([1.0, np.inf]), 0.0]
    assert jsonable(value) == [None, None, None, None, [1.0, None], 0.0]


def test_plain_values_are_unchanged_and_input_is_not_modified():
    value = {"a": [1, "x", None, True, 2.0]}
    out = jsonable(value)
    assert out == value
    assert out is not value and out["a"] is not value["a"]
