"""Swanepoel's envelope method: thickness and n of a film from its transmission fringes.

A film of index n on a thick transparent substrate of index s shows
interference fringes in T(λ). Where the film absorbs weakly, the upper and
lower envelopes T_M(λ) and T_m(λ) through the maxima and minima give n in
closed form, and the orders of the fringes give the thickness. This is the
quick, model-free start value the fit engine needs: thickness within ~1 % and a
Cauchy or Sellmeier seed for n(λ).

The steps (Swanepoel 1983, sections 3-4):

1. find the fringe extrema (smoothed data, prominence test against the noise,
   strict alternation of maxima and minima, then a local polynomial on the raw
   data for each extremum's position and height);
2. interpolate the envelopes T_M and T_m through the maxima and the minima (PCHIP
   in 1/λ, where fringes are nearly periodic);
3. at every extremum, eq. (A) of the weak and medium absorption region,

   .. math::
       N = 2s\\frac{T_M - T_m}{T_M T_m} + \\frac{s^2 + 1}{2}, \\qquad
       n_1 = \\sqrt{N + \\sqrt{N^2 - s^2}};

4. a first thickness from each pair of adjacent maxima (or minima),
   d_1 = λ_1 λ_2 / (2(λ_1 n_2 - λ_2 n_1));
5. the order numbers from 2nd = mλ (m integer at maxima, half-integer at
   minima), refined thickness d_2 = mean(mλ/(2n_1)) and refined n = mλ/(2d_2).

The method assumes the film index exceeds the substrate's (maxima then sit at
integer orders) and a uniform film; a wedge or a low-index film (n < s) needs
the full fit.

References
----------
.. [1] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E: Sci. Instrum. 16, 1214 (1983).
       :DOI:`10.1088/0022-3735/16/12/023`
.. [2] A. Savitzky and M. J. E. Golay, "Smoothing and differentiation of data by
       simplified least squares procedures", Anal. Chem. 36, 1627 (1964).
.. [3] F. N. Fritsch and R. E. Carlson, "Monotone piecewise cubic interpolation",
       SIAM J. Numer. Anal. 17, 238 (1980) (the PCHIP envelopes).
.. [4] S. H. Wemple and M. DiDomenico, "Behavior of the electronic dielectric constant
       in covalent and ionic materials", Phys. Rev. B 3, 1338 (1971) (the
       single-oscillator form behind :func:`sellmeier_start`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.signal import find_peaks, savgol_filter

from .errors import ParameterError
from .labels import format_pm

__all__ = ["EnvelopeResult", "swanepoel_envelope", "cauchy_start", "sellmeier_start",
           "MIN_EXTREMA"]

#: Fewest alternating extrema (about one and a half fringes) the method works with.
MIN_EXTREMA = 3

_EMPTY = np.zeros(0)


@dataclass(frozen=True)
class EnvelopeResult:
    """What :func:`swanepoel_envelope` found.

    Attributes
    ----------
    ok : bool
        False when the spectrum has too few fringes (film too thin or too
        absorbing); the other numbers are then NaN or empty.
    message : str
        One plain sentence: what was found, or why nothing could be.
    thickness_nm, thickness_sigma_nm : float
        Refined thickness d_2 and the standard deviation of the per-extremum
        values mλ/(2n_1) it is the mean of (the spread Swanepoel quotes).
    wavelength_nm : ndarray of shape (K,)
        Wavelengths of the extrema used, ascending.
    n : ndarray of shape (K,)
        Refined n = mλ/(2d_2) at the extrema.
    orders : ndarray of shape (K,)
        Order numbers m (integer at maxima, half-integer at minima).
    kind : ndarray of str, shape (K,)
        ``"max"`` or ``"min"`` for each extremum.
    T_max_env, T_min_env : ndarray of shape (N,)
        Upper and lower envelopes on the input wavelength grid (NaN outside the
        span of the extrema).
    n_envelope : ndarray of shape (K,)
        First-pass n_1 from the envelopes (eq. A), before the order refinement.
    alpha_cm : ndarray of shape (K,)
        Absorption coefficient at the extrema from the upper envelope and the
        refined n, d (Swanepoel's x from T_M); 0 where the film is clear within
        the data's accuracy.
    thickness_first_nm : float
        Median of the first-pass thicknesses d_1 from adjacent extrema.
    """

    ok: bool
    message: str
    thickness_nm: float = math.nan
    thickness_sigma_nm: float = math.nan
    wavelength_nm: np.ndarray = field(default_factory=lambda: _EMPTY)
    n: np.ndarray = field(default_factory=lambda: _EMPTY)
    orders: np.ndarray = field(default_factory=lambda: _EMPTY)
    kind: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype="<U3"))
    T_max_env: np.ndarray = field(default_factory=lambda: _EMPTY)
    T_min_env: np.ndarray = field(default_factory=lambda: _EMPTY)
    n_envelope: np.ndarray = field(default_factory=lambda: _EMPTY)
    thickness_first_nm: float = math.nan
    alpha_cm: np.ndarray = field(default_factory=lambda: _EMPTY)

    def __bool__(self) -> bool:
        return self.ok


# ----------------------------------------------------------------------------------------
def _check_inputs(wavelength_nm, T, substrate_n):
    wl = np.asarray(wavelength_nm, dtype=float)
    T = np.asarray(T, dtype=float)
    if wl.ndim != 1 or wl.size < 8:
        raise ParameterError("wavelength_nm", f"{wl.size} points",
                             "the envelope method needs a 1-D spectrum of at least 8 points")
    if T.shape != wl.shape:
        raise ParameterError("T", f"shape {T.shape}",
                             f"must have the shape of wavelength_nm {wl.shape}")
    if not (np.all(np.isfinite(wl)) and np.all(np.isfinite(T))):
        raise ParameterError("T", "NaN/inf", "wavelengths and T must be finite numbers; "
                             "drop or mask the bad rows first")
    if np.any(wl <= 0):
        raise ParameterError("wavelength_nm", float(wl.min()), "wavelengths must be positive nm")
    if T.max() > 1.05 or T.min() < -0.05:
        raise ParameterError("T", float(T.max() if T.max() > 1.05 else T.min()),
                             "transmittance must be a fraction 0..1 (divide percent by 100)")
    if hasattr(substrate_n, "N"):              # a Substrate or a Dispersion model
        s = np.real(substrate_n.N(wl))
    else:
        s = np.broadcast_to(np.asarray(substrate_n, dtype=float), wl.shape).astype(float)
    if not np.all(np.isfinite(s)) or np.any(s <= 1.0):
        raise ParameterError("substrate_n", float(np.min(s)),
                             "substrate index must be a finite number above 1")
    order = np.argsort(wl)
    if np.any(np.diff(wl[order]) <= 0):
        raise ParameterError("wavelength_nm", "duplicates", "wavelengths must be distinct")
    return wl, T, s, order


def _fringe_period(nu, Tu):
    """Dominant fringe period (in samples of the uniform 1/λ grid) from the spectrum's FFT."""
    # The cubic trend in the sample index mapped to [-1, 1] (as Polynomial.fit does).
    last = float(nu.size - 1)
    x = (-last - 0.0) / last + 2.0 / last * np.arange(nu.size)
    trend = _horner(_polyfit(x, Tu, 3), x)
    y = (Tu - trend) * np.hanning(nu.size)
    power = np.abs(np.fft.rfft(y)) ** 2
    # Fewer than two fringes over the range cannot be told from the trend; more
    # than one per 8 samples is too fast to resolve.
    lo, hi = 2, max(3, nu.size // 8)
    if hi <= lo + 1:
        return None
    k = lo + int(np.argmax(power[lo:hi]))
    return nu.size / k


def _odd(n: float, lo: int = 5) -> int:
    n = max(lo, int(round(n)))
    return n if n % 2 else n + 1


def _raw_noise(T_raw):
    """Point noise σ of the raw spectrum: MAD of second differences (white noise: var·6)."""
    d2 = T_raw[:-2] - 2 * T_raw[1:-1] + T_raw[2:]
    return float(1.4826 * np.median(np.abs(d2)) / math.sqrt(6.0))


def _find_extrema(nu_u, T_u, period, noise, do_smooth=True):
    """Alternating extrema on the uniform 1/λ grid: (indices, kinds) from smoothed data."""
    win = _odd(min(period / 4, T_u.size // 3))
    smooth = savgol_filter(T_u, win, 3) if do_smooth else T_u
    prom = max(5 * noise, 1e-3)
    dist = max(1, int(0.35 * period))
    imax, _ = find_peaks(smooth, prominence=prom, distance=dist)
    imin, _ = find_peaks(-smooth, prominence=prom, distance=dist)
    ext = sorted([(i, "max") for i in imax] + [(i, "min") for i in imin])
    out = _alternate(ext, smooth)
    # A noise wiggle adds a maximum and a minimum far closer together than half a
    # fringe: drop such pairs (closest first) until the spacing is regular.
    while len(out) > MIN_EXTREMA:
        pos = np.array([i for i, _ in out], dtype=float)
        gaps = np.diff(pos)
        j = int(np.argmin(gaps))
        if gaps[j] >= 0.3 * np.median(gaps):
            break
        del out[j:j + 2]
        out = _alternate(out, smooth)
    return out, smooth


def _alternate(ext, smooth):
    # Strict alternation: of two neighbours of the same kind keep the more extreme
    # (a noise wiggle on a fringe flank can pass the prominence test alone).
    out: list[tuple[int, str]] = []
    for i, kd in ext:
        if out and out[-1][1] == kd:
            j = out[-1][0]
            better = smooth[i] > smooth[j] if kd == "max" else smooth[i] < smooth[j]
            if better:
                out[-1] = (i, kd)
            continue
        out.append((i, kd))
    return out


def _polyfit(x, y, deg):
    """Least-squares polynomial through (x, y), coefficients lowest order first.

    The procedure of numpy's ``polynomial.polyfit`` (columns scaled to unit norm,
    SVD least squares with rcond = len(x)·eps), without its per-call checks.
    """
    v = np.empty((deg + 1, x.size))
    v[0] = x * 0 + 1
    v[1] = x
    for i in range(2, deg + 1):
        v[i] = v[i - 1] * x
    scl = np.sqrt(np.square(v).sum(1))
    scl[scl == 0] = 1
    c = np.linalg.lstsq(v.T / scl, y, x.size * np.finfo(float).eps)[0]
    return c / scl


def _horner(c, x):
    """Σ c[..., i]·xⁱ by Horner's rule: coefficients lowest order first along the last
    axis (one polynomial, or one per row evaluated on the same x)."""
    v = c[..., -1:] + x * 0
    for i in range(c.shape[-1] - 2, -1, -1):
        v = c[..., i:i + 1] + v * x
    return v


#: Where :func:`_refine` looks for the quartic's extremum, in half-widths of its window.
_REFINE_AT = np.linspace(-0.6, 0.6, 241)


def _refine(nu_raw, T_raw, centres, halves, is_max, fallback_nu, fallback_T):
    """Position and height of every extremum from a quartic through the raw points
    around it; the fallback (smoothed) values where there is none.

    A quartic over ±1/4 fringe follows the fringe shape closely (a parabola would
    clip the peak) while averaging the noise of all points in the window.
    """
    # 1/T is linear in cos φ (Swanepoel eq. 1 at fixed n, x), so a polynomial follows
    # 1/T more closely than T itself near sharp maxima.
    inv_T = 1.0 / np.maximum(T_raw, 1e-6)
    C = np.zeros((centres.size, 5))
    fitted = np.zeros(centres.size, bool)
    for j, (centre, half) in enumerate(zip(centres, halves)):
        sel = np.abs(nu_raw - centre) <= half
        if sel.sum() >= 9:
            C[j] = _polyfit((nu_raw[sel] - centre) / half, inv_T[sel], 4)
            fitted[j] = True
    # All quartics on the search grid at once.
    xs = _REFINE_AT
    v = _horner(C, xs)
    j = np.where(is_max, np.argmin(v, axis=1), np.argmax(v, axis=1))
    vj = v[np.arange(centres.size), j]
    # No interior extremum (or no quartic): keep the smoothed one.
    with np.errstate(divide="ignore"):
        ok = fitted & (j != 0) & (j != xs.size - 1) & ~(vj <= 0)
        return (np.where(ok, centres + xs[j] * halves, fallback_nu),
                np.where(ok, 1.0 / np.where(ok, vj, 1.0), fallback_T))


def _envelope(nu_pts, T_pts):
    """The envelope through the extrema as a function of ν: PCHIP in 1/λ, linear
    continuation past the last ones (built once, evaluated where needed)."""
    if nu_pts.size == 1:
        return lambda nu_eval: np.full(np.shape(nu_eval), T_pts[0])
    pchip = PchipInterpolator(nu_pts, T_pts, extrapolate=False)

    def at(nu_eval):
        out = pchip(nu_eval)
        for end, a, b in ((nu_eval < nu_pts[0], 0, 1), (nu_eval > nu_pts[-1], -2, -1)):
            slope = (T_pts[b] - T_pts[a]) / (nu_pts[b] - nu_pts[a])
            ref = 0 if a == 0 else -1
            out[end] = T_pts[ref] + slope * (nu_eval[end] - nu_pts[ref])
        return out
    return at


def _fail(message, n_points):
    nan = np.full(n_points, np.nan)
    return EnvelopeResult(False, message, T_max_env=nan, T_min_env=nan.copy())


def swanepoel_envelope(wavelength_nm, T, substrate_n, *, smooth: bool = True) -> EnvelopeResult:
    """Thickness and refractive index of a film from the envelopes of its T fringes.

    Parameters
    ----------
    wavelength_nm : array_like of shape (N,)
        Vacuum wavelengths in nm (any order).
    T : array_like of shape (N,)
        Measured transmittance as a fraction 0..1 (film on substrate, both
        substrate faces included, normal incidence).
    substrate_n : float, array_like of shape (N,), or object with ``.N(wl)``
        Substrate index s (a :class:`~fitting.substrates.Substrate` or a
        dispersion model works; its real part is used).
    smooth : bool
        Smooth with a Savitzky-Golay filter (a quarter fringe wide) before
        looking for extrema. Turn off only for noise-free synthetic spectra.

    Returns
    -------
    EnvelopeResult
        ``ok=False`` with a plain message (never an exception) when fewer than
        :data:`MIN_EXTREMA` fringe extrema are found, as for a film thinner
        than about λ/(2n), or when the envelopes are unphysical.

    Raises
    ------
    ParameterError
        For malformed input (shapes, NaN, T in percent, substrate index <= 1).

    Notes
    -----
    The substrate must be transparent where the fringes are (T_s = 2s/(s²+1)).
    Heights at the extrema come from a quartic fitted to the raw points within
    a quarter fringe, so the 0.1-0.5 % noise of a typical spectrometer is
    averaged rather than picked up. The accuracy is the method's own, about 1 %
    in d and n for a uniform film with several fringes (Swanepoel 1983, sec. 5).
    It degrades where the fringe contrast is low compared with the noise, since
    n comes from T_M - T_m: with 0.2 % noise, a film of n ≈ 1.7 on glass
    (contrast ~3 %) gives d and n to about 3 %, and a film with only three
    extrema to 1-2 %. That is still a good start for the full fit.

    Examples
    --------
    A 900 nm Cauchy film on glass, its T from the stack engine:

    >>> import numpy as np
    >>> from fitting.dispersion import Cauchy
    >>> from fitting.stack import Layer, Stack
    >>> from fitting.substrates import Substrate, generic_glass
    >>> wl = np.arange(450.0, 1500.0, 1.0)
    >>> glass = Substrate(generic_glass(1.52))
    >>> sample = Stack([Layer("film", Cauchy(2.0, 0.02), 900.0)], glass)
    >>> env = swanepoel_envelope(wl, sample.transmittance(wl), 1.52)
    >>> env.ok, round(env.thickness_nm)
    (True, 900)

    References
    ----------
    .. [1] R. Swanepoel, J. Phys. E: Sci. Instrum. 16, 1214 (1983), eqs. (1), (A),
           (23) and the order-number procedure of sec. 4.
    """
    wl, T, s, order = _check_inputs(wavelength_nm, T, substrate_n)
    wl_s, T_s, s_s = wl[order], T[order], s[order]
    nu = 1.0 / wl_s[::-1]                     # ascending 1/λ (nm⁻¹)
    Tn, sn = T_s[::-1], s_s[::-1]
    m_pts = max(256, nu.size)
    nu_u = np.linspace(nu[0], nu[-1], m_pts)
    T_u = np.interp(nu_u, nu, Tn)

    period = _fringe_period(nu_u, T_u)
    if period is None:
        return _fail("too few data points to look for interference fringes", wl.size)
    ext, T_sm = _find_extrema(nu_u, T_u, period, _raw_noise(Tn), smooth)
    if len(ext) < MIN_EXTREMA:
        return _fail(f"found {len(ext)} interference extrema, the envelope method needs at "
                     f"least {MIN_EXTREMA}: the film is too thin (or too absorbing) for it; "
                     "enter a start thickness by hand", wl.size)

    # Position and height of each extremum from the raw data.
    du = nu_u[1] - nu_u[0]
    pos = np.array([nu_u[i] for i, _ in ext])
    kinds = np.array([k for _, k in ext])
    gaps = np.diff(pos)
    near = np.empty_like(pos)
    near[0], near[-1] = gaps[0], gaps[-1]
    if pos.size > 2:
        near[1:-1] = 0.5 * (gaps[:-1] + gaps[1:])
    is_max = kinds == "max"
    nu_e, T_e = _refine(nu, Tn, pos, 0.5 * near, is_max, pos,
                        T_sm[[i for i, _ in ext]])
    nu_e = np.clip(nu_e, pos - 0.25 * du * period, pos + 0.25 * du * period)

    if is_max.sum() < 1 or (~is_max).sum() < 1:
        return _fail("found extrema of one kind only; the envelope method needs both "
                     "maxima and minima", wl.size)
    upper = _envelope(nu_e[is_max], T_e[is_max])
    lower = _envelope(nu_e[~is_max], T_e[~is_max])
    TM = np.where(is_max, T_e, upper(nu_e))
    Tm = np.where(~is_max, T_e, lower(nu_e))
    s_e = np.interp(nu_e, nu, sn)
    lam = 1.0 / nu_e
    if np.any(TM <= Tm) or np.any(Tm <= 0):
        return _fail("the upper and lower envelopes cross: the fringes are too weak or "
                     "distorted for the envelope method", wl.size)

    # Eq. (A): weak and medium absorption region.
    N = 2 * s_e * (TM - Tm) / (TM * Tm) + (s_e ** 2 + 1) / 2
    n1 = np.sqrt(N + np.sqrt(np.maximum(N ** 2 - s_e ** 2, 0.0)))

    # First-pass thickness from adjacent extrema of the same kind, one order apart
    # (eq. 23). Ascending ν means λ1 > λ2.
    l1, l2, na, nb = lam[:-2], lam[2:], n1[:-2], n1[2:]
    den = 2 * (l1 * nb - l2 * na)
    d1_all = np.where(den > 0, l1 * l2 / np.where(den > 0, den, 1.0), np.nan)
    d1_all = d1_all[np.isfinite(d1_all) & (d1_all > 0)]
    if d1_all.size == 0:
        return _fail("the fringe positions give no positive thickness; check that the "
                     "file holds a film transmission spectrum", wl.size)
    d1 = float(np.median(d1_all))

    # Orders: consecutive extrema differ by 1/2; the first one's parity is set by
    # its kind. Of the candidate offsets keep the one whose per-extremum thicknesses
    # agree best (Swanepoel sec. 4: the right orders minimise the spread of d).
    step = 0.5 * np.arange(pos.size)
    half0 = 0.0 if kinds[0] == "max" else 0.5
    m_guess = 2 * n1[0] * d1 * nu_e[0]
    base = math.floor(m_guess - half0 + 0.5) + half0
    best = None
    for j in range(-3, 4):
        m0 = base + j
        if m0 < 0.5:
            continue
        m = m0 + step
        d_i = m * lam / (2 * n1)
        spread = float(np.std(d_i) / np.mean(d_i))
        if best is None or spread < best[0]:
            best = (spread, m, d_i)
    _, m, d_i = best
    d2 = float(np.mean(d_i))
    d2_sigma = float(np.std(d_i, ddof=1)) if d_i.size > 1 else math.nan
    n2 = m * lam / (2 * d2)
    alpha = _alpha_from_TM(n2, s_e, TM, d2)

    # Envelopes on the caller's grid, NaN outside the extrema's span.
    nu_grid = 1.0 / wl
    inside = (nu_grid >= nu_e.min()) & (nu_grid <= nu_e.max())
    env_M = np.full(wl.shape, np.nan)
    env_m = np.full(wl.shape, np.nan)
    env_M[inside] = upper(nu_grid[inside])
    env_m[inside] = lower(nu_grid[inside])

    asc = np.argsort(lam)
    msg = (f"{pos.size} fringe extrema between {lam.min():.0f} and {lam.max():.0f} nm: "
           f"d = {format_pm(d2, d2_sigma, 'nm')}, n = {n2[asc][-1]:.3f} at {lam.max():.0f} nm "
           f"to {n2[asc][0]:.3f} at {lam.min():.0f} nm")
    return EnvelopeResult(True, msg, d2, d2_sigma, lam[asc], n2[asc], m[asc], kinds[asc],
                          env_M, env_m, n1[asc], d1, alpha[asc])


def _alpha_from_TM(n, s, TM, d_nm):
    """α (cm⁻¹) from the upper envelope: eq. (1) at cos φ = 1 solved for x = exp(-αd).

    x = [E_M - (E_M² - (n²-1)³(n²-s⁴))^½] / [(n-1)³(n-s²)],
    E_M = 8n²s/T_M + (n²-1)(n²-s²) (Swanepoel 1983, weak and medium absorption).
    """
    EM = 8 * n ** 2 * s / TM + (n ** 2 - 1) * (n ** 2 - s ** 2)
    D = (n - 1) ** 3 * (n - s ** 2)
    BD = (n ** 2 - 1) ** 3 * (n ** 2 - s ** 4)
    root = np.sqrt(np.maximum(EM ** 2 - BD, 0.0))
    # Near n = s² the quadratic degenerates; its root tends to B / (2 E_M).
    small = np.abs(D) < 1e-9 * np.abs(EM)
    B = (n + 1) ** 3 * (n + s ** 2)
    x = np.where(small, B / (2 * EM), (EM - root) / np.where(small, 1.0, D))
    x = np.clip(x, 1e-300, 1.0)
    return -np.log(x) / d_nm * 1e7


# ----------------------------------------------------------------------------------------
def _need_ok(env: EnvelopeResult, what: str):
    if not env.ok or env.n.size < 2:
        raise ParameterError("env", env.message,
                             f"{what} needs a successful envelope result with >= 2 extrema")


def cauchy_start(env: EnvelopeResult) -> dict[str, float]:
    """Least-squares Cauchy n = A + B/λ² (λ in µm) through the envelope's n values.

    Returns ``{"A": ..., "B": ...}`` named as the parameters of
    :class:`~fitting.dispersion.Cauchy`, to seed the fit engine.

    References
    ----------
    .. [1] R. Swanepoel, J. Phys. E 16, 1214 (1983), sec. 4 (a two-term fit of n
           to extrapolate it beyond the fringes).
    """
    _need_ok(env, "cauchy_start")
    x = 1.0 / (env.wavelength_nm * 1e-3) ** 2
    B, A = np.polyfit(x, env.n, 1)
    return {"A": float(A), "B": float(B)}


def sellmeier_start(env: EnvelopeResult) -> dict[str, float]:
    """One-term Sellmeier n² = 1 + B1 λ²/(λ² - C1) (λ in µm) through the envelope's n.

    The single-oscillator form is linear in 1/λ²:
    1/(n² - 1) = 1/B1 - (C1/B1)/λ² (Wemple & DiDomenico 1971), so a straight-line fit
    gives B1 and C1 directly. Returns ``{"A": 1.0, "B1": ..., "C1": ...}`` named as
    the parameters of ``Sellmeier(terms=1)``; C1 is floored at 0.

    References
    ----------
    .. [1] S. H. Wemple and M. DiDomenico, Phys. Rev. B 3, 1338 (1971).
    """
    _need_ok(env, "sellmeier_start")
    x = 1.0 / (env.wavelength_nm * 1e-3) ** 2
    y = 1.0 / (env.n ** 2 - 1.0)
    b, a = np.polyfit(x, y, 1)
    B1 = 1.0 / a
    return {"A": 1.0, "B1": float(B1), "C1": float(max(0.0, -b * B1))}
