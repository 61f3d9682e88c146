"""Tests for fitting/verdict.py: residual statistics and the good / check / poor verdict.

References
----------
* Runs test: A. Wald and J. Wolfowitz, Ann. Math. Stat. 11, 147 (1940): for n₊
  positive and n₋ negative signs in random order the number of runs R has mean
  2n₊n₋/n + 1 and variance 2n₊n₋(2n₊n₋ - n)/(n²(n - 1)), and (R - μ)/σ tends to
  N(0, 1). Checked here by enumerating every arrangement, and by simulation.
* Lag-1 autocorrelation of white noise: mean ≈ -1/n, variance ≈ 1/n (M. S. Bartlett,
  J. R. Stat. Soc. Suppl. 8, 27 (1946)); of an AR(1) series x_t = φx_{t-1} + e_t it
  is φ (G. E. P. Box and G. M. Jenkins, *Time Series Analysis*, 1970, ch. 3).
* A running mean of w independent values has σ/√w (arithmetic).
* Spectra for the verdicts on real fits are made with the independent ``tmm``
  package from published n, κ (``validation/``: HfO2 from the Cauchy coefficients
  of Al-Kuhaili, Opt. Mater. 27, 383 (2004), which the default three-term Cauchy
  model can represent exactly; TiO2 from Sarkar et al. 2019 and Ta2O5 from Gao et
  al. 2012, tables with their DOIs in validation/data), fitted from the defaults a
  technician gets (as ``validation/run.py`` does).
* Quarter-wave extrema of a film of index n and thickness d lie at λ = 4nd/m
  (H. A. Macleod, *Thin-Film Optical Filters*, ch. 2).
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import threading

import numpy as np
import pytest

from fitting import verdict
from fitting.result import Alternative, ParamResult, Uncertainty
from fitting.verdict import diagnose, judge, reasons, runs_test_z


from validation.materials import material, substrate
from validation.synth import Instrument, measure

ORDINARY = Instrument(scale=1.005, tilt=-0.002, noise=0.002)


def _fit(key, d, grid, model="cauchy", instrument=ORDINARY, seed=11, edit=None, stop=None):
    """Spectrum of a published film from tmm, fitted from the defaults (validation/run.py)."""
    from fitting.fit import fit_spectrum
    from fitting.presets import default_stack
    from fitting.recipe import Recipe
    from fitting.spectrum import Spectrum
    wl = np.linspace(*grid)
    T, _ = measure(material(key), d, substrate("fused_silica"), wl, instrument, seed)
    sp = Spectrum(wl, T, name=f"{key} {d} nm")
    rec = Recipe(default_stack(model, "fused_silica"))
    stack = rec.new_stack()
    if edit is not None:
        edit(stack)
    return fit_spectrum(sp, stack, rec.make_fit_options(sp), stop=stop)


@pytest.fixture(scope="module")
def good():
    """A right model on tmm data with ordinary instrument errors: HfO2, 500 nm."""
    return _fit("HfO2", 500.0, (300.0, 1000.0, 141))


# -- the runs test -----------------------------------------------------------------------
def _runs(signs) -> int:
    return 1 + sum(a != b for a, b in zip(signs[1:], signs[:-1]))


def test_runs_z_uses_the_exact_mean_and_variance_of_the_run_count():
    # All C(12, 5) = 792 arrangements of 5 positive and 7 negative signs are equally
    # likely under randomness: their run counts give the exact mean and variance.
    n1, n = 5, 12
    counts = []
    for pos in itertools.combinations(range(n), n1):
        s = [1 if i in pos else -1 for i in range(n)]
        counts.append(_runs(s))
    mu, var = float(np.mean(counts)), float(np.var(counts))
    assert mu == pytest.approx(2 * 5 * 7 / 12 + 1)                   # Wald-Wolfowitz mean
    for s in ([1] * 5 + [-1] * 7,                                     # 2 runs
              [1, -1] * 5 + [-1, -1],                                 # 11 runs
              [1, 1, -1, -1, -1, 1, -1, 1, -1, -1, 1, -1]):           # 9 runs
        r = np.array(s, float) * np.linspace(1, 2, n)                 # magnitudes ignored
        assert runs_test_z(r) == pytest.approx((_runs(s) - mu) / math.sqrt(var), rel=1e-12)


def test_runs_z_is_standard_normal_for_white_noise():
    rng = np.random.default_rng(1940)
    z = np.array([runs_test_z(rng.standard_normal(200)) for _ in range(3000)])
    # 3000 draws: the mean is known to ±0.02 (1σ), the spread to ±2 %.
    assert abs(z.mean()) < 0.08
    assert z.std() == pytest.approx(1.0, abs=0.07)
    assert 0.035 < np.mean(np.abs(z) > 1.96) < 0.07                  # the 5 % tails


def test_runs_z_sees_a_shaped_misfit():
    rng = np.random.default_rng(2)
    x = np.linspace(0, 1, 200)
    sine = 0.01 * np.sin(2 * np.pi * 3 * x) + 0.002 * rng.standard_normal(x.size)
    assert runs_test_z(sine) < -8                                     # few, long runs
    alternating = np.array([1.0, -1.0] * 100)
    assert runs_test_z(alternating) > 8                               # too many runs
    assert runs_test_z(np.ones(50)) == -math.inf                      # one run only
    assert runs_test_z(np.array([1.0, -1.0] * 4)) == 0.0              # too few points
    # zeros and NaNs carry no sign and are left out
    r = np.array([1.0, np.nan, -1.0, 0.0] * 10)
    assert runs_test_z(r) == pytest.approx(runs_test_z(np.array([1.0, -1.0] * 10)))


# -- lag-1 autocorrelation and the other diagnostics ----------------------------------------
def test_lag1_of_white_noise_and_of_correlated_residuals():
    rng = np.random.default_rng(1946)
    n = 400
    lags = np.array([diagnose(rng.standard_normal(n), np.ones(n), dof=n, redchi=1.0,
                              noise_source="").lag1 for _ in range(300)])
    assert abs(lags.mean() + 1 / n) < 0.012
    assert lags.std() == pytest.approx(1 / math.sqrt(n), rel=0.15)   # Bartlett 1946
    phi = 0.7
    e = rng.standard_normal(5000)
    ar = np.empty_like(e)
    ar[0] = e[0]
    for i in range(1, e.size):
        ar[i] = phi * ar[i - 1] + e[i]
    d = diagnose(ar, np.ones(e.size), dof=e.size, redchi=1.0, noise_source="")
    assert d.lag1 == pytest.approx(phi, abs=0.04)


def test_diagnose_fields():
    rng = np.random.default_rng(9)
    n, s = 2000, 0.002
    r = s * rng.standard_normal(n)
    sig = np.linspace(s, 2 * s, n)         # the median of σ is what is reported
    sig[7] = 100.0                         # one odd σ does not move it
    r_nan = r.copy()
    r_nan[5] = np.nan                      # dropped, with its σ
    d = diagnose(r_nan, sig, dof=n - 3, redchi=1.1, noise_source="given")
    assert d.rms_residual == pytest.approx(float(np.sqrt(np.mean(np.delete(r, 5) ** 2))))
    assert d.noise_sigma == pytest.approx(1.5 * s, rel=1e-3)
    assert d.dof == n - 3 and d.redchi == 1.1 and d.noise_source == "given"
    assert d.structured_rms == pytest.approx(s / 3, rel=0.15)         # running mean of 9
    x = np.linspace(0, 1, n)
    d = diagnose(0.01 * np.sin(2 * np.pi * 2 * x), sig, dof=n, redchi=30.0, noise_source="")
    assert d.structured_rms == pytest.approx(0.01 / math.sqrt(2), rel=0.05)
    assert d.lag1 > 0.99


# -- verdicts on fits of tmm spectra -------------------------------------------------------
def test_right_model_with_ordinary_errors_is_good(good):
    assert good.verdict == "good", good.verdict_reasons
    assert good.verdict_reasons == ()
    assert judge(good) == ("good", ())
    assert good.thickness()[0] == pytest.approx(500.0, rel=0.01)


def test_cauchy_on_titania_through_its_edge_is_not_good_and_says_where():
    # TiO2 absorbs below ~380 nm (Sarkar 2019, κ > 0.05 at 345 nm); a Cauchy film has
    # no absorption, so a fit from 300 nm cannot describe the data there.
    res = _fit("TiO2", 600.0, (300.0, 1000.0, 141))
    assert res.verdict != "good"
    first = res.verdict_reasons[0]
    assert "short-wavelength end (300-" in first, res.verdict_reasons
    hi = float(first.split("short-wavelength end (300-")[1].split(" nm")[0])
    assert hi <= 450                                   # the worst sixth, at the edge
    assert "absorption edge" in first and f"start the fit range at {hi:.0f} nm" in first


def test_one_extremum_film_is_check():
    # Ta2O5 (Gao 2012) of 90 nm over 450-1100 nm: quarter-wave extrema at 4nd/m; with the
    # published n only m = 1 falls in the range.
    n = material("Ta2O5").n(700.0)
    m_in = [m for m in range(1, 10) if 450.0 <= 4 * n * 90.0 / m <= 1100.0]
    assert m_in == [1]
    res = _fit("Ta2O5", 90.0, (450.0, 1100.0, 131))
    assert res.verdict == "check"
    assert any("one interference extremum" in r for r in res.verdict_reasons)


def test_stopped_fit_is_poor():
    ev = threading.Event()
    ev.set()
    res = _fit("HfO2", 500.0, (300.0, 1000.0, 141), stop=ev)
    assert res.aborted and res.verdict == "poor"
    assert res.verdict_reasons[0].startswith("The fit was stopped before it finished")


def test_thickness_held_below_the_truth_by_its_bound_is_poor():
    # 2 % below the truth: the fit presses against the bound and says so.
    def cap(stack):
        p = stack.parameters()["film_thickness"]
        p.value, p.max = 470.0, 490.0
    res = _fit("HfO2", 500.0, (300.0, 1000.0, 141), edit=cap)
    assert res.params["film_thickness"].at_bound
    assert res.verdict == "poor"
    assert "film, thickness d ended at its upper bound (490 nm)" in res.verdict_reasons[0]
    # 10 % below: the fit finds another, grossly wrong basin inside the bounds, and
    # must not call it good either.
    def far(stack):
        p = stack.parameters()["film_thickness"]
        p.value, p.max = 400.0, 450.0
    res = _fit("HfO2", 500.0, (300.0, 1000.0, 141), edit=far)
    assert res.thickness()[0] < 450.0 and res.verdict == "poor"


# -- each reason alone, on the good result -------------------------------------------------
def _with_param(res, name, **kw):
    p = res.params[name]
    return dataclasses.replace(res, params={**res.params,
                                            name: dataclasses.replace(p, **kw)})


def test_parameter_at_a_bound(good):
    B = good.params["film_B"]
    at_max = _with_param(good, "film_B", value=B.max)
    v, why = judge(at_max)
    assert v == "check" and "film, B ended at its upper bound" in why[0]
    at_min = _with_param(good, "film_thickness", value=good.params["film_thickness"].min)
    assert judge(at_min)[0] == "poor"                  # a thickness at a bound is no result
    # no non-uniformity at all is an answer, not a bound problem; the top of its range is
    spread = ParamResult("thickness_spread", 0.0, None, 0.0, 0.0, 0.1, True)
    none = dataclasses.replace(good, params={**good.params, "thickness_spread": spread})
    assert judge(none)[0] == "good"
    top = dataclasses.replace(good, params={**good.params, "thickness_spread":
                                            dataclasses.replace(spread, value=0.1)})
    assert "thickness non-uniformity ended at its upper bound" in judge(top)[1][0]


def test_not_converged_is_check_and_stopped_is_poor(good):
    v, why = judge(dataclasses.replace(good, success=False, message="gave up"))
    assert v == "check" and "did not converge (gave up)" in why[0]
    assert judge(dataclasses.replace(good, aborted=True, success=False))[0] == "poor"


@pytest.mark.parametrize("rms, runs_z, redchi, expected", [
    (0.030, -12.0, 200.0, "poor"),     # misses by more than 2 % RMS, with a shape
    (0.006, -12.0, 9.0, "check"),      # above an instrument's 0.3 % accuracy
    (0.012, -12.0, 40.0, "poor"),      # over 1 % and far from chance: the model fails
    (0.012, -6.0, 40.0, "check"),      # over 1 %, shaped, but not far from chance
    (0.0025, -6.0, 2.5, "good"),       # shaped, but within the photometric accuracy
    (0.0025, -12.0, 2.5, "check"),     # ... unless far from chance (a faint-fringe basin)
    (0.030, -1.0, 200.0, "good"),      # large but shapeless: the noise was misjudged
    (0.030, -12.0, 1.5, "good"),       # within the noise
])
def test_misfit_levels(good, rms, runs_z, redchi, expected):
    d = dataclasses.replace(good.diagnostics, rms_residual=rms, runs_z=runs_z, redchi=redchi)
    assert judge(dataclasses.replace(good, diagnostics=d))[0] == expected


def _misfit_at(good, where, k=0.0):
    """The good result with a large shaped misfit over one end of the range."""
    wl = good.wavelength_nm
    lo, hi = wl[good.used][[0, -1]]
    sel = wl < lo + 0.15 * (hi - lo) if where == "short" else wl > hi - 0.15 * (hi - lo)
    meas = good.measured.copy()
    meas[sel] = 0.05                                   # T falls to 5 % there
    oc = good.optical["film"]
    optical = {"film": dataclasses.replace(oc, k=np.where(oc.wavelength_nm < lo + 0.15 * (
        hi - lo), k, 0.0))}
    d = dataclasses.replace(good.diagnostics, rms_residual=0.3, runs_z=-12.0, redchi=900.0)
    return dataclasses.replace(good, measured=meas, residuals=meas - good.fitted,
                               optical=optical, diagnostics=d)


def test_misfit_advice_follows_where_and_what(good):
    lo = good.wavelength_nm[good.used][0]
    why = judge(_misfit_at(good, "short"))[1][0]
    assert f"fall off towards short wavelengths ({lo:.0f}-" in why
    assert "model has no absorption there" in why and "nm up" in why
    why = judge(_misfit_at(good, "short", k=0.05))[1][0]
    assert "where the film absorbs" in why and "Tauc-Lorentz" in why
    why = judge(_misfit_at(good, "long"))[1][0]
    assert "check the substrate choice" in why


def test_other_solution_is_check(good):
    alt = Alternative(655.0, good.chisqr * 1.01, good.redchi * 1.01, "mirror")
    v, why = judge(dataclasses.replace(good, alternatives=(alt,)))
    assert v == "check" and "thickness 655.0 nm (mirror)" in why[0]


def test_correlation_matters_only_where_it_costs_precision(good):
    names = list(good.var_names)
    i, j = names.index("film_thickness"), names.index("film_A")
    c = np.eye(len(names))
    c[i, j] = c[j, i] = -0.99
    d = good.params["film_thickness"].value

    def with_u(u_c):
        u = Uncertainty("film_thickness", d, "nm", (), u_c)
        return dataclasses.replace(good, correl=c, uncertainty={"film_thickness": u})
    v, why = judge(with_u(0.006 * d))                  # U = 1.2 % of d
    assert v == "check" and "film, thickness d and film, A are hardly separable" in why[0]
    assert judge(with_u(0.004 * d))[0] == "good"       # U = 0.8 %: fine however correlated


def test_large_uncertainty_is_check(good):
    d = good.params["film_thickness"].value
    u = Uncertainty("film_thickness", d, "nm", (), 0.03 * d)        # U = 6 %
    v, why = judge(dataclasses.replace(good, uncertainty={"film_thickness": u}))
    assert v == "check" and "more than 5 % of the value" in why[-1]


def test_scale_far_from_one_is_check_and_very_far_poor(good):
    # Prior of the scale: 1 ± 1 % (an instrument's 100 % line, common practice).
    assert judge(_with_param(good, "scale", value=1.02))[0] == "good"
    v, why = judge(_with_param(good, "scale", value=1.04))
    assert v == "check" and "scale came out at 1.040" in why[0]
    v, why = judge(_with_param(good, "scale", value=0.92))      # 8 %: beyond any baseline
    assert v == "poor" and "scale came out at 0.920" in why[0] and "8 % off" in why[0]


def test_implausible_indices_are_check(good):
    # MgF2 (n = 1.38) on N-BK7 (1.517) has a mirror twin of index 1.517/1.38 = 1.10 with
    # the same quarter-wave extrema (Macleod, ch. 2); no dense film is that low.
    oc = good.optical["film"]
    low = {"film": dataclasses.replace(oc, n=np.full(oc.n.shape, 1.10))}
    v, why = judge(dataclasses.replace(good, optical=low))
    assert v == "check" and "mirror of a film of index n_substrate/n" in why[0]
    below_one = {"film": dataclasses.replace(oc, n=np.where(oc.wavelength_nm < 500, 0.9, 2.0))}
    assert any("drops below 1" in r for r in judge(dataclasses.replace(good,
                                                                     optical=below_one))[1])


def test_most_serious_reason_first(good):
    r = dataclasses.replace(_with_param(good, "scale", value=1.05), aborted=True)
    out = reasons(r)
    assert [x.level for x in out] == sorted((x.level for x in out),
                                            key=["poor", "check"].index)
    assert out[0].level == "poor" and len(out) >= 2
    assert verdict.PHOTOMETRIC_ACCURACY < verdict.GROSS_SYSTEMATIC_MISFIT < verdict.GROSS_MISFIT
