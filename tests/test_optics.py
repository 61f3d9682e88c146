"""Optical kernels against the `tmm` package, closed-form thin-film results and energy balance.

`tmm` (S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720 (2016)) is the
independent transfer-matrix reference: `coh_tmm` for a semi-infinite substrate,
`inc_tmm` for the thick incoherent one. Other sources are named beside each check.
"""

import numpy as np
import pytest
import tmm

from fitting.optics import coherent_rt, cos_theta, stack_RT



def _random_case(seed):
    """1-4 films (dielectric, absorbing or metallic) on a transparent or absorbing substrate."""
    rng = np.random.default_rng(seed)
    wl = np.sort(rng.uniform(300.0, 1600.0, 12))
    L = int(rng.integers(1, 5))
    kind = ["lossless", "absorbing", "metal"][seed % 3]
    films, d = [], []
    for j in range(L):
        # Normal dispersion n(λ) = a + b/λ² (Cauchy), so every wavelength differs.
        n = rng.uniform(1.3, 3.2) + rng.uniform(0, 0.05) / (wl / 1000) ** 2
        k = np.zeros_like(wl)
        if kind == "absorbing":
            k = rng.uniform(0.0, 0.6) * (400.0 / wl)
        if kind == "metal" and j == 0:
            n, k = rng.uniform(0.05, 0.6) + 0 * wl, rng.uniform(2.0, 6.0) * wl / 600
        films.append(n + 1j * k)
        d.append(float(rng.uniform(5.0, 60.0) if kind == "metal" and j == 0
                       else rng.uniform(5.0, 900.0)))
    ks = rng.uniform(1e-6, 4e-5) if seed % 2 else 0.0  # absorbing substrate every other case
    sub = rng.uniform(1.4, 1.9) + 0.004 / (wl / 1000) ** 2 + 1j * ks
    angle = 0.0 if seed % 4 == 0 else float(rng.uniform(5.0, 75.0))
    return wl, films, d, sub, angle


def _strong_substrate(seed, wl):
    """A semiconductor-like, strongly absorbing semi-infinite substrate (κ up to 1)."""
    rng = np.random.default_rng(1000 + seed)
    return rng.uniform(3.0, 4.5) + 1j * rng.uniform(0.01, 1.0) * (400.0 / wl)


def _tmm_reference(pol, wl, films, d, sub, angle, sub_d_nm):
    """(R, T) from tmm; 'u' is the mean of s and p.

    Natural light is an incoherent equal mix of s and p (common practice).
    """
    if pol == "u":
        return tuple(np.mean([_tmm_reference(p, wl, films, d, sub, angle, sub_d_nm)
                              for p in "sp"], axis=0))
    R, T = np.empty(wl.size), np.empty(wl.size)
    th = np.radians(angle)
    for i, lam in enumerate(wl):
        n_list = [1.0] + [N[i] for N in films] + [sub[i]]
        if sub_d_nm is None:
            res = tmm.coh_tmm(pol, n_list, [np.inf] + d + [np.inf], th, lam)
        else:
            res = tmm.inc_tmm(pol, n_list + [1.0], [np.inf] + d + [sub_d_nm, np.inf],
                              ["i"] + ["c"] * len(d) + ["i", "i"], th, lam)
        R[i], T[i] = res["R"], res["T"]
    return R, T


@pytest.mark.parametrize("seed", range(30))
def test_random_stacks_match_tmm(seed):
    wl, films, d, sub, angle = _random_case(seed)
    one = np.ones(wl.size, complex)
    # Semi-infinite (coh_tmm), also strongly absorbing, and 1 mm incoherent (inc_tmm).
    for sub_d, N_sub in ((None, sub), (None, _strong_substrate(seed, wl)), (1.0e6, sub)):
        for pol in "spu":
            R, T = stack_RT(wl, one, films, d, N_sub, sub_d, one, angle_rad=np.radians(angle),
                            polarization=pol)
            Rr, Tr = _tmm_reference(pol, wl, films, d, N_sub, angle, sub_d)
            np.testing.assert_allclose(R, Rr, rtol=0, atol=1e-9, err_msg=f"R {pol} {sub_d}")
            np.testing.assert_allclose(T, Tr, rtol=0, atol=1e-9, err_msg=f"T {pol} {sub_d}")


