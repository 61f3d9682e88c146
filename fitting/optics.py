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

References
----------
.. [1] M. Born and E. Wolf, *Principles of Optics*, 7th ed., Cambridge (1999), sec. 1.6.
.. [2] S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720 (2016).
.. [3] B. Harbecke, "Coherent and incoherent reflection and transmission of
       multilayer structures", Appl. Phys. B 39, 165 (1986).
.. [4] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E 16, 1214 (1983).
"""

from __future__ import annotations

import numpy as np

__all__ = ["cos_theta", "interface_rt", "coherent_rt", "power_t_factor", "substrate_RT",
           "stack_RT"]

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


def substrate_RT(pol: str, N_front, c_front, d_front, N_sub, c_sub, sub_d_nm, N_exit, c_exit,
                 wavelength_nm):
    """Front-side R and T of films on a thick incoherent substrate.

    ``N_front``/``c_front`` list the ambient and the film layers (ambient first),
    ``d_front`` the film thicknesses. The substrate of thickness ``sub_d_nm`` is
    followed by the exit medium. Multiple reflections inside the substrate add
    in intensity:

        T = T_f τ T_b / (1 - R_f' R_b τ²),
        R = R_f + T_f T_f' R_b τ² / (1 - R_f' R_b τ²),

    with T_f, R_f the film side seen from the ambient, T_f', R_f' seen from
    inside the substrate, R_b, T_b the bare back interface and
    τ = exp(-4π Im(N_s cos θ_s) d_s / λ) the single-pass internal transmittance.
    """
    Nf = list(N_front) + [N_sub]
    cf = list(c_front) + [c_sub]
    rf, tf = coherent_rt(pol, Nf, cf, d_front, wavelength_nm)
    rr, tr = coherent_rt(pol, Nf[::-1], cf[::-1], list(d_front)[::-1], wavelength_nm)
    Rf = np.abs(rf) ** 2
    Tf = np.abs(tf) ** 2 * power_t_factor(pol, Nf[0], N_sub, cf[0], c_sub)
    Rr = np.abs(rr) ** 2
    Tr = np.abs(tr) ** 2 * power_t_factor(pol, N_sub, Nf[0], c_sub, cf[0])
    rb, tb = interface_rt(pol, N_sub, N_exit, c_sub, c_exit)
    Rb = np.abs(rb) ** 2
    Tb = np.abs(tb) ** 2 * power_t_factor(pol, N_sub, N_exit, c_sub, c_exit)
    tau = np.exp(-4 * np.pi * sub_d_nm * (N_sub * c_sub).imag / wavelength_nm)
    tau2 = tau * tau
    den = 1 - Rr * Rb * tau2
    return Rf + Tf * Tr * Rb * tau2 / den, Tf * tau * Tb / den


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
    """
    if polarization == "u" and angle_rad == 0.0:
        polarization = "s"  # identical powers at normal incidence
    if polarization == "u":
        Rs, Ts = stack_RT(wavelength_nm, N_ambient, N_films, d_films_nm, N_sub, sub_d_nm,
                          N_exit, angle_rad=angle_rad, polarization="s")
        Rp, Tp = stack_RT(wavelength_nm, N_ambient, N_films, d_films_nm, N_sub, sub_d_nm,
                          N_exit, angle_rad=angle_rad, polarization="p")
        return (Rs + Rp) / 2, (Ts + Tp) / 2
    inv = (N_ambient * np.sin(angle_rad)).real if angle_rad else 0.0
    media = [N_ambient, *N_films]
    c_front = [cos_theta(N, inv) for N in media]
    c_sub = cos_theta(N_sub, inv)
    if sub_d_nm is None or not np.isfinite(sub_d_nm):
        r, t = coherent_rt(polarization, media + [N_sub], c_front + [c_sub], d_films_nm,
                           wavelength_nm)
        T = np.abs(t) ** 2 * power_t_factor(polarization, N_ambient, N_sub, c_front[0], c_sub)
        return np.abs(r) ** 2, T
    c_exit = cos_theta(N_exit, inv)
    return substrate_RT(polarization, media, c_front, d_films_nm, N_sub, c_sub, sub_d_nm,
                        N_exit, c_exit, wavelength_nm)
