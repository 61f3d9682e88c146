"""Synthetic spectrophotometer spectra made with the independent ``tmm`` package.

One coherent film on a thick incoherent substrate in air, at normal incidence,
computed with ``tmm.inc_tmm`` (S. J. Byrnes, "Multilayer optical calculations",
arXiv:1603.02720; coherent film by the transfer-matrix method, incoherent
substrate by intensity sums following C. C. Katsidis and D. I. Siapkas,
Appl. Opt. 41, 3978 (2002), back-side reflection included). The project's own
optics are never used here.

The errors of an ordinary instrument are then applied, in the order light
meets them:

1. thickness non-uniformity over the light spot: T is averaged over a Gaussian
   distribution of film thickness, d(1 + s·z) with z ~ N(0, 1), by
   Gauss-Hermite quadrature (Abramowitz & Stegun 1964, 25.4.46);
2. the 100 % line: T is multiplied by ``scale`` and by a linear ``tilt``
   (the relative change of the 100 % line from the first to the last
   wavelength, zero at the middle of the range);
3. detector noise: Gaussian, ``noise`` in absolute T.

Everything is seeded: the same :class:`Instrument` and seed give the same
spectrum, bit for bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import tmm

from .materials import Material

__all__ = ["Instrument", "transmittance", "averaged_transmittance", "gauss_hermite_nodes",
           "measure", "grid"]


@dataclass(frozen=True)
class Instrument:
    """Errors of the measurement.

    Attributes
    ----------
    scale : float
        Factor on the 100 % line (1.01 = reads 1 % high).
    tilt : float
        Relative change of the 100 % line across the range (0.004 = +0.4 %
        from the first to the last wavelength, no change at the middle).
    noise : float
        1σ Gaussian noise in absolute T (0.002 = 0.2 % T).
    spread : float
        1σ relative thickness non-uniformity over the light spot (0.01 = 1 %).
    """

    scale: float = 1.0
    tilt: float = 0.0
    noise: float = 0.0
    spread: float = 0.0

    def describe(self) -> str:
        parts = []
        if self.scale != 1.0:
            parts.append(f"scale {100 * (self.scale - 1):+.1f}%")
        if self.tilt:
            parts.append(f"tilt {100 * self.tilt:+.1f}%")
        if self.spread:
            parts.append(f"spread {100 * self.spread:.1f}%")
        if self.noise:
            parts.append(f"noise {100 * self.noise:.2f}%T")
        return ", ".join(parts) or "none"


def grid(start_nm: float, stop_nm: float, step_nm: float) -> np.ndarray:
    """A spectrometer grid from start to stop (inclusive) in equal steps."""
    n = int(round((stop_nm - start_nm) / step_nm)) + 1
    return start_nm + step_nm * np.arange(n)


def transmittance(film: Material, thickness_nm: float, substrate: Material, wavelength_nm,
                  substrate_mm: float = 1.0) -> np.ndarray:
    """Exact T of air | film | substrate | air at normal incidence, from ``tmm.inc_tmm``.

    Unpolarised light at normal incidence: s and p coincide there (a test
    checks it with ``tmm``), so the s result is the unpolarised one.
    """
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float))
    Nf, Ns = film.N(wl), substrate.N(wl)
    d_list = [np.inf, float(thickness_nm), substrate_mm * 1e6, np.inf]
    c_list = ["i", "c", "i", "i"]
    out = np.empty(wl.size)
    for i, w in enumerate(wl):
        out[i] = tmm.inc_tmm("s", [1.0, Nf[i], Ns[i], 1.0], d_list, c_list, 0.0, w)["T"]
    return out


def gauss_hermite_nodes(phase_sigma: float, tol: float = 1e-4, max_nodes: int = 120) -> int:
    """Fewest Gauss-Hermite nodes that average cos(φ + σ_φ z) over z ~ N(0, 1) to ``tol``.

    The exact average is cos φ · exp(-σ_φ²/2); an Airy transmittance is a
    Fourier series in the film phase, so resolving the harmonic with the
    largest phase spread resolves T.
    """
    exact = math.exp(-phase_sigma ** 2 / 2)
    for n in range(3, max_nodes + 1):
        x, w = np.polynomial.hermite.hermgauss(n)
        if abs(np.sum(w * np.cos(phase_sigma * math.sqrt(2) * x)) / math.sqrt(math.pi)
               - exact) < tol:
            return n
    return max_nodes


def averaged_transmittance(film: Material, thickness_nm: float, substrate: Material,
                           wavelength_nm, spread: float, substrate_mm: float = 1.0,
                           nodes: int | None = None) -> np.ndarray:
    """T averaged over a Gaussian thickness distribution of relative 1σ ``spread``.

    ``nodes`` defaults to what :func:`gauss_hermite_nodes` needs for the third
    harmonic of the film phase 4πnd/λ at the shortest wavelength: the
    multiple-reflection series of a film of index up to ~2.5 is resolved to
    ~1e-5 in T then (a test compares with brute-force averaging).
    """
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float))
    if spread <= 0:
        return transmittance(film, thickness_nm, substrate, wl, substrate_mm)
    if nodes is None:
        n_max = float(np.max(film.N(wl).real))
        phase_sigma = 4 * math.pi * n_max * thickness_nm * spread / float(wl.min())
        nodes = gauss_hermite_nodes(3 * phase_sigma)
    x, w = np.polynomial.hermite.hermgauss(nodes)
    total = np.zeros(wl.size)
    for xi, wi in zip(x, w):
        d = thickness_nm * (1 + spread * math.sqrt(2) * xi)
        total += wi * transmittance(film, d, substrate, wl, substrate_mm)
    return total / math.sqrt(math.pi)


def measure(film: Material, thickness_nm: float, substrate: Material, wavelength_nm,
            instrument: Instrument, seed: int, substrate_mm: float = 1.0):
    """A measured spectrum: (T as the instrument reads it, T of the ideal film).

    Parameters
    ----------
    film, substrate : Material
    thickness_nm : float
        Mean film thickness.
    wavelength_nm : array
        The spectrometer grid.
    instrument : Instrument
    seed : int
        Seed of the noise (``numpy.random.default_rng``).

    Returns
    -------
    measured, ideal : ndarray
        ``ideal`` is T with non-uniformity but without scale, tilt and noise.
    """
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float))
    ideal = averaged_transmittance(film, thickness_nm, substrate, wl, instrument.spread,
                                   substrate_mm)
    span = wl[-1] - wl[0] if wl.size > 1 else 1.0
    line = instrument.scale * (1 + instrument.tilt * (wl - 0.5 * (wl[0] + wl[-1])) / span)
    rng = np.random.default_rng(seed)
    measured = ideal * line + instrument.noise * rng.standard_normal(wl.size)
    return measured, ideal
