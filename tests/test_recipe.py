"""Recipes (fitting/recipe.py): format, validation, upgrade; a recipe inside a project."""

import copy
import json

import numpy as np
import pytest

from fitting.dispersion import Cauchy, Oscillators, TaucLorentz
from fitting.errors import RecipeError
from fitting.project import Project, load_project, save_project
from fitting.recipe import (Limit, Recipe, load_recipe, recipe_from_dict, recipe_hash,
                            save_recipe, upgrade, validate_expression)
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


def make_recipe(**kw):
    stack = Stack([Layer("film", Cauchy(A=2.0, B=0.02), 480.0),
                   Layer("cap", Oscillators(2.5, [TaucLorentz()]), 60.0)],
                  library_substrate("fused_silica", 1.0))
    kw.setdefault("limits", {"film_thickness": {"target": 500, "tol": 25},
                             "film_n@633": {"min": 1.9, "max": 2.1}, "redchi": {"max": 5}})
    return Recipe(stack, name="test recipe", notes="line 3", range_nm=(400, 1000),
                  masks_nm=[(655, 657)], plot_formats=("png", "svg"), **kw)


def test_save_load_round_trip_is_identical(tmp_path):
    r = make_recipe()
    path = save_recipe(r, tmp_path / "r.json")
    d = json.loads(path.read_text(encoding="utf-8"))
    assert d["format"] == "pellucid-recipe" and d["version"] == 1
    r2 = load_recipe(path)
    assert r2.to_dict() == r.to_dict()
    assert recipe_hash(r2) == recipe_hash(r) == recipe_hash(d)
    assert r2.limits["film_thickness"] == Limit(target=500.0, tol=25.0)
    assert r2.range_nm == (400.0, 1000.0) and r2.masks_nm == [(655.0, 657.0)]
    # Same optics from the reloaded stack.
    wl = np.linspace(400, 1000, 50)
    np.testing.assert_array_equal(r.stack.RT(wl)[1], r2.stack.RT(wl)[1])
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]     # no temp files left


def test_hash_is_canonical_and_sensitive():
    r = make_recipe()
    d = r.to_dict()
    shuffled = json.loads(json.dumps(dict(reversed(list(d.items())))))
    assert recipe_hash(shuffled) == recipe_hash(r)
    d["stack"]["layers"][0]["thickness"]["value"] = 481.0
    assert recipe_hash(d) != recipe_hash(r)
    assert len(recipe_hash(r)) == 64


def test_new_stack_is_an_independent_copy():
    r = make_recipe()
    s = r.new_stack()
    s.set_values({"film_thickness": 123.0})
    assert r.stack.values()["film_thickness"] == 480.0


def test_fit_window_goes_into_fit_options():
    from fitting.spectrum import Spectrum
    from fitting import fit
    opts = make_recipe(fit_options={"method": "least_squares"}).make_fit_options()
    assert isinstance(opts, fit.FitOptions) and opts.method == "least_squares"
    assert opts.fit_range_nm == (400.0, 1000.0) and opts.mask_windows_nm == ((655.0, 657.0),)
    # An open end is closed with the spectrum's own first/last wavelength.
    r = Recipe(make_recipe().stack, range_nm=(450, None))
    wl = np.arange(300.0, 1101.0, 1.0)
    assert r.make_fit_options(Spectrum(wl, np.full(wl.size, 0.9))).fit_range_nm == (450, 1100)
    # A window given inside the fit options moves to fit.range_nm (one place only).
    r = Recipe(make_recipe().stack, fit_options={"fit_range_nm": [500, 900]})
    assert r.range_nm == (500.0, 900.0) and "fit_range_nm" not in r.to_dict()["fit"]["options"]
    with pytest.raises(RecipeError, match="give the fit window once"):
        Recipe(make_recipe().stack, range_nm=(400, 800), fit_options={"fit_range_nm": [500, 900]})


def _bad(d, path, value):
    d = copy.deepcopy(d)
    node = d
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value
    return d


