"""Swanepoel envelope method against spectra built from Swanepoel's own closed form.

Reference: R. Swanepoel, J. Phys. E 16, 1214 (1983), eq. (1) for T of an absorbing
film on a thick transparent substrate, and his claim (abstract, sec. 5) that the
method gives d and n to better than 1 %.
"""

from dataclasses import replace

import numpy as np
import pytest

from fitting.dispersion import Cauchy, Sellmeier
from fitting.envelope import cauchy_start, sellmeier_start, swanepoel_envelope
from fitting.errors import ParameterError
from fitting.stack import Layer, Stack
from fitting.substrates import Substrate, generic_glass


def swanepoel_T(wl, n, s, d, alpha_per_nm, envelope=None):
    """Swanepoel (1983) eq. (1); ``envelope`` = "max"/"min" gives eqs. (2)/(3) (cos φ = ±1)."""
    x = np.exp(-alpha_per_nm * d)
    A = 16 * n ** 2 * s
    B = (n + 1) ** 3 * (n + s ** 2)
    C = 2 * (n ** 2 - 1) * (n ** 2 - s ** 2)
    D = (n - 1) ** 3 * (n - s ** 2)
    cos = {"max": 1.0, "min": -1.0}.get(envelope, None)
    if cos is None:
        cos = np.cos(4 * np.pi * n * d / wl)
    return A * x / (B - C * x * cos + D * x ** 2)


def asi_film(wl):
    # The hypothetical a-Si:H film of Swanepoel (1983), sec. 5, recalled from memory:
    # n = 3e5/λ² + 2.6, log10 α = 1.5e6/λ² - 8 (λ in nm, α in nm⁻¹), d = 1 µm, s = 1.51.
    return 3e5 / wl ** 2 + 2.6, 10 ** (1.5e6 / wl ** 2 - 8)


def oxide_film(wl):
    # A TiO2-like Cauchy film (n ≈ 2.3) with an exponential weak-absorption tail
    # (Urbach 1953 form); invented values, d = 1.2 µm, on fused silica s = 1.46.
    lu = wl * 1e-3
    n = 2.2 + 0.03 / lu ** 2
    alpha = 1e-5 * np.exp((1239.84 / wl - 3.2) / 0.25)       # nm⁻¹
    return n, alpha


WL = np.arange(600.0, 2001.0, 1.0)
WL_OX = np.arange(420.0, 1601.0, 1.0)


@pytest.mark.parametrize("film,wl,s,d", [(asi_film, WL, 1.51, 1000.0),
                                         (oxide_film, WL_OX, 1.46, 1200.0)])
def test_recovers_thickness_and_index_within_one_percent(film, wl, s, d):
    n, alpha = film(wl)
    env = swanepoel_envelope(wl, swanepoel_T(wl, n, s, d, alpha), s)
    assert env.ok, env.message
    assert env.wavelength_nm.size >= 8
    assert env.thickness_nm == pytest.approx(d, rel=0.01)
    n_true = film(env.wavelength_nm)[0]
    assert np.max(np.abs(env.n / n_true - 1)) < 0.01
    # Orders: integer at maxima, half-integer at minima, and 2 n d = m λ.
    frac = env.orders % 1.0
    assert np.all(frac[env.kind == "max"] == 0.0) and np.all(frac[env.kind == "min"] == 0.5)
    assert np.allclose(2 * n_true * d / env.wavelength_nm, env.orders, atol=0.1)


def test_envelopes_follow_swanepoel_eqs_2_and_3():
    n, alpha = asi_film(WL)
    env = swanepoel_envelope(WL, swanepoel_T(WL, n, 1.51, 1000.0, alpha), 1.51)
    inside = np.isfinite(env.T_max_env)
    assert inside.sum() > 0.7 * WL.size
    TM = swanepoel_T(WL, n, 1.51, 1000.0, alpha, "max")
    Tm = swanepoel_T(WL, n, 1.51, 1000.0, alpha, "min")
    # Within 1e-3 away from the ends; the last half fringe at each end is extrapolated
    # and the short end is where absorption changes fastest.
    mid = (WL > 700) & (WL < 1400)
    assert np.max(np.abs(env.T_max_env[mid] - TM[mid])) < 1e-3
    assert np.max(np.abs(env.T_min_env[mid] - Tm[mid])) < 1e-3
    assert np.max(np.abs(env.T_max_env[inside] - TM[inside])) < 6e-3
    assert np.max(np.abs(env.T_min_env[inside] - Tm[inside])) < 6e-3
    assert np.all(np.isnan(env.T_max_env[~inside]))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_noise_of_0p2_percent(seed):
    n, alpha = asi_film(WL)
    rng = np.random.default_rng(seed)
    T = swanepoel_T(WL, n, 1.51, 1000.0, alpha) + rng.normal(0, 0.002, WL.size)
    env = swanepoel_envelope(WL, T, 1.51)
    assert env.ok, env.message
    assert env.thickness_nm == pytest.approx(1000.0, rel=0.01)
    assert np.max(np.abs(env.n / asi_film(env.wavelength_nm)[0] - 1)) < 0.01
    # Noise wiggles are not taken for fringes: maxima and minima strictly alternate.
    assert np.all(env.kind[1:] != env.kind[:-1])


def test_thin_film_without_fringes_returns_not_ok():
    n, alpha = asi_film(WL)
    env = swanepoel_envelope(WL, swanepoel_T(WL, n, 1.51, 50.0, alpha), 1.51)
    assert not env.ok and not env
    assert "too thin" in env.message
    assert np.isnan(env.thickness_nm)
    assert env.T_max_env.shape == WL.shape


