"""Numerical kernels: Fresnel coefficients, coherent films and the incoherent substrate.

Pure array functions with no model objects, so the fit engine can call them
thousands of times without allocation beyond NumPy temporaries. Every array
runs over wavelength; layers are looped in Python (a few at most), never
wavelengths.

Conventions follow Byrnes' transfer-matrix notes (the ``tmm`` package), so
that results agree with it to rounding: time dependence exp(-iωt), N = n + iκ,
p-polarisation reflection r_p = (N_f cosθ_i - N_i cosθ_f)/(N_f cosθ_i + N_i cosθ_f),
power transmission T = |t|² Re(N_f cosθ_f)/Re(N_i cosθ_i) for s and with
conj(cosθ) for p.

Coherent films are combined by the Airy recursion, which for 2x2 characteristic
matrices is algebraically the same as multiplying them (Born & Wolf, sec. 1.6)
but needs fewer operations per layer. The thick substrate is incoherent: the
beams bouncing inside it add in intensity (Harbecke 1986; Swanepoel 1983,
eq. A1), with the back side included.

Fits evaluate one geometry thousands of times with only the films changing:
:func:`outer_media` binds the ambient, substrate and back side to a grid once
and :func:`films_RT` then evaluates the films alone, all interfaces at once,
both polarisations sharing every phase factor. :func:`stack_RT` is the same
two steps in one call.

References
----------
.. [1] M. Born and E. Wolf, *Principles of Optics*, 7th ed., Cambridge (1999), sec. 1.6.
.. [2] S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720 (2016).
.. [3] B. Harbecke, "Coherent and incoherent reflection and transmission of
       multilayer structures", Appl. Phys. B 39, 165 (1986).
.. [4] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E 16, 1214 (1983).
.. [5] H. A. Macleod, *Thin-Film Optical Filters*, 4th ed., CRC Press (2010), ch. 2.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

__all__ = ["cos_theta", "interface_rt", "coherent_rt", "power_t_factor",
           "stack_RT", "OuterMedia", "outer_media", "films_RT", "films_RT_thicknesses"]

# exp(-2·Im δ) below e^-70 is zero at double precision for our purposes; capping
# keeps exp() of opaque layers from underflowing into 0/0.
_MAX_IM_PHASE = 35.0


def cos_theta(N, n0_sin0):
    """cos θ in a medium of index N for the Snell invariant n0 sin θ0.

    Picks the forward branch: Im(N cos θ) > 0 (decaying), or Re(N cos θ) > 0 for
    a lossless medium, as in Byrnes (2016) ``is_forward_angle``.
    """
    if np.all(n0_sin0 == 0):
        return np.ones_like(np.asarray(N, dtype=complex))
    s = n0_sin0 / N
    c = np.sqrt(1 - s * s + 0j)
    q = N * c
    flip = np.where(np.abs(q.imag) > 1e-12 * np.abs(q), q.imag < 0, q.real < 0)
    return np.where(flip, -c, c)


def interface_rt(pol: str, Ni, Nf, ci, cf):
    """Fresnel amplitude coefficients (r, t) from medium i into medium f."""
    if pol == "s":
        a, b = Ni * ci, Nf * cf
        den = a + b
        return (a - b) / den, 2 * a / den
    a, b = Nf * ci, Ni * cf
    den = a + b
    return (a - b) / den, 2 * Ni * ci / den


def power_t_factor(pol: str, Ni, Nf, ci, cf):
    """Factor turning |t|² into transmitted power from medium i into medium f."""
    if pol == "s":
        return (Nf * cf).real / (Ni * ci).real
    return (Nf * np.conj(cf)).real / (Ni * np.conj(ci)).real


def coherent_rt(pol: str, N, c, d_nm, wavelength_nm):
    """Amplitude r and t of a coherent stack between two semi-infinite media.

    Parameters
    ----------
    pol : {"s", "p"}
    N, c : sequence of ndarray of shape (W,)
        Complex indices and cos θ of media 0 (incident) .. M (exit).
    d_nm : sequence of float or ndarray
        Thicknesses of media 1 .. M-1 (nm); each may broadcast against (W,).
    wavelength_nm : ndarray of shape (W,)

    Returns
    -------
    r, t : ndarray of complex, shape (W,)
    """
    M = len(N) - 1
    r, t = interface_rt(pol, N[M - 1], N[M], c[M - 1], c[M])
    k0 = 2 * np.pi / wavelength_nm
    for j in range(M - 2, -1, -1):
        delta = k0 * d_nm[j] * (N[j + 1] * c[j + 1])
        if np.any(delta.imag > _MAX_IM_PHASE):
            delta = delta.real + 1j * np.minimum(delta.imag, _MAX_IM_PHASE)
        e = np.exp(1j * delta)
        rj, tj = interface_rt(pol, N[j], N[j + 1], c[j], c[j + 1])
        re2 = r * (e * e)
        den = 1 + rj * re2
        r, t = (rj + re2) / den, tj * t * e / den
    return r, t


def stack_RT(wavelength_nm, N_ambient, N_films, d_films_nm, N_sub, sub_d_nm, N_exit, *,
             angle_rad: float = 0.0, polarization: str = "u"):
    """R and T (front side) of ambient | films | thick substrate | exit medium.

    Parameters
    ----------
    wavelength_nm : ndarray of shape (W,)
    N_ambient, N_sub, N_exit : ndarray of complex, shape (W,)
        The ambient must be lossless for oblique incidence.
    N_films : list of ndarray of complex, shape (W,)
        Coherent films, ambient side first (may be empty).
    d_films_nm : list of float or ndarray broadcasting against (W,)
    sub_d_nm : float
        Substrate thickness in nm; ``None`` or ``inf`` for a semi-infinite
        substrate (no back side: T is the power entering it).
    angle_rad : float
        Angle of incidence in the ambient.
    polarization : {"s", "p", "u"}
        "u" (unpolarised) averages the s and p powers.

    Returns
    -------
    R, T : ndarray of float, shape (W,)

    Notes
    -----
    The same as ``films_RT(outer_media(...), N_films, d_films_nm)``; callers
    that evaluate one geometry many times (fits) should bind
    :func:`outer_media` once and call :func:`films_RT`.
    """
    outer = outer_media(wavelength_nm, N_ambient, N_sub, sub_d_nm, N_exit,
                        angle_rad=angle_rad, polarization=polarization)
    return films_RT(outer, N_films, d_films_nm)


# -- the fast path: fixed outer media bound once, films evaluated per call -------------------

def _abs2(z):
    """|z|² in real arithmetic (no square root, unlike abs(z)**2)."""
    return np.square(z.real) + np.square(z.imag)


@dataclass(frozen=True, eq=False)
class OuterMedia:
    """Ambient, substrate and exit medium on one grid: the part of a stack a fit never changes.

    Built by :func:`outer_media`. Arrays carry a leading polarisation axis P
    (1 for "s" or "p", 2 for unpolarised light at oblique incidence: s, p).
    Admittances are Y = N cos θ (s) and Y = cos θ / N (p), so that every
    interface has r = (Y_i - Y_f)/(Y_i + Y_f) and t-factor 1 + r in both
    polarisations. For s this is Macleod's tilted admittance (2010, sec. 2.4);
    for p it is the reciprocal of his N/cos θ, which gives Byrnes' sign of r_p
    (his r_p with numerator and denominator divided by N_i N_f). Byrnes' t_p is
    then (1 + r) N_i/N_f, whose product over the interfaces telescopes to
    N_0/N_s, a factor folded into ``t_scale``.
    """

    ik2: np.ndarray          # (W,) 2i·2π/λ: i·2δ = ik2 · d · N cos θ
    normal: bool             # normal incidence: cos θ = 1 in every medium
    inv2: np.ndarray | float  # (n0 sin θ0)², 0.0 at normal incidence
    pols: tuple
    Y_amb: np.ndarray        # (P, W) complex
    Y_sub: np.ndarray        # (P, W) complex
    t_scale: np.ndarray      # (P, W) T_f = t_scale · Π|1 + r_i|² · Π|e^{2iδ}| / |Π den|²
    back: tuple | None       # (R_b τ², g R_b τ², τ T_b), each (P, W); None: semi-infinite


def outer_media(wavelength_nm, N_ambient, N_sub, sub_d_nm, N_exit, *, angle_rad: float = 0.0,
                polarization: str = "u") -> OuterMedia:
    """Precompute everything about ambient, substrate and exit medium for :func:`films_RT`.

    Arguments as in :func:`stack_RT`. The substrate terms of the incoherent sum
    (R_b, T_b, τ) are fixed here, and so is the ratio g = T_f'/T_f of the film
    stack's transmittances seen from the substrate and from the ambient. By
    reciprocity the amplitude ratio is t'/t = det M = N_s cos θ_s/(N_0 cos θ_0)
    for any film stack, absorbing or not (the 2x2 interface matrices have
    determinant Y_f/Y_i, the phase matrices 1; Born & Wolf 1999, sec. 1.6), so
    g depends on the outer media only and the reverse transmittance needs no
    second pass through the films.
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    if polarization == "u" and angle_rad == 0.0:
        polarization = "s"  # identical powers at normal incidence
    pols = ("s", "p") if polarization == "u" else (polarization,)
    N0, Ns, Ne = (np.broadcast_to(np.asarray(N, dtype=complex), wl.shape)
                  for N in (N_ambient, N_sub, N_exit))
    inv = (N0 * np.sin(angle_rad)).real if angle_rad else 0.0
    c0, cs = cos_theta(N0, inv), cos_theta(Ns, inv)
    finite = sub_d_nm is not None and bool(np.isfinite(sub_d_nm))
    Y_amb, Y_sub, t_scale, back = [], [], [], []
    for pol in pols:
        Y_amb.append(N0 * c0 if pol == "s" else c0 / N0)
        Y_sub.append(Ns * cs if pol == "s" else cs / Ns)
        pf = power_t_factor(pol, N0, Ns, c0, cs)
        t_scale.append(pf if pol == "s" else pf * _abs2(N0 / Ns))
        if finite:
            ce = cos_theta(Ne, inv)
            rb, tb = interface_rt(pol, Ns, Ne, cs, ce)
            Rb = _abs2(rb)
            Tb = _abs2(tb) * power_t_factor(pol, Ns, Ne, cs, ce)
            tau = np.exp(-4 * np.pi * sub_d_nm * (Ns * cs).imag / wl)
            g = _abs2(Ns * cs / (N0 * c0)) * power_t_factor(pol, Ns, N0, cs, c0) / pf
            back.append((Rb * tau * tau, g * Rb * tau * tau, tau * Tb))
    return OuterMedia(
        ik2=4j * np.pi / wl, normal=not angle_rad, inv2=inv * inv, pols=pols,
        Y_amb=np.array(Y_amb), Y_sub=np.array(Y_sub), t_scale=np.array(t_scale),
        back=tuple(np.array(x) for x in zip(*back)) if finite else None)


