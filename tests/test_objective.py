"""Tests for fitting/objective.py: used points, weights, nuisance terms and priors.

References
----------
* The model of the measured spectrum, y = (s + t·u)·T + o with u running from -1/2
  to +1/2 over the fitted range, is the one the independent validation generator
  uses (``validation/synth.py``: scale and a linear tilt of the 100 % line, zero at
  the middle); T of the film comes from ``tmm`` (S. J. Byrnes, arXiv:1603.02720) with
  the Cauchy index n = A + B/λ² + C/λ⁴ and fused silica from Malitson's Sellmeier
  (J. Opt. Soc. Am. 55, 1205, 1965).
* A Gaussian prior N(μ, σ²) of a parameter x adds ((x - μ)/σ)² to χ²: the
  maximum a posteriori fit of a least-squares problem (D. S. Sivia, *Data Analysis:
  A Bayesian Tutorial*, 2nd ed., Oxford 2006, ch. 3).
* 1.4826·MAD estimates σ of a normal sample (Rousseeuw & Croux, JASA 88, 1273, 1993).
"""

from __future__ import annotations

import threading

import lmfit
import numpy as np
import pytest
import tmm

from fitting.dispersion import Cauchy
from fitting.errors import FitError
from fitting.fit import FitOptions
from fitting.objective import DEFAULT_SIGMA, Objective, build_part
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate

CAUCHY = {"A": 2.0, "B": 0.015, "C": 0.0005}      # a Ta2O5-like film (invented values)
D_NM = 450.0


def _stack(d=D_NM, **cauchy):
    return Stack([Layer("film", Cauchy(**{**CAUCHY, **cauchy}), d)],
                 library_substrate("fused_silica", 1.0))


def _tmm_T(wl, d=D_NM):
    N_film = Cauchy(**CAUCHY).N(wl)
    N_sub = library_substrate("fused_silica").N(wl)
    return np.array([tmm.inc_tmm("s", [1.0, nf, ns, 1.0], [np.inf, d, 1e6, np.inf],
                                 ["i", "c", "i", "i"], 0.0, w)["T"]
                     for w, nf, ns in zip(wl, N_film, N_sub)])


def _objective(spectrum, opts=None, stack=None):
    opts = opts or FitOptions()
    return Objective([build_part(0, spectrum, stack or _stack(), opts)], opts)


# -- the tilt abscissa and the model of the measurement ------------------------------------
def test_tilt_abscissa_runs_from_minus_to_plus_a_half_over_the_used_points():
    wl = np.linspace(350.0, 1050.0, 141)
    opts = FitOptions(fit_range_nm=(400.0, 1000.0), mask_windows_nm=((990.0, 1000.0),))
    part = build_part(0, Spectrum(wl, np.full(wl.size, 0.9)), _stack(), opts)
    assert part.wl[0] == 400.0 and part.wl[-1] < 990.0       # range and mask applied
    assert part.u[0] == pytest.approx(-0.5) and part.u[-1] == pytest.approx(0.5)
    np.testing.assert_allclose(np.diff(part.u) / np.diff(part.wl),
                               1 / (part.wl[-1] - part.wl[0]))
    np.testing.assert_allclose(part.u_at(part.wl), part.u)
    # beyond the used points the line goes on (the fitted curve is drawn on the range)
    assert part.u_at([part.wl[-1] + (part.wl[-1] - part.wl[0])])[0] == pytest.approx(1.5)


def test_model_of_the_measurement_matches_the_validation_generator():
    # validation/synth.py applies scale·(1 + tilt·(λ - λ_mid)/span) to the tmm T; the
    # objective's (s + t·u)·T is the same line for s = 1, so the true film with the
    # true tilt must reproduce the generator's spectrum to rounding.
    wl = np.linspace(400.0, 1000.0, 61)
    tilt, scale = 0.004, 1.0
    T = _tmm_T(wl)
    line = scale * (1 + tilt * (wl - 0.5 * (wl[0] + wl[-1])) / (wl[-1] - wl[0]))
    part = build_part(0, Spectrum(wl, T * line), _stack(), FitOptions())
    local = {"film_thickness": D_NM, **{f"film_{k}": v for k, v in CAUCHY.items()},
             "scale": scale, "tilt": tilt}
    np.testing.assert_allclose(part.evaluate(local), T * line, atol=1e-9)
    # scale multiplies, offset adds
    y = part.evaluate({**local, "scale": 0.98, "tilt": 0.0, "offset": 0.01})
    np.testing.assert_allclose(y, 0.98 * T + 0.01, atol=1e-9)


