"""Projects (fitting/project.py): the stored fit and the reference correction survive a
save and load; version-1 files still open; broken fields are named."""

import json
import math

import numpy as np
import pytest

from fitting.errors import RecipeError
from fitting.project import (Project, Reference, StoredResult, fit_result_from_dict,
                             load_project, save_project)
from fitting.recipe import Recipe
from fitting.presets import default_stack
from test_export import make_result
from test_recipe import make_recipe


def _same(a, b):
    if a is None or b is None:
        return a is None and b is None
    return np.array_equal(np.asarray(a, float), np.asarray(b, float), equal_nan=True)


def _files(tmp_path):
    spectra = tmp_path / "data"
    spectra.mkdir()
    paths = {}
    for name, text in (("s.csv", "wavelength_nm,T\n500,0.9\n"),
                       ("base.txt", "500\t30000\n"), ("dark.txt", "500\t300\n")):
        paths[name] = spectra / name
        paths[name].write_text(text)
    return paths


def test_stored_fit_and_reference_round_trip(tmp_path):
    f = _files(tmp_path)
    res = make_result("s", 512.3, seed=3)
    proj = Project(Recipe(default_stack()), name="line 3")
    proj.add_spectrum(f["s.csv"])
    proj.reference = Reference.of(f["base.txt"], f["dark.txt"])
    proj.result = StoredResult(res, "ab" * 32, current=False)
    path = save_project(proj, tmp_path / "p.pellucid.json")
    raw = json.loads(path.read_text())
    assert raw["version"] == 2
    assert raw["reference"]["baseline"]["path"] == "data/base.txt"     # relative, portable
    back = load_project(path)
    assert back.reference.baseline.path == f["base.txt"].resolve()
    assert back.reference.dark.path == f["dark.txt"].resolve() and back.reference.raw_counts
    assert back.check_spectra() == []
    r = back.result.fit
    assert back.result.recipe_hash == "ab" * 32 and back.result.current is False
    # Everything a reader of the result sees comes back: the report text, every array.
    assert r.report() == res.report()
    assert r.thickness() == res.thickness()
    for k in ("wavelength_nm", "measured", "fitted", "residuals", "sigma", "correl", "covar"):
        assert _same(getattr(r, k), getattr(res, k)), k
    assert r.used.dtype == bool and np.array_equal(r.used, res.used)
    for k in ("n", "k", "alpha_cm", "n_sigma", "k_sigma"):
        assert _same(getattr(r.optical["film"], k), getattr(res.optical["film"], k)), k
    assert r.band_gap == res.band_gap
    assert math.isinf(r.params["film_A"].max) is False and r.params["film_C"].stderr is None
    # A changed baseline file is noticed like a changed spectrum.
    f["base.txt"].write_text("500\t31000\n")
    assert any("reference correction" in p and "changed" in p for p in back.check_spectra())


def test_open_bounds_and_unknown_sigma_come_back(tmp_path):
    from dataclasses import replace
    from fitting.result import ParamResult
    res = make_result("s", 500.0)
    params = dict(res.params)
    params["film_A"] = ParamResult("film_A", 2.0, float("nan"), None, -math.inf, math.inf)
    res = replace(res, params=params)
    proj = Project(Recipe(default_stack()), result=StoredResult(res))
    back = load_project(save_project(proj, tmp_path / "p.json"))
    p = back.result.fit.params["film_A"]
    assert p.min == -math.inf and p.max == math.inf
    # A NaN σ is stored as null (strict JSON) and reads as "not estimated", as before.
    assert p.stderr is None and back.result.fit.report() == res.report()


def test_version_1_project_opens_without_stored_fit(tmp_path):
    d = Project(Recipe(default_stack())).to_dict()
    d["version"] = 1
    del d["reference"], d["result"]
    d["results"] = [{"file": "a.csv", "status": "ok", "film_thickness": 498.7}]
    f = tmp_path / "old.pellucid.json"
    f.write_text(json.dumps(d))
    back = load_project(f)
    assert back.reference is None and back.result is None
    assert back.results[0]["film_thickness"] == 498.7


