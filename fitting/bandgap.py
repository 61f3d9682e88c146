"""Optical band gap from a Tauc plot: (αhν)^r against hν, extrapolated to zero.

Near the absorption edge of a semiconductor or insulator the absorption
coefficient follows α hν = B (hν - E_g)^p, with p = 1/2 for direct allowed and
p = 2 for indirect allowed transitions (Tauc, Grigorovici & Vancu 1966; Davis &
Mott 1970). Plotted as y = (α hν)^r with r = 1/p, the edge is a straight line
whose intercept with y = 0 is E_g.

:func:`tauc_gap` picks the straight part itself. It scans every window of
consecutive points (prefix sums make each window's regression O(1)) and keeps
those that are straight (R² >= 0.99), rising, and whose line meets zero below
their first point (a window reaching down into the Urbach tail fails this).
The edge's slope a_edge is the best lower 2σ bound of the slope among kept
windows of at least a tenth of the points; a window's σ is never taken below
the point noise measured from second differences, so a few points that line
up by chance do not set it. Of the kept windows with slope >= 0.85 a_edge it
chooses the longest. So the chosen window is the longest steep straight part
of the edge, the usual hand construction. On curved edges (a Tauc-Lorentz
film, saturation at high α) the result depends on that choice; the user can
give the range instead.

References
----------
.. [1] J. Tauc, R. Grigorovici and A. Vancu, "Optical properties and electronic
       structure of amorphous germanium", Phys. Status Solidi 15, 627 (1966).
       :DOI:`10.1002/pssb.19660150224`
.. [2] E. A. Davis and N. F. Mott, "Conduction in non-crystalline systems V.
       Conductivity, optical absorption and photoconductivity in amorphous
       semiconductors", Philos. Mag. 22, 903 (1970).
.. [3] F. Urbach, Phys. Rev. 92, 1324 (1953) (the exponential tail below the edge).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from .errors import ParameterError, PellucidError
from .result import BandGap
from .units import HC_EV_NM

__all__ = ["tauc_gap", "tauc_curve", "NoAbsorptionEdgeError", "TAUC_EXPONENTS", "R2_MIN"]

#: Exponent r of (α hν)^r for each transition type.
TAUC_EXPONENTS = {"direct": 2.0, "indirect": 0.5}

#: Default straightness test of a window (R² of the line).
R2_MIN = 0.99
#: A window counts as part of the edge if its slope is at least this share of the
#: edge's slope a_edge (common practice: the steepest straight part).
_STEEP_FRACTION = 0.85
_MAX_NODES = 300          # windows start/end on at most this many nodes (O(nodes²) scan)
_BLOCK = 8192             # windows per block of the scan


class NoAbsorptionEdgeError(PellucidError, ValueError):
    """No rising, straight absorption edge in the data: no Tauc gap can be given."""


def tauc_curve(wavelength_nm, alpha_cm, *, transition: str = "direct"):
    """Tauc-plot coordinates: photon energy hν (eV, ascending) and (α hν)^r.

    Negative α (noise in a transparent region) counts as zero.

    Returns
    -------
    E_eV, y : ndarray of shape (N,)
        y in (cm⁻¹ eV)^r.
    """
    r = _exponent(transition)
    wl = np.asarray(wavelength_nm, dtype=float)
    a = np.asarray(alpha_cm, dtype=float)
    if wl.shape != a.shape or wl.ndim != 1:
        raise ParameterError("alpha_cm", f"shape {a.shape}",
                             f"must be 1-D with the shape of wavelength_nm {wl.shape}")
    if np.any(wl <= 0) or not np.all(np.isfinite(wl)):
        raise ParameterError("wavelength_nm", "non-positive or NaN",
                             "wavelengths must be positive finite nm")
    E = HC_EV_NM / wl
    order = np.argsort(E)
    E, a = E[order], a[order]
    good = np.isfinite(a)
    E, a = E[good], a[good]
    return E, (np.maximum(a, 0.0) * E) ** r


def _exponent(transition: str) -> float:
    if transition not in TAUC_EXPONENTS:
        raise ParameterError("transition", transition,
                             f"choose one of {', '.join(TAUC_EXPONENTS)}")
    return TAUC_EXPONENTS[transition]


def _line_fit(x, y):
    """Least-squares y = a x + b with its covariance, R² and point count."""
    n = x.size
    xm, ym = x.mean(), y.mean()
    sxx = np.sum((x - xm) ** 2)
    sxy = np.sum((x - xm) * (y - ym))
    syy = np.sum((y - ym) ** 2)
    a = sxy / sxx
    b = ym - a * xm
    ssr = max(syy - a * sxy, 0.0)
    s2 = ssr / (n - 2) if n > 2 else 0.0
    var_a = s2 / sxx
    var_b = s2 * (1.0 / n + xm * xm / sxx)
    cov_ab = -xm * s2 / sxx
    r2 = 1.0 - ssr / syy if syy > 0 else 0.0
    return a, b, var_a, var_b, cov_ab, r2


def _gap_and_sigma(a, b, var_a, var_b, cov_ab):
    """E_g = -b/a and its 1σ by first-order propagation with the a, b covariance."""
    Eg = -b / a
    # ∂Eg/∂a = b/a², ∂Eg/∂b = -1/a
    ga, gb = b / a ** 2, -1.0 / a
    var = ga * ga * var_a + gb * gb * var_b + 2 * ga * gb * cov_ab
    return Eg, math.sqrt(max(var, 0.0))


def _point_noise_sq(y, half: int = 5):
    """Local noise variance of each point from second differences (white noise: var/6).

    Averaged over +-``half`` neighbours; a smooth curve adds only its tiny
    (step² · curvature)² share.
    """
    if y.size < 3:
        return np.zeros_like(y)
    d2 = (y[:-2] - 2 * y[1:-1] + y[2:]) ** 2 / 6.0
    d2 = np.concatenate(([d2[0]], d2, [d2[-1]]))
    k = np.ones(2 * half + 1)
    num = np.convolve(d2, k, mode="same")
    den = np.convolve(np.ones_like(d2), k, mode="same")
    return num / den


@functools.lru_cache(maxsize=4)
def _windows(n: int, min_points: int):
    """Every window (start, end + 1, point count) between nodes, at least ``min_points``
    long; the same for every spectrum on one grid, so a batch builds it once."""
    nodes = np.unique(np.linspace(0, n - 1, min(n, _MAX_NODES)).round().astype(int))
    I, J = np.meshgrid(nodes, nodes, indexing="ij")
    ok = (J - I + 1) >= min_points
    I, k = I[ok], J[ok] + 1
    m = (k - I).astype(float)
    for v in (I, k, m):
        v.flags.writeable = False
    return I, k, m


def _scan_windows(E, y, min_points, r2_min):
    """Longest straight steep window (i, j), inclusive; None if there is none."""
    n = E.size
    I_all, k_all, m_all = _windows(n, int(min_points))
    if I_all.size == 0:
        return None
    # Prefix sums give every window's regression in O(1).
    c = lambda v: np.concatenate(([0.0], np.cumsum(v)))  # noqa: E731
    # Centre and scale for round-off: y spans many decades in a Tauc plot.
    x0, xs = E.mean(), max(np.ptp(E), 1e-12)
    ys = max(np.max(np.abs(y)), 1e-300)
    X, Y = (E - x0) / xs, y / ys
    Sx, Sy, Sxx, Sxy, Syy = c(X), c(Y), c(X * X), c(X * Y), c(Y * Y)
    # Only the straight rising windows (a small share) go on to the noise and intercept.
    # The windows are taken in blocks that keep the working arrays in a core's cache.
    kept = []
    for lo in range(0, I_all.size, _BLOCK):
        I, k, m = (v[lo:lo + _BLOCK] for v in (I_all, k_all, m_all))
        sx, sy = Sx[k] - Sx[I], Sy[k] - Sy[I]
        with np.errstate(divide="ignore", invalid="ignore"):
            sxx = Sxx[k] - Sxx[I] - sx * sx / m
            sxy = Sxy[k] - Sxy[I] - sx * sy / m
            syy = Syy[k] - Syy[I] - sy * sy / m
            a = sxy / sxx
            ssr = np.maximum(syy - a * sxy, 0.0)
            r2 = 1.0 - ssr / syy
        keep = np.flatnonzero(np.isfinite(r2) & (r2 >= r2_min) & (a > 0) & (sxx > 0))
        kept.append([v[keep] for v in (I, k, m, sx, sy, sxx, a, ssr)])
    I, k, m, sx, sy, sxx, a, ssr = (np.concatenate(v) for v in zip(*kept))
    Sn = c(_point_noise_sq(Y))
    with np.errstate(divide="ignore", invalid="ignore"):
        # A window's scatter is never taken below the point noise measured around it:
        # a few points can line up by chance, and their slope is no surer for that.
        s2 = np.maximum(ssr / np.maximum(m - 2, 1), (Sn[k] - Sn[I]) / m)
        sig_a = np.sqrt(s2 / sxx)
        b = (sy - a * sx) / m
        Eg = -b / a                                     # in scaled X
    # A window qualifies if it is straight, rising, and its intercept lies below its
    # first point (the line runs down into the gap, not back up into the tail).
    valid = np.isfinite(Eg) & (Eg <= X[I] + 1e-12)
    if not np.any(valid):
        return None
    # "Steep" is measured against the edge's largest slope that is certain: the best
    # lower 2σ bound of the slope among windows of at least a tenth of the points.
    # (The plain largest slope of thousands of short windows is biased upwards by the
    # noise and would shut out the long window.)
    wide = valid & (m >= max(min_points, n // 10))
    pool = wide if np.any(wide) else valid
    a_edge = float(np.max(np.where(pool, a - 2 * sig_a, -np.inf)))
    steep = valid & (a >= _STEEP_FRACTION * a_edge)
    if not np.any(steep):
        steep = valid
    # The longest straight steep window; of equally long ones, the steeper.
    idx = np.flatnonzero(steep)
    best = idx[np.lexsort((-a[idx], -m[idx]))[0]]
    return int(I[best]), int(k[best] - 1)


def tauc_gap(wavelength_nm, alpha_cm, *, transition: str = "direct",
             energy_range_eV: tuple[float, float] | None = None, min_points: int = 5,
             r2_min: float = R2_MIN, layer: str = "") -> BandGap:
    """Tauc optical gap of a film from its absorption coefficient.

    Parameters
    ----------
    wavelength_nm : array_like of shape (N,)
        Vacuum wavelengths in nm.
    alpha_cm : array_like of shape (N,)
        Absorption coefficient α = 4πκ/λ in cm⁻¹ (see :func:`fitting.units.alpha_per_cm`).
    transition : {"direct", "indirect"}
        Allowed direct transitions plot (α hν)², indirect ones (α hν)^½.
    energy_range_eV : (float, float), optional
        Fit only within this photon-energy range instead of choosing the linear
        part automatically.
    min_points : int
        Fewest points a straight-line window may have (>= 3).
    r2_min : float
        Straightness a window needs in automatic mode (R² of its line).
    layer : str
        Layer name recorded in the result.

    Returns
    -------
    BandGap
        E_g, its 1σ from the straight-line fit's covariance (statistical only:
        the choice of range usually matters more, so look at the plot), the
        energy range used and the R² of the line.

    Raises
    ------
    NoAbsorptionEdgeError
        If α is zero or flat (a transparent film), or no rising straight part
        with R² >= 0.99 exists in the range.
    ParameterError
        For malformed input.

    Notes
    -----
    The intercept's σ follows from E_g = -b/a with the covariance of the slope a
    and intercept b (first-order propagation). In automatic mode the window is
    the longest straight rising window at least 0.85 times as steep as the
    edge; see the module docstring.

    Examples
    --------
    A direct-gap edge α ∝ (hν - 3.2 eV)^½ / hν:

    >>> import numpy as np
    >>> from fitting.units import HC_EV_NM
    >>> wl = np.linspace(250, 500, 251)
    >>> E = HC_EV_NM / wl
    >>> alpha = 1e5 * np.sqrt(np.clip(E - 3.2, 0, None)) / E
    >>> round(tauc_gap(wl, alpha, transition="direct").Eg_eV, 3)
    3.2

    References
    ----------
    .. [1] J. Tauc, R. Grigorovici and A. Vancu, Phys. Status Solidi 15, 627 (1966).
    .. [2] E. A. Davis and N. F. Mott, Philos. Mag. 22, 903 (1970).
    """
    if int(min_points) < 3:
        raise ParameterError("min_points", min_points, "a straight-line fit needs >= 3 points")
    min_points = int(min_points)
    E, y = tauc_curve(wavelength_nm, alpha_cm, transition=transition)
    if E.size < min_points:
        raise NoAbsorptionEdgeError(f"only {E.size} usable points; a Tauc fit needs at least "
                                    f"{min_points}")
    if energy_range_eV is not None:
        lo, hi = sorted(float(v) for v in energy_range_eV)
        sel = (E >= lo) & (E <= hi)
        if sel.sum() < min_points:
            raise NoAbsorptionEdgeError(
                f"the range {lo:.2f}-{hi:.2f} eV holds {int(sel.sum())} data points, a Tauc "
                f"fit needs at least {min_points}; widen it (data span {E[0]:.2f}-{E[-1]:.2f} eV)")
        i, j = np.flatnonzero(sel)[[0, -1]]
    else:
        if not np.any(y > 0) or np.ptp(y) <= 0:
            raise NoAbsorptionEdgeError(
                f"α is zero throughout {E[0]:.2f}-{E[-1]:.2f} eV: the film is transparent "
                "there; measure further into the UV to see the absorption edge")
        win = _scan_windows(E, y, min_points, float(r2_min))
        if win is None:
            raise NoAbsorptionEdgeError(
                f"no straight rising absorption edge (R² >= {r2_min}) in "
                f"{E[0]:.2f}-{E[-1]:.2f} eV; choose the energy range by hand or check the "
                f"transition type ({transition})")
        i, j = win
    x, yy = E[i:j + 1], y[i:j + 1]
    # Scale y for the regression (Tauc values reach 1e12 and more), unscale after.
    ys = max(np.max(np.abs(yy)), 1e-300)
    a, b, va, vb, cab, r2 = _line_fit(x, yy / ys)
    if not a > 0:
        raise NoAbsorptionEdgeError(
            f"(αhν)^r does not rise over {x[0]:.2f}-{x[-1]:.2f} eV: no absorption edge there")
    Eg, sig = _gap_and_sigma(a, b, va, vb, cab)
    return BandGap(float(Eg), float(sig), transition, (float(x[0]), float(x[-1])), float(r2),
                   layer)