# -- priors ---------------------------------------------------------------------------------
def test_priors_of_scale_and_tilt_are_residuals_of_their_own():
    wl = np.linspace(400.0, 1000.0, 61)
    obj = _objective(Spectrum(wl, _tmm_T(wl)))
    assert [(k, mu, sd) for k, mu, sd in obj.priors] == [("scale", 1.0, 0.01),
                                                         ("tilt", 0.0, 0.005)]
    values = {**obj.params.valuesdict(), "scale": 1.02, "tilt": -0.01}
    np.testing.assert_allclose(obj.prior_residual(values), [2.0, -2.0])
    # χ² = data terms + prior terms (MAP fit), and lmfit's residual carries both
    data = obj.part_residual(obj.parts[0], obj.local_values(obj.parts[0], values))
    assert obj.chisqr_of(values) == pytest.approx(float(data @ data) + 8.0)
    p = obj.params.copy()
    p["scale"].value, p["tilt"].value = 1.02, -0.01
    r = obj.residual(p)
    assert r.size == wl.size + 2 and r[-2:].tolist() == pytest.approx([2.0, -2.0])


def test_no_prior_when_asked_for_none_or_when_the_term_is_not_fitted():
    wl = np.linspace(400.0, 1000.0, 61)
    sp = Spectrum(wl, _tmm_T(wl))
    free = _objective(sp, FitOptions(scale_sigma=None, tilt_sigma=0.002))
    assert [k for k, *_ in free.priors] == ["tilt"] and "scale" in free.var_names
    off = _objective(sp, FitOptions(fit_scale=False, fit_tilt=False))
    assert off.priors == [] and "scale" not in off.params
    assert off.prior_residual(off.params.valuesdict()).size == 0


# -- noise from the spectrum ---------------------------------------------------------------
def test_noise_is_estimated_from_the_spectrum_before_any_model():
    wl = np.linspace(400.0, 1000.0, 301)
    rng = np.random.default_rng(17)
    sigma = 0.002
    part = build_part(0, Spectrum(wl, _tmm_T(wl) + sigma * rng.standard_normal(wl.size)),
                      _stack(), FitOptions())
    assert not part.sigma_given
    assert np.median(part.sigma) == pytest.approx(sigma, rel=0.2)


def test_given_sigma_is_used_and_points_without_one_are_dropped():
    wl = np.linspace(400.0, 1000.0, 61)
    s = np.full(wl.size, 0.003)
    s[5], s[9] = np.nan, 0.0
    part = build_part(0, Spectrum(wl, _tmm_T(wl), sigma=s), _stack(), FitOptions())
    assert part.sigma_given and part.y.size == wl.size - 2
    assert np.all(part.sigma == 0.003)
    few = build_part(0, Spectrum(wl[:8], _tmm_T(wl[:8])), _stack(), FitOptions())
    assert np.all(few.sigma == DEFAULT_SIGMA)        # too few points for an estimate


# -- what is free -----------------------------------------------------------------------------
def test_a_fit_with_only_the_100_percent_line_free_is_refused():
    wl = np.linspace(400.0, 1000.0, 61)
    st = _stack()
    for p in st.parameters().values():
        p.vary = False
    with pytest.raises(FitError, match="no parameter is free to vary.*scale and tilt alone"):
        _objective(Spectrum(wl, _tmm_T(wl)), FitOptions(fit_offset=True), st)
    # joint fits name each spectrum's own scale p1_scale, p2_scale: still not a fit
    opts = FitOptions()
    parts = [build_part(i, Spectrum(wl, _tmm_T(wl)), st, opts) for i in range(2)]
    with pytest.raises(FitError, match="no parameter is free to vary"):
        Objective(parts, opts, shared={"film_thickness"})


def test_too_few_points_for_the_free_parameters_are_refused():
    wl = np.linspace(400.0, 1000.0, 5)
    with pytest.raises(FitError, match="5 usable data points cannot determine 6"):
        _objective(Spectrum(wl, _tmm_T(wl)))


def test_hold_and_release():
    wl = np.linspace(400.0, 1000.0, 61)
    obj = _objective(Spectrum(wl, _tmm_T(wl)), FitOptions(fit_spread="auto"))
    # "auto": the spread is there, held at the stack's value, at most 10 %
    p = obj.params["thickness_spread"]
    assert not p.vary and "thickness_spread" not in obj.var_names and p.max == 0.1
    obj.release("thickness_spread")
    assert obj.params["thickness_spread"].vary and obj.var_names[-1] == "thickness_spread"
    obj.release("thickness_spread")                 # twice is once
    assert obj.var_names.count("thickness_spread") == 1
    obj.hold("film_C")
    assert "film_C" not in obj.var_names and not obj.params["film_C"].vary
    # a held parameter keeps its start value, whatever a run is started from
    res = obj.minimize("leastsq", {**obj.params.valuesdict(), "film_C": 0.0123})
    assert res.params["film_C"].value == CAUCHY["C"]
    # the same through the direct least_squares path (no lmfit Parameters copies)
    res = obj.minimize("least_squares", {**obj.params.valuesdict(), "film_C": 0.0123})
    assert res.params["film_C"].value == CAUCHY["C"] and not res.params["film_C"].vary
    assert res.params.valuesdict()["film_C"] == CAUCHY["C"]
    assert "film_C" not in res.var_names and res.success
    spread = _objective(Spectrum(wl, _tmm_T(wl)), FitOptions(fit_spread=True))
    assert spread.params["thickness_spread"].vary and spread.params["thickness_spread"].max == 0.3


