"""Fit-result checks added at integration: the Kramers-Kronig record of a fitted model and
the refusal of raw detector counts.

KK reference: a Lorentz oscillator film is causal by construction (H. A. Lorentz; see
Lucarini et al., *Kramers-Kronig Relations in Optical Materials Research*, Springer 2005),
so the check on its fitted n, κ must pass.
"""

import numpy as np
import pytest

from fitting.dispersion import Lorentz, Oscillators
from fitting.errors import FitError
from fitting.fit import FitOptions, fit_spectrum
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


def _stack(d=400.0):
    film = Oscillators(eps_inf=1.5, terms=[Lorentz(f=2.0, E0=5.5, gamma=0.6)])
    return Stack([Layer("film", film, d)], library_substrate("fused_silica", 1.0))


def test_fitted_oscillator_film_passes_the_kk_check_and_the_report_says_so():
    wl = np.linspace(300, 1000, 351)
    T = _stack().transmittance(wl) + np.random.default_rng(3).normal(0, 0.002, wl.size)
    res = fit_spectrum(Spectrum(wl, T), _stack(420.0), FitOptions(method="least_squares"))
    kk = res.extra["kk"]["film"]
    assert kk["consistent"] is True, kk
    assert "[[Kramers-Kronig check]]" in res.report()


def test_raw_counts_are_refused_with_advice():
    wl = np.linspace(400, 800, 50)
    spec = Spectrum(wl, np.full(wl.shape, 3.0e4), metadata={"ordinate": "counts"}, name="raw")
    with pytest.raises(FitError, match="raw detector counts.*100 % line"):
        fit_spectrum(spec, _stack())
