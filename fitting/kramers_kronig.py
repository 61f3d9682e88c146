"""Kramers-Kronig relations between n and κ on a finite spectral range.

N(E) - 1 = n - 1 + iκ is the response function of a causal, linear medium, so
its real part follows from its imaginary part (Lucarini et al. 2005, ch. 2):

.. math::
    n(E) = 1 + \\frac{2}{\\pi} \\, P\\!\\!\\int_0^\\infty \\frac{E' κ(E')}{E'^2 - E^2} dE'.

A measurement covers a finite range only. The *singly subtractive* form
(Ahrenkiel 1971) anchors n at one energy E_0 where it is known,

.. math::
    n(E) - n(E_0) = \\frac{2}{\\pi} (E^2 - E_0^2) \\, P\\!\\!\\int
        \\frac{E' κ(E')}{(E'^2 - E^2)(E'^2 - E_0^2)} dE',

whose integrand falls off as E'^-3 instead of E'^-1, so absorption outside the
range matters far less.

The integral is evaluated exactly for κ linear between grid points (the
principal value then has a closed form in logarithms), so non-uniform
wavelength grids need no resampling and the singular point needs no special
quadrature.

References
----------
.. [1] R. K. Ahrenkiel, "Modified Kramers-Kronig analysis of optical spectra",
       J. Opt. Soc. Am. 61, 1651 (1971). :DOI:`10.1364/JOSA.61.001651`
.. [2] V. Lucarini, J. J. Saarinen, K.-E. Peiponen and E. M. Vartiainen,
       *Kramers-Kronig Relations in Optical Materials Research*, Springer (2005),
       ch. 2-4 (subtractive relations, truncation errors).
.. [3] D. E. Aspnes, "The accurate determination of optical properties by
       ellipsometry", in E. D. Palik (ed.), *Handbook of Optical Constants of
       Solids*, Academic Press (1985), p. 89 (far-off absorption appears in band
       as smooth pole terms).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .units import HC_EV_NM

__all__ = ["kk_n_from_kappa", "kk_consistency", "KKCheck", "kk_integral"]

#: High-energy continuation of κ: κ_end (E_end/E)^p, p = 3 as for a Lorentz or
#: Tauc-Lorentz term far above its resonance (ε2 ∝ E^-3; Lucarini et al. 2005, ch. 4).
_TAIL_POWER = 3.0
_TAIL_SPAN = 30.0          # continue the tail up to 30 E_max (κ down by 27000)
_TAIL_NODES = 60


def _log_dist(E_nodes, x):
    """ln|E' - x| for every target (rows) and node (columns), ln 0 taken as 0."""
    L = np.subtract(E_nodes[None, :], x)
    np.abs(L, out=L)
    with np.errstate(divide="ignore"):
        np.log(L, out=L)
    L[~np.isfinite(L)] = 0.0
    return L


def _seg_pv(E_nodes, k, x, L=None):
    """Σ over segments of PV ∫_a^b f(E')/(E' - x) dE', f linear on each segment.

    Targets x run along the first axis. With f(E') = f(x) + s (E' - x) each
    segment gives s (b - a) + f(x) ln|(b - x)/(a - x)|. Where x coincides with a
    node, the ln 0 of the two neighbouring segments carries the same coefficient
    f(x) and cancels in the principal value, so ln 0 is taken as 0. The logs
    are taken once per node and shared by the two segments meeting there; ``L``
    (from :func:`_log_dist`) passes them in when several κ share nodes and targets.
    """
    if L is None:
        L = _log_dist(E_nodes, x)
    a, b = E_nodes[:-1], E_nodes[1:]
    s = (k[1:] - k[:-1]) / (b - a)
    # In place: the matrices are large enough that fresh temporaries cost more
    # than the arithmetic.
    fx = x - a[None, :]
    fx *= s
    fx += k[:-1]
    fx *= L[:, 1:] - L[:, :-1]
    return np.sum(s * (b - a)) + np.sum(fx, axis=1)