@pytest.mark.parametrize("seed", [1, 2, 4, 5, 7, 8, 10, 11])
def test_absorption_equals_tmm_poynting_absorption(seed):
    # R + T + A = 1 with A computed independently by tmm from the Poynting vector at each
    # interface (tmm.absorp_in_each_layer / inc_absorp_in_each_layer, Byrnes 2016).
    wl, films, d, sub, angle = _random_case(seed)
    one = np.ones(wl.size, complex)
    th = np.radians(angle)
    for pol in "sp":
        for sub_d in (None, 1.0e6):
            R, T = stack_RT(wl, one, films, d, sub, sub_d, one, angle_rad=th, polarization=pol)
            A_ref = np.empty(wl.size)
            for i, lam in enumerate(wl):
                n_list = [1.0] + [N[i] for N in films] + [sub[i]]
                if sub_d is None:
                    a = tmm.absorp_in_each_layer(
                        tmm.coh_tmm(pol, n_list, [np.inf] + d + [np.inf], th, lam))
                else:
                    a = tmm.inc_absorp_in_each_layer(
                        tmm.inc_tmm(pol, n_list + [1.0], [np.inf] + d + [sub_d, np.inf],
                                    ["i"] + ["c"] * len(d) + ["i", "i"], th, lam))
                A_ref[i] = np.sum(a[1:-1])  # first entry is R, last is T
            A = 1 - R - T
            assert np.all(A > 0) and np.all(A < 1)
            np.testing.assert_allclose(A, A_ref, rtol=0, atol=1e-9)


@pytest.mark.parametrize("seed", [0, 3, 6, 9, 12])
def test_lossless_stacks_conserve_energy(seed):
    # Lossless films and substrate: R + T = 1 exactly (Poynting's theorem; Born & Wolf 1.1.4).
    wl, films, d, sub, angle = _random_case(seed)
    films = [N.real + 0j for N in films]
    one = np.ones(wl.size, complex)
    for pol in "spu":
        for sub_d in (None, 2.0e6):
            R, T = stack_RT(wl, one, films, d, sub.real + 0j, sub_d, one,
                            angle_rad=np.radians(angle), polarization=pol)
            assert np.max(np.abs(R + T - 1)) < 1e-12


# ---------------------------------------------------------------------------------------
def _one(x, n=1):
    return np.full(n, x, dtype=complex)


def test_single_surface_fresnel_values():
    # Normal incidence R = ((n-1)/(n+1))² = 0.04 for n = 1.5; at 45° R_s = 0.0920 and
    # R_p = 0.0085 (Fresnel equations, Born & Wolf sec. 1.5; values from memory).
    wl = np.array([500.0])
    R, T = stack_RT(wl, _one(1), [], [], _one(1.5), None, _one(1))
    assert R[0] == pytest.approx(0.04, abs=1e-14) and T[0] == pytest.approx(0.96, abs=1e-14)
    Rs = stack_RT(wl, _one(1), [], [], _one(1.5), None, _one(1), angle_rad=np.radians(45),
                  polarization="s")[0][0]
    Rp = stack_RT(wl, _one(1), [], [], _one(1.5), None, _one(1), angle_rad=np.radians(45),
                  polarization="p")[0][0]
    assert Rs == pytest.approx(0.0920, abs=1e-4)
    assert Rp == pytest.approx(0.0085, abs=1e-4)
    assert Rp == pytest.approx(Rs ** 2, rel=1e-12)  # R_p = R_s² at 45° (Abelès 1950)


def test_brewster_angle():
    # R_p = 0 at tan θ_B = n (Born & Wolf sec. 1.5).
    wl = np.array([600.0])
    Rp, Tp = stack_RT(wl, _one(1), [], [], _one(1.52), None, _one(1),
                      angle_rad=np.arctan(1.52), polarization="p")
    assert Rp[0] < 1e-28 and Tp[0] == pytest.approx(1.0, abs=1e-14)


def test_total_internal_reflection():
    # Beyond the critical angle (glass to air, sin θ_c = 1/1.5) R = 1 and no power is
    # transmitted (Born & Wolf sec. 1.5).
    wl = np.array([550.0, 800.0])
    for pol in "sp":
        R, T = stack_RT(wl, _one(1.5, 2), [], [], _one(1.0, 2), None, _one(1, 2),
                        angle_rad=np.radians(50), polarization=pol)
        assert np.allclose(R, 1.0, atol=1e-14) and np.allclose(T, 0.0, atol=1e-14)


def test_evanescent_branch_decays():
    # cos θ in an absorbing or evanescent medium: Im(N cos θ) > 0, the forward (decaying)
    # wave (Byrnes 2016; tmm's "is_forward_angle").
    N = np.array([1.0 + 0j, 0.2 + 3j, 1.5 + 1e-3j])
    c = cos_theta(N, 1.3 * np.sin(np.radians(70)))
    assert np.all((N * c).imag > 0)


