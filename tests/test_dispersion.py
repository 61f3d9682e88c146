"""Dispersion models against published formulas, Kramers-Kronig and effective-medium theory.

Sources named beside each check. Numerical Kramers-Kronig integrals use
``scipy.integrate.quad`` (QUADPACK; ``weight='cauchy'`` is its principal-value rule
QAWC, Piessens et al., *QUADPACK*, Springer 1983).
"""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import quad

from fitting.dispersion import (MODEL_KINDS, Bruggeman, Cauchy, Constant, Drude, Lorentz,
                                Oscillators, Sellmeier, Tabulated, TaucLorentz, model_from_dict,
                                tauc_lorentz_chi)
from fitting.errors import (ParameterError, PellucidError, RecipeError, SpectrumFormatError,
                            WavelengthRangeError)
from fitting.params import Param
from fitting.units import HC_EV_NM

WL = np.linspace(250.0, 2000.0, 71)


# ---------------------------------------------------------------------------------------
# Kramers-Kronig machinery (Kramers 1927, Kronig 1926; in the form of e.g. Wooten,
# *Optical Properties of Solids*, Academic Press (1972), ch. 6):
#   Re χ(E) = (2/π) P∫_0^∞ ξ Im χ(ξ) / (ξ² - E²) dξ
#   Im χ(E) = -(2E/π) P∫_0^∞ Re χ(ξ) / (ξ² - E²) dξ   (+ a DC-conductivity term, below)
# The first is written with g(ξ) = ξ Im χ(ξ) and 1/(ξ²-E²) = [1/(ξ-E) - 1/(ξ+E)]/(2E), the
# second with ξ²-E² split the same way, so the pole at ξ = E is a plain Cauchy principal
# value (QUADPACK's QAWC) and the tail beyond `hi` a regular integral. g is regular at
# ξ = 0 even for Drude's Im χ ~ 1/ξ; `lo` = 1e-12 eV keeps the model away from E = 0,
# which changes the integrals by < 1e-10.

_Q = dict(limit=500, epsabs=1e-12, epsrel=1e-11)


def _pv(f, lo, hi, E):
    """P∫_lo^hi f(ξ)/(ξ-E) dξ."""
    if lo < E < hi:
        return quad(f, lo, hi, weight="cauchy", wvar=E, **_Q)[0]
    return quad(lambda x: f(x) / (x - E), lo, hi, **_Q)[0]


def kk_real_from_imag(im, E, lo=1e-12, hi=300.0):
    g = lambda x: x * im(x)  # noqa: E731
    head = (_pv(g, lo, hi, E) - quad(lambda x: g(x) / (x + E), lo, hi, **_Q)[0]) / (2 * E)
    tail = quad(lambda x: g(x) / (x * x - E * E), hi, np.inf, **_Q)[0]
    return 2 * (head + tail) / np.pi


def kk_imag_from_real(re, E, lo=1e-12, hi=300.0):
    head = _pv(re, lo, hi, E) - quad(lambda x: re(x) / (x + E), lo, hi, **_Q)[0]
    tail = quad(lambda x: re(x) * 2 * E / (x * x - E * E), hi, np.inf, **_Q)[0]
    return -(head + tail) / np.pi


def _scalar(term, v, part):
    return lambda x: float(getattr(term.chi(np.array([x]), v)[0], part))


TL_SETS = [
    # (A, E0, C, Eg) in eV: an a-Si-like set (Jellison & Modine 1996, Table I, from
    # memory), a wide-gap oxide-like set, and a set with the gap close to the peak.
    (122.0, 3.45, 2.54, 1.20),
    (100.0, 4.5, 1.5, 3.0),
    (50.0, 6.0, 5.0, 5.5),
]


@pytest.mark.parametrize("A,E0,C,Eg", TL_SETS)
def test_tauc_lorentz_eps1_is_kramers_kronig_of_eps2(A, E0, C, Eg):
    # Closed form of Jellison & Modine, Appl. Phys. Lett. 69, 371 and 2137 (1996), against a
    # numerical KK integral of its own ε2; energies below, at and above the gap and the peak.
    t = TaucLorentz(A, E0, C, Eg)
    v = t.values()
    im = _scalar(t, v, "imag")
    for E in (0.3, 0.8 * Eg, Eg, 1.15 * Eg, E0, 2.5 * E0):
        re = float(t.chi(np.array([E]), v)[0].real)
        assert re == pytest.approx(kk_real_from_imag(im, E, lo=Eg), abs=1e-8), E