def test_joint_parts_share_only_what_they_are_told_to():
    wl = np.linspace(400.0, 1000.0, 61)
    opts = FitOptions()
    parts = [build_part(i, Spectrum(wl, _tmm_T(wl)), _stack(), opts) for i in range(2)]
    obj = Objective(parts, opts, shared={"film_thickness", "film_A", "film_B", "film_C"})
    assert {"film_thickness", "p1_scale", "p2_scale", "p1_tilt", "p2_tilt"} <= set(obj.params)
    assert "scale" not in obj.params
    assert sorted(k for k, *_ in obj.priors) == ["p1_scale", "p1_tilt", "p2_scale", "p2_tilt"]
    assert obj.ndata == 2 * wl.size


# -- one minimiser run ---------------------------------------------------------------------
def test_bounds_override_holds_for_one_run_only():
    wl = np.linspace(400.0, 1000.0, 121)
    y = _tmm_T(wl) + 0.002 * np.random.default_rng(8).standard_normal(wl.size)
    obj = _objective(Spectrum(wl, y), FitOptions(fit_scale=False, fit_tilt=False))
    lo0, hi0 = obj.params["film_thickness"].min, obj.params["film_thickness"].max
    start = {**obj.params.valuesdict(), "film_thickness": 435.0}
    res = obj.minimize("least_squares", start, bounds={"film_thickness": (430.0, 440.0)})
    d = res.params["film_thickness"].value
    assert 430.0 <= d <= 440.0                      # the truth, 450 nm, is outside
    # a start outside the run's bounds is moved into them, not refused
    outside = obj.minimize("least_squares", {**start, "film_thickness": 400.0},
                           bounds={"film_thickness": (430.0, 440.0)})
    assert 430.0 <= outside.params["film_thickness"].value <= 440.0
    assert (obj.params["film_thickness"].min, obj.params["film_thickness"].max) == (lo0, hi0)
    # without the override the same start runs on to the truth
    free = obj.minimize("least_squares", start)
    assert free.params["film_thickness"].value == pytest.approx(D_NM, abs=2.0)
    assert free.chisqr < res.chisqr


def test_staged_runs_do_not_touch_the_best_point_record():
    wl = np.linspace(400.0, 1000.0, 61)
    obj = _objective(Spectrum(wl, _tmm_T(wl)))
    masks = [np.arange(wl.size) < 30]
    obj.minimize("leastsq", masks=masks)
    assert obj.best_values is None and obj.best_chisqr == np.inf
    obj.minimize("leastsq")
    assert obj.best_values is not None
    assert obj.best_chisqr == pytest.approx(obj.chisqr_of(obj.best_values), rel=1e-9)


def test_a_run_cap_returns_the_best_point_of_that_run():
    wl = np.linspace(400.0, 1000.0, 61)
    obj = _objective(Spectrum(wl, _tmm_T(wl)))
    start = {**obj.params.valuesdict(), "film_thickness": 430.0}
    res = obj.minimize("least_squares", start, max_nfev=3)
    assert res.aborted and not res.success
    assert res.chisqr <= obj.chisqr_of(start) + 1e-9
    assert not obj.stop_reason                      # the fit as a whole goes on


def test_stop_request_and_budget():
    wl = np.linspace(400.0, 1000.0, 61)
    ev = threading.Event()
    opts = FitOptions(max_nfev=10)
    obj = Objective([build_part(0, Spectrum(wl, _tmm_T(wl)), _stack(), opts)], opts, stop=ev)
    assert not obj.should_stop()
    ev.set()
    assert obj.should_stop() and obj.stop_reason == "stopped on request"
    obj2 = Objective([build_part(0, Spectrum(wl, _tmm_T(wl)), _stack(), opts)], opts)
    obj2.minimize("leastsq")
    assert "evaluation budget of 10" in obj2.stop_reason
    assert obj2.iter_cb(lmfit.Parameters(), 0, None) is True


def test_bad_tie_is_refused_with_the_parameter_and_expression():
    wl = np.linspace(400.0, 1000.0, 61)
    st = _stack()
    st.parameters()["film_B"].expr = "film_nonexistent * 2"
    with pytest.raises(FitError, match=r"'film_B'.*film_nonexistent \* 2"):
        _objective(Spectrum(wl, _tmm_T(wl)), stack=st)