@pytest.mark.parametrize("path,value,field,match", [
    (("version",), 7, "version", "newer"),
    (("version",), "1", "version", "whole number"),
    (("format",), "something-else", "format", "not a Pellucid recipe"),
    (("stack", "layers", 0, "material", "kind"), "plasma", "stack.layers[0].material.kind",
     "unknown model"),
    (("stack", "layers", 0, "thickness", "value"), "thick", "stack.layers[0].thickness",
     "not a number"),
    (("stack", "layers", 0, "thickness", "min"), 900.0, "stack.layers[0].thickness",
     "within its bounds"),
    (("stack", "layers", 0, "material", "params", "A", "max"), 0.5,
     "stack.layers[0].material.params.A", "lower bound"),
    (("stack", "substrate", "thickness_mm"), -1, "stack.substrate.thickness_mm", "positive"),
    (("fit", "range_nm"), [1000, 400], "fit.range_nm", "below stop"),
    (("fit", "range_nm"), "400-1000", "fit.range_nm", r"\[start_nm, stop_nm\]"),
    (("fit", "masks_nm"), [[500, None]], "fit.masks_nm[0]", "both ends"),
    (("limits", "film_thickness"), {"target": 500}, "limits.film_thickness", "together"),
    (("limits", "film_thickness"), {"target": 500, "tol": -1}, "limits.film_thickness.tol",
     "positive"),
    (("limits", "film_thickness"), {"min": 510, "max": 490}, "limits.film_thickness",
     "smaller"),
    (("limits", "film_thickness"), {"min": "low"}, "limits.film_thickness.min",
     "finite number"),
    (("limits", "ghost_thickness"), {"max": 5}, "limits.ghost_thickness", "no layer"),
    (("limits", "colour"), {"max": 5}, "limits.colour", "unknown quantity"),
    (("outputs", "plot_formats"), ["gif"], "outputs.plot_formats[0]", "unknown choice"),
    (("outputs", "exports"), "nk", "outputs.exports", "must be a list"),
    (("surprise",), 1, "surprise", "unknown field"),
    (("fit", "options", "method"), "guess", "fit.options.method", "choose one of"),
    (("fit", "options", "warp"), 9, "fit.options.warp", "unknown fit option"),
    (("reader", "x_unit"), 17, "reader.x_unit", "must be a string"),
    (("reader", "colour"), "red", "reader.colour", "unknown reader option"),
])
def test_invalid_recipes_name_the_field(tmp_path, path, value, field, match):
    d = _bad(make_recipe().to_dict(), path, value)
    f = tmp_path / "bad.json"
    f.write_text(json.dumps(d), encoding="utf-8")
    with pytest.raises(RecipeError, match=match) as ei:
        load_recipe(f)
    assert ei.value.field == field
    assert str(f) in str(ei.value)


@pytest.mark.parametrize("expr", [
    "__import__('os')",
    "__import__('os').system('echo hacked')",
    "film_B.__class__",
    "(lambda: 1)()",
    "film_B if 1 else 2",
    "[film_B]",
    "'text'",
    "open('x')",
    "film_B; film_B",
    "film_B < 2",
    "sqrt(film_B, 2)",
    "True * film_B",
])
def test_malicious_or_non_arithmetic_ties_are_refused(expr):
    d = make_recipe().to_dict()
    d["stack"]["layers"][0]["material"]["params"]["A"]["expr"] = expr
    with pytest.raises(RecipeError) as ei:
        recipe_from_dict(d)
    assert ei.value.field == "stack.layers[0].material.params.A.expr"


def test_tie_naming_an_unknown_parameter_is_refused():
    d = make_recipe().to_dict()
    d["stack"]["layers"][1]["thickness"]["expr"] = "0.1 * flim_thickness"
    with pytest.raises(RecipeError, match="flim_thickness.*not a parameter") as ei:
        recipe_from_dict(d)
    assert ei.value.field == "stack.layers[1].thickness.expr"


def test_arithmetic_ties_are_kept():
    d = make_recipe().to_dict()
    expr = "0.1 * film_thickness + sqrt(abs(film_B)) ** 2 - pi / 1e3"
    d["stack"]["layers"][1]["thickness"]["expr"] = expr
    r = recipe_from_dict(d)
    assert r.stack.parameters()["cap_thickness"].expr == expr
    assert validate_expression("-(film_A)", {"film_A"}) == "-(film_A)"


def test_version_0_is_upgraded():
    v0 = {"format": "pellucid-recipe", "version": 0, "name": "old",
          "stack": {"substrate": {"library": "fused_silica", "thickness_mm": 1.0},
                    "layers": [{"name": "film", "material": {"kind": "cauchy"},
                                "thickness_nm": 450.0, "thickness_range_nm": [100, 900],
                                "fit_thickness": False}]},
          "range_nm": [350, 1050]}
    frozen = copy.deepcopy(v0)
    d1 = upgrade(v0)
    assert v0 == frozen                                  # input untouched
    assert d1["version"] == 1 and d1["reader"] == {} and d1["limits"] == {}
    r = recipe_from_dict(v0)
    th = r.stack.layers[0].thickness
    assert (th.value, th.min, th.max, th.vary) == (450.0, 100.0, 900.0, False)
    assert r.range_nm == (350.0, 1050.0)
    assert r.to_dict()["version"] == 1