def kk_integral(E_nodes, kappa_nodes, E_eval) -> np.ndarray:
    """I(E) = PV ∫ E' κ(E')/(E'² - E²) dE' over the nodes' span, κ piecewise linear.

    Parameters
    ----------
    E_nodes : ndarray of shape (M,)
        Ascending positive energies (eV).
    kappa_nodes : ndarray of shape (M,)
    E_eval : ndarray of shape (K,)
        Energies at which to evaluate (inside or outside the span).

    Returns
    -------
    ndarray of shape (K,)

    Notes
    -----
    E'/(E'² - E²) = ½ [1/(E' - E) + 1/(E' + E)], each integrated exactly per
    segment. Cost O(K M) memory and time; a few thousand points are fine.
    """
    E_nodes = np.asarray(E_nodes, float)
    k = np.asarray(kappa_nodes, float)
    x = np.asarray(E_eval, float)[:, None]
    return 0.5 * (_seg_pv(E_nodes, k, x) + _seg_pv(E_nodes, k, -x))


def _energy_grid(wavelength_nm, kappa, extend: bool, shape: str = "decay"):
    wl = np.asarray(wavelength_nm, dtype=float)
    k = np.asarray(kappa, dtype=float)
    if wl.ndim != 1 or wl.size < 3 or k.shape != wl.shape:
        raise ParameterError("kappa", f"shape {k.shape}",
                             f"must be 1-D with the shape of wavelength_nm {wl.shape} "
                             "(>= 3 points)")
    if not (np.all(np.isfinite(wl)) and np.all(np.isfinite(k))) or np.any(wl <= 0):
        raise ParameterError("wavelength_nm", "NaN/inf or <= 0",
                             "wavelengths and κ must be finite, wavelengths positive")
    if np.any(k < -1e-9):
        raise ParameterError("kappa", float(k.min()), "κ must not be negative (loss)")
    E = HC_EV_NM / wl
    order = np.argsort(E)
    E, kk = E[order], np.maximum(k[order], 0.0)
    if np.any(np.diff(E) <= 0):
        raise ParameterError("wavelength_nm", "duplicates", "wavelengths must be distinct")
    En, kn = E, kk
    if extend:
        # High side: power-law decay. Low side: κ continued as the power law of its
        # last points (a dielectric's tail falls towards the infrared, a conductor's
        # Drude κ rises), down to E_min/30; what lies below that acts in band as a
        # smooth -1/E² term, which the consistency check allows for.
        # ``shape="flat"`` is the other plausible guess, used to measure how much
        # the unknown continuation matters: κ held at its end value over a factor
        # 1.5 in energy before it decays or follows the power law.
        hold = 1.5 if shape == "flat" else 1.0
        hi = E[-1] * np.geomspace(1.0, _TAIL_SPAN, _TAIL_NODES + 1)[1:]
        k_hi = kk[-1] * np.minimum(1.0, (hold * E[-1] / hi) ** _TAIL_POWER)
        if kk[0] > 0:
            p = _low_end_power(E, kk)
            lo = E[0] * np.geomspace(1.0 / _TAIL_SPAN, 1.0, _TAIL_NODES + 1)[:-1]
            k_lo = kk[0] * np.minimum(1.0, (lo * hold / E[0]) ** p) if p > 0 else \
                kk[0] * np.where(lo * hold >= E[0], 1.0, (lo * hold / E[0]) ** p)
        else:
            lo = k_lo = np.zeros(0)
        En = np.concatenate((lo, E, hi))
        kn = np.concatenate((k_lo, kk, k_hi))
    return E, kk, order, En, kn