def films_RT(outer: OuterMedia, N_films, d_films_nm, *, thickness_scales=None, weights=None,
             want_R: bool = True):
    """R and T of coherent films between the bound outer media (see :func:`stack_RT`).

    Parameters
    ----------
    outer : OuterMedia
        From :func:`outer_media` on the same grid.
    N_films : sequence of ndarray of complex, shape (W,)
        Film indices, ambient side first; κ >= 0.
    d_films_nm : sequence of float or ndarray broadcasting against (W,)
    thickness_scales, weights : sequence of float, optional
        Average R and T over all thicknesses scaled by each factor, with these
        weights (quadrature of a thickness distribution). The interface terms
        do not depend on thickness and are computed once for all nodes.
    want_R : bool
        False: T alone (R is returned as None), for fits to transmittance.

    Returns
    -------
    R, T : ndarray of float, shape (W,)

    Notes
    -----
    All interfaces and phase factors are computed at once over (layer,
    wavelength); only the Airy recursion itself runs layer by layer, twice:
    from the substrate towards the ambient for r and t, and the other way for
    the reflectance r' seen from inside the substrate. The incoherent sum is
    Harbecke's (1986): T = T_f τ T_b/(1 - R_f' R_b τ²) and
    R = R_f + T_f T_f' R_b τ²/(1 - R_f' R_b τ²), with T_f' = g T_f.

    Examples
    --------
    A quarter-wave film of n = sqrt(1.5) on a lossless n = 1.5 slab removes the
    front reflection, leaving only the back face's 4 % (Macleod 2010, sec. 3.2):

    >>> wl = np.array([600.0])
    >>> one = np.ones(1, complex)
    >>> outer = outer_media(wl, one, 1.5 * one, 1e6, one)
    >>> R, T = films_RT(outer, [np.sqrt(1.5) * one], [600.0 / (4 * np.sqrt(1.5))])
    >>> round(float(T[0]), 4), round(float(R[0]), 4)
    (0.96, 0.04)
    """
    L = len(N_films)
    q, r_if, t2 = _interfaces(outer, N_films)
    if L:
        try:
            d = np.array(d_films_nm, dtype=float).reshape(L, -1)
        except ValueError:  # a mix of scalars and arrays
            d = np.array([np.broadcast_to(np.asarray(x, float), outer.ik2.shape)
                          for x in d_films_nm])
        kq = outer.ik2 * q                                     # i·2δ per nm of thickness
    if thickness_scales is None:
        R, T = _airy(outer, r_if, t2, kq * d if L else None, want_R)
    else:
        R = T = 0.0
        for x, w in zip(thickness_scales, weights):
            Ri, Ti = _airy(outer, r_if, t2, kq * (d * x) if L else None, want_R)
            T = T + w * Ti
            R = R + w * Ri if want_R else None
    return R, T