def test_tauc_lorentz_eps2_is_the_published_formula():
    # ε2(E) = A E0 C (E - Eg)² / [(E² - E0²)² + C² E²] / E for E > Eg, 0 below
    # (Jellison & Modine 1996).
    A, E0, C, Eg = TL_SETS[1]
    E = np.linspace(0.5, 10, 200)
    lorentz = (E * E - E0 * E0) ** 2 + C * C * E * E
    ref = np.where(E > Eg, A * E0 * C * (E - Eg) ** 2 / lorentz / E, 0.0)
    assert np.allclose(tauc_lorentz_chi(E, A, E0, C, Eg).imag, ref, rtol=1e-13, atol=0)


def _tauc_lorentz_eps1_published(E, A, E0, C, Eg):
    """ε1 - ε∞ term by term as printed (Jellison & Modine, Appl. Phys. Lett. 69, 371
    (1996), eq. 3, with the erratum 69, 2137), transcribed independently of the code."""
    E2 = E * E
    a = np.sqrt(4 * E0 ** 2 - C ** 2)
    g2 = E0 ** 2 - C ** 2 / 2
    z4 = (E2 - g2) ** 2 + a ** 2 * C ** 2 / 4
    a_ln = (Eg ** 2 - E0 ** 2) * E2 + Eg ** 2 * C ** 2 - E0 ** 2 * (E0 ** 2 + 3 * Eg ** 2)
    a_atan = (E2 - E0 ** 2) * (E0 ** 2 + Eg ** 2) + Eg ** 2 * C ** 2
    return (A * C * a_ln / (2 * np.pi * z4 * a * E0)
            * np.log((E0 ** 2 + Eg ** 2 + a * Eg) / (E0 ** 2 + Eg ** 2 - a * Eg))
            - A * a_atan / (np.pi * z4 * E0)
            * (np.pi - np.arctan((2 * Eg + a) / C) + np.arctan((a - 2 * Eg) / C))
            + 2 * A * E0 * Eg * (E2 - g2) / (np.pi * z4 * a)
            * (np.pi + 2 * np.arctan(2 * (g2 - Eg ** 2) / (a * C)))
            - A * E0 * C * (E2 + Eg ** 2) / (np.pi * z4 * E) * np.log(np.abs(E - Eg) / (E + Eg))
            + 2 * A * E0 * C * Eg / (np.pi * z4)
            * np.log(np.abs(E - Eg) * (E + Eg)
                     / np.sqrt((E0 ** 2 - Eg ** 2) ** 2 + Eg ** 2 * C ** 2)))


def test_tauc_lorentz_eps1_matches_the_published_terms():
    # The code gathers the five published terms by their E-dependence (fewer array
    # operations); the sum must be the published one to rounding, for films' usual
    # parameters (gap below the peak, C < 2 E0) drawn at random.
    rng = np.random.default_rng(11)
    E = np.linspace(0.5, 8.0, 401)
    for _ in range(300):
        E0 = rng.uniform(1.0, 12.0)
        C, Eg, A = rng.uniform(0.05, 1.9 * E0), rng.uniform(0.2, 0.98 * E0), rng.uniform(1, 500)
        ref = _tauc_lorentz_eps1_published(E, A, E0, C, Eg)
        got = tauc_lorentz_chi(E, A, E0, C, Eg).real
        assert np.max(np.abs(got - ref)) <= 1e-10 * np.max(np.abs(ref)), (A, E0, C, Eg)


def test_tauc_lorentz_slopes_match_differences():
    # The closed-form dχ/dθ of tauc_lorentz_slopes against 4th-order central differences
    # of the closed form itself (truncation ~h⁴; at the better of two steps the
    # difference is good to ~1e-8 of max|dχ/dθ|, away from the kink at E = Eg).
    from fitting.dispersion import tauc_lorentz_slopes
    rng = np.random.default_rng(5)
    E = np.linspace(0.6, 6.0, 300)
    names = ["A", "E0", "C", "Eg"]
    for _ in range(60):
        E0 = rng.uniform(1.0, 10.0)
        v = {"A": rng.uniform(1, 300), "E0": E0, "C": rng.uniform(0.05, 1.9 * E0),
             "Eg": rng.uniform(0.2, 0.98 * E0)}
        got = tauc_lorentz_slopes(E, v["A"], v["E0"], v["C"], v["Eg"], names)
        away = np.abs(E - v["Eg"]) > 1e-3
        for row, k in enumerate(names):
            errs = []
            for rel in (1e-4, 1e-5):
                h = rel * v[k]
                if k == "C" and v["C"] + 2 * h >= 2 * v["E0"]:
                    continue

                def f(dx, k=k, v=v):
                    return tauc_lorentz_chi(E, **{**v, k: v[k] + dx})
                ref = (-f(2 * h) + 8 * f(h) - 8 * f(-h) + f(-2 * h)) / (12 * h)
                errs.append(np.max(np.abs(got[row] - ref)[away]) / np.max(np.abs(ref)[away]))
            assert min(errs) < 1e-6, (k, v, errs)