@pytest.mark.parametrize("change, field", [
    (lambda d: d.update(version=3), "version"),
    (lambda d: d.update(reference={"baseline": {"path": "b.txt", "sha256": "0" * 64}}),
     "reference"),
    (lambda d: d.update(reference={"baseline": {"path": "b.txt", "sha256": "zz"},
                                   "dark": None, "raw_counts": True}), "reference.baseline.sha256"),
    (lambda d: d.update(result={"fit": {"params": {}}, "recipe_hash": "", "current": True}),
     "result.fit.curves"),
    (lambda d: d.update(result={"fit": {}, "recipe_hash": "", "current": "yes"}),
     "result.current"),
])
def test_broken_project_fields_are_named(tmp_path, change, field):
    d = Project(Recipe(default_stack())).to_dict()
    change(d)
    f = tmp_path / "p.json"
    f.write_text(json.dumps(d))
    with pytest.raises(RecipeError) as ei:
        load_project(f)
    assert ei.value.field.startswith(field) and ei.value.path == f


def test_result_dict_refuses_a_curve_of_the_wrong_length():
    d = make_result("s", 500.0).to_dict(curves=True)
    d["curves"]["fitted"] = d["curves"]["fitted"][:-1]
    with pytest.raises(RecipeError, match="one per wavelength"):
        fit_result_from_dict(d)


def test_text_fields_of_a_newer_result_pass_through(monkeypatch):
    from dataclasses import dataclass

    from fitting.result import FitResult

    @dataclass(frozen=True)
    class Newer(FitResult):
        verdict: str = ""
        verdict_reasons: tuple = ()
        diagnostics: object = None

    base = make_result("s", 500.0)
    d = base.to_dict(curves=True)
    d.update(verdict="check", verdict_reasons=["few fringes"], diagnostics={"runs_z": 1.0})
    monkeypatch.setattr("fitting.result.FitResult", Newer)
    r = fit_result_from_dict(d)
    assert r.verdict == "check" and r.verdict_reasons == ("few fringes",)
    assert r.diagnostics is None          # a structured record is not handed on as a dict


def test_project_round_trip_and_change_detection(tmp_path):
    spectra = tmp_path / "spectra"
    spectra.mkdir()
    a, b = spectra / "a.csv", spectra / "b.csv"
    a.write_text("wavelength_nm,T\n500,0.9\n")
    b.write_text("wavelength_nm,T\n500,0.8\n")
    proj = Project(make_recipe(), name="week 12")
    proj.add_spectrum(a)
    proj.add_spectrum(b)
    proj.add_spectrum(a)                                    # same path: replaced, not doubled
    proj.results.append({"file": str(a), "status": "ok", "film_thickness": 498.7})
    path = save_project(proj, tmp_path / "p.pellucid.json")
    raw = json.loads(path.read_text())
    assert raw["format"] == "pellucid-project"
    assert sorted(s["path"] for s in raw["spectra"]) == ["spectra/a.csv", "spectra/b.csv"]
    back = load_project(path)
    assert back.recipe.to_dict() == proj.recipe.to_dict()
    assert {r.path for r in back.spectra} == {a.resolve(), b.resolve()}
    assert back.results == proj.results and back.check_spectra() == []
    b.write_text("wavelength_nm,T\n500,0.7\n")
    a.unlink()
    problems = back.check_spectra()
    assert len(problems) == 2
    assert any("not found" in p for p in problems) and any("changed" in p for p in problems)


def test_project_errors_name_the_field(tmp_path):
    d = Project(make_recipe()).to_dict()
    d["recipe"]["stack"]["layers"][0]["material"]["kind"] = "plasma"
    f = tmp_path / "p.json"
    f.write_text(json.dumps(d))
    with pytest.raises(RecipeError) as ei:
        load_project(f)
    assert ei.value.field == "recipe.stack.layers[0].material.kind"
    d = Project(make_recipe()).to_dict()
    d["spectra"] = [{"path": "x.csv", "sha256": "zz"}]
    f.write_text(json.dumps(d))
    with pytest.raises(RecipeError, match="hex") as ei:
        load_project(f)
    assert ei.value.field == "spectra[0].sha256"