def test_quarter_and_half_wave_layers():
    # A quarter-wave layer of n_f = sqrt(n_s) cancels the reflection at λ0; a half-wave layer
    # is "absentee" (H. A. Macleod, *Thin-Film Optical Filters*, 4th ed., CRC (2010), ch. 2-3).
    lam0, ns = 550.0, 1.52
    wl = np.array([lam0])
    nf = np.sqrt(ns)
    R_ar = stack_RT(wl, _one(1), [_one(nf)], [lam0 / (4 * nf)], _one(ns), None, _one(1))[0]
    assert R_ar[0] < 1e-28
    bare = stack_RT(wl, _one(1), [], [], _one(ns), None, _one(1))[0]
    half = stack_RT(wl, _one(1), [_one(2.3)], [lam0 / (2 * 2.3)], _one(ns), None, _one(1))[0]
    assert half[0] == pytest.approx(bare[0], abs=1e-14)
    # Quarter-wave of n = 2.3: R = ((n_s - n²)/(n_s + n²))² (Macleod 2010).
    qw = stack_RT(wl, _one(1), [_one(2.3)], [lam0 / (4 * 2.3)], _one(ns), None, _one(1))[0]
    assert qw[0] == pytest.approx(((ns - 2.3 ** 2) / (ns + 2.3 ** 2)) ** 2, abs=1e-14)


def test_transmittance_is_reciprocal():
    # Between identical media, T is the same from either side even for lossy stacks
    # (Lorentz reciprocity; R. J. Potton, Rep. Prog. Phys. 67, 717 (2004)); R is not.
    wl, films, d, _, angle = _random_case(1)
    one = np.ones(wl.size, complex)
    glass = 1.5 * one
    for pol in "sp":
        kw = dict(angle_rad=np.radians(angle), polarization=pol)
        Rf, Tf = stack_RT(wl, glass.real + 0j, films, d, glass, None, one, **kw)
        Rb, Tb = stack_RT(wl, glass.real + 0j, films[::-1], d[::-1], glass, None, one, **kw)
        np.testing.assert_allclose(Tf, Tb, rtol=0, atol=1e-13)
        assert np.max(np.abs(Rf - Rb)) > 1e-3


def test_opaque_metal_layer_stays_finite():
    # A 2 µm metal film is opaque: T -> 0 and R equals the bulk-metal Fresnel value
    # |(1-N)/(1+N)|² (Born & Wolf ch. 14, optics of metals), with no overflow into NaN.
    wl = np.linspace(400, 800, 5)
    Nm = (0.2 + 3.5j) * np.ones(5)
    R, T = stack_RT(wl, _one(1, 5), [Nm], [2000.0], _one(1.52, 5), 1e6, _one(1, 5))
    assert np.all(np.isfinite(R)) and np.all(np.isfinite(T))
    assert np.all(T < 1e-20)
    np.testing.assert_allclose(R, np.abs((1 - Nm) / (1 + Nm)) ** 2, rtol=0, atol=1e-12)


def test_coherent_rt_of_zero_thickness_layer_is_bare_interface():
    # A film of zero thickness does not exist optically (common practice).
    wl = np.array([500.0, 900.0])
    N = [_one(1, 2), _one(2.0 + 0.1j, 2), _one(1.5, 2)]
    c = [np.ones(2)] * 3
    r, t = coherent_rt("s", N, c, [0.0], wl)
    r0, t0 = coherent_rt("s", [N[0], N[2]], c[:2], [], wl)
    assert np.allclose(r, r0, atol=1e-15) and np.allclose(t, t0, atol=1e-15)


# ---------------------------------------------------------------------------------------
def test_bare_substrate_both_faces():
    # Incoherent lossless slab: T = 2s/(s² + 1) = 0.9231 for s = 1.5 (Swanepoel 1983,
    # J. Phys. E 16, 1214).
    wl = np.linspace(400, 800, 3)
    R, T = stack_RT(wl, _one(1, 3), [], [], _one(1.5, 3), 1e6, _one(1, 3))
    assert np.allclose(T, 2 * 1.5 / (1.5 ** 2 + 1), rtol=0, atol=1e-14)
    assert T[0] == pytest.approx(0.9231, abs=1e-4)
    assert np.allclose(R + T, 1.0, atol=1e-14)