def test_tauc_lorentz_kept_shapes_never_go_stale():
    # TaucLorentz.chi keeps the last edge shapes (χ = A · shape(E0, C, Eg)): every call,
    # whichever parameter or energy grid changed, must equal the closed form of
    # Jellison & Modine (1996) computed afresh.
    t = TaucLorentz()
    E1, E2 = np.linspace(1.0, 6.0, 300), np.linspace(1.0, 6.0, 301)
    rng = np.random.default_rng(3)
    v = t.values()
    for _ in range(60):
        k = rng.choice(["A", "E0", "C", "Eg", "grid", "same"])
        if k in ("A", "E0", "C", "Eg"):
            v = {**v, k: v[k] * (1 + 0.01 * rng.standard_normal())}
        E = E2 if k == "grid" else E1
        ref = tauc_lorentz_chi(E, v["A"], v["E0"], v["C"], v["Eg"])
        assert np.allclose(t.chi(E, v), ref, rtol=1e-13, atol=1e-15)
    E1[10] += 1e-3                               # the same array, edited in place
    ref = tauc_lorentz_chi(E1, v["A"], v["E0"], v["C"], v["Eg"])
    assert np.allclose(t.chi(E1, v), ref, rtol=1e-13, atol=1e-15)


def test_tauc_lorentz_eps1_is_continuous_through_the_gap():
    # ε1 is analytic across E = Eg (the log singularities cancel; Jellison & Modine 1996).
    A, E0, C, Eg = TL_SETS[1]
    E = Eg + np.array([-1e-6, -1e-9, 0.0, 1e-9, 1e-6])
    re = tauc_lorentz_chi(E, A, E0, C, Eg).real
    assert np.all(np.isfinite(re))
    assert np.ptp(re) < 1e-4


@pytest.mark.parametrize("f,E0,gamma", [(1.5, 4.0, 0.3), (0.4, 1.2, 2.0)])
def test_lorentz_obeys_kramers_kronig_and_f_sum_rule(f, E0, gamma):
    t = Lorentz(f, E0, gamma)
    v = t.values()
    im, re = _scalar(t, v, "imag"), _scalar(t, v, "real")
    for E in (0.2, 0.7 * E0, E0, 1.3 * E0, 3 * E0):
        assert re(E) == pytest.approx(kk_real_from_imag(im, E), abs=1e-8)
        assert im(E) == pytest.approx(kk_imag_from_real(re, E), abs=1e-8)
    # f-sum rule ∫_0^∞ E ε2 dE = (π/2) f E0² (Wooten 1972, ch. 6, with the oscillator
    # strength written as f E0²): checks the meaning of f (static ε contribution).
    s = quad(lambda x: x * im(x), 0, np.inf, **_Q)[0]
    assert s == pytest.approx(np.pi / 2 * f * E0 ** 2, rel=1e-8)
    assert re(1e-9) == pytest.approx(f, rel=1e-9)


