"""Tests for fitting/presets.py: the models on offer, the default stack and fit options.

What a new user starts from must be the same wherever it is made (issue 11, item 1:
"GUI, recipe defaults and CLI agree"). Physical reference: a lossless film on a
lossless substrate cannot transmit more than 1 nor less than 0, and the bare
fused-silica slab transmits 2s/(s² + 1) with s = 1.4585 at 587.6 nm (Malitson 1965;
Swanepoel 1983 for the slab formula), the ceiling a transparent film of higher
index touches at its fringe maxima.
"""

from __future__ import annotations

import numpy as np
import pytest

from fitting.dispersion import Bruggeman, Cauchy
from fitting.errors import ParameterError
from fitting.fit import FitOptions
from fitting.presets import (MODEL_CHOICES, SUBSTRATE_NAMES, default_fit_options,
                             default_stack, make_model, model_choice_of, tie_roughness)
from fitting.recipe import Recipe, load_recipe, save_recipe
from fitting.stack import Layer, Stack

WL = np.linspace(300.0, 1100.0, 81)
_BUILT = [c for c in MODEL_CHOICES if c != "tabulated"]


def _table(tmp_path):
    p = tmp_path / "film_nk.csv"
    p.write_text("wavelength_nm,n,k\n300,2.3,0.05\n600,2.1,0.0\n1200,2.05,0.0\n",
                 encoding="utf-8")
    return p


def _build(choice, tmp_path):
    if choice == "tabulated":
        return make_model(choice, table_path=_table(tmp_path))
    return make_model(choice, host=Cauchy())


@pytest.mark.parametrize("choice", list(MODEL_CHOICES))
def test_every_choice_builds_evaluates_and_is_recognised(choice, tmp_path):
    model = _build(choice, tmp_path)
    lo, hi = (300.0, 1200.0) if choice == "tabulated" else (WL[0], WL[-1])
    wl = WL[(WL >= lo) & (WL <= hi)]
    N = model.N(wl)
    assert np.all(np.isfinite(N)) and np.all(N.imag >= 0) and np.all(N.real > 0)
    assert model_choice_of(model) == choice
    # fresh every time: editing one model must not change the next one
    other = _build(choice, tmp_path)
    assert other is not model
    if model.params:                         # a table has no parameters to edit
        name = next(iter(model.params))
        model.params[name].value = model.params[name].value * 1.01 + 0.01
        assert other.params[name].value != model.params[name].value


def test_labels_are_unique_and_say_what_the_model_is_for():
    labels = list(MODEL_CHOICES.values())
    assert len(set(labels)) == len(labels)
    assert all(len(v) > 5 and v[0].isupper() for v in labels)
    assert next(iter(MODEL_CHOICES)) == "cauchy"      # the default comes first in the menu


def test_bad_choices_are_refused_with_the_list_of_choices():
    with pytest.raises(ParameterError, match="cauchy, cauchy_urbach"):
        make_model("cauchey")
    with pytest.raises(ParameterError, match="table file"):
        make_model("tabulated")


@pytest.mark.parametrize("choice", _BUILT)
def test_default_stack_round_trips(choice):
    st = default_stack(choice)
    d = st.to_dict()
    again = Stack.from_dict(d)
    assert again.to_dict() == d
    assert model_choice_of(again.layers[0].material) == choice
    np.testing.assert_array_equal(again.transmittance(WL), st.transmittance(WL))


def test_default_stack_is_one_cauchy_film_on_1_mm_fused_silica():
    st = default_stack()
    assert [layer.name for layer in st.layers] == ["film"]
    assert isinstance(st.layers[0].material, Cauchy)
    assert st.substrate.library == "fused_silica" and st.substrate.thickness_mm == 1.0
    assert st.layers[0].thickness.vary
    T = st.transmittance(WL)
    assert np.all((T > 0) & (T < 1))
    # A film above the substrate's index (Cauchy start A = 1.9) only lowers T below the
    # bare slab's 2s/(s² + 1) = 0.9326 at 587.6 nm (s = 1.4585, Malitson 1965): its
    # fringe maxima touch that line (Swanepoel 1983).
    T_bare = 2 * 1.4585 / (1.4585 ** 2 + 1)
    assert st.transmittance(np.array([587.6]))[0] <= T_bare + 1e-4


@pytest.mark.parametrize("key", list(SUBSTRATE_NAMES))
def test_every_substrate_name_builds(key):
    st = default_stack("cauchy", key)
    assert st.substrate.library == key
    assert np.all(np.isfinite(st.transmittance(np.array([400.0, 600.0, 1000.0]))))


def test_default_options_are_the_engines_and_the_recipes():
    assert default_fit_options() == FitOptions().to_dict()
    assert FitOptions.from_dict(default_fit_options()) == FitOptions()
    # A fresh recipe fits exactly as the engine does by default (issue 11, item 1) ...
    assert Recipe(default_stack()).make_fit_options() == FitOptions()
    # ... and the defaults fit the 100 % line scale and tilt with their priors.
    d = default_fit_options()
    assert d["fit_scale"] and d["fit_tilt"] and d["scale_sigma"] and d["tilt_sigma"]


def test_saved_recipe_keeps_options_that_differ_from_the_defaults(tmp_path):
    # Issue 11, item 1: loading and saving a recipe once reset the thickness spread,
    # the time limit and the evaluation budget.
    opts = {**default_fit_options(), "fit_spread": True, "time_limit_s": 12.5,
            "max_nfev": 1234, "scale_sigma": 0.02, "fit_tilt": False}
    opts.pop("mask_windows_nm")
    opts.pop("fit_range_nm")
    path = save_recipe(Recipe(default_stack(), fit_options=opts), tmp_path / "r.json")
    again = load_recipe(path)
    fo = again.make_fit_options()
    assert (fo.fit_spread, fo.time_limit_s, fo.max_nfev, fo.scale_sigma, fo.fit_tilt) == \
        (True, 12.5, 1234, 0.02, False)
    save_recipe(again, tmp_path / "r2.json")
    assert load_recipe(tmp_path / "r2.json").make_fit_options() == fo


def test_roughness_is_tied_to_the_film_below():
    film = Layer("film", make_model("cauchy"), 300.0)
    rough = Layer("rough", make_model("roughness", host=film.material), 10.0)
    assert isinstance(rough.material, Bruggeman)
    tie_roughness(rough, film)
    p = rough.material.params
    for local in film.material.params:
        assert p[f"host_{local}"].expr == f"film_{local}" and not p[f"host_{local}"].vary
    assert all(not v.vary for k, v in p.items() if k.startswith("incl_"))
    assert p["fraction"].vary                       # the void fraction stays free
    # the tie survives a save and a load of the stack
    st = Stack([film, rough], default_stack().substrate)
    again = Stack.from_dict(st.to_dict())
    assert again.layers[1].material.params["host_A"].expr == "film_A"
    # a layer that is not a mixture is left alone
    plain = Layer("cap", make_model("cauchy"), 50.0)
    before = {k: (q.value, q.vary, q.expr) for k, q in plain.material.params.items()}
    tie_roughness(plain, film)
    assert {k: (q.value, q.vary, q.expr) for k, q in plain.material.params.items()} == before
