"""Specification limits (fitting/limits.py): one rule for the batch summary, report and plots.

Limits are inclusive at both ends and a value the fit did not give is "n/a", never a
pass (common practice for specification limits in production control).
"""

import math

import numpy as np
import pytest

from fitting.errors import RecipeError
from fitting.limits import Limit, overall_state
from fitting.recipe import Limit as RecipeLimit


def test_limit_check():
    assert Limit(target=500, tol=25).check(524.9) == "pass"
    assert Limit(target=500, tol=25).check(475.0) == "pass"
    assert Limit(target=500, tol=25).check(526) == "fail"
    assert Limit(min=1.9).check(1.85) == "fail"
    assert Limit(max=5).check(float("nan")) == "n/a"
    assert Limit(max=5).check(None) == "n/a"


@pytest.mark.parametrize("value,expect", [
    (475.0, True), (525.0, True), (474.999, False), (525.001, False), (np.float32(500), True),
    ("510", True), (None, None), ("film", None), (math.inf, None), (math.nan, None)])
def test_passes_is_inclusive_and_none_without_a_finite_value(value, expect):
    assert Limit(target=500, tol=25).passes(value) is expect
    assert Limit(min=475, max=525).passes(value) is expect


def test_open_ends():
    assert Limit(min=1.9).passes(1e300) is True and Limit(max=5).passes(-1e300) is True
    assert Limit().passes(3.0) is True and Limit().bounds == (-math.inf, math.inf)
    assert Limit().describe() == "any value"
    assert [Limit(target=500, tol=25).describe(), Limit(min=1.9, max=2.1).describe(),
            Limit(min=1.9).describe(), Limit(max=5).describe()] == \
        ["500 ± 25", "1.9 to 2.1", ">= 1.9", "<= 5"]


def test_strict_from_dict_for_recipes_round_trips():
    for d in ({"target": 500.0, "tol": 25.0}, {"min": 1.9, "max": 2.1}, {"max": 5.0}):
        assert Limit.from_dict(d).to_dict() == d
    with pytest.raises(RecipeError, match=r"limits\.q\.tol"):
        Limit.from_dict({"target": 500, "tol": 0}, where="limits.q")
    with pytest.raises(RecipeError, match="not both"):
        Limit.from_dict({"target": 500, "tol": 5, "max": 600})
    with pytest.raises(RecipeError, match="finite number"):
        Limit.from_dict({"min": float("nan")})


def test_lenient_coerce_for_plots_and_reports():
    lim = Limit(max=3.0)
    assert Limit.coerce(lim) is lim
    assert Limit.coerce({"target": "500", "tol": -25}).bounds == (475.0, 525.0)
    assert Limit.coerce({"min": 1, "max": "open"}) == Limit(min=1.0)
    assert Limit.coerce({"target": 500, "tol": float("nan")}) == Limit()   # no usable limit
    assert Limit.coerce(None) == Limit()


def test_overall_state_fail_beats_not_judged_beats_pass():
    assert overall_state(["pass", "n/a", "fail"]) == "fail"
    assert overall_state(["pass", "n/a"]) == "n/a"
    assert overall_state(["pass", "pass"]) == "pass"
    assert overall_state(iter(["pass"])) == "pass"


def test_recipe_module_hands_out_the_same_class():
    assert RecipeLimit is Limit