@pytest.mark.parametrize("Ep,gamma", [(2.0, 0.15), (0.8, 0.5)])
def test_drude_obeys_kramers_kronig_with_its_dc_pole(Ep, gamma):
    # χ = -Ep²/(E² + iΓE) has a pole at E = 0 (DC conductivity). Re χ still follows the
    # plain KK integral, because ξ Im χ(ξ) = Ep² Γ/(ξ² + Γ²) is regular at 0 and the pole's
    # residue only feeds Im χ. Im χ needs the extra term σ0/(ε0 ω), here s/E with
    # s = lim_{E->0} E Im χ(E) (J. D. Jackson, *Classical Electrodynamics*, 3rd ed.,
    # Wiley (1999), sec. 7.10; from memory). s is read from the model, not assumed.
    t = Drude(Ep, gamma)
    v = t.values()
    im, re = _scalar(t, v, "imag"), _scalar(t, v, "real")
    s_dc = 1e-7 * im(1e-7)
    assert s_dc == pytest.approx(Ep ** 2 / gamma, rel=1e-9)  # σ0 = ε0 ωp² τ (Drude)
    for E in (0.05, 0.5 * gamma, gamma, 1.0, 4.0):
        assert re(E) == pytest.approx(kk_real_from_imag(im, E), abs=1e-8)
        assert im(E) == pytest.approx(kk_imag_from_real(re, E) + s_dc / E, rel=1e-8)
    # f-sum rule ∫_0^∞ E ε2 dE = (π/2) Ep² (Wooten 1972, ch. 6): Ep is the plasma energy.
    assert quad(lambda x: x * im(x), 0, np.inf, **_Q)[0] == pytest.approx(np.pi / 2 * Ep ** 2,
                                                                           rel=1e-8)


def test_lorentz_with_vanishing_resonance_tends_to_drude():
    # E0 -> 0 with f E0² = Ep² fixed turns a Lorentz oscillator into the Drude term
    # (M. Fox, *Optical Properties of Solids*, 2nd ed., OUP (2010), ch. 7; from memory).
    Ep, gamma = 1.5, 0.2
    E = np.linspace(0.3, 5, 50)
    d = Drude(Ep, gamma)
    dv = d.chi(E, d.values())
    for E0, tol in ((0.02, 1e-2), (0.002, 1e-4)):
        lz = Lorentz().chi(E, {"f": Ep ** 2 / E0 ** 2, "E0": E0, "gamma": gamma})
        assert np.max(np.abs(lz - dv) / np.abs(dv)) < tol


def test_oscillator_model_sums_its_terms():
    # ε = ε∞ + Σ χ_k (the definition of the model; e.g. Fujiwara, *Spectroscopic
    # Ellipsometry*, Wiley (2007), ch. 5).
    m = Oscillators(2.1, [TaucLorentz(80, 4.2, 1.8, 3.1), Lorentz(0.5, 7.0, 0.5), Drude(0.9, 0.1)])
    parts = m.components(WL)
    assert np.allclose(m.epsilon(WL), 2.1 + sum(parts), rtol=1e-13)
    # Term parameters are addressed by position: o1_Eg, o3_Ep ...
    assert m.params["o1_Eg"].value == 3.1 and m.params["o3_Ep"].value == 0.9
    shifted = m.N(WL, {"o1_Eg": 3.5})
    assert not np.allclose(shifted, m.N(WL))
    assert np.allclose(shifted, Oscillators(2.1, [TaucLorentz(80, 4.2, 1.8, 3.5),
                                                  Lorentz(0.5, 7.0, 0.5), Drude(0.9, 0.1)]).N(WL))


# ---------------------------------------------------------------------------------------
def test_cauchy_formula():
    # n = A + B/λ² + C/λ⁴, λ in µm (Cauchy 1836; common practice).
    m = Cauchy(1.45, 0.0036, 1e-4)
    wl = np.array([400.0, 632.8, 1550.0])
    lu = wl / 1000
    assert np.allclose(m.N(wl), 1.45 + 0.0036 / lu ** 2 + 1e-4 / lu ** 4, rtol=1e-14)
    assert np.all(m.N(wl).imag == 0)


def test_urbach_tail():
    # κ = κ0 exp((E - E_edge)/E_U) (Urbach, Phys. Rev. 92, 1324 (1953)): κ0 at E_edge and
    # d ln κ / dE = 1/E_U.
    m = Cauchy(2.0, 0.01, urbach=True, k0=0.02, Eu=0.15, E_edge=3.2)
    k = m.N(HC_EV_NM / np.array([3.2, 2.9, 2.6])).imag
    assert k[0] == pytest.approx(0.02, rel=1e-12)
    assert np.allclose(np.diff(np.log(k)), -0.3 / 0.15, rtol=1e-10)


def test_sellmeier_one_term_formula():
    # n² = A + B λ²/(λ² - C) (Sellmeier 1871), λ in µm.
    m = Sellmeier(1, A=1.2, B1=1.1, C1=0.012)
    lu2 = (WL / 1000) ** 2
    assert np.allclose(m.N(WL).real ** 2, 1.2 + 1.1 * lu2 / (lu2 - 0.012), rtol=1e-13)