def _low_end_power(E, kk):
    """Log-log slope p of κ ∝ E^p over the lowest-energy points, clipped to [-2, 3]."""
    m = max(5, E.size // 30)
    e, k = E[:m], kk[:m]
    use = k > 0
    if use.sum() < 3:
        return 1.0
    p = np.polyfit(np.log(e[use]), np.log(k[use]), 1)[0]
    return float(np.clip(p, -2.0, 3.0))


def kk_n_from_kappa(wavelength_nm, kappa, *, n_anchor, extend: bool = True) -> np.ndarray:
    """Refractive index n(λ) from κ(λ) by numerical Kramers-Kronig integration.

    Parameters
    ----------
    wavelength_nm : array_like of shape (N,)
        Vacuum wavelengths in nm (any order; the result follows it).
    kappa : array_like of shape (N,)
        Extinction coefficient κ >= 0.
    n_anchor : (float, float) or float
        ``(λ_ref_nm, n_ref)``: singly subtractive KK anchored where n is known
        (Ahrenkiel 1971), the recommended form. A single float ``n_inf``:
        plain KK, n = n_inf + (2/π) PV∫..., where n_inf stands in for 1 plus
        the contribution of absorption above the range.
    extend : bool
        Continue κ beyond the range: above it as κ_end (E_end/E)³ up to 30 E_max,
        below it as the power law of the lowest points down to E_min/30. Off, κ is taken
        as zero outside, which with a non-zero κ at an end leaves a logarithmic error
        near that end.

    Returns
    -------
    ndarray of shape (N,)

    Notes
    -----
    κ is linear between grid points in photon energy; the principal value is
    then exact (see :func:`kk_integral`), so the grid must follow the bands:
    a Lorentz band 0.5 eV wide needs steps of ~0.02 eV at its peak (a uniform
    grid in λ is coarse in energy in the ultraviolet). The other error is the κ
    outside the range: with the subtractive form it is small and smooth in band,
    about
    c_hi (E² - E_0²) from absorption far above and c_lo (1/E_0² - 1/E²) from
    absorption far below.

    Examples
    --------
    n of a Lorentz oscillator from its κ, anchored at one wavelength:

    >>> import numpy as np
    >>> from fitting.dispersion import Lorentz, Oscillators
    >>> wl = np.geomspace(150, 3000, 600)
    >>> N = Oscillators(1.0, [Lorentz(2.0, 4.0, 0.5)]).N(wl)
    >>> n_kk = kk_n_from_kappa(wl, N.imag, n_anchor=(wl[200], N.real[200]))
    >>> inner = (wl > 200) & (wl < 2500)
    >>> bool(np.max(np.abs(n_kk - N.real)[inner]) < 2e-3)
    True

    References
    ----------
    .. [1] R. K. Ahrenkiel, J. Opt. Soc. Am. 61, 1651 (1971).
    .. [2] V. Lucarini et al., *Kramers-Kronig Relations in Optical Materials
           Research*, Springer (2005), sec. 4.2.
    """
    E, kk, order, En, kn = _energy_grid(wavelength_nm, kappa, extend)
    I = kk_integral(En, kn, E)
    if isinstance(n_anchor, (tuple, list, np.ndarray)) and np.size(n_anchor) == 2:
        lam_ref, n_ref = (float(v) for v in n_anchor)
        if not (lam_ref > 0 and math.isfinite(lam_ref) and math.isfinite(n_ref)):
            raise ParameterError("n_anchor", n_anchor, "needs a positive wavelength and finite n")
        I_ref = kk_integral(En, kn, np.array([HC_EV_NM / lam_ref]))[0]
        n_sorted = n_ref + 2.0 / np.pi * (I - I_ref)
    else:
        try:
            n_inf = float(n_anchor)
        except (TypeError, ValueError):
            raise ParameterError("n_anchor", n_anchor,
                                 "give (wavelength_nm, n) or a single n_inf") from None
        n_sorted = n_inf + 2.0 / np.pi * I
    out = np.empty_like(n_sorted)
    out[order] = n_sorted
    return out


def _out_of_range_terms(E, diff, inner):
    """Least-squares smooth terms that absorption outside the range can add in band.

    A constant (the anchor's own error), one infrared pole -1/(E² - E_ir²) below
    the range (E_ir = 0 is the -1/E² of free carriers or far-infrared phonons)
    and one ultraviolet pole 1/(E_p² - E²) above it (the usual Sellmeier "UV
    pole"; for E_p far above it becomes the E² term). E_p and E_ir are chosen
    on grids (1.05-20 E_max, 0-0.9 E_min) for the smallest residual.
    """
    y = diff[inner]
    E_in = E[inner]

    def bases(Eir, Ep, E=E_in):
        """Basis columns for every (E_ir, E_p) pair at once, on the compared points
        unless ``E`` is given: shape (K, N, 3)."""
        Eir, Ep = np.broadcast_arrays(np.atleast_1d(Eir), np.atleast_1d(Ep))
        B = np.empty((Eir.size, E.size, 3))
        B[..., 0] = 1.0
        B[..., 1] = -1.0 / (E[None] ** 2 - Eir[:, None] ** 2)
        B[..., 2] = 1.0 / (Ep[:, None] ** 2 - E[None] ** 2)
        return B

    def residuals(Bi):
        # All the small least-squares problems at once by their normal equations,
        # columns scaled to unit norm first (the pole columns differ by orders of
        # magnitude): residual norm |y|² - bᵀx with G x = b, G = BᵀB, b = Bᵀy. Three
        # columns keep G well enough conditioned for choosing the poles on a grid;
        # the chosen fit itself is solved by lstsq (see fitted).
        Bt = Bi.transpose(0, 2, 1)
        G = Bt @ Bi
        b = Bt @ y
        scale = np.sqrt(np.diagonal(G, axis1=1, axis2=2))
        scale = np.where(scale > 0, scale, 1.0)
        G = G / (scale[:, :, None] * scale[:, None, :])
        b = b / scale
        try:
            x = np.linalg.solve(G, b[..., None])[..., 0]
        except np.linalg.LinAlgError:          # a singular pair: the QR path decides
            Q, _ = np.linalg.qr(Bi)
            qy = np.einsum("kmi,m->ki", Q, y)
            return float(y @ y) - np.sum(qy * qy, axis=1)
        return float(y @ y) - np.sum(b * x, axis=1)

    def fitted(Eir, Ep):
        basis = bases(Eir, Ep, E)[0]
        coef, *_ = np.linalg.lstsq(basis[inner], y, rcond=None)
        return basis @ coef

    ratios = np.geomspace(1.05, 20.0, 24)
    irs = E[0] * np.array([0.0, 0.3, 0.5, 0.65, 0.75, 0.82, 0.87, 0.9])
    # Every (E_ir, E_p) pair of the grids, E_ir major: each pole column is made
    # once per pole and shared by the pairs that hold it.
    B = np.empty((irs.size, ratios.size, E_in.size, 3))
    B[..., 0] = 1.0
    B[..., 1] = (-1.0 / (E_in[None] ** 2 - irs[:, None] ** 2))[:, None]
    B[..., 2] = 1.0 / ((ratios * E[-1])[:, None] ** 2 - E_in[None] ** 2)
    res = residuals(B.reshape(-1, E_in.size, 3))
    k = int(np.argmin(res))
    Eir, j = irs[k // ratios.size], k % ratios.size
    # Refine the UV pole between the grid neighbours of the best one (a fine grid
    # in log E_p, solved at once, instead of a scalar search of single fits).
    lo, hi = np.log(ratios[max(j - 1, 0)]), np.log(ratios[min(j + 1, ratios.size - 1)])
    t = np.linspace(lo, hi, 41)
    res = residuals(bases(np.full(t.size, Eir), np.exp(t) * E[-1]))
    return fitted(Eir, np.exp(t[int(np.argmin(res))]) * E[-1])


@dataclass(frozen=True)
class KKCheck:
    """Outcome of :func:`kk_consistency`.

    Attributes
    ----------
    consistent : bool
        True if n and κ agree with causality within the tolerance.
    rms_dev, max_dev : float
        RMS and largest |n - n_kk| over the compared points.
    n_kk : ndarray of shape (N,)
        n from κ by subtractive KK plus the fitted smooth out-of-range terms, on
        the input grid, so that ``n - n_kk`` is the inconsistency.
    message : str
        One sentence for the user.
    compared : ndarray of bool, shape (N,)
        The points compared: not the outer edges of the range, nor points where
        the unknown κ outside the range could move n_kk by more than tol/2.
    tolerance : float
        The RMS tolerance used.
    """

    consistent: bool
    rms_dev: float
    max_dev: float
    n_kk: np.ndarray
    message: str
    compared: np.ndarray
    tolerance: float


def kk_consistency(wavelength_nm, n, kappa, *, anchor_nm: float | None = None,
                   tol: float = 2e-3, edge_fraction: float = 0.05) -> KKCheck:
    """Check that n(λ) and κ(λ) are a Kramers-Kronig pair over the measured range.

    Parameters
    ----------
    wavelength_nm, n, kappa : array_like of shape (N,)
    anchor_nm : float, optional
        Where the subtractive KK is anchored to the given n (default: the middle
        of the range in photon energy). n there is taken from a local straight
        line through ±5 points, and the offset is refined with the out-of-range
        terms (see Notes), so one noisy point does not shift the whole curve.
    tol : float
        RMS tolerance on |n - n_kk| beyond the numerical error estimate.
    edge_fraction : float
        Share of the span in log photon energy left out at each end of the
        comparison.

    Returns
    -------
    KKCheck

    Notes
    -----
    How the finite range is accounted for. Absorption outside the range
    cannot be measured, but far from the range it only adds smooth terms to n in
    band (Aspnes 1985; Lucarini et al. 2005, sec. 4.2): absorption above the
    range acts like a pole c_p/(E_p² - E²) with E_p above the range (the E²
    term when far), absorption below it like -c_ir/(E² - E_ir²) (-c_ir/E² when
    far, as for free carriers). These terms and a
    constant (which refines the anchor, so one noisy point cannot shift the
    curve) are fitted by least squares to n - n_kk and removed, with E_p and
    E_ir chosen on grids outside the range; whatever remains cannot come from
    absorption outside the range, and is an inconsistency. In addition:

    * κ is continued past the ends (see :func:`kk_n_from_kappa`) and the outer
      ``edge_fraction`` of the span is not compared, where the unknown shape of
      κ just outside matters most;
    * the truncation sensitivity is measured: the integral is repeated with a
      second plausible continuation (κ held at its end value over a factor 1.5
      in energy before it decays); where the two differ by more than tol/2
      after removing the smooth terms (typically next to an end where κ is
      large and rising), n_kk is set by the unknown κ outside and the point is
      not compared;
    * the discretisation error is estimated by repeating the integration on
      every second point (the error of the piecewise-linear rule falls as h²,
      so the full grid's error is about a third of the difference); the
      tolerance is ``tol`` plus the RMS of that estimate.

    A Cauchy n with κ = 0 is therefore consistent (it is exactly such a smooth
    term), while an n without the anomalous dispersion that the κ of an
    absorption band demands is not.

    References
    ----------
    .. [1] R. K. Ahrenkiel, J. Opt. Soc. Am. 61, 1651 (1971).
    .. [2] V. Lucarini et al., *Kramers-Kronig Relations in Optical Materials
           Research*, Springer (2005).
    .. [3] D. E. Aspnes, in *Handbook of Optical Constants of Solids*, ed. E. D.
           Palik, Academic Press (1985), p. 89.
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    n = np.asarray(n, dtype=float)
    if n.shape != wl.shape or not np.all(np.isfinite(n)):
        raise ParameterError("n", f"shape {n.shape}",
                             f"must be finite, with the shape of wavelength_nm {wl.shape}")
    if wl.size < 12:
        raise ParameterError("wavelength_nm", f"{wl.size} points",
                             "a Kramers-Kronig check needs at least 12 points")
    E, kk, order, En, kn = _energy_grid(wl, kappa, True)
    ns = n[order]
    if anchor_nm is None:
        i0 = int(np.argmin(np.abs(E - 0.5 * (E[0] + E[-1]))))
    else:
        i0 = int(np.argmin(np.abs(E - HC_EV_NM / float(anchor_nm))))
    sl = slice(max(0, i0 - 5), min(E.size, i0 + 6))
    p = np.polyfit(E[sl] - E[i0], ns[sl], 1)
    n0 = float(p[-1])

    # kk_integral three times over (κ, every second node, the other continuation of
    # κ), its logarithms (the dearest part) taken once.
    x = (E[:, None], -E[:, None])
    logs = (_log_dist(En, x[0]), _log_dist(En, x[1]))

    def integral(keep, k):
        nodes = En if keep is None else En[keep]
        L = logs if keep is None else (logs[0][:, keep], logs[1][:, keep])
        return 0.5 * (_seg_pv(nodes, k, x[0], L[0]) + _seg_pv(nodes, k, x[1], L[1]))

    I = integral(None, kn)
    n_raw = n0 + 2 / np.pi * (I - I[i0])

    # Discretisation error estimate: same integral from every second node.
    sub = np.zeros(En.size, bool)
    sub[::2] = True
    sub[-1] = True
    I2 = integral(sub, kn[sub])
    disc = np.abs((I - I[i0]) - (I2 - I2[i0])) * (2 / np.pi) / 3.0

    # Edges in log E: the unknown κ just outside matters within a fixed *ratio* of
    # the end energy, at the infrared end as much as at the ultraviolet one.
    lspan = math.log(E[-1] / E[0])
    inner = ((E >= E[0] * math.exp(edge_fraction * lspan))
             & (E <= E[-1] * math.exp(-edge_fraction * lspan)))
    # Truncation sensitivity: the same integral with the other continuation of κ;
    # what of the difference the smooth out-of-range terms cannot absorb is how much
    # the unknown κ outside can move n_kk at each point. Points where that exceeds
    # half the tolerance are not compared.
    *_, En_b, kn_b = _energy_grid(wl, kappa, True, "flat")
    # The two continuations differ in κ only, on the same energies.
    Ib = integral(None, kn_b) if np.array_equal(En_b, En) else kk_integral(En_b, kn_b, E)
    delta = 2 / np.pi * ((Ib - Ib[i0]) - (I - I[i0]))
    trunc = np.abs(delta - _out_of_range_terms(E, delta, inner))
    inner &= trunc <= 0.5 * tol
    if inner.sum() < 6:
        raise ParameterError("wavelength_nm", f"{E.size} points",
                             "too short a range for a Kramers-Kronig check: κ outside it "
                             "decides n everywhere; measure a wider range")
    n_kk_sorted = n_raw + _out_of_range_terms(E, ns - n_raw, inner)
    dev = (ns - n_kk_sorted)[inner]
    rms = float(np.sqrt(np.mean(dev ** 2)))
    mx = float(np.max(np.abs(dev)))
    tolerance = float(tol + np.sqrt(np.mean(disc[inner] ** 2)))
    ok = rms <= tolerance
    n_kk = np.empty_like(n_kk_sorted)
    n_kk[order] = n_kk_sorted
    compared = np.empty_like(inner)
    compared[order] = inner
    if ok:
        msg = (f"n and κ are Kramers-Kronig consistent: RMS deviation {rms:.2g} "
               f"(largest {mx:.2g}) within the tolerance {tolerance:.2g}")
    else:
        lam_worst = HC_EV_NM / E[inner][int(np.argmax(np.abs(dev)))]
        msg = (f"n and κ violate the Kramers-Kronig relations: RMS deviation {rms:.2g} "
               f"exceeds {tolerance:.2g} (largest {mx:.2g} near {lam_worst:.0f} nm); "
               "n and κ cannot belong to one causal material: check the model or the "
               "inversion there")
    return KKCheck(bool(ok), rms, mx, n_kk, msg, compared, tolerance)