def test_agrees_with_stack_engine_and_accepts_substrate_object():
    # Same physics through Pellucid's transfer-matrix stack: a lossless Cauchy film
    # on a 1 mm glass substrate (the stack engine is checked against tmm in test_stack).
    wl = np.arange(450.0, 1500.0, 1.0)
    film = Cauchy(2.0, 0.02)
    sub = Substrate(generic_glass(1.52), 1.0)
    T = Stack([Layer("film", film, 900.0)], sub).transmittance(wl)
    env = swanepoel_envelope(wl, T, sub)
    assert env.ok, env.message
    assert env.thickness_nm == pytest.approx(900.0, rel=0.01)
    start = cauchy_start(env)
    assert start["A"] == pytest.approx(2.0, abs=0.02)
    assert start["B"] == pytest.approx(0.02, abs=0.005)


def test_sellmeier_start_recovers_single_oscillator():
    # n² = 1 + B λ²/(λ² - C) sampled at fake extrema; the Wemple-DiDomenico
    # linearisation is exact for this form.
    wl = np.linspace(500, 1500, 12)
    n = np.real(Sellmeier(1, B1=3.5, C1=0.04).N(wl))
    n_f, alpha = asi_film(WL)
    env = swanepoel_envelope(WL, swanepoel_T(WL, n_f, 1.51, 1000.0, alpha), 1.51)
    fake = replace(env, wavelength_nm=wl, n=n)
    start = sellmeier_start(fake)
    assert start["B1"] == pytest.approx(3.5, rel=1e-9)
    assert start["C1"] == pytest.approx(0.04, rel=1e-9)


def test_cauchy_start_refuses_failed_result():
    n, alpha = asi_film(WL)
    env = swanepoel_envelope(WL, swanepoel_T(WL, n, 1.51, 50.0, alpha), 1.51)
    with pytest.raises(ParameterError, match="successful envelope"):
        cauchy_start(env)


def test_percent_input_is_refused_with_advice():
    with pytest.raises(ParameterError, match="divide percent by 100"):
        swanepoel_envelope(WL, np.full(WL.size, 80.0), 1.51)


def test_unsorted_input_gives_same_answer():
    n, alpha = asi_film(WL)
    T = swanepoel_T(WL, n, 1.51, 1000.0, alpha)
    a = swanepoel_envelope(WL, T, 1.51)
    b = swanepoel_envelope(WL[::-1], T[::-1], 1.51)
    assert a.thickness_nm == pytest.approx(b.thickness_nm, rel=1e-9)
    assert np.allclose(a.T_max_env, b.T_max_env[::-1], equal_nan=True)


def test_absorption_at_extrema_from_upper_envelope():
    # Swanepoel (1983) x from T_M (eq. 1 at cos φ = 1 solved for x): α within 10 % where
    # the single-pass loss αd exceeds 0.5 %, and no absorption far in the clear region.
    n, alpha = asi_film(WL)
    env = swanepoel_envelope(WL, swanepoel_T(WL, n, 1.51, 1000.0, alpha), 1.51)
    a_true = asi_film(env.wavelength_nm)[1] * 1e7          # nm⁻¹ -> cm⁻¹
    lossy = a_true * 1000.0e-7 > 5e-3
    assert lossy.sum() >= 5
    assert np.allclose(env.alpha_cm[lossy], a_true[lossy], rtol=0.1)
    assert np.all(env.alpha_cm[env.wavelength_nm > 1200] < 10.0)


def test_docstring_examples():
    import doctest

    import fitting.envelope as mod
    assert doctest.testmod(mod).failed == 0


def test_refined_extrema_match_a_plain_quartic_per_extremum():
    # The extrema are refined all at once; each must be what one quartic through the
    # raw 1/T points around it, evaluated on the search grid, gives (numpy's polyfit
    # and polyval, one extremum at a time).
    from scipy.signal import find_peaks

    from fitting.envelope import _refine
    wl = np.arange(600.0, 1600.0, 2.0)
    n, alpha = oxide_film(wl)
    clean = swanepoel_T(wl, n, 1.46, 1200.0, alpha)[::-1]
    nu = 1.0 / wl[::-1]
    Tn = clean + np.random.default_rng(4).normal(0, 2e-3, wl.size)
    imax, imin = find_peaks(clean)[0], find_peaks(-clean)[0]
    idx = np.sort(np.concatenate([imax, imin]))
    is_max = np.isin(idx, imax)
    centres = nu[idx] + 0.1 * (nu[1] - nu[0])      # a little off the true extremum
    halves = 0.25 * np.gradient(nu[idx])
    halves[0] = 0.2 * (nu[1] - nu[0])               # too few points: keeps the fallback
    fallback_T = np.full(idx.size, 0.5)
    got_nu, got_T = _refine(nu, Tn, centres, halves, is_max, centres, fallback_T)
    P = np.polynomial.polynomial
    xs = np.linspace(-0.6, 0.6, 241)
    for j in range(idx.size):
        sel = np.abs(nu - centres[j]) <= halves[j]
        if sel.sum() < 9:
            assert (got_nu[j], got_T[j]) == (centres[j], 0.5)
            continue
        c = P.polyfit((nu[sel] - centres[j]) / halves[j], 1.0 / Tn[sel], 4)
        v = P.polyval(xs, c)
        k = int(np.argmin(v) if is_max[j] else np.argmax(v))
        assert 0 < k < xs.size - 1
        assert got_nu[j] == pytest.approx(centres[j] + xs[k] * halves[j], rel=1e-12)
        assert got_T[j] == pytest.approx(1.0 / v[k], rel=1e-12)
    assert idx.size >= 8 and got_T[0] == 0.5
