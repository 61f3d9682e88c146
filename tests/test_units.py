"""Unit conversions against CODATA and textbook definitions.

Sources: CODATA 2018 (E. Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)), also
shipped as ``scipy.constants``; α = 4πκ/λ from Born & Wolf, *Principles of Optics*,
7th ed., ch. 14 (intensity of a plane wave in an absorbing medium decays as
exp(-4πκz/λ)).
"""

import math

import numpy as np
import pytest
import scipy.constants as sc

from fitting import units


def test_hc_matches_codata_2018():
    # CODATA 2018: h, c and e are exact SI values; hc/e = 1239.8419843... eV nm, which
    # Pellucid rounds to 1239.84198 (rel. 3.5e-9, far below any optical uncertainty).
    hc = sc.h * sc.c / sc.e * 1e9
    assert units.HC_EV_NM == pytest.approx(hc, rel=5e-9)
    assert units.HC_EV_NM == pytest.approx(1239.84198, abs=1e-5)


def test_photon_energy_of_known_lines():
    # E[eV] = 1239.84198 / λ[nm] (CODATA 2018): 1239.84198 nm -> 1 eV, HeNe 632.8 nm ->
    # 1.9593 eV, Nd:YAG 1064 nm -> 1.1653 eV (laser line energies: common practice).
    assert units.nm_to_ev(1239.84198) == pytest.approx(1.0, abs=1e-12)
    assert units.nm_to_ev(632.8) == pytest.approx(1.95930, abs=1e-5)
    assert units.nm_to_ev(1064.0) == pytest.approx(1.16527, abs=1e-5)
    e = np.array([0.5, 1.0, 3.0, 6.2])
    assert np.allclose(units.nm_to_ev(units.ev_to_nm(e)), e, rtol=1e-15)


def test_wavenumber_conversions():
    # 1 cm = 1e7 nm, so 1000 nm <-> 10000 cm⁻¹ (definition of the wavenumber).
    assert units.nm_to_wavenumber(1000.0) == pytest.approx(1e4)
    assert units.wavenumber_to_nm(2e4) == pytest.approx(500.0)
    w = np.array([250.0, 800.0, 2500.0])
    assert np.allclose(units.wavenumber_to_nm(units.nm_to_wavenumber(w)), w, rtol=1e-15)


def test_alpha_from_kappa():
    # α = 4πκ/λ (Born & Wolf ch. 14). κ = 1e-3 at 500 nm = 5e-5 cm:
    # α = 4π·1e-3/5e-5 cm = 251.327 cm⁻¹.
    assert units.alpha_per_cm(1e-3, 500.0) == pytest.approx(4 * math.pi * 1e-3 / 5e-5, rel=1e-12)
    assert units.alpha_per_cm(1e-3, 500.0) == pytest.approx(251.327, abs=1e-3)
    # Meaning of α: a 1 µm path with α = 1e4 cm⁻¹ transmits exp(-1) (Beer-Lambert).
    k = units.kappa_from_alpha(1e4, 633.0)
    path_nm = 1000.0
    assert math.exp(-4 * math.pi * k * path_nm / 633.0) == pytest.approx(math.exp(-1.0), rel=1e-12)


def test_alpha_kappa_round_trip_vectorised():
    kappa = np.array([0.0, 1e-5, 0.01, 2.0])
    wl = np.array([300.0, 550.0, 900.0, 2000.0])
    assert np.allclose(units.kappa_from_alpha(units.alpha_per_cm(kappa, wl), wl), kappa,
                       rtol=1e-14, atol=0)
