"""A substrate described by a measured transmission spectrum of the bare slide.

Witness slides of one batch of glass often absorb a little more (or less) than the
library value says, mostly in the UV. Measuring one bare slide and using it as the
substrate takes that into account.

For a slab of index n, extinction κ << n and thickness d in air, with incoherent
multiple reflections, the transmittance is (Swanepoel 1983, eq. A1 with x the
internal transmittance)

    T = (1 - R)² x / (1 - R² x²),      R = ((n - 1)/(n + 1))²,  x = exp(-4πκd/λ).

Given n (from a library material) it is solved for x at every wavelength,

    R² T x² + (1 - R)² x - T = 0   →   x = (-(1-R)² + sqrt((1-R)⁴ + 4R²T²)) / (2R²T),

and κ = -λ ln(x)/(4πd). Without a library material the slab is taken as lossless
and n follows from T = 2n/(n² + 1): n = 1/T + sqrt(1/T² - 1) (Swanepoel 1983, eq. 3).

References
----------
.. [1] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E 16, 1214 (1983).
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import median_filter

from .dispersion import Dispersion, Tabulated
from .errors import ParameterError
from .spectrum import Spectrum
from .substrates import Substrate

__all__ = ["substrate_from_bare_spectrum"]


def _smooth(y: np.ndarray, points: int) -> np.ndarray:
    """Median then moving-average smoothing; noise would otherwise become κ noise."""
    if points <= 1 or y.size < 3 * points:
        return y
    y = median_filter(y, size=points, mode="nearest")
    kernel = np.ones(points) / points
    pad = points // 2
    return np.convolve(np.pad(y, pad, mode="edge"), kernel, mode="valid")[: y.size]


def substrate_from_bare_spectrum(spectrum: Spectrum, *, thickness_mm: float = 1.0,
                                 material: Dispersion | None = None,
                                 smooth_points: int = 9) -> Substrate:
    """Build a :class:`~fitting.substrates.Substrate` from a bare-slide T spectrum.

    Parameters
    ----------
    spectrum : Spectrum
        Transmittance of the bare slide (quantity "T").
    thickness_mm : float
        Slide thickness.
    material : Dispersion, optional
        Known index of the glass (e.g. ``fused_silica()``); the spectrum then gives
        the slide's absorption κ(λ). Without it the slide is taken as lossless and
        the spectrum gives n(λ).
    smooth_points : int
        Width of the smoothing applied to T before inversion (1 = none).

    Returns
    -------
    Substrate
        With a :class:`~fitting.dispersion.Tabulated` material on the spectrum's grid.
    """
    if spectrum.quantity != "T":
        raise ParameterError("bare substrate spectrum", spectrum.quantity,
                             f"{spectrum.source or spectrum.name or 'the spectrum'} is a "
                             "reflectance spectrum; measure the bare slide in transmission")
    if len(spectrum) < 5:
        raise ParameterError("bare substrate spectrum", len(spectrum),
                             "needs at least 5 points")
    wl = spectrum.wavelength_nm
    T = _smooth(np.asarray(spectrum.values, float), int(smooth_points))
    if np.any(T <= 0.05):
        dark = wl[T <= 0.05]
        raise ParameterError("bare substrate spectrum", float(T.min()),
                             f"{spectrum.source or spectrum.name or 'the spectrum'}: the slide "
                             f"is nearly opaque (T <= 5 %) at {dark[0]:g}-{dark[-1]:g} nm; "
                             "crop the range to where it transmits")
    d_nm = float(thickness_mm) * 1e6
    if material is None:
        # Lossless slab: T <= 2n/(n²+1) < 1; values above the n = 1 limit are noise.
        Tc = np.minimum(T, 0.9999)
        n = 1 / Tc + np.sqrt(1 / Tc ** 2 - 1)
        k = np.zeros_like(n)
        name = f"bare slide {spectrum.name or 'spectrum'} (lossless, n from T)"
    else:
        n = material.N(wl).real
        R = ((n - 1) / (n + 1)) ** 2
        a = (1 - R) ** 2
        x = (-a + np.sqrt(a * a + 4 * R * R * T * T)) / (2 * R * R * T)
        x = np.clip(x, 1e-12, 1.0)  # x > 1 means noise above the lossless limit: κ = 0
        k = -wl * np.log(x) / (4 * np.pi * d_nm)
        name = f"bare slide {spectrum.name or 'spectrum'} ({material.describe()} n, measured κ)"
    return Substrate(Tabulated(wl, n, k, name=name), thickness_mm)