def _swanepoel_T(n, s, d, kappa, wl):
    """Swanepoel (1983), J. Phys. E 16, 1214, eq. 1 (film n - iκ on a thick substrate s)."""
    A = 16 * n ** 2 * s
    B = (n + 1) ** 3 * (n + s ** 2)
    C = 2 * (n ** 2 - 1) * (n ** 2 - s ** 2)
    D = (n - 1) ** 3 * (n - s ** 2)
    phi = 4 * np.pi * n * d / wl
    x = np.exp(-4 * np.pi * kappa * d / wl)  # α = 4πκ/λ
    return A * x / (B - C * x * np.cos(phi) + D * x ** 2)


@pytest.mark.parametrize("n,s,d", [(2.4, 1.51, 1000.0), (3.2, 1.45, 700.0), (1.9, 1.52, 2500.0)])
def test_weakly_absorbing_film_matches_swanepoel(n, s, d):
    # Eq. 1 neglects κ in the Fresnel coefficients of both film faces. That shifts each
    # reflection phase by ~2κ/(n²-1) rad, an error first order in κ with a coefficient
    # below 1: allow 0.5 κ, and demand exactness (1e-12) for κ = 0.
    wl = np.linspace(400.0, 1100.0, 300)
    one = np.ones(wl.size, complex)
    for kappa in (0.0, 1e-4, 1e-3):
        T = stack_RT(wl, one, [(n + 1j * kappa) * one], [d], s * one, 1e6, one)[1]
        ref = _swanepoel_T(n, s, d, kappa, wl)
        assert np.max(np.abs(T - ref)) <= max(0.5 * kappa, 1e-12)
    # The absorption term itself is resolved: the κ = 1e-3 spectrum differs from κ = 0
    # by far more than the tolerance.
    assert np.max(np.abs(_swanepoel_T(n, s, d, 1e-3, wl) - _swanepoel_T(n, s, d, 0, wl))) > 0.01


@pytest.mark.parametrize("seed", range(4))
def test_thickness_grid_matches_tmm_and_films_RT(seed):
    # The thickness scan's kernel: one film's thickness over a grid, the others fixed.
    # Each row must be tmm's R, T for that thickness (Byrnes 2016), and bit for bit what
    # films_RT gives for the same stack (the scan ranks thicknesses by it).
    from fitting.optics import films_RT, films_RT_thicknesses, outer_media
    wl, films, d, sub, angle = _random_case(seed)
    one = np.ones(wl.size, complex)
    scanned = len(films) - 1
    grid = np.linspace(20.0, 900.0, 5)
    for pol in "su":
        outer = outer_media(wl, one, sub, 1.0e6, one, angle_rad=np.radians(angle),
                            polarization=pol)
        R, T = films_RT_thicknesses(outer, films, [*d[:scanned], grid])
        assert R.shape == T.shape == (grid.size, wl.size)
        for i, x in enumerate(grid):
            dd = [*d[:scanned], float(x)]
            r, t = films_RT(outer, films, dd)
            assert np.array_equal(R[i], r) and np.array_equal(T[i], t)
            if i % 2 == 0:
                Rr, Tr = _tmm_reference(pol, wl, films, dd, sub, angle, 1.0e6)
                np.testing.assert_allclose(T[i], Tr, rtol=0, atol=1e-9)
                np.testing.assert_allclose(R[i], Rr, rtol=0, atol=1e-9)


@pytest.mark.parametrize("seed", range(3))
def test_transmittance_alone_is_the_same_number(seed):
    # Fits to T skip R (want_R=False): T must be bit for bit the T of the full call,
    # with and without a thickness-spread average and on a thickness grid.
    from fitting.optics import films_RT, films_RT_thicknesses, outer_media
    wl, films, d, sub, angle = _random_case(seed)
    one = np.ones(wl.size, complex)
    for pol in "su":
        outer = outer_media(wl, one, sub, 1.0e6, one, angle_rad=np.radians(angle),
                            polarization=pol)
        for kw in ({}, {"thickness_scales": [0.98, 1.0, 1.02], "weights": [0.25, 0.5, 0.25]}):
            R, T = films_RT(outer, films, d, **kw)
            R1, T1 = films_RT(outer, films, d, want_R=False, **kw)
            assert R1 is None and np.array_equal(T1, T)
        grid = [*d[:-1], np.linspace(50.0, 500.0, 4)]
        assert np.array_equal(films_RT_thicknesses(outer, films, grid, want_R=False)[1],
                              films_RT_thicknesses(outer, films, grid)[1])