def films_RT_thicknesses(outer: OuterMedia, N_films, thickness_nm, *, want_R: bool = True):
    """R and T of one film stack at many thickness sets at once, shape (K, W) each.

    ``thickness_nm`` has one row per film, each a scalar or K values (the
    thickness scan varies one film's). Interfaces and admittances do not depend
    on thickness, so they are computed once on the W wavelengths and only the
    phases and the Airy recursion run on the K×W grid: element by element the
    same arithmetic as :func:`films_RT` on each thickness set (``want_R`` as there).
    """
    L = len(N_films)
    if not L:
        raise ValueError("films_RT_thicknesses needs at least one film")
    q, r_if, t2 = _interfaces(outer, N_films)
    d = np.broadcast_arrays(*[np.atleast_1d(np.asarray(x, dtype=float)) for x in thickness_nm])
    arg = (outer.ik2 * q)[:, None, :] * np.array(d)[:, :, None]          # (L, K, W)
    grid = replace(outer, t_scale=outer.t_scale[:, None],
                   back=None if outer.back is None else tuple(b[:, None] for b in outer.back))
    return _airy(grid, r_if[:, :, None], t2[:, None], arg, want_R)


def _interfaces(outer: OuterMedia, N_films):
    """N cos θ of the films (L, W), interface r (P, L+1, W) and Π|1 + r|² (P, W)."""
    if len(N_films):
        N = np.array(N_films, dtype=complex)                  # (L, W)
        if outer.normal:
            q = N                                              # cos θ = 1
            Yf = [N if pol == "s" else 1 / N for pol in outer.pols]
        else:
            N2 = N * N
            # N cos θ = sqrt(N² - n0² sin² θ0); numpy's principal root has
            # Im >= 0 for κ >= 0, the forward (decaying) branch of cos_theta.
            q = np.sqrt(N2 - outer.inv2)
            Yf = [q if pol == "s" else q / N2 for pol in outer.pols]
        Y = np.concatenate([outer.Y_amb[:, None], np.array(Yf), outer.Y_sub[:, None]], axis=1)
    else:
        q = None
        Y = np.stack([outer.Y_amb, outer.Y_sub], axis=1)
    a, b = Y[:, :-1], Y[:, 1:]
    r_if = (a - b) / (a + b)
    return q, r_if, _abs2(1 + r_if).prod(axis=1)