def test_load_errors_for_missing_and_broken_files(tmp_path):
    with pytest.raises(RecipeError, match="file not found"):
        load_recipe(tmp_path / "nope.json")
    f = tmp_path / "broken.json"
    f.write_text('{"format": "pellucid-recipe",\n "version": 1,,}', encoding="utf-8")
    with pytest.raises(RecipeError, match="line 2"):
        load_recipe(f)


def test_round_trip_gives_identical_fit_results(tmp_path):
    # Save, load, fit the same spectrum with both: every parameter and χ² identical.
    from fitting import fit
    from batch_helpers import make_recipe as single_film_recipe
    from batch_helpers import write_spectra
    from fitting.reader import read_spectrum
    write_spectra(tmp_path, [575.0], seed=5)
    r = single_film_recipe(fit_options={"method": "auto", "fit_offset": True})
    r2 = load_recipe(save_recipe(r, tmp_path / "r.json"))
    sp = read_spectrum(tmp_path / "s000.txt", options=r2.reader_options())
    a = fit.fit_spectrum(sp, r.new_stack(), r.make_fit_options(sp))
    b = fit.fit_spectrum(sp, r2.new_stack(), r2.make_fit_options(sp))
    assert a.success and b.success
    assert {k: (p.value, p.stderr) for k, p in a.params.items()} == \
        {k: (p.value, p.stderr) for k, p in b.params.items()}
    assert a.chisqr == b.chisqr and "offset" in a.params
    assert a.thickness()[0] == pytest.approx(575.0, rel=0.01)


def test_documented_layer_example_is_valid():
    # The layer shown in the module docstring must load as written.
    import re
    import fitting.recipe as module
    doc = module.__doc__
    block = doc[doc.index('{"name": "film"'):doc.index("and the substrate")]
    layer = json.loads(re.sub(r"#.*", "", block))
    d = make_recipe().to_dict()
    d["stack"]["layers"] = [layer]
    d["limits"] = {}
    r = recipe_from_dict(d)
    assert r.stack.layers[0].thickness.max == 5000.0


# -- hand-edited recipes: refused up front, naming the field ------------------------------
def _recipe_text(edit_text=None, **layer_thickness):
    d = make_recipe().to_dict()
    d["stack"]["layers"][0]["thickness"].update(layer_thickness)
    text = json.dumps(d)
    return edit_text(text) if edit_text else text


@pytest.mark.parametrize("text,field,match", [
    (_recipe_text(value="abc"), "stack.layers[0].thickness", "not a number"),
    (_recipe_text(value=None), "stack.layers[0].thickness", "not a number"),
    (_recipe_text(value=[480]), "stack.layers[0].thickness", "not a number"),
    (_recipe_text(value=1e308), "stack.layers[0].thickness.value", "far too large"),
    (_recipe_text(vary="false"), "stack.layers[0].thickness.vary", "true or false"),
    (_recipe_text(lambda t: t.replace('"value": 480.0', '"value": ' + "9" * 5000)),
     "stack.layers[0].thickness.value", "5000 digits"),
    (_recipe_text(lambda t: t.replace('"time_limit_s": 60.0', '"time_limit_s": Infinity')),
     "fit.options.time_limit_s", "finite"),
    (_recipe_text(lambda t: t.replace('"fit_scale": true', '"fit_scale": "true"')),
     "fit.options.fit_scale", "true or false"),
    (_recipe_text(lambda t: t.replace('"max_nfev": 20000', '"max_nfev": 2.5')),
     "fit.options.max_nfev", "whole number"),
    (_recipe_text(lambda t: t.replace('"notes": "line 3"',
                                      '"notes": ' + "[" * 40 + "]" * 40)),
     "notes" + "[0]" * 32, "nested"),
    (_recipe_text(lambda t: t.replace('"notes": "line 3"',
                                      '"notes": ' + "[" * 100000 + "]" * 100000)),
     "(file)", "nested"),
])
def test_hand_edited_recipes_are_refused_with_the_field(tmp_path, text, field, match):
    # Each of these gave a traceback, loaded and killed a batch later, or was read wrongly
    # ("false" in quotes is true in Python).
    f = tmp_path / "edited.json"
    f.write_text(text, encoding="utf-8")
    with pytest.raises(RecipeError, match=match) as ei:
        load_recipe(f)
    assert ei.value.field == field
    assert str(f) in str(ei.value)