def _sample_models():
    rng = np.random.default_rng(7)
    out = []
    for _ in range(4):
        out.append(Oscillators(rng.uniform(1, 3), [
            TaucLorentz(rng.uniform(20, 200), rng.uniform(3, 6), rng.uniform(0.5, 2.5),
                        rng.uniform(1, 2.9)),
            Lorentz(rng.uniform(0, 2), rng.uniform(0.5, 8), rng.uniform(0.01, 2)),
            Drude(rng.uniform(0, 3), rng.uniform(0.01, 1))]))
    out.append(Cauchy(1.9, 0.03, urbach=True, k0=0.5, Eu=0.1, E_edge=4.0))
    out.append(Bruggeman(Oscillators(1, [Drude(9.0, 0.05)]), Constant(1.5), 0.3))
    return out


@pytest.mark.parametrize("model", _sample_models(), ids=lambda m: type(m).__name__)
def test_loss_convention_kappa_and_eps2_non_negative(model):
    # exp(-iωt) convention: passive media have κ >= 0 and ε2 >= 0 (Born & Wolf ch. 14).
    N = model.N(WL)
    assert np.all(N.imag >= 0)
    assert np.all((N * N).imag >= -1e-12)


# ---------------------------------------------------------------------------------------
# Bruggeman effective medium (Bruggeman, Ann. Phys. 416, 636 (1935); Aspnes, Thin Solid
# Films 89, 249 (1982)).

MATERIALS = {
    "dielectric": Cauchy(2.1, 0.02),
    "absorbing": Cauchy(2.5, 0.05, urbach=True, k0=0.05, Eu=0.3, E_edge=4.5),
    "void": Constant(1.0),
    "metal": Oscillators(1.0, [Drude(8.0, 0.1)]),
}


def _eps(m, wl=WL):
    return m.N(wl) ** 2


@pytest.mark.parametrize("host,incl", [("dielectric", "void"), ("absorbing", "void"),
                                       ("dielectric", "metal"), ("absorbing", "dielectric")])
