"""Tests for fitting/edge.py: where a film absorbs, read from the spectrum before any model.

References
----------
* Spectra from ``tmm`` (S. J. Byrnes, arXiv:1603.02720) through ``validation/`` with
  published n, κ: amorphous silicon (Pierce & Spicer 1972, in Palik's handbook,
  validation/data/asi_pierce1972.csv), TiO2 (Sarkar et al. 2019), Ta2O5 (Gao et al.
  2012), HfO2 (Al-Kuhaili 2004), SiO2 (Lemarchand 2013), on fused silica
  (Malitson 1965). The true αd is 4πκd/λ from the published κ (the Beer-Lambert
  loss of a wave with complex index n + iκ).
* Swanepoel, J. Phys. E 16, 1214 (1983): the envelope of the fringe maxima of a film
  with transparency x = exp(-αd) on a thick substrate of index s is
  T_M = Ax/(B - Cx + Dx²) (eq. 1 at cos φ = 1). An a-Si film was his example, at
  about 1 µm, the thickness used here.

Tolerances. -ln(T_M(x)/T_M(1)) is not exactly αd: the interference terms depend on
x (worked out below from Swanepoel's eq. 1: up to 1.6x for a-Si, n ≈ 4); hence a
factor of 2 on the values. And an envelope is known only at the fringe maxima, half
a fringe period λ²/(2nd) apart (each side of a point, the module's running maximum
spans one period), so an estimate at λ is compared with the true αd anywhere within
half a period of λ.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from fitting.edge import (CLEAR, OPAQUE_AD, EdgeData, absorption_edge, alpha_targets,
                          opaque_floor, target_residuals,
                          target_residuals_and_slopes)
from fitting.reference import estimate_noise


from validation.materials import material, substrate
from validation.synth import Instrument, measure

FS = substrate("fused_silica")
NOISE_ONLY = Instrument(noise=0.002)


def _edge(key, d, lo, hi, instrument=NOISE_ONLY, seed=3, seeded=True):
    """(wl, T, true αd, published n, EdgeData) of a tmm spectrum on a 1 nm grid.

    ``seeded``: the envelope window from the true thickness and median index, as a
    fringe seed gives them; otherwise none, as when the seed sees no fringes.
    """
    m = material(key)
    wl = np.arange(lo, hi + 0.01, 1.0)
    T, _ = measure(m, d, FS, wl, instrument, seed)
    N = m.N(wl)
    ad = 4 * np.pi * N.imag / wl * d
    e = absorption_edge(wl, T, estimate_noise(T, order=4), FS.N(wl).real,
                        thickness_nm=d if seeded else None,
                        n_film=float(np.median(N.real)) if seeded else None)
    return wl, T, ad, N.real, e


def _within_envelope_resolution(wl, ad, n, d, e):
    """Edge points whose estimate is not within a factor 2 of the true αd anywhere
    within one fringe period: the envelope is the smaller of the maxima one period
    to either side (fitting/edge.py), so an estimate may come from a maximum up to
    a period away on the absorbing side."""
    bad = []
    for lam, est in zip(e.wavelength_nm, e.alpha_d):
        half = lam ** 2 / (2 * np.interp(lam, wl, n) * d)
        near = ad[np.abs(wl - lam) <= half + 1.0]
        if not near.min() / 2 <= est <= 2 * near.max():
            bad.append((float(lam), float(est), float(near.min()), float(near.max())))
    return bad


def _clear_past_half_period(wl, ad, n, d, e):
    """Largest true αd in the clear span, beyond half a period from its ends."""
    lo, hi = e.clear_nm
    half_lo = lo ** 2 / (2 * np.interp(lo, wl, n) * d) / 2
    sel = (wl >= lo + half_lo) & (wl <= hi)
    return float(ad[sel].max())


def test_swanepoel_bias_of_the_envelope_estimate_is_below_two():
    # The reason for the factor-2 tolerance, from Swanepoel's eq. 1 at the maxima.
    def bias(n, s, ad):
        A, B = 16 * n * n * s, (n + 1) ** 3 * (n + s * s)
        C, D = 2 * (n * n - 1) * (n * n - s * s), (n - 1) ** 3 * (n - s * s)
        TM = lambda x: A * x / (B - C * x + D * x * x)  # noqa: E731
        return -math.log(TM(math.exp(-ad)) / TM(1.0)) / ad
    n_asi = material("a-Si").n(800.0)
    assert 3.5 < n_asi < 4.5
    worst = max(bias(n_asi, 1.453, ad) for ad in (0.1, 0.5, 1.0, 2.0, 3.0))
    assert 1.0 < worst < 2.0


# -- amorphous silicon, 1 µm: Swanepoel's case ----------------------------------------------
@pytest.fixture(scope="module")
def asi():
    return _edge("a-Si", 1000.0, 400.0, 1100.0)


def test_asi_opaque_clear_and_edge(asi):
    wl, _T, ad, _n, e = asi
    assert e.absorbs
    # opaque: T at the noise floor below opaque_below_nm, where the true αd exceeds the
    # module's OPAQUE_AD = 3.5 (T < 3 % of clear) within the factor-2 tolerance
    assert e.opaque_below_nm is not None and e.opaque_above_nm is None
    assert ad[wl <= e.opaque_below_nm].min() > OPAQUE_AD / 2
    assert ad[wl > e.opaque_below_nm + 20].min() < OPAQUE_AD     # and not far beyond it
    # clear: transparency ≥ 0.93 means αd ≤ 0.073
    assert ad[(wl >= e.clear_nm[0]) & (wl <= e.clear_nm[1])].max() <= 2 * -math.log(CLEAR)
    assert e.clear_nm[1] == 1100.0
    # the edge lies between the two, and every estimate is an absorption
    assert e.opaque_below_nm < e.wavelength_nm.min() <= e.wavelength_nm.max() < e.clear_nm[0]
    assert np.all(e.alpha_d > 0)


def test_asi_alpha_d_along_the_edge(asi):
    wl, _T, ad, n, e = asi
    true = np.interp(e.wavelength_nm, wl, ad)
    mid = (true >= 1.0) & (true <= OPAQUE_AD)         # where a start model needs it
    assert mid.sum() > 50
    ratio = e.alpha_d[mid] / true[mid]
    assert ratio.min() > 0.5 and ratio.max() < 2.0
    assert _within_envelope_resolution(wl, ad, n, 1000.0, e) == []


# -- titania, 600 nm: the validation case with its UV edge in range --------------------------
@pytest.fixture(scope="module")
def tio2():
    return _edge("TiO2", 600.0, 300.0, 1100.0)


def test_titania_edge_at_the_envelope_resolution(tio2):
    wl, _T, ad, n, e = tio2
    assert e.absorbs and e.opaque_below_nm is not None
    assert ad[wl <= e.opaque_below_nm].min() > OPAQUE_AD / 2
    assert e.alpha_d.size > 0
    assert _within_envelope_resolution(wl, ad, n, 600.0, e) == []
    assert _clear_past_half_period(wl, ad, n, 600.0, e) <= 2 * -math.log(CLEAR)
    assert e.clear_nm[1] == 1100.0


def test_titania_alpha_d_pointwise_within_a_factor_3(tio2):
    wl, _T, ad, _n, e = tio2
    true = np.interp(e.wavelength_nm, wl, ad)
    mid = (true >= 1.0) & (true <= OPAQUE_AD)
    assert mid.any()
    ratio = e.alpha_d[mid] / true[mid]
    assert ratio.min() > 1 / 3 and ratio.max() < 3


def test_titania_clear_span_starts_where_the_film_is_clear(tio2):
    wl, _T, ad, _n, e = tio2
    assert ad[(wl >= e.clear_nm[0]) & (wl <= e.clear_nm[1])].max() <= 3 * -math.log(CLEAR)


# -- what is not an absorption edge --------------------------------------------------------
@pytest.mark.parametrize("key, d, lo, hi, inst", [
    ("HfO2", 500.0, 300.0, 1000.0, Instrument(noise=0.002)),
    ("HfO2", 500.0, 300.0, 1000.0, Instrument(scale=0.99, tilt=0.004, noise=0.003,
                                              spread=0.01)),
    ("SiO2", 800.0, 300.0, 1100.0, Instrument(scale=1.01, tilt=-0.004, noise=0.002)),
])
def test_transparent_films_do_not_absorb(key, d, lo, hi, inst):
    # No κ in the range (HfO2: Cauchy formula) or next to none (SiO2: αd < 0.005 at
    # 300 nm from the table), and the ordinary instrument errors of issue 11 must not
    # look like absorption.
    _wl, _T, ad, _n, e = _edge(key, d, lo, hi, inst)
    assert ad.max() < 0.005
    assert not e.absorbs and e.opaque_below_nm is None and e.opaque_above_nm is None
    assert e.clear_nm == (lo, hi)


def test_a_spectrum_opaque_everywhere_has_no_clear_span():
    for seeded in (True, False):
        _wl, T, ad, _n, e = _edge("a-Si", 3000.0, 400.0, 650.0, seeded=seeded)
        assert ad.min() > 10 and T.max() < 0.01
        assert e.absorbs and e.clear_nm is None


def test_thin_transparent_film_without_a_seed_does_not_absorb():
    wl, _T, ad, _n, e = _edge("Ta2O5", 90.0, 450.0, 1100.0, seeded=False)
    assert ad.max() < 1e-3
    assert not e.absorbs
    assert e.clear_nm[1] - e.clear_nm[0] > 0.9 * (wl[-1] - wl[0])


def test_too_few_points_say_nothing():
    e = absorption_edge(np.linspace(400, 500, 11), np.full(11, 0.5), np.full(11, 0.002),
                        np.full(11, 1.5), thickness_nm=None, n_film=None)
    assert e.clear_nm is None and e.alpha_d.size == 0 and not e.absorbs


def test_opaque_floor():
    # below 4σ of the noise, and never above 0.5 % T
    y = np.array([0.004, 0.006, 0.011, 0.013, 0.5])
    s = np.array([0.001, 0.001, 0.003, 0.003, 0.2])
    assert opaque_floor(y, s).tolist() == [True, False, True, False, True]


# -- targets for a model's absorption ------------------------------------------------------
def test_alpha_targets_and_their_residuals():
    edge = EdgeData((500.0, 900.0), opaque_below_nm=350.0, opaque_above_nm=None,
                    wavelength_nm=np.array([400.0, 420.0]), alpha_d=np.array([1.0, 2.0]),
                    absorbs=True)
    t = alpha_targets(edge, 1000.0, 300.0, 1000.0)
    d_cm = 1000.0 * 1e-7
    eq = [x for x in t if x[2] == "="]
    lt = [x for x in t if x[2] == "<"]
    gt = [x for x in t if x[2] == ">"]
    assert eq == [(400.0, pytest.approx(1.0 / d_cm), "="), (420.0, pytest.approx(2.0 / d_cm),
                                                             "=")]
    assert len(lt) == 8 and lt[0][0] == 500.0 and lt[-1][0] == 900.0
    assert all(x[1] == pytest.approx(0.03 / d_cm) for x in lt)
    assert len(gt) == 5 and gt[0][0] == pytest.approx(300.0) and gt[-1][0] == pytest.approx(350.0)
    assert all(x[1] == pytest.approx(OPAQUE_AD / d_cm) for x in gt)
    # many edge points: at most 40 targets, spread along the edge, ends kept
    many = EdgeData((500.0, 900.0), wavelength_nm=np.linspace(380, 480, 300),
                    alpha_d=np.linspace(3, 0.1, 300), absorbs=True)
    eq = [x for x in alpha_targets(many, 1000.0, 300.0, 1000.0) if x[2] == "="]
    assert len(eq) == 40 and eq[0][0] == 380.0 and eq[-1][0] == 480.0
    # residuals: log ratio on the edge, one-sided in the clear and opaque parts
    tg = [(400.0, 100.0, "="), (600.0, 100.0, "<"), (600.0, 100.0, "<"),
          (300.0, 100.0, ">"), (300.0, 100.0, ">")]
    r = target_residuals(np.array([100 * math.e, 10.0, 1000.0, 10.0, 1000.0]), tg)
    np.testing.assert_allclose(r, [1.0, 0.0, math.log(10), math.log(0.1), 0.0])
    assert target_residuals(np.array([0.0]), [(400.0, 1.0, "=")])[0] == pytest.approx(
        math.log(1e-3))                                 # α = 0 is floored, not -inf
    assert edge.to_dict() == {"clear_nm": [500.0, 900.0], "opaque_below_nm": 350.0,
                              "opaque_above_nm": None, "edge_points": 2, "absorbs": True}


def test_target_slopes_are_the_derivative_by_log_alpha():
    # The edge fit's exact Jacobian uses dr/d(log α): 1 where the residual follows
    # log α, 0 where it is one-sided at rest or floored; checked by differences.
    tg = [(400.0, 100.0, "="), (600.0, 100.0, "<"), (600.0, 100.0, "<"),
          (300.0, 100.0, ">"), (300.0, 100.0, ">"), (400.0, 1.0, "=")]
    alpha = np.array([100 * math.e, 10.0, 1000.0, 10.0, 1000.0, 1e-4])
    r, slope = target_residuals_and_slopes(alpha, tg)
    np.testing.assert_array_equal(r, target_residuals(alpha, tg))
    h = 1e-6
    ref = (target_residuals(alpha * math.exp(h), tg) - target_residuals(alpha, tg)) / h
    np.testing.assert_allclose(slope, ref, atol=1e-5)
    assert slope.tolist() == [1.0, 0.0, 1.0, 1.0, 0.0, 0.0]


def test_window_maxima_equal_a_plain_scan():
    # The upper envelope takes the maximum over a window left and right of every point;
    # the sparse table must give exactly what slicing and max give (common practice:
    # a range-maximum table answers each window with two overlapping spans).
    from fitting.edge import _range_max
    rng = np.random.default_rng(4)
    for _ in range(300):
        n = int(rng.integers(1, 200))
        y = rng.standard_normal(n)
        a = rng.integers(0, n, n)
        b = np.minimum(a + rng.integers(0, n, n), n - 1)
        plain = np.array([y[i:j + 1].max() for i, j in zip(a, b)])
        assert np.array_equal(_range_max(y, a, b), plain)
