"""Numerical Kramers-Kronig against models that are causal in closed form.

References: the Lorentz oscillator ε = ε∞ + f E0²/(E0² - E² - iΓE) is analytic in the
upper half plane, hence KK-consistent (M. Fox, *Optical Properties of Solids*, 2nd
ed., Oxford 2010, ch. 2; Lucarini et al., *Kramers-Kronig Relations in Optical
Materials Research*, Springer 2005, ch. 2); the Tauc-Lorentz ε1 is the closed-form KK
transform of its ε2 (Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996)). Both are
evaluated by fitting.dispersion, whose formulas are checked in test_dispersion.
"""

import numpy as np
import pytest

from fitting.dispersion import Cauchy, Drude, Lorentz, Oscillators, TaucLorentz
from fitting.errors import ParameterError
from fitting.kramers_kronig import kk_consistency, kk_integral, kk_n_from_kappa

WL = np.arange(150.0, 3001.0, 2.0)      # 0.41-8.3 eV, enclosing the bands below
LORENTZ = Oscillators(1.0, [Lorentz(2.0, 4.0, 0.5)])
TL = Oscillators(1.5, [TaucLorentz(120.0, 4.5, 1.8, 3.0)])


def test_pv_integral_of_constant_kappa_is_analytic():
    # PV ∫_a^b E'/(E'² - E²) dE' = ½ ln|(b² - E²)/(a² - E²)| (elementary integral).
    E = np.linspace(1.0, 5.0, 401)
    x = np.array([0.5, 2.0, 2.01, 3.0, 6.0])     # outside, on a node, between nodes
    got = kk_integral(E, np.ones_like(E), x)
    ref = 0.5 * np.log(np.abs((5.0 ** 2 - x ** 2) / (1.0 ** 2 - x ** 2)))
    assert np.allclose(got, ref, atol=1e-12)


def test_shared_logarithms_give_the_same_integral():
    # The consistency check takes ln|E' - E| once and reuses it for every second node
    # (its discretisation estimate); that must equal integrating on those nodes afresh,
    # including the ln 0 = 0 of targets on a node (no outside reference: an identity).
    from fitting.kramers_kronig import _log_dist, _seg_pv
    E = np.geomspace(0.5, 8.0, 121)
    k = LORENTZ.N(1239.84 / E).imag
    x = E[::3, None]                               # every third target sits on a node
    sub = np.zeros(E.size, bool)
    sub[::2] = True
    sub[-1] = True
    L = _log_dist(E, x)
    assert np.array_equal(_seg_pv(E[sub], k[sub], x, L[:, sub]), _seg_pv(E[sub], k[sub], x))
    assert np.array_equal(_seg_pv(E, k, x, L), _seg_pv(E, k, x))


@pytest.mark.parametrize("model", [LORENTZ, TL], ids=["lorentz", "tauc-lorentz"])
def test_subtractive_kk_reproduces_model_n(model):
    N = model.N(WL)
    i = int(np.argmin(np.abs(WL - 600)))
    n_kk = kk_n_from_kappa(WL, N.imag, n_anchor=(600.0, N.real[i]))
    inner = (WL > 200) & (WL < 2500)
    assert np.max(np.abs(n_kk - N.real)[inner]) < 3e-3
    assert abs(n_kk[i] - N.real[i]) < 1e-12      # anchored


def test_extension_reduces_truncation_error_for_tauc_lorentz():
    # κ of Tauc-Lorentz is still large at the 150 nm end; cutting it off leaves a
    # large error, the E^-3 continuation removes most of it (Lucarini et al. 2005, ch. 4).
    N = TL.N(WL)
    anchor = (600.0, float(TL.N([600.0]).real[0]))
    inner = (WL > 200) & (WL < 2500)
    err_cut = np.max(np.abs(kk_n_from_kappa(WL, N.imag, n_anchor=anchor, extend=False)
                            - N.real)[inner])
    err_ext = np.max(np.abs(kk_n_from_kappa(WL, N.imag, n_anchor=anchor) - N.real)[inner])
    assert err_cut > 0.03 and err_ext < err_cut / 10