def test_flat_thickness_of_the_wrong_type_names_the_layer():
    d = make_recipe().to_dict()
    for bad in ("abc", None, [1, 2], True):
        d["stack"]["layers"][1]["thickness"] = bad
        with pytest.raises(RecipeError, match="must be a number") as ei:
            recipe_from_dict(d)
        assert ei.value.field == "stack.layers[1].thickness"


def test_a_byte_order_mark_is_read(tmp_path):
    # Some Windows editors save UTF-8 with a BOM (EF BB BF); the recipe is the same.
    r = make_recipe()
    f = tmp_path / "bom.json"
    f.write_bytes(b"\xef\xbb\xbf" + json.dumps(r.to_dict()).encode("utf-8"))
    assert load_recipe(f).to_dict() == r.to_dict()


# -- identity for resuming -----------------------------------------------------------------
def test_identity_ignores_start_values_name_and_notes_only():
    from fitting.recipe import recipe_identity
    base = make_recipe()
    ident = recipe_identity(base)
    d = base.to_dict()
    d["name"], d["notes"] = "renamed", "other notes"
    d["stack"]["layers"][0]["thickness"]["value"] = 470.0          # varied: a start value
    d["stack"]["layers"][0]["material"]["params"]["A"]["value"] = 2.2
    assert recipe_identity(d) == ident
    assert recipe_hash(d) != recipe_hash(base)                     # provenance still tells
    base_d = base.to_dict()
    base_d["stack"]["layers"][0]["material"]["params"]["C"]["vary"] = False
    base = recipe_from_dict(base_d)                  # C fixed: its value is part of the model
    ident = recipe_identity(base)
    changes = [
        ("stack", "layers", 0, "material", "params", "C", "value"),  # fixed (vary false): model
        ("stack", "layers", 0, "thickness", "max"),                  # a bound
        ("stack", "substrate", "thickness_mm"),
        ("fit", "options", "time_limit_s"),
    ]
    for path in changes:
        d2 = base.to_dict()
        node = d2
        for k in path[:-1]:
            node = node[k]
        node[path[-1]] = node[path[-1]] * 0.9 + 0.001
        assert recipe_identity(d2) != ident, path
    d3 = base.to_dict()
    d3["stack"]["layers"][0]["thickness"]["vary"] = False              # fixing changes it
    assert recipe_identity(d3) != ident
    d4 = base.to_dict()
    d4["outputs"]["exports"] = ["nk"]
    assert recipe_identity(d4) != ident


# -- model suggestion -----------------------------------------------------------------------
def test_suggest_model_option_round_trips_and_counts_for_resume(tmp_path):
    from fitting.recipe import recipe_identity
    plain = make_recipe()
    assert "suggest_model" not in plain.to_dict()["fit"]          # older hashes unchanged
    auto = make_recipe(suggest_model=True)
    chosen = make_recipe(suggest_model=["tauc_lorentz", "cauchy", "tauc_lorentz"])
    assert chosen.suggest_model == ("tauc_lorentz", "cauchy")
    for r in (auto, chosen):
        loaded = load_recipe(save_recipe(r, tmp_path / "r.json"))
        assert loaded.suggest_model == r.suggest_model
        assert loaded.to_dict() == r.to_dict() and recipe_hash(loaded) == recipe_hash(r)
    idents = {recipe_identity(r) for r in (plain, auto, chosen)}
    assert len(idents) == 3
    assert make_recipe(suggest_model=False).to_dict() == plain.to_dict()


@pytest.mark.parametrize("value,field,words", [
    ("yes", "fit.suggest_model", "must be true, false or a list"),
    (1, "fit.suggest_model", "must be true, false or a list"),
    ([], "fit.suggest_model", "empty"),
    (["cauchy", "plasma"], "fit.suggest_model[1]", "unknown film model 'plasma'"),
    (["tabulated"], "fit.suggest_model[0]", "unknown film model 'tabulated'"),
])
def test_suggest_model_option_is_validated(value, field, words):
    d = make_recipe().to_dict()
    d["fit"]["suggest_model"] = value
    with pytest.raises(RecipeError) as e:
        recipe_from_dict(d)
    assert e.value.field == field and words in str(e.value)


