"""JSON output: no NaN ever reaches a report, numpy values become JSON numbers.

Reference: RFC 8259 (JSON) §6, numbers have no NaN or infinity; Python's json module, whose
allow_nan=False rejects them, is the parser checked against.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from iqstat.report.jsonio import dumps_line, json_safe

CASES = [
    {"a": 1.5, "b": [1, 2.0, None, "x"], "c": (0.1, 0.2), "d": {"e": True}},
    {"ebn0_db": float("nan"), "ci": [float("-inf"), 3.0], "ok": 1.0},
    {"n": np.int64(3), "f": np.float32(0.25), "g": np.float64(1e-300), "b": np.bool_(True)},
    {"msg": "NaN in a message is text, not a number", "v": 2.0},
    {"nested": [{"x": [float("inf")]}, {"y": np.arange(3)}]},
    {1: "int key", "s": "Infinity"},
]


@pytest.mark.parametrize("obj", CASES)
def test_fast_line_equals_the_safe_path(obj):
    text = dumps_line(obj)
    assert text == json.dumps(json_safe(obj), allow_nan=False)
    back = json.loads(text, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert isinstance(back, dict)


def test_non_finite_numbers_become_null():
    back = json.loads(dumps_line({"a": math.nan, "b": [math.inf, -math.inf]}))
    assert back == {"a": None, "b": [None, None]}
