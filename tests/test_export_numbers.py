"""The number texts of the exports: the shortest text that reads back exactly.

:class:`fitting.export._NumberText` makes each array's texts once per fit and fills
in the marker of a value that is not finite by index. The references here are
independent of it: :func:`repr` of each Python float (Python's float repr is the
shortest string that round-trips, David Gay's algorithm; see the Python docs,
"Floating-Point Arithmetic: Issues and Limitations") and :func:`json.dumps` of the
same list with None for NaN/inf, which is what RFC 8259 allows. No physics here.
"""

import json
import math

import numpy as np
import pytest

from fitting import export


def _awkward(rng, n=600):
    """Random doubles of every size and sign, with the values formatting gets wrong
    most easily: subnormals, signed zeros, exact powers of ten and two, the largest
    double, integers past 2**53, NaN and both infinities."""
    bits = rng.integers(0, 2**63, n, dtype=np.uint64) | (
        rng.integers(0, 2, n, dtype=np.uint64) << np.uint64(63))
    a = bits.view(np.float64).copy()
    special = [0.0, -0.0, 5e-324, -5e-324, 2.2250738585072014e-308, 1e22, 1e16, 1e15,
               9007199254740993.0, 1.7976931348623157e308, 0.1, 1e-5, 1e-4, 123.0,
               2.0**-1074, 2.0**52, math.nan, math.inf, -math.inf, -math.nan]
    a[: len(special)] = special
    rng.shuffle(a)
    return a


def _reference_cells(values, missing):
    return [repr(x) if math.isfinite(x) else missing for x in np.asarray(values).tolist()]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_csv_and_json_cells_equal_repr_and_json_dumps(seed):
    a = _awkward(np.random.default_rng(seed))
    assert np.isnan(a).any() and np.isinf(a).any() and (a == 0).any()
    numbers = export._NumberText()
    assert numbers.csv_column(a) == _reference_cells(a, "nan")
    assert numbers.texts(a, "null") == _reference_cells(a, "null")
    # JSON run: the stand-in filled in is json.dumps of the same list (None for NaN/inf).
    text = numbers.fill(json.dumps({"v": numbers.json_run(a)}, ensure_ascii=False))
    want = json.dumps({"v": [x if math.isfinite(x) else None for x in a.tolist()]})
    assert text == want
    for cell in numbers.csv_column(a):        # every cell reads back to its double
        assert cell == "nan" or repr(float(cell)) == cell


def test_signed_zero_and_equal_arrays_keep_their_own_texts():
    numbers = export._NumberText()
    assert numbers.csv_column(np.array([0.0, 1.5])) == ["0.0", "1.5"]
    assert numbers.csv_column(np.array([-0.0, 1.5])) == ["-0.0", "1.5"]
    # The cache hands the same cells to the next file of the fit.
    a = np.linspace(300.0, 1100.0, 9)
    assert numbers.csv_column(a) is numbers.csv_column(a.copy())


@pytest.mark.parametrize("values", [np.full(50, np.nan), np.array([np.inf, -np.inf, np.nan]),
                                    np.array([]), np.array([np.nan, 2.5, np.nan]),
                                    np.array([1.0, np.nan]), np.arange(20.0)])
def test_columns_never_estimated_or_partly_missing(values):
    numbers = export._NumberText()
    for missing in ("nan", "null", "nan"):     # the second "nan" comes from the cache
        assert numbers.texts(values, missing) == _reference_cells(values, missing)


def test_csv_text_equals_a_plain_row_by_row_writer():
    rng = np.random.default_rng(5)
    data = np.column_stack([np.linspace(300.0, 1100.0, 40), rng.normal(size=40),
                            np.full(40, np.nan), rng.random(40) * 1e-300,
                            np.where(rng.random(40) < 0.3, np.nan, rng.random(40))])
    header = ["# software: pellucid", "# created: 2026-01-01T00:00:00+00:00"]
    names = ("a", "b", "c", "d", "e")
    want = "\n".join([*header, ",".join(names)] + [
        ",".join(repr(v) if math.isfinite(v) else "nan" for v in row)
        for row in data.tolist()]) + "\n"
    assert export._csv_text(names, data, header) == want