# -- reference correction in a recipe -------------------------------------------------------
def test_reference_paths_resolve_from_the_recipe_folder(tmp_path):
    (tmp_path / "refs").mkdir()
    (tmp_path / "refs" / "b.csv").write_text("400,1000\n500,1000\n")
    r = make_recipe(reference={"baseline": "refs/b.csv"})
    assert r.to_dict()["reference"] == {"baseline": "refs/b.csv", "dark": None}
    path = save_recipe(r, tmp_path / "r.json")
    loaded = load_recipe(path)
    files = loaded.reference_files()
    assert files == {"baseline": (tmp_path / "refs" / "b.csv").resolve(), "dark": None}
    resolved = loaded.resolved()
    assert resolved.reference["baseline"] == str((tmp_path / "refs" / "b.csv").resolve())
    # No reference: the section is not written, so older recipes keep their hash.
    assert "reference" not in make_recipe().to_dict()
    missing = make_recipe(reference={"baseline": "refs/nope.csv", "dark": "refs/dark.csv"})
    missing.source_dir = tmp_path
    with pytest.raises(RecipeError, match="does not exist.*folder of the recipe") as ei:
        missing.reference_files()
    assert ei.value.field == "reference.baseline"
    for bad, field in (({"dark": "d.csv"}, "reference.baseline"),
                       ({"baseline": 5}, "reference.baseline"),
                       ({"baseline": "b.csv", "flat": "x"}, "reference.flat"),
                       ("b.csv", "reference")):
        with pytest.raises(RecipeError) as ei:
            make_recipe(reference=bad)
        assert ei.value.field == field


# -- known layers (format version 2; see also tests/test_known.py) -----------------------
def _known_recipe():
    r = make_recipe()
    r.stack.layers[1].known = True
    r.stack.layers[1].source = {"file": "cap_nk.csv", "sha256": "cd" * 32}
    return r


def test_recipes_without_known_layers_stay_version_1(tmp_path):
    # Old files load unchanged and are written back as they were: same version, same keys,
    # so their hashes (and a resumed batch's identity) do not move.
    d = make_recipe().to_dict()
    assert d["version"] == 1
    assert all(set(ld) == {"name", "material", "thickness"} for ld in d["stack"]["layers"])
    path = tmp_path / "old.json"
    path.write_text(json.dumps(d, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    before = path.read_bytes()
    save_recipe(load_recipe(path), path)
    assert path.read_bytes() == before


def test_known_layer_recipe_round_trip_is_version_2(tmp_path):
    r = _known_recipe()
    path = save_recipe(r, tmp_path / "k.json")
    d = json.loads(path.read_text(encoding="utf-8"))
    assert d["version"] == 2 and d["stack"]["layers"][1]["known"] is True
    back = load_recipe(path)
    assert back.to_dict() == r.to_dict() and back.stack.layer("cap").known
    assert back.stack.layer("cap").source == {"file": "cap_nk.csv", "sha256": "cd" * 32}
    assert recipe_hash(back) == recipe_hash(r) != recipe_hash(make_recipe())
    d["version"] = 3
    with pytest.raises(RecipeError, match="newer than this Pellucid"):
        recipe_from_dict(d)
    # A project keeps the known layer through its embedded recipe.
    proj = load_project(save_project(Project(r), tmp_path / "p.json"))
    assert proj.recipe.stack.layer("cap").known and proj.recipe.to_dict() == r.to_dict()


def test_identity_holds_every_value_of_a_known_layer():
    from fitting.recipe import recipe_identity
    r = _known_recipe()
    base = recipe_identity(r)
    moved = _known_recipe()
    moved.stack.layer("cap").material.params["o1_A"].value += 1.0   # varied flag, but known
    assert recipe_identity(moved) != base
    unknown = _known_recipe()
    unknown.stack.layer("cap").known = False
    assert recipe_identity(unknown) != base
    other_source = _known_recipe()
    other_source.stack.layer("cap").source = None               # provenance only
    assert recipe_identity(other_source) == base


def test_documented_known_layer_example_loads(tmp_path):
    # The file form of a known layer shown in the module docstring, as written there.
    import re
    import fitting.recipe as module
    doc = module.__doc__
    start = doc.index('{"name": "barrier", "known": true,\n     "material": {"kind": "tabulated", '
                      '"file"')
    block = doc[start:doc.index("or embedded", start)]
    layer = json.loads(re.sub(r"#.*", "", block))
    (tmp_path / "barrier_nk.csv").write_text("wavelength_nm,n,k\n300,1.67,0\n1100,1.65,0\n",
                                             encoding="utf-8")
    d = make_recipe().to_dict()
    d["stack"]["layers"].append(layer)
    r = recipe_from_dict(d, path=tmp_path / "r.json")
    assert r.stack.layer("barrier").known and r.stack.layer("barrier").thickness.value == 98.2