def test_plain_kk_with_n_inf_on_wide_range():
    # Range 60 nm - 50 µm holds nearly all of the Lorentz band: plain KK with the
    # vacuum value 1 (+ε∞ - 1 = 0) reproduces n to ~1e-2 in band.
    wl = np.geomspace(60.0, 50000.0, 1500)
    N = LORENTZ.N(wl)
    n_kk = kk_n_from_kappa(wl, N.imag, n_anchor=1.0)
    inner = (wl > 150) & (wl < 3000)
    assert np.max(np.abs(n_kk - N.real)[inner]) < 1e-2


def test_result_follows_input_order():
    N = LORENTZ.N(WL)
    a = kk_n_from_kappa(WL, N.imag, n_anchor=(600.0, 1.5))
    b = kk_n_from_kappa(WL[::-1], N.imag[::-1], n_anchor=(600.0, 1.5))
    assert np.allclose(a, b[::-1], atol=1e-12)


@pytest.mark.parametrize("model", [LORENTZ, TL], ids=["lorentz", "tauc-lorentz"])
def test_consistency_passes_causal_models(model):
    N = model.N(WL)
    check = kk_consistency(WL, N.real, N.imag)
    assert check.consistent, check.message
    assert check.rms_dev < 1e-3
    assert check.n_kk.shape == WL.shape and check.compared.sum() > 0.8 * WL.size


def test_consistency_passes_transparent_conductor():
    # Drude free carriers (causal: Fox 2010, ch. 7) plus a Tauc-Lorentz gap, as for a
    # transparent conducting oxide: κ rises towards the infrared end of the range, so
    # the unmeasured infrared matters; the infrared pole term must allow for it.
    wl = np.arange(300.0, 2501.0, 3.0)
    N = Oscillators(3.8, [Drude(1.8, 0.12), TaucLorentz(60.0, 5.5, 1.5, 3.6)]).N(wl)
    check = kk_consistency(wl, N.real, N.imag)
    assert check.consistent, check.message
    assert check.compared.sum() > 0.3 * wl.size
    # ... while the same κ with the carriers' dispersion left out of n is flagged.
    n_wrong = Oscillators(3.8, [TaucLorentz(60.0, 5.5, 1.5, 3.6)]).N(wl).real
    assert not kk_consistency(wl, n_wrong, N.imag).consistent


def test_consistency_passes_cauchy_in_transparent_region():
    # κ = 0 in range: a Cauchy n is exactly the smooth out-of-range term (Aspnes 1985).
    n = Cauchy(1.9, 0.02, 0.001).N(WL[WL > 400]).real
    assert kk_consistency(WL[WL > 400], n, np.zeros_like(n)).consistent


@pytest.mark.parametrize("n_model", [Oscillators(1.0, [Lorentz(2.0, 4.3, 0.5)]),
                                     Oscillators(1.0, [Lorentz(2.0, 4.0, 0.8)]),
                                     Cauchy(1.8, 0.02)],
                         ids=["shifted-E0", "wider-band", "cauchy"])
def test_consistency_flags_mismatched_pair(n_model):
    kappa = LORENTZ.N(WL).imag
    n = n_model.N(WL).real
    check = kk_consistency(WL, n, kappa)
    assert not check.consistent
    assert check.rms_dev > 5 * check.tolerance
    assert "violate" in check.message


def test_noise_within_tolerance_is_accepted():
    rng = np.random.default_rng(0)
    N = TL.N(WL)
    n = N.real + rng.normal(0, 5e-4, WL.size)
    assert kk_consistency(WL, n, N.imag).consistent


def test_bad_input():
    with pytest.raises(ParameterError, match="negative"):
        kk_n_from_kappa(WL, -np.ones_like(WL), n_anchor=1.0)
    with pytest.raises(ParameterError, match="shape"):
        kk_consistency(WL, np.ones(3), np.zeros_like(WL))
    with pytest.raises(ParameterError, match="n_anchor"):
        kk_n_from_kappa(WL, np.zeros_like(WL), n_anchor="one")


def test_docstring_examples():
    import doctest

    import fitting.kramers_kronig as mod
    assert doctest.testmod(mod).failed == 0
