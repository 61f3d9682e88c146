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
    kk = res.kk["film"]
    assert kk.consistent is True, kk
    assert "[[Kramers-Kronig check]]" in res.report()


def test_raw_counts_are_refused_with_advice():
    wl = np.linspace(400, 800, 50)
    spec = Spectrum(wl, np.full(wl.shape, 3.0e4), metadata={"ordinate": "counts"}, name="raw")
    with pytest.raises(FitError, match="raw detector counts.*100 % line"):
        fit_spectrum(spec, _stack())


def _direct_edge(wl, Eg=3.2, saturate_eV=np.inf):
    # α ∝ sqrt(hν - Eg)/hν: direct allowed transition (Tauc et al. 1966, Phys. Status
    # Solidi 15, 627); invented amplitude.
    from fitting.result import OpticalConstants
    from fitting.units import kappa_from_alpha, nm_to_ev
    E = nm_to_ev(wl)
    alpha = 2e5 * np.sqrt(np.clip(E - Eg, 0, saturate_eV)) / E
    k = kappa_from_alpha(alpha, wl)
    return OpticalConstants("film", wl, np.full(wl.shape, 2.2), k, alpha)


def test_band_gap_warns_when_the_tauc_line_runs_into_the_data_end():
    from fitting.finish import band_gap as _band_gap
    wl = np.linspace(340, 1000, 661)          # the edge rises up to the last point
    g, warn = _band_gap({"film": _direct_edge(wl)}, "direct")
    assert g is not None and abs(g.Eg_eV - 3.2) < 0.05
    assert warn and "short-wavelength end" in warn
    wl_wide = np.linspace(250, 1000, 751)     # the edge flattens 0.6 eV above the gap
    g, warn = _band_gap({"film": _direct_edge(wl_wide, Eg=3.0, saturate_eV=0.6)}, "direct")
    assert g is not None and g.fit_range_eV[1] < 4.0
    assert warn is None


def test_typos_in_saved_stacks_are_refused_not_ignored():
    from fitting.errors import RecipeError
    d = _stack().to_dict()
    d["layers"][0]["thicknes"] = d["layers"][0].pop("thickness")
    with pytest.raises(RecipeError, match=r"layers\[0\]\.thicknes.*did you mean 'thickness'"):
        Stack.from_dict(d)
    d = _stack().to_dict()
    d["layers"][0]["material"]["params"]["eps_inf"]["valeu"] = 2.0
    with pytest.raises(RecipeError, match=r"eps_inf\.valeu.*did you mean 'value'"):
        Stack.from_dict(d)
