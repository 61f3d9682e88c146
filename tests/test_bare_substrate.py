"""Substrate from a measured bare slide (fitting/bare_substrate.py).

Reference: bare-slab transmission from the `tmm` package (inc_tmm, S. J. Byrnes,
arXiv:1603.02720) and the lossless-slab relation T = 2n/(n²+1) (Swanepoel 1983,
J. Phys. E 16, 1214, eq. 3).
"""

import numpy as np
import pytest
import tmm

from fitting.bare_substrate import substrate_from_bare_spectrum
from fitting.errors import ParameterError
from fitting.spectrum import Spectrum
from fitting.substrates import fused_silica



def _tmm_bare_T(wl, N, d_nm):
    return np.array([tmm.inc_tmm("s", [1, N[i], 1], [np.inf, d_nm, np.inf], ["i", "i", "i"],
                                 0.0, lam)["T"] for i, lam in enumerate(wl)])


def test_absorption_of_a_slide_is_recovered_from_its_transmission():
    wl = np.linspace(250, 1000, 76)
    n = fused_silica().N(wl).real
    kappa = 2e-7 * np.exp(-(wl - 250) / 120)        # a UV absorption tail (invented)
    T = _tmm_bare_T(wl, n + 1j * kappa, 1e6)
    sub = substrate_from_bare_spectrum(Spectrum(wl, T), thickness_mm=1.0,
                                       material=fused_silica(), smooth_points=1)
    got = sub.N(wl).imag
    # The inversion neglects κ in the surface reflectance (κ << n): error ~ (κ/n)², tiny.
    assert np.allclose(got, kappa, rtol=1e-4, atol=1e-11)
    assert np.allclose(sub.N(wl).real, n)


def test_lossless_slide_gives_n_from_T():
    wl = np.linspace(400, 800, 41)
    s = 1.5 + 0.01 * (800 - wl) / 400
    T = 2 * s / (s ** 2 + 1)                         # Swanepoel 1983, eq. 3
    sub = substrate_from_bare_spectrum(Spectrum(wl, T), smooth_points=1)
    assert np.allclose(sub.N(wl).real, s, atol=1e-9)
    assert np.all(sub.N(wl).imag == 0)


def test_noise_above_the_lossless_limit_gives_zero_kappa_not_nan():
    wl = np.linspace(400, 800, 60)
    T = np.full(wl.shape, 0.99)                      # above 2n/(n²+1) for fused silica
    sub = substrate_from_bare_spectrum(Spectrum(wl, T), material=fused_silica())
    k = sub.N(wl).imag
    assert np.all(np.isfinite(k)) and np.all(k == 0)


def test_opaque_or_reflectance_spectra_are_refused():
    wl = np.linspace(400, 800, 60)
    T = np.where(wl < 500, 0.01, 0.9)        # a UV-blocking slide, opaque below 500 nm
    with pytest.raises(ParameterError, match=r"slide.csv: the slide is nearly opaque "
                                             r"\(T <= 5 %\) at 400-494.9\d* nm; crop"):
        substrate_from_bare_spectrum(Spectrum(wl, T, source="slide.csv"), smooth_points=1)
    with pytest.raises(ParameterError, match="reflectance spectrum; measure the bare slide "
                                             "in transmission"):
        substrate_from_bare_spectrum(Spectrum(wl, np.full(wl.shape, 0.04), quantity="R"))