def test_bruggeman_end_points_and_symmetry(host, incl):
    h, i = MATERIALS[host], MATERIALS[incl]
    assert np.allclose(Bruggeman(h, i, 0.0).N(WL), h.N(WL), rtol=1e-12, atol=1e-14)
    assert np.allclose(Bruggeman(h, i, 1.0).N(WL), i.N(WL), rtol=1e-12, atol=1e-14)
    for f in (0.1, 0.37, 0.5, 0.8):
        # The Bruggeman equation is symmetric in its two constituents (Aspnes 1982).
        assert np.allclose(Bruggeman(h, i, f).N(WL), Bruggeman(i, h, 1 - f).N(WL),
                           rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("host,incl", [("dielectric", "void"), ("absorbing", "dielectric"),
                                       ("dielectric", "metal")])
def test_bruggeman_solves_its_equation_on_the_physical_branch(host, incl):
    h, i = MATERIALS[host], MATERIALS[incl]
    ea, eb = _eps(i), _eps(h)
    prev = None
    for f in np.linspace(0, 1, 41):
        e = _eps(Bruggeman(h, i, f))
        res = f * (ea - e) / (ea + 2 * e) + (1 - f) * (eb - e) / (eb + 2 * e)
        assert np.max(np.abs(res)) < 1e-12
        assert np.all(e.imag >= -1e-12)
        if prev is not None:  # the chosen root follows f continuously (no branch jump)
            assert np.max(np.abs(e - prev) / (np.abs(ea) + np.abs(eb))) < 0.2
        prev = e


def test_bruggeman_dilute_limit_is_maxwell_garnett():
    # To first order in f both give ε = εb + 3 f εb (εa - εb)/(εa + 2 εb) (Aspnes 1982,
    # eqs. for Maxwell Garnett and Bruggeman); the difference is O(f²).
    h, i = MATERIALS["absorbing"], MATERIALS["dielectric"]
    ea, eb = _eps(i), _eps(h)

    def maxwell_garnett(f):  # (ε - εb)/(ε + 2εb) = f (εa - εb)/(εa + 2εb)
        y = f * (ea - eb) / (ea + 2 * eb)
        return eb * (1 + 2 * y) / (1 - y)

    first_order = lambda f: eb + 3 * f * eb * (ea - eb) / (ea + 2 * eb)  # noqa: E731
    scale = np.abs(eb)
    errs = []
    for f in (0.01, 0.005):
        br = _eps(Bruggeman(h, i, f))
        errs.append(np.max(np.abs(br - maxwell_garnett(f)) / scale))
        assert np.max(np.abs(br - first_order(f)) / scale) < 2 * f ** 2
        assert np.max(np.abs(maxwell_garnett(f) - first_order(f)) / scale) < 2 * f ** 2
    assert errs[0] > 1e-7  # the two theories do differ at second order ...
    assert errs[1] / errs[0] == pytest.approx(0.25, abs=0.03)  # ... and only there


@settings(max_examples=60, deadline=None)
@given(n1=st.floats(1.0, 4.0), k1=st.floats(0.0, 3.0), n2=st.floats(0.05, 4.0),
       k2=st.floats(0.0, 6.0), f=st.floats(0.0, 1.0))
def test_bruggeman_properties_for_any_passive_pair(n1, k1, n2, k2, f):
    # For any two passive media (including metals, n < 1 < κ): the result solves the
    # Bruggeman equation, is passive (κ >= 0, n >= 0) and is symmetric (Aspnes 1982).
    a, b = Constant(n1, k1), Constant(n2, k2)
    wl = np.array([550.0])
    N = Bruggeman(a, b, f).N(wl)
    e, ea, eb = N ** 2, a.N(wl) ** 2, b.N(wl) ** 2
    res = f * (eb - e) / (eb + 2 * e) + (1 - f) * (ea - e) / (ea + 2 * e)
    assert abs(res[0]) < 1e-10
    assert N.real[0] >= 0 and N.imag[0] >= 0
    assert np.allclose(N, Bruggeman(b, a, 1 - f).N(wl), rtol=1e-10, atol=1e-12)


def test_bruggeman_within_wiener_bounds_for_lossless_parts():
    # Any isotropic mixture lies between the series and parallel (Wiener 1912) bounds
    # (Aspnes 1982).
    h, i = MATERIALS["dielectric"], MATERIALS["void"]
    ea, eb = _eps(i).real, _eps(h).real
    for f in (0.2, 0.5, 0.7):
        e = _eps(Bruggeman(h, i, f))
        assert np.all(np.abs(e.imag) < 1e-14)
        assert np.all(e.real <= f * ea + (1 - f) * eb)
        assert np.all(e.real >= 1 / (f / ea + (1 - f) / eb))


# ---------------------------------------------------------------------------------------
def _every_kind():
    tab = Tabulated([300, 500, 800, 1200, 2100], [2.4, 2.2, 2.1, 2.05, 2.02],
                    [0.1, 0.01, 0.0, 0.0, 0.0], name="film table")
    return {
        "constant": Constant(1.73, 0.002),
        "cauchy": Cauchy(1.62, 0.011, -0.0003),
        "cauchy-urbach": Cauchy(2.2, 0.03, urbach=True, k0=0.004, Eu=0.27, E_edge=3.3),
        "sellmeier-1": Sellmeier(1, B1=1.3, C1=0.013),
        "sellmeier-3": Sellmeier(3, valid_nm=(280.0, 2500.0), B1=0.7, C1=0.005, B2=0.4,
                                 C2=0.013, B3=0.9, C3=97.0),
        "oscillators": Oscillators(1.3, [TaucLorentz(150, 3.9, 2.1, 2.4), Lorentz(0.3, 8, 1.0),
                                         Drude(0.7, 0.09)]),
        "tabulated": tab,
        "bruggeman": Bruggeman(Cauchy(2.0, 0.02), Constant(1.0), 0.22),
        "bruggeman-nested": Bruggeman(Bruggeman(tab, Oscillators(2, [Lorentz()]), 0.6),
                                      Sellmeier(2, B1=1.0, C1=0.01, B2=0.2, C2=0.03), 0.1),
    }


def test_every_registered_kind_is_covered():
    kinds = {m.kind for m in _every_kind().values()}
    assert kinds == set(MODEL_KINDS)


@pytest.mark.parametrize("name,model", list(_every_kind().items()))
def test_round_trip_through_json_gives_identical_index(name, model):
    wl = np.linspace(300.0, 2000.0, 60)
    # Vary a parameter first so that stored (not default) values must survive.
    if model.params:
        k, p = next((k, p) for k, p in model.params.items() if p.max > p.min)
        model.set(k, p.value + 0.1 * (p.max - p.value) if math.isfinite(p.max) else p.value * 1.1)
        model.params[k].vary = not model.params[k].vary
    d = json.loads(json.dumps(model.to_dict()))  # recipes are JSON: no inf, no numpy types
    back = model_from_dict(d)
    assert type(back) is type(model)
    assert np.array_equal(back.N(wl), model.N(wl))
    assert back.to_dict() == model.to_dict()
    assert {k: (p.value, p.min, p.max, p.vary) for k, p in back.params.items()} == \
        {k: (p.value, p.min, p.max, p.vary) for k, p in model.params.items()}
    assert back.valid_nm == model.valid_nm


# ---------------------------------------------------------------------------------------
def test_tabulated_interpolates_linearly_and_refuses_extrapolation():
    t = Tabulated([400, 600, 800], [2.0, 1.8, 1.7], [0.02, 0.0, 0.0])
    assert t.N([500.0])[0] == pytest.approx(1.9 + 0.01j, abs=1e-15)
    with pytest.raises(WavelengthRangeError, match=r"valid from 400 to 800 nm.*390-500 nm"):
        t.N([390.0, 500.0])
    with pytest.raises(WavelengthRangeError, match="800.1"):
        t.N([800.1])


def test_tabulated_from_file(tmp_path):
    p = tmp_path / "film.nk"
    p.write_text("# wavelength n k\nwavelength_nm;n;k\n400;2.0;0.02\n600;1.8;0\n800;1.7\n",
                 encoding="utf-8")
    t = Tabulated.from_file(p)
    assert np.allclose(t.N([400.0, 800.0]), [2.0 + 0.02j, 1.7])
    bad = tmp_path / "bad.nk"
    bad.write_text("400 2.0 0\n500 two 0\n", encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match=r"bad.nk, line 2: column 2 holds text"):
        Tabulated.from_file(bad)
    neg = tmp_path / "neg.nk"
    neg.write_text("400 2.0 -0.1\n500 2.0 0\n", encoding="utf-8")
    with pytest.raises(SpectrumFormatError, match="must not be negative"):
        Tabulated.from_file(neg)


@pytest.mark.parametrize("args,match", [
    (([400, 500], [2.0]), "equal length"),
    (([400], [2.0]), "at least 2 rows"),
    (([400, 400], [2.0, 2.1]), "distinct"),
    (([400, 500], [2.0, math.nan]), "finite"),
    (([400, math.nan], [2.0, 2.1]), "finite"),
    (([400, 500], [2.0, 2.1], [0.0, -0.01]), "must not be negative"),
])
def test_bad_tables(args, match):
    with pytest.raises(ParameterError, match=match):
        Tabulated(*args)


# ---------------------------------------------------------------------------------------
# Bad input: specific error types with messages a user can act on, never a silent NaN.

@pytest.mark.parametrize("make,match", [
    (lambda: Cauchy(A=math.nan), "'A'.*finite"),
    (lambda: Cauchy(A="abc"), "'A'.*not a number"),
    (lambda: Cauchy(A=9.0), r"'A'.*within \[1, 4\]"),
    (lambda: Cauchy(D=1.0), "unknown parameter of Cauchy"),
    (lambda: Cauchy(k0=0.1), "unknown parameter of Cauchy"),  # no Urbach tail requested
    (lambda: Sellmeier(4), "1, 2 or 3 terms"),
    (lambda: Oscillators(2.0, []), "at least one term"),
    (lambda: TaucLorentz(A=50, E0=3.0, C=6.0, Eg=1.5), r"C < 2·E0 = 6 eV"),
    (lambda: Lorentz(gamma=-0.1), "'gamma'"),
    (lambda: Bruggeman(Cauchy(), Constant(1.0), 1.5), "'fraction'"),
    (lambda: Param("x", 1.0, 2.0, 1.0), "lower bound must be smaller"),
    (lambda: Param("x", 1.0, 1.0, 1.0), "lower bound must be smaller"),
    (lambda: Param("x", 5.0, 0.0, 1.0), r"within its bounds \[0, 1\]"),
    (lambda: Param("x", 0.5, math.nan, 1.0), "bounds must not be NaN"),
    (lambda: Param("x", math.inf), "finite"),
])
def test_bad_parameters_are_refused(make, match):
    with pytest.raises(ParameterError, match=match) as info:
        make()
    assert isinstance(info.value, PellucidError) and isinstance(info.value, ValueError)


def test_scalar_wavelength_gives_scalar_index():
    # Every model is vectorised and also takes a plain float (common practice for numpy APIs).
    for m in _every_kind().values():
        N = m.N(600.0)
        assert np.shape(N) == () and np.isfinite(N)
        assert N == m.N(np.array([600.0]))[0]


def test_set_refuses_nan_and_out_of_bounds():
    m = Cauchy()
    with pytest.raises(ParameterError, match="finite"):
        m.set("B", math.nan)
    with pytest.raises(ParameterError, match="within"):
        m.set("B", 3.0)
    m.set("B", 3.0, widen=True)
    assert m.params["B"].max == 3.0


@pytest.mark.parametrize("wl,match", [
    ([500.0, math.nan], "must be finite"),
    ([500.0, math.inf], "must be finite"),
    ([0.0, 500.0], "must be positive"),
    ([-300.0], "must be positive"),
    ([], "at least one wavelength"),
])
def test_bad_wavelengths_are_refused(wl, match):
    for m in _every_kind().values():
        with pytest.raises(ParameterError, match=match):
            m.N(wl)


def test_nan_in_override_values_is_refused():
    m = Oscillators(2.0, [TaucLorentz()])
    with pytest.raises(ParameterError, match="'o1_A'.*finite"):
        m.N(WL, {"o1_A": math.nan})
    with pytest.raises(ParameterError, match="'o1_C'.*Tauc-Lorentz needs C < 2·E0"):
        m.N(WL, {"o1_C": 9.5})


def test_pole_on_a_requested_wavelength_is_an_error_not_nan():
    # An undamped Lorentz oscillator (Γ = 0) diverges at E = E0; a Sellmeier term at λ² = C.
    lz = Oscillators(2.0, [Lorentz(1.0, 2.0, 0.0)])
    with pytest.raises(ParameterError, match=r"non-finite refractive index at 619.9"):
        lz.N([500.0, HC_EV_NM / 2.0])
    assert np.all(np.isfinite(lz.N([500.0, 700.0])))  # fine away from the pole
    with pytest.raises(ParameterError, match="non-finite refractive index at 500 nm"):
        Sellmeier(1, B1=1.0, C1=0.25).N([500.0])


def test_outside_model_range():
    m = Sellmeier(1, valid_nm=(300.0, 1000.0))
    with pytest.raises(WavelengthRangeError,
                       match=r"Sellmeier \(1 term\) is valid from 300 to 1000 nm"):
        m.N([250.0, 500.0])
    # A mixture is valid only where both parts are.
    b = Bruggeman(Tabulated([400, 900], [2.0, 1.9]), m, 0.3)
    assert b.valid_nm == (400.0, 900.0)
    with pytest.raises(WavelengthRangeError):
        b.N([350.0])


@pytest.mark.parametrize("d,match", [
    ({"kind": "plasma"}, r"'model.kind'.*unknown model 'plasma'; choose one of cauchy"),
    ({}, r"'model.kind'.*unknown model None"),
    ("cauchy", "must be an object"),
    ({"kind": "oscillators", "terms": ["lorentz", "phonon"]}, "unknown term 'phonon'"),
    ({"kind": "oscillators", "terms": []}, "non-empty list"),
    ({"kind": "sellmeier", "terms": 5}, "1, 2 or 3 terms"),
    ({"kind": "tabulated", "n": [1, 2]}, r"'model.wavelength_nm'.*is missing"),
    ({"kind": "cauchy", "params": {"Q": 1.0}}, r"'model.params.Q'.*unknown parameter"),
    ({"kind": "cauchy", "params": {"A": {"value": 1.5, "min": 2.0, "max": 1.0}}},
     r"'model.params.A'.*lower bound"),
    ({"kind": "cauchy", "params": {"A": "NaN"}}, r"'model.params.A'.*finite"),
    ({"kind": "cauchy", "params": []}, r"'model.params'.*must be an object"),
    ({"kind": "bruggeman", "host": {"kind": "cauchy"}, "inclusion": {"kind": "x"}},
     r"'model.inclusion.kind'.*unknown model 'x'"),
])
def test_bad_model_records(d, match):
    with pytest.raises(RecipeError, match=match):
        model_from_dict(d)
