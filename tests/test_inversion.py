"""Point-by-point inversion against T and R synthesised by the reference library `tmm`.

Reference: tmm.inc_tmm (S. J. Byrnes, "Multilayer optical calculations",
arXiv:1603.02720), one coherent film on an incoherent 1 mm fused-silica substrate
(Malitson 1965 Sellmeier). The film is a Tauc-Lorentz material (Jellison & Modine,
Appl. Phys. Lett. 69, 371 (1996)); its parameters are invented.
"""

import numpy as np
import pytest
import tmm

from fitting.dispersion import Cauchy, Oscillators, TaucLorentz
from fitting.errors import FitError, ParameterError
from fitting.inversion import invert_point_by_point
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


WL = np.arange(300.0, 1001.0, 3.0)
FILM = Oscillators(2.2, [TaucLorentz(100.0, 4.8, 2.0, 3.3)])
D = 400.0
SUB = library_substrate("fused_silica", 1.0)


@pytest.fixture(scope="module")
def measured():
    N, Ns = FILM.N(WL), SUB.N(WL)
    R, T = np.empty(WL.size), np.empty(WL.size)
    for i, lam in enumerate(WL):
        o = tmm.inc_tmm("s", [1, N[i], Ns[i], 1], [np.inf, D, 1e6, np.inf],
                        ["i", "c", "i", "i"], 0.0, lam)
        R[i], T[i] = o["R"], o["T"]
    return N, T, R


def stack(d=D):
    # The film's own model is irrelevant to the inversion (a Cauchy placeholder).
    return Stack([Layer("film", Cauchy(2.0, 0.02), d)], SUB)


def test_T_and_R_recover_n_and_kappa(measured):
    N, T, R = measured
    res = invert_point_by_point(stack(), "film", WL, T, R)
    assert res.mode == "T+R" and res.ok.mean() > 0.95, res.message
    good = (np.abs(res.n - N.real) < 1e-3) & (np.abs(res.k - N.imag) < 1e-3)
    assert good.mean() > 0.9
    assert np.all(res.residual[res.ok] < 1e-6)
    # The edge (κ from 0 to ~0.3 over 300-380 nm) is followed, not just the transparent part.
    edge = WL < 380
    assert np.max(np.abs(res.k - N.imag)[edge & res.ok]) < 1e-3
    assert res.kk is not None and res.kk.consistent, res.kk.message


def test_wrong_thickness_is_caught(measured):
    # 1 % too thick: the fringes no longer line up, so the inversion either jumps
    # branch or returns n, κ that no causal material has (common practice: this is how
    # point-by-point results expose a wrong thickness).
    _, T, R = measured
    sub = slice(None, None, 2)                      # every other point keeps it quick
    res = invert_point_by_point(stack(D * 1.01), "film", WL[sub], T[sub], R[sub])
    assert res.ok.mean() < 0.95 or not res.kk.consistent
    assert res.kk is not None and not res.kk.consistent


def test_T_only_with_true_n_prior_recovers_kappa(measured):
    N, T, _ = measured
    res = invert_point_by_point(stack(), "film", WL, T, n_prior=FILM)
    assert res.mode == "T"
    assert np.array_equal(res.n, N.real)
    use = res.ok & (T > 1e-3)
    assert use.mean() > 0.95
    assert np.max(np.abs(res.k - N.imag)[use]) < 1e-4


def test_T_only_with_envelope_prior_in_transparent_region(measured):
    # No prior given: n from the envelope method's Cauchy curve refined on the
    # transparent part of T. Good to a few 1e-3 where the film is clear (the prior is a
    # 3-term Cauchy, the film Tauc-Lorentz); near the edge only κ follows the data.
    N, T, _ = measured
    res = invert_point_by_point(stack(), "film", WL, T)
    clear = WL > 420
    assert np.max(np.abs(res.n - N.real)[clear]) < 5e-3
    assert np.max(np.abs(res.k - N.imag)[clear]) < 5e-4
    assert res.ok[clear].mean() > 0.5


def test_T_only_without_fringes_asks_for_a_prior():
    thin = Stack([Layer("film", Cauchy(2.0, 0.02), 40.0)], SUB)
    T = thin.transmittance(WL)
    with pytest.raises(FitError, match="n_prior"):
        invert_point_by_point(thin, "film", WL, T)


def test_noisy_data_stay_on_the_physical_branch(measured):
    # 0.03 % photometric noise on T and R: near fringe extrema of the clear film the
    # physical and the mirror solution touch; the smooth prediction must keep the walk
    # on the physical one (a two-point extrapolation does not, with this seed).
    N, T, R = measured
    rng = np.random.default_rng(0)
    res = invert_point_by_point(stack(), "film", WL, T + rng.normal(0, 3e-4, WL.size),
                                R + rng.normal(0, 3e-4, WL.size))
    dn = np.abs(res.n - N.real)
    assert res.ok.mean() > 0.9, res.message
    assert np.median(dn) < 1e-3 and np.mean(dn < 0.01) > 0.95
    assert res.kk is not None and res.kk.consistent, res.kk.message


def test_opaque_points_are_not_ok(measured):
    N, T, R = measured
    Tc = T.copy()
    Tc[:5] = 1e-6
    sub = slice(None, None, 2)
    res = invert_point_by_point(stack(), "film", WL[sub], Tc[sub], R[sub], min_T=1e-4)
    assert not res.ok[:3].any()
    assert "opaque" in res.message


def test_bad_input():
    with pytest.raises(ParameterError, match="no such layer"):
        invert_point_by_point(stack(), "oxide", WL, np.full(WL.size, 0.8))
    with pytest.raises(ParameterError, match="shape"):
        invert_point_by_point(stack(), "film", WL, np.full(3, 0.8))
    with pytest.raises(ParameterError, match="percent"):
        invert_point_by_point(stack(), "film", WL, np.full(WL.size, 80.0))


def test_thickness_spread_and_oblique_incidence_follow_the_stack_engine():
    # Self-consistency with fitting.stack (itself checked against tmm in test_stack):
    # the inversion must use the same thickness-spread average and geometry.
    wl = WL[::3]
    true = Stack([Layer("film", FILM, D)], SUB, thickness_spread=0.01)
    R, T = true.RT(wl, angle_deg=8.0, polarization="p")
    guess = Stack([Layer("film", Cauchy(2.0, 0.02), D)], SUB, thickness_spread=0.01)
    res = invert_point_by_point(guess, "film", wl, T, R, angle_deg=8.0, polarization="p")
    N = FILM.N(wl)
    good = (np.abs(res.n - N.real) < 1e-3) & (np.abs(res.k - N.imag) < 1e-3)
    assert good.mean() > 0.9, res.message


def test_sigma_bands_match_noise_scatter(measured):
    # First-order σ(n) from the Jacobian against the actual scatter of repeated noisy
    # inversions (0.01 % noise keeps the walk on one branch): the median ratio per
    # point is near 1. (At fringe extrema of the clear film the linear σ overstates
    # the error, which grows there as the square root of the noise.)
    N, T, R = measured
    wl, n_true = WL, N.real
    runs = []
    for seed in range(4):
        rng = np.random.default_rng(seed)
        res = invert_point_by_point(stack(), "film", wl, T + rng.normal(0, 1e-4, wl.size),
                                    R + rng.normal(0, 1e-4, wl.size), sigma_data=1e-4,
                                    kk_check=False)
        runs.append(res.n - n_true)
    spread = np.sqrt(np.mean(np.square(runs), axis=0))
    assert 0.6 < np.median(spread / res.n_sigma) < 1.5
    assert np.all(res.n_sigma > 0)
