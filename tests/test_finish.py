"""Tests for fitting/finish.py: from the polished starts to a FitResult, step by step.

References
----------
* χ² bookkeeping (data plus prior terms, degrees of freedom = points + priors -
  free parameters) is compared with lmfit's own ``MinimizerResult`` (chisqr, nfree)
  on the same residual (M. Newville et al., lmfit, doi:10.5281/zenodo.11813).
* "Almost as well": Δχ² = 25 is a 5σ difference for one parameter (W. H. Press et
  al., *Numerical Recipes*, 3rd ed., 2007, sec. 15.6), scaled by χ²_red when the
  model misfits (R. T. Birge, Phys. Rev. 40, 207 (1932)).
* Kramers-Kronig: a Lorentz oscillator is causal by construction (V. Lucarini et
  al., *Kramers-Kronig Relations in Optical Materials Research*, Springer 2005,
  ch. 2), so its n, κ pass the check; an absorption band in κ with a featureless
  n violates it (a band must bring a dispersion wiggle in n, same source).
* Spectra: ``tmm`` (S. J. Byrnes, arXiv:1603.02720) with the Cauchy index of an
  invented Ta2O5-like film and Malitson's fused silica; HfO2 from the Cauchy
  coefficients of Al-Kuhaili, Opt. Mater. 27, 383 (2004) (``validation/``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
import pytest
import tmm

from fitting import finish
from fitting.dispersion import Cauchy, Lorentz, Oscillators
from fitting.finish import (ALT_CHI2_RATIO, Stats, alternatives, choose, kk_checks,
                            plain_message, scanned_film, statistics)
from fitting.fit import FitOptions
from fitting.objective import Objective, build_part
from fitting.result import OpticalConstants, ParamResult
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate
from fitting.units import alpha_per_cm


CAUCHY = {"A": 2.0, "B": 0.015, "C": 0.0005}
D_NM = 450.0


@dataclass
class Polished:
    """What the engine hands to finish for each polished start (fit._Polished)."""

    values: dict
    chisqr: float
    lm: object | None
    label: str
    note: str = ""
    implausible: bool = False


def _lm(success=True, message="Both actual and predicted relative reductions in the sum "
                              "of squares are at most ftol", aborted=False):
    return SimpleNamespace(success=success, message=message, aborted=aborted)


@pytest.fixture(scope="module")
def spectrum():
    wl = np.linspace(400.0, 1000.0, 121)
    Nf = Cauchy(**CAUCHY).N(wl)
    Ns = library_substrate("fused_silica").N(wl)
    T = np.array([tmm.inc_tmm("s", [1.0, a, b, 1.0], [np.inf, D_NM, 1e6, np.inf],
                              ["i", "c", "i", "i"], 0.0, w)["T"] for w, a, b in zip(wl, Nf, Ns)])
    return Spectrum(wl, T + 0.002 * np.random.default_rng(4).standard_normal(wl.size))


def _obj(spectrum, opts=None, vary_d=True):
    opts = opts or FitOptions()
    st = Stack([Layer("film", Cauchy(**CAUCHY), D_NM)], library_substrate("fused_silica"))
    st.parameters()["film_thickness"].vary = vary_d
    return Objective([build_part(0, spectrum, st, opts)], opts)


def _at(obj, **kw):
    return {**obj.params.valuesdict(), **kw}


# -- 1. choose ---------------------------------------------------------------------------
def test_a_converged_local_fit_is_kept_against_a_probe_lower_by_rounding(spectrum):
    # Issue 11, item 3: a Jacobian probe of the minimiser can land a hair below the
    # point it converged to; the converged fit is still the result.
    obj = _obj(spectrum)
    v = _at(obj)
    c = obj.chisqr_of(v)
    obj.best_values, obj.best_chisqr = _at(obj, film_thickness=D_NM + 1e-6), c - 1e-3
    ch = choose(obj, [Polished(v, c, _lm(), "scan 1")], v, "auto")
    assert ch.converged and ch.values == v and ch.index == 0
    assert ch.message == "χ² stopped improving" and "no local fit" not in ch.message
    # also a point seen that is better by more than rounding does not replace a fit
    # that converged: that point was a probe, not a minimum
    obj.best_chisqr = c - 5.0
    assert choose(obj, [Polished(v, c, _lm(), "scan 1")], v, "auto").values == v


def test_a_fit_cut_short_yields_to_a_better_point_seen(spectrum):
    obj = _obj(spectrum)
    v = _at(obj, film_thickness=D_NM + 2.0)
    c = obj.chisqr_of(v)
    seen = _at(obj)
    obj.best_values, obj.best_chisqr = seen, c - 5.0
    for lm in (_lm(success=False, message="max evaluations"), _lm(aborted=True), None):
        ch = choose(obj, [Polished(v, c, lm, "scan 1")], v, "auto")
        assert not ch.converged and ch.values == seen
    assert "evaluation cap" in choose(obj, [Polished(v, c, _lm(aborted=True), "s")], v,
                                      "auto").message
    # ... but not to one better only by rounding
    obj.best_chisqr = c - 1e-3
    assert choose(obj, [Polished(v, c, _lm(aborted=True), "s")], v, "auto").values == v


def test_without_a_local_fit_the_best_point_seen_stands(spectrum):
    obj = _obj(spectrum)
    start = _at(obj, film_thickness=440.0)
    ch = choose(obj, [], start, "auto")
    assert ch.values == start and not ch.converged and ch.message == "no local fit finished"
    obj.best_values = _at(obj)
    ch = choose(obj, [], start, "differential_evolution")
    assert ch.values == obj.best_values and "global search did not finish" in ch.message
    obj.stop_reason = "stopped on request"
    assert choose(obj, [], start, "auto").message == "stopped on request"


def test_best_first_and_a_mirror_yields_to_a_plausible_solution(spectrum):
    obj = _obj(spectrum)
    a, b, c = (_at(obj, film_thickness=d) for d in (450.0, 520.0, 600.0))
    pol = [Polished(b, 130.0, _lm(), "b"), Polished(a, 120.0, _lm(), "a"),
           Polished(c, 300.0, _lm(), "c")]
    ch = choose(obj, pol, a, "auto")
    assert ch.order == [1, 0, 2] and ch.label == "a"
    # the best fit has an index no dense film has: the next within Δχ² < 25 wins
    pol[1].implausible = True
    assert choose(obj, pol, a, "auto").label == "b"
    pol[0].chisqr = 120.0 + 26 * max(120.0 / (obj.ndata - len(obj.var_names)), 1.0)
    assert choose(obj, pol, a, "auto").label == "a"    # too much worse: the mirror stays


@pytest.mark.parametrize("success, msg, text", [
    (True, "... at most `ftol` ...", "χ² stopped improving"),
    (True, "... at most `xtol` ...", "the parameters stopped changing"),
    (True, "`gtol` termination condition is satisfied.", "the gradient vanished"),
    (False, "Number of calls to function has reached maxfev",
     "the local minimiser gave up: Number of calls"),
])
def test_plain_messages(success, msg, text):
    assert plain_message(success, msg).startswith(text)


def test_scanned_film(spectrum):
    assert scanned_film(_obj(spectrum)) == ("film_thickness", 0)
    assert scanned_film(_obj(spectrum, vary_d=False)) is None


# -- 2. statistics -----------------------------------------------------------------------
def test_statistics_agree_with_lmfit_bookkeeping(spectrum):
    obj = _obj(spectrum)
    res = obj.minimize("leastsq")
    values = res.params.valuesdict()
    st = statistics(obj, values)
    # lmfit minimised data + prior residuals: its χ² and free count are the reference
    assert st.chisqr == pytest.approx(res.chisqr, rel=1e-9)
    assert st.dof == res.nfree == obj.ndata + 2 - len(obj.var_names)
    assert st.redchi == pytest.approx(res.redchi, rel=1e-9)
    part = obj.parts[0]
    np.testing.assert_allclose(st.residual, part.y - part.evaluate(
        obj.local_values(part, values)))
    assert "4th differences" in st.sigma_source
    assert f"median {100 * float(np.median(part.sigma)):.3g} %" in st.sigma_source
    given = Spectrum(spectrum.wavelength_nm, spectrum.values,
                     sigma=np.full(spectrum.wavelength_nm.size, 0.002))
    assert statistics(_obj(given), values).sigma_source.startswith("given with the spectrum")


@pytest.mark.parametrize("fit_range, masks, n_masked", [
    (None, ((600.0, 650.0),), 11),
    ((400.0, 995.0), ((400.0, 696.0),), 60),   # as many points masked as used (60 + 60)
    (None, (), 0)])
def test_fitted_curve_reuses_the_statistics_curve(spectrum, fit_range, masks, n_masked):
    # The curve on the used points comes from statistics(); computed afresh over the
    # whole fit range it is the same, and the masked points get the model too (with
    # the 100 % line's tilt at their own wavelengths).
    opts = FitOptions(fit_range_nm=fit_range, mask_windows_nm=masks, fit_tilt=True)
    obj = _obj(spectrum, opts)
    values = obj.tied_values(_at(obj, film_thickness=D_NM + 3.0, tilt=0.01, scale=1.02))
    st = statistics(obj, values)
    (part, local, sigma), = st.parts
    reused = finish._curves(part, local, sigma, st.model[0])
    fresh = finish._curves(part, local, sigma)
    np.testing.assert_array_equal(reused["fit"], fresh["fit"])
    np.testing.assert_array_equal(reused["sigma"], fresh["sigma"])
    assert np.all(np.isfinite(reused["fit"][part.in_range]))
    assert np.all(np.isnan(reused["fit"][~part.in_range]))
    assert (part.in_range & ~part.used).sum() == n_masked


# -- 4. other solutions ------------------------------------------------------------------
def _stats(chisqr, dof):
    return Stats([], chisqr, dof, chisqr / dof, np.zeros(0), np.zeros(0), "")


def test_alternatives_by_delta_chi2(spectrum):
    obj = _obj(spectrum)
    at = lambda d: _at(obj, film_thickness=d)  # noqa: E731
    pol = [Polished(at(450.0), 200.0, _lm(), "best"),
           Polished(at(520.0), 210.0, _lm(), "close", note="higher order"),  # Δχ² = 10
           Polished(at(451.0), 205.0, _lm(), "same basin"),                  # within 0.5 %
           Polished(at(600.0), 260.0, _lm(), "far")]                         # Δχ² = 60
    ch = choose(obj, pol, pol[0].values, "auto")
    alts = alternatives(obj, pol, ch, _stats(200.0, 200), {})
    assert [a.thickness_nm for a in alts] == [520.0]
    assert alts[0].note == "higher order" and alts[0].redchi == pytest.approx(210.0 / 200)
    # a model that misfits (χ²_red = 4) widens "almost as well" by that factor (Birge)
    alts = alternatives(obj, pol, ch, _stats(800.0, 200), {})
    assert [a.thickness_nm for a in alts] == [520.0, 600.0]
    # a thickness σ wider than the gap makes two solutions one
    assert alternatives(obj, pol, ch, _stats(200.0, 200), {"film_thickness": 40.0}) == []


def test_alternatives_need_chi2_within_the_ratio(spectrum):
    obj = _obj(spectrum)
    pol = [Polished(_at(obj, film_thickness=450.0), 10.0, _lm(), "best"),
           Polished(_at(obj, film_thickness=520.0), 14.0, _lm(), "in"),
           Polished(_at(obj, film_thickness=600.0), 16.0, _lm(), "out")]
    ch = choose(obj, pol, pol[0].values, "auto")
    assert 14.0 < ALT_CHI2_RATIO * 10.0 < 16.0
    assert [a.thickness_nm for a in alternatives(obj, pol, ch, _stats(10.0, 100), {})] == [520.0]


# -- 4. Kramers-Kronig on a subsample ----------------------------------------------------
def _oc(wl, N):
    return OpticalConstants("film", wl, N.real, N.imag, alpha_per_cm(N.imag, wl))


def test_kk_check_of_a_lorentz_film_passes_on_a_subsample(monkeypatch):
    from fitting import kramers_kronig
    seen = []
    real = kramers_kronig.kk_consistency

    def spy(wl, n, k, **kw):
        seen.append(np.asarray(wl))
        return real(wl, n, k, **kw)
    monkeypatch.setattr(kramers_kronig, "kk_consistency", spy)
    wl = np.linspace(250.0, 1500.0, 20000)      # fine enough to pick any energy
    N = Oscillators(1.5, [Lorentz(2.0, 5.5, 0.6)]).N(wl)
    out = kk_checks({"film": _oc(wl, N)})
    assert out["film"].consistent is True, out["film"].message
    sub = seen[0]
    from fitting.finish import _KK_POINTS
    assert 0.8 * _KK_POINTS <= sub.size <= _KK_POINTS
    # spread evenly in photon energy over the whole range
    assert sub[0] == wl[0] and sub[-1] == wl[-1]
    dE = np.abs(np.diff(1.0 / sub))
    assert np.all(np.abs(dE / np.median(dE) - 1) < 0.15)
    # and the subsample gives the answer of a grid four times as dense
    assert real(wl[::16], N.real[::16], N.imag[::16]).consistent is True


def test_kk_check_flags_an_absorption_band_without_its_dispersion():
    wl = np.linspace(300.0, 1200.0, 500)
    n = Cauchy(**CAUCHY).N(wl).real
    k = 0.05 * np.exp(-0.5 * ((wl - 650.0) / 40.0) ** 2)
    out = kk_checks({"film": _oc(wl, n + 1j * k)})
    assert out["film"].consistent is False
    assert kk_checks({"film": _oc(wl[:8], n[:8] + 0j)}) == {}       # too few points


# -- 5. warnings -------------------------------------------------------------------------
def test_warnings_in_plain_words():
    names = ("film_thickness", "film_A", "film_B")
    c = np.array([[1.0, -0.97, 0.2], [-0.97, 1.0, 0.99], [0.2, 0.99, 1.0]])
    params = {"film_B": ParamResult("film_B", -0.01, vary=True)}
    kk = {"film": SimpleNamespace(consistent=False, layer="film", message="off by 0.01")}
    w = finish.warnings(params, names, c, np.eye(3), {"film_B": -0.01}, ["film"], kk,
                        ["n of film could not be computed"], False)
    corr = next(x for x in w if x.startswith("Strongly correlated"))
    # largest first, with readable names
    assert corr.index("film, A and film, B (+0.990)") < corr.index(
        "film, thickness d and film, A (-0.970)")
    assert any("film, B = -0.01 is negative" in x for x in w)
    assert any("not a Kramers-Kronig pair (off by 0.01)" in x for x in w)
    assert "n of film could not be computed" in w
    none = finish.warnings({}, names, None, None, {}, ["film"], {}, [], True)
    assert none == [("Uncertainties could not be estimated: the fit ended early, away from "
                     "a minimum.")]


def test_quantities_outside_the_measured_range_are_not_reported():
    # Issue 11, item 4: n at 633 nm from a 910-2000 nm scan. HfO2 (Al-Kuhaili 2004).
    from validation.materials import material, substrate
    from validation.synth import Instrument, measure

    from fitting.fit import fit_spectrum
    from fitting.presets import default_stack
    wl = np.linspace(910.0, 2000.0, 110)
    T, _ = measure(material("HfO2"), 1500.0, substrate("fused_silica"), wl,
                   Instrument(noise=0.002), seed=6)
    res = fit_spectrum(Spectrum(wl, T), default_stack())
    note = next(w for w in res.warnings if "are not reported" in w)
    assert "550, 633 nm" in note and "1000" not in note.split("are not")[0]
    assert math.isnan(res.optical["film"].at(633.0)[0])
    assert not any("n@633" in k for k in res.uncertainty)
    assert res.thickness()[0] == pytest.approx(1500.0, rel=0.01)
