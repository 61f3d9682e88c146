"""Tests for fitting/labels.py: the names a technician reads for parameters, and values
with their uncertainty (σ to two significant digits where asked: GUM, JCGM 100:2008, 7.2.6).

No physics here: the reference is the project's own naming of parameters
(``film_o1_E0`` = layer ``film``, oscillator term 1, parameter ``E0``) and the
usual symbols of the trade for them (ε∞, Γ, E₀, E_g, κ: common practice in the
optical-constants literature, e.g. Jellison & Modine, Appl. Phys. Lett. 69, 371
(1996) for the Tauc-Lorentz parameters).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from fitting.fit import FitOptions
from fitting.labels import NUISANCE_LABELS, format_pm, param_label, pretty_name, two_digits
from fitting.objective import Objective, build_part
from fitting.presets import MODEL_CHOICES, make_model
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


@pytest.mark.parametrize("local, label", [
    ("o1_E0", "term 1: E₀"),
    ("o12_gamma", "term 12: Γ"),          # two-digit term numbers
    ("o2_Eg", "term 2: E_g"),
    ("o1_Ep", "term 1: E_p"),
    ("eps_inf", "ε∞"),
    ("k", "κ"),
    ("k0", "κ₀"),
    ("thickness", "thickness d"),
    ("host_A", "film A"),                 # the film part of a roughness mixture
    ("incl_n", "void n"),                 # its voids
    ("A", "A"),                           # plain names stay as they are
    ("ox_E0", "ox_E0"),                   # not a term: "x" is no number
])
def test_pretty_name(local, label):
    assert pretty_name(local) == label


@pytest.mark.parametrize("name, layers, label", [
    ("film_o1_E0", ["film"], "film, term 1: E₀"),
    ("film_thickness", ["film"], "film, thickness d"),
    # the longest layer name wins: "film_top_A" belongs to "film_top", not to "film"
    ("film_top_A", ["film", "film_top"], "film_top, A"),
    ("film_A", ["film", "film_top"], "film, A"),
    ("scale", ["film"], "100 % line scale"),
    ("thickness_spread", ["film"], "thickness non-uniformity"),
    # joint fits prefix per-spectrum parameters with p<i>_
    ("p2_scale", ["film"], "spectrum 2: 100 % line scale"),
    ("p3_film_o1_E0", ["film"], "spectrum 3: film, term 1: E₀"),
    ("unknown_thing", ["film"], "unknown_thing"),
])
def test_param_label(name, layers, label):
    assert param_label(name, layers) == label


# A raw token a technician should never see in a label.
_RAW = re.compile(r"\bo\d+_|host_|incl_|eps_inf|gamma|_thickness|thickness_spread")


@pytest.mark.parametrize("choice", [c for c in MODEL_CHOICES if c != "tabulated"])
def test_every_menu_model_has_readable_labels(choice):
    model = make_model(choice, host=make_model("cauchy"))
    stack = Stack([Layer("film", model, 100.0)], library_substrate("fused_silica"))
    for name in stack.parameters():
        label = param_label(name, ["film"])
        assert label.startswith("film, "), (name, label)
        assert not _RAW.search(label), (name, label)


def test_every_nuisance_parameter_of_a_fit_has_a_label():
    # Build an objective with every nuisance term switched on and label its parameters:
    # each must read as words, not as the internal name.
    wl = np.linspace(400.0, 800.0, 41)
    stack = Stack([Layer("film", make_model("cauchy"), 300.0)], library_substrate("fused_silica"))
    opts = FitOptions(fit_scale=True, fit_tilt=True, fit_offset=True, fit_angle=True,
                      fit_spread=True)
    obj = Objective([build_part(0, Spectrum(wl, np.full(wl.size, 0.9)), stack, opts)], opts)
    nuisance = [k for k in obj.params if not k.startswith("film_")]
    assert set(nuisance) == set(NUISANCE_LABELS)
    for k in nuisance:
        assert param_label(k, ["film"]) == NUISANCE_LABELS[k] != k
        assert "_" not in NUISANCE_LABELS[k]


def test_format_pm_value_sigma_and_unit():
    assert format_pm(231.04, 0.0612, "nm", sigma_fmt=".2g") == "231.0 ± 0.061 nm"
    assert format_pm(231.04, 0.0612) == "231.0 ± 0.1"
    assert format_pm(3.2104, 0.0123, "eV", fmt=".3f") == "3.210 ± 0.012 eV"
    assert format_pm(1.5, 0.25, fmt=".6g", sigma_fmt=".3g", sep=" +/- ") == "1.5 +/- 0.25"
    # an expanded uncertainty keeps its second digit (GUM 7.2.6)
    assert format_pm(231.04, 1.0, "nm", fmt=".4g", sigma_fmt=two_digits) == "231 ± 1.0 nm"


def test_format_pm_never_prints_nan():
    assert format_pm(float("nan"), 1.0, "nm") == "–"
    assert format_pm(None, None) == "–"
    assert format_pm(500.0, float("nan"), "nm") == "500.0 nm"
    assert format_pm(500.0, None, "nm", no_sigma="(σ not estimated)") == \
        "500.0 nm (σ not estimated)"
    assert format_pm(500.0, 2.0, "nm", no_sigma="(σ not estimated)") == "500.0 ± 2.0 nm"


@pytest.mark.parametrize("x,text", [(1.0, "1.0"), (0.5, "0.50"), (12.3, "12"), (123.0, "120"),
                                    (0.0996, "0.10"), (0.0994, "0.099"), (0.0012345, "0.0012"),
                                    (float("nan"), "–"), (None, "–")])
def test_two_digits_keeps_the_second_significant_digit(x, text):
    # GUM (JCGM 100:2008, 7.2.6): an uncertainty to at most two significant digits;
    # "1.0 nm" states two, "1 nm" (what ".2g" writes) only one.
    assert two_digits(x) == text
