"""FitResult read back from its JSON (fitting/result.py, FitResult.from_dict).

A saved project stores its result as ``FitResult.to_dict()``; reopening it must give
the same result, every record typed, so that the report, the verdict, the GUM budget
and the Kramers-Kronig line a technician sees after reopening are those of the fit.
The result is a real fit of a synthetic Cauchy film (invented demo data, the
project's own stack engine), which fills the diagnostics, the budget and the KK
check the way the engine does.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest

from fitting.errors import RecipeError
from fitting.result import (Alternative, BandGap, BudgetItem, ConsistencyCheck, Diagnostics,
                            FitResult, Uncertainty)


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    from fitting.fit import FitOptions, fit_spectrum
    from fitting.presets import default_stack
    from fitting.reader import read_spectrum
    from tests.app.conftest import synthetic_spectrum
    path = synthetic_spectrum(tmp_path_factory.mktemp("rt") / "film.csv", points=150)
    r = fit_spectrum(read_spectrum(path), default_stack(), FitOptions())
    # Records this clear film does not produce by itself, added as an absorbing film's
    # fit would carry them (values invented for the round trip only).
    return dataclasses.replace(
        r, alternatives=(Alternative(770.0, 412.0, 2.8, "half a fringe order away"),),
        band_gap=BandGap(3.41, 0.02, "direct", (3.5, 3.9), 0.995, "film"),
        verdict="check", verdict_reasons=("a reason to look", "another"))


def _json(d) -> str:
    return json.dumps(d, sort_keys=True)


def test_every_field_survives_the_json_round_trip(fitted):
    d = json.loads(json.dumps(fitted.to_dict()))        # as a project file holds it
    back = FitResult.from_dict(d)
    assert _json(back.to_dict()) == _json(fitted.to_dict())
    assert back.report() == fitted.report()
    # Typed records, not bare dicts.
    assert isinstance(back.diagnostics, Diagnostics) and back.diagnostics == fitted.diagnostics
    u, u0 = back.uncertainty["film_thickness"], fitted.uncertainty["film_thickness"]
    assert isinstance(u, Uncertainty) and all(isinstance(i, BudgetItem) for i in u.items)
    assert u.items == u0.items and u.expanded == pytest.approx(u0.expanded)
    assert isinstance(back.kk["film"], ConsistencyCheck) and back.kk["film"] == fitted.kk["film"]
    assert back.alternatives == fitted.alternatives and back.alternatives[0].note
    assert back.band_gap == fitted.band_gap
    assert (back.verdict, back.verdict_reasons) == (fitted.verdict, fitted.verdict_reasons)
    np.testing.assert_array_equal(back.covar, fitted.covar)
    np.testing.assert_array_equal(back.used, fitted.used)
    assert back.thickness() == fitted.thickness()


def test_missing_and_open_values_come_back_as_nan_and_infinity(fitted):
    p = dataclasses.replace(fitted.params["film_A"], stderr=math.nan, min=-math.inf)
    covar = fitted.covar.copy()
    covar[0, 0] = math.nan
    r = dataclasses.replace(fitted, params={**fitted.params, "film_A": p}, covar=covar)
    back = FitResult.from_dict(json.loads(json.dumps(r.to_dict())))
    assert back.params["film_A"].stderr is None          # written as null: not estimated
    assert back.params["film_A"].min == -math.inf
    assert math.isnan(back.covar[0, 0]) and back.covar[1, 1] == covar[1, 1]


@pytest.mark.parametrize("change, field", [
    (lambda d: d["uncertainty"]["film_thickness"]["items"][0].update(u="abc"),
     "uncertainty.film_thickness.items[0].u"),
    (lambda d: d["uncertainty"]["film_thickness"].pop("items"), "uncertainty.film_thickness"),
    (lambda d: d["kk"]["film"].update(consistent="yes"), "kk.film.consistent"),
    (lambda d: d["diagnostics"].update(dof="many"), "diagnostics.dof"),
    (lambda d: d["alternatives"][0].pop("chisqr"), "alternatives[0]"),
    (lambda d: d.update(covar=[[1.0, 2.0]]), "covar"),
])
def test_a_damaged_record_is_refused_naming_the_field(fitted, change, field):
    d = json.loads(json.dumps(fitted.to_dict()))
    change(d)
    with pytest.raises(RecipeError) as ei:
        FitResult.from_dict(d)
    assert ei.value.field == field


def test_a_reopened_project_keeps_diagnostics_budget_and_kk(fitted, tmp_path):
    from fitting.presets import default_stack
    from fitting.project import Project, StoredResult, load_project, save_project
    from fitting.recipe import Recipe
    project = Project(Recipe(default_stack()))
    project.result = StoredResult(fitted, "abc123", True)
    save_project(project, tmp_path / "p.pellucid.json")
    back = load_project(tmp_path / "p.pellucid.json").result.fit
    assert back.diagnostics == fitted.diagnostics
    assert back.uncertainty["film_thickness"].items == fitted.uncertainty["film_thickness"].items
    assert back.kk == fitted.kk and back.report() == fitted.report()
