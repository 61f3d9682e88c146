"""The one JSON cleaner (fitting/jsonsafe.py): strict JSON from results.

The rule checked is RFC 8259, section 6: "Numeric values that cannot be represented in
the grammar below (such as Infinity and NaN) are not permitted", so every writer turns
them into null and dumps with ``allow_nan=False``.
"""

import enum
import json
import math
from collections import OrderedDict
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitting.jsonsafe import finite_or_none, is_plain_json, json_safe


def strict(obj) -> str:
    return json.dumps(obj, allow_nan=False)     # raises on NaN/inf and on numpy types


def test_non_finite_numbers_become_null_at_any_depth():
    doc = {"a": math.nan, "b": [1.0, math.inf, (-math.inf, 2)], "c": {"d": np.float64("nan")}}
    assert json_safe(doc) == {"a": None, "b": [1.0, None, [None, 2]], "c": {"d": None}}
    strict(json_safe(doc))


def test_numpy_scalars_become_python_numbers_of_the_same_kind():
    out = json_safe([np.float32(0.5), np.int64(7), np.bool_(True), np.uint8(3)])
    assert out == [0.5, 7, True, 3]
    assert [type(x) for x in out] == [float, int, bool, int]


def test_arrays_long_and_short_with_and_without_gaps():
    long = np.linspace(1.0, 2.0, 20)
    long[3] = np.nan
    out = json_safe({"long": long, "short": np.array([1.0, np.inf]),
                     "ints": np.arange(12), "grid": np.eye(2), "mask": np.array([True, False])})
    assert out["long"][3] is None and out["long"][:3] == long[:3].tolist()
    assert out["long"][4:] == long[4:].tolist()
    assert out["short"] == [1.0, None]
    assert out["ints"] == list(range(12)) and type(out["ints"][0]) is int
    assert out["grid"] == [[1.0, 0.0], [0.0, 1.0]]
    assert out["mask"] == [True, False]
    strict(out)


def test_long_python_float_list_keeps_its_texts_and_nones():
    mixed = [1.0] * 9 + ["n/a", None]          # vectorised path must not coerce the text
    assert json_safe(mixed) == [1.0] * 9 + ["n/a", None]
    gaps = [0.5] * 9 + [math.nan]
    assert json_safe(gaps) == [0.5] * 9 + [None]
    kinds = [0.0] * 9 + [0, True, "2"]          # found by the property test below
    assert [type(x) for x in json_safe(kinds)[-3:]] == [int, bool, str]


def test_keys_become_text_and_mappings_plain_dicts():
    out = json_safe(OrderedDict([(1, "x"), (2.5, [])]))
    assert out == {"1": "x", "2.5": []} and type(out) is dict


def test_other_objects_as_number_or_text():
    class Color(str, enum.Enum):    # noqa: UP042 (the mix-in, whose str() is not its text)
        RED = "red"

    assert json_safe(Path("a") / "b.csv") == str(Path("a") / "b.csv")
    assert json_safe(Color.RED) == "red" and strict(json_safe(Color.RED)) == '"red"'
    assert json_safe(complex(1, 2)) == "(1+2j)"

    class Level:
        def __float__(self):
            return math.inf

    assert json_safe(Level()) is None


# A loaded machine (CI shares its cores) can make drawing nested data look slow.
@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.recursive(st.floats() | st.integers() | st.text() | st.none() | st.booleans(),
                    lambda inner: st.lists(inner, max_size=12)
                    | st.dictionaries(st.text(max_size=4), inner, max_size=4), max_leaves=30))
def test_any_nested_data_becomes_strict_json_with_finite_values_kept(data):
    clean = json_safe(data)
    assert json.loads(strict(clean)) == clean

    def same(a, b):
        if isinstance(a, float) and not math.isfinite(a):
            return b is None
        if isinstance(a, list):
            return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
        if isinstance(a, dict):
            return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
        return a == b and type(a) is type(b)

    assert same(data, clean)


def test_finite_or_none():
    assert finite_or_none(None) is None
    assert finite_or_none(math.nan) is None and finite_or_none(-math.inf) is None
    assert finite_or_none("1.5") == 1.5 and finite_or_none("film") is None
    assert finite_or_none(np.float32(2.0)) == 2.0 and type(finite_or_none(np.int64(3))) is float
    assert finite_or_none(object()) is None


def test_is_plain_json():
    assert all(is_plain_json(v) for v in ("x", 1, 1.5, True, [1], {"a": 1}, None))
    assert not any(is_plain_json(v) for v in (np.arange(3), Path("x"), (1, 2), object()))


def test_runs_of_numbers_go_to_the_writer_unchanged():
    seen = []

    def runs(a):
        seen.append(a.copy())
        return f"run{len(seen)}"

    floats = [0.5 * i for i in range(12)]
    data = {"x": floats, "y": np.arange(10.0), "ints": list(range(12)), "short": [1.0, 2.0],
            "mixed": [*floats, 1], "nested": [{"z": tuple(floats)}], "bool": np.ones(9, bool)}
    clean = json_safe(data, runs=runs)
    assert clean == {"x": "run1", "y": "run2", "ints": list(range(12)), "short": [1.0, 2.0],
                     "mixed": [*floats, 1], "nested": [{"z": "run3"}], "bool": [True] * 9}
    np.testing.assert_array_equal(seen[0], floats)
    np.testing.assert_array_equal(seen[1], np.arange(10.0))
    assert all(a.dtype == float and a.ndim == 1 for a in seen)
    assert json_safe(data) == json_safe(data, runs=None)     # without a writer: lists