def _airy(outer: OuterMedia, r_if, t2, arg, want_R: bool = True):
    """R, T from the interface terms and the phases ``arg`` = i·2δ of shape (L, W);
    R is None when not ``want_R`` (T needs neither R_f nor the sum for R)."""
    L = r_if.shape[1] - 1
    if L:
        # Opaque layers: cap the single-pass loss at e^-70 so nothing underflows to 0/0.
        np.maximum(arg.real, -2 * _MAX_IM_PHASE, out=arg.real)
        E2 = np.exp(arg)
        loss = np.exp(arg.real.sum(axis=0))                    # Π |e^{2iδ}|
    else:
        E2 = loss = None

    # Forward pass, substrate side first: r = A/B with Π den = B (see _airy_pass).
    A, B = _airy_pass(r_if, E2, range(L - 1, -1, -1), first=L, shift=0)
    den2 = 1.0 if B is None else _abs2(B)
    Rf = _abs2(A) / den2 if want_R else None
    Tf = outer.t_scale * t2 * loss / den2 if L else outer.t_scale * t2

    if outer.back is None:
        R, T = Rf, Tf
    else:
        # Seen from the substrate the interfaces change sign, r_{f,i} = -r_{i,f};
        # carrying s = -r' keeps the same step, and |r'| = |s|.
        if L == 1:  # one film: the same denominator 1 + r01 r12 e^{2iδ} as forward
            Rr = _abs2(r_if[:, 1] + r_if[:, 0] * E2[0]) / den2
        else:
            A, B = _airy_pass(r_if, E2, range(L), first=0, shift=1)
            Rr = _abs2(A) / (1.0 if B is None else _abs2(B))
        Rb_tau2, gRb_tau2, tau_Tb = outer.back
        den = 1 - Rr * Rb_tau2
        T = Tf * tau_Tb / den
        R = Rf + Tf * Tf * gRb_tau2 / den if want_R else None
    if len(outer.pols) == 2:
        return (R[0] + R[1]) / 2 if want_R else None, (T[0] + T[1]) / 2
    return R[0] if want_R else None, T[0]


def _airy_pass(r_if, E2, layers, *, first: int, shift: int):
    """One Airy recursion through the films, as numerator and denominator.

    The step r <- (ρ + r e^{2iδ})/(1 + ρ r e^{2iδ}) is carried as r = A/B:
    A <- ρB + A e^{2iδ}, B <- B + ρ A e^{2iδ} (the 2x2 matrix product of
    Born & Wolf 1999, sec. 1.6, in Airy's variables), so no step divides, and
    B ends as the product of the step denominators that |t|² needs. Starts
    from interface ``first``; layer j meets interface j + ``shift``. Returns
    (A, B), B None when there is no film.
    """
    A, B = r_if[:, first], None
    for j in layers:
        rho = r_if[:, j + shift]
        AE = A * E2[j]
        A, B = (rho + AE, 1 + rho * AE) if B is None else (rho * B + AE, B + rho * AE)
    return A, B
