"""Physical constants and unit conversions used throughout Pellucid.

Wavelengths are vacuum wavelengths in nm everywhere inside Pellucid; other
abscissae are converted on the way in and out.

References
----------
.. [1] E. Tiesinga et al., "CODATA recommended values of the fundamental physical
       constants: 2018", Rev. Mod. Phys. 93, 025010 (2021). hc = 1239.841984 eV nm.
"""

from __future__ import annotations

import numpy as np

__all__ = ["HC_EV_NM", "nm_to_ev", "ev_to_nm", "nm_to_wavenumber", "wavenumber_to_nm",
           "alpha_per_cm", "kappa_from_alpha"]

#: Planck constant times speed of light in eV nm (CODATA 2018, exact SI values).
HC_EV_NM = 1239.84198


def nm_to_ev(wavelength_nm):
    """Photon energy in eV of a vacuum wavelength in nm: E = hc/λ."""
    return HC_EV_NM / np.asarray(wavelength_nm, dtype=float)


def ev_to_nm(energy_ev):
    """Vacuum wavelength in nm of a photon energy in eV."""
    return HC_EV_NM / np.asarray(energy_ev, dtype=float)


def nm_to_wavenumber(wavelength_nm):
    """Wavenumber in cm⁻¹ of a vacuum wavelength in nm (1 cm = 1e7 nm)."""
    return 1e7 / np.asarray(wavelength_nm, dtype=float)


def wavenumber_to_nm(wavenumber_cm):
    """Vacuum wavelength in nm of a wavenumber in cm⁻¹."""
    return 1e7 / np.asarray(wavenumber_cm, dtype=float)


def alpha_per_cm(kappa, wavelength_nm):
    """Absorption coefficient α = 4πκ/λ in cm⁻¹ (intensity decays as exp(-αz))."""
    return 4.0 * np.pi * np.asarray(kappa, dtype=float) / np.asarray(wavelength_nm) * 1e7


def kappa_from_alpha(alpha_cm, wavelength_nm):
    """Extinction coefficient κ = αλ/(4π) from α in cm⁻¹."""
    return np.asarray(alpha_cm, dtype=float) * np.asarray(wavelength_nm) * 1e-7 / (4.0 * np.pi)
