"""Tests for fitting/reference.py: reference correction and the noise estimate.

Reference values: T = (S - D)/(B - D) computed by hand below (dark-corrected ratio
against a 100 % line, common practice of spectrophotometry); the normal quantile
Phi^-1(3/4) from scipy.stats (MAD consistency factor, Hampel 1974); the variance
of the second difference of white noise, (1 + 4 + 1) sigma^2 = 6 sigma^2, by
arithmetic, and of the k-th difference, C(2k, k) sigma^2 (Vandermonde's identity);
fringe spectra for the higher-order estimate from ``tmm`` with published n, κ
(validation/materials.py names the sources).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from fitting.errors import ParameterError, SpectrumFormatError
from fitting.reader import Dialect, ReaderOptions, read_spectrum, write_spectrum
from fitting.reference import MAD_TO_SIGMA, estimate_noise, reference_correct
from fitting.spectrum import Spectrum


def counts(wl, values, **kw):
    return Spectrum(np.asarray(wl, float), np.asarray(values, float), **kw)


# --------------------------------------------------------------------- reference correction

def test_reference_correction_hand_computed():
    wl = [400, 410, 420, 430, 440, 450]
    sample = counts(wl, [550, 560, 100, 1060, 820, 1000], name="S", source="s.txt",
                    sha256="aa")
    # Baseline on its own 5 nm grid, linear so interpolation is exact:
    # B(400..440) = 1000, 1020, 1040, 1060, 1080; it ends at 445 nm.
    bwl = np.arange(395.0, 446.0, 5.0)
    baseline = counts(bwl, 1000 + 2 * (bwl - 400), name="B", source="b.txt", sha256="bb")
    dark = counts([380, 470], [100, 100], name="D", source="d.txt", sha256="dd")
    t = reference_correct(sample, baseline, dark)
    # By hand: (550-100)/(1000-100) = 0.5, 460/920 = 0.5, 0/940 = 0, 960/960 = 1,
    # 720/980 = 0.7346938775510204; 450 nm lies outside the baseline and is cut.
    np.testing.assert_allclose(t.wavelength_nm, [400, 410, 420, 430, 440])
    np.testing.assert_allclose(t.values, [0.5, 0.5, 0.0, 1.0, 0.7346938775510204], rtol=1e-14)
    assert any("restricted to 400-445 nm" in w for w in t.warnings)
    assert t.name == "S" and t.sha256 == "aa" and t.quantity == "T"
    ref = t.metadata["reference_correction"]
    assert ref["baseline"]["sha256"] == "bb" and ref["dark"]["source"] == "d.txt"
    assert t.metadata["ordinate"] == "fraction"
    # No dark: D = 0, so T = S / B; 550/1000 = 0.55.
    assert reference_correct(sample, baseline).values[0] == pytest.approx(0.55)


def test_reference_correction_propagates_sigma():
    wl = np.linspace(400, 800, 9)
    s = counts(wl, np.full(9, 600.0), sigma=np.full(9, 6.0))
    b = counts(wl, np.full(9, 1100.0), sigma=np.full(9, 4.0))
    d = counts(wl, np.full(9, 100.0), sigma=np.full(9, 2.0))
    t = reference_correct(s, b, d)
    # T = 500/1000 = 0.5; first-order propagation by finite differences.
    f = lambda S, B, D: (S - D) / (B - D)  # noqa: E731
    h = 1e-3
    parts = [(f(600 + h, 1100, 100) - f(600 - h, 1100, 100)) / (2 * h) * 6.0,
             (f(600, 1100 + h, 100) - f(600, 1100 - h, 100)) / (2 * h) * 4.0,
             (f(600, 1100, 100 + h) - f(600, 1100, 100 - h)) / (2 * h) * 2.0]
    np.testing.assert_allclose(t.sigma, np.sqrt(np.sum(np.square(parts))), rtol=1e-6)
    assert reference_correct(counts(wl, np.full(9, 600.0)), b, d).sigma is not None
    assert reference_correct(counts(wl, np.full(9, 600.0)), counts(wl, np.full(9, 1100.0)))\
        .sigma is None


def test_reference_correction_refuses_bad_pairs():
    sample = counts(np.arange(400, 500, 10), np.full(10, 500.0), source="s.txt")
    far = counts(np.arange(900, 1000, 10), np.full(10, 1000.0), source="b.txt")
    with pytest.raises(SpectrumFormatError, match=r"b.txt: shares no wavelength range"):
        reference_correct(sample, far)
    same = counts(np.arange(400, 500, 10), np.full(10, 300.0), source="b.txt")
    with pytest.raises(SpectrumFormatError, match="baseline minus dark is about zero"):
        reference_correct(sample, same, same)
    narrow = counts([405, 410, 415], [1000, 1000, 1000], source="n.txt")
    with pytest.raises(SpectrumFormatError, match="only 1 sample points"):
        reference_correct(sample, narrow)
    with pytest.raises(TypeError):
        reference_correct(sample, np.ones(10))


def test_points_without_signal_are_dropped_with_a_warning():
    wl = np.arange(400.0, 500.0, 10.0)
    b = np.full(10, 1000.0)
    b[:2] = 100.0                                   # lamp cut-off: B = D
    t = reference_correct(counts(wl, np.full(10, 550.0)), counts(wl, b),
                          counts(wl, np.full(10, 100.0)))
    np.testing.assert_allclose(t.wavelength_nm, wl[2:])
    np.testing.assert_allclose(t.values, 0.5)
    assert any("2 points" in w and "400-410 nm" in w for w in t.warnings)


def test_raw_files_read_and_corrected(tmp_path):
    wl = np.linspace(350, 1050, 141)
    lamp = 2e4 * np.exp(-((wl - 700) / 400) ** 2)
    t_true = 0.6 + 0.3 * np.cos(wl / 25)
    paths = {}
    for name, sig in (("sample", 300 + t_true * lamp), ("base", 300 + lamp),
                      ("dark", np.full(wl.size, 300.0))):
        paths[name] = write_spectrum(tmp_path / f"{name}.csv", counts(wl, sig),
                                     dialect=Dialect(delimiter=",", y_kind="counts"))
    opts = ReaderOptions(y_kind="counts")
    s, b, d = (read_spectrum(paths[k], options=opts) for k in ("sample", "base", "dark"))
    assert s.metadata["ordinate"] == "counts"
    t = reference_correct(s, b, d)
    np.testing.assert_allclose(t.values, t_true, atol=1e-8)
    assert t.source == str(paths["sample"]) and t.metadata["ordinate"] == "fraction"


# --------------------------------------------------------------------- noise estimate

def test_mad_factor_is_the_normal_quantile():
    # scipy.stats: Phi^-1(0.75) = 0.6744897...; the factor is its inverse.
    assert MAD_TO_SIGMA == pytest.approx(1 / norm.ppf(0.75), rel=1e-12)


@pytest.mark.parametrize("sigma", [0.0005, 0.004, 0.02])
def test_noise_estimate_on_seeded_white_noise(sigma):
    rng = np.random.default_rng(20240611)
    wl = np.linspace(300, 1100, 4000)
    clean = 0.55 + 0.3 * np.cos(2 * np.pi * wl / 160.0)      # ~800 points per fringe
    spec = Spectrum(wl, clean + sigma * rng.standard_normal(wl.size))
    est = estimate_noise(spec)
    assert est.shape == wl.shape
    assert np.median(est) == pytest.approx(sigma, rel=0.2)
    err = np.abs(est / sigma - 1)
    assert np.mean(err < 0.2) > 0.8 and np.all(err < 0.4)   # a local estimate scatters
    glob = estimate_noise(spec, window=None)
    assert np.ptp(glob) == 0 and glob[0] == pytest.approx(sigma, rel=0.2)


def test_noise_estimate_follows_noise_that_changes_along_the_spectrum():
    rng = np.random.default_rng(7)
    n = 4000
    sig = np.where(np.arange(n) < n // 2, 0.002, 0.008)
    est = estimate_noise(0.5 + sig * rng.standard_normal(n))
    assert np.median(est[200:1500]) == pytest.approx(0.002, rel=0.2)
    assert np.median(est[2500:3800]) == pytest.approx(0.008, rel=0.2)


def test_noise_estimate_is_robust_and_never_zero():
    rng = np.random.default_rng(11)
    y = 0.5 + 0.003 * rng.standard_normal(3000)
    y[::300] += 0.5                                          # ten spikes
    assert estimate_noise(y, window=None)[0] == pytest.approx(0.003, rel=0.2)
    line = estimate_noise(np.linspace(0.1, 0.9, 50))         # no noise at all
    assert np.all(line > 0)
    with pytest.raises(ParameterError, match="at least 5 points"):
        estimate_noise(np.ones(4))
    with pytest.raises(ParameterError, match="window"):
        estimate_noise(np.ones(40), window=2)


# --------------------------------------------------------------------- higher-order differences

@pytest.mark.parametrize("order", [2, 3, 4, 5, 6])
def test_difference_variance_factor_is_binomial(order):
    # The k-th difference of white noise is a sum of k+1 independent terms with
    # binomial weights, so its variance is sum_j C(k, j)^2 sigma^2 = C(2k, k) sigma^2
    # (Vandermonde's identity): 6, 20, 70, 252, 924. Pure white noise (no signal) must
    # give sigma back at every order.
    rng = np.random.default_rng(100 + order)
    y = 0.4 + 0.003 * rng.standard_normal(20000)
    assert estimate_noise(y, order=order, window=None)[0] == pytest.approx(0.003, rel=0.04)


def _fringe_spectrum():
    """T of a 1.5 µm Ta2O5 film on fused silica from ``tmm``, 16-20 points per fringe.

    Published n, κ: Ta2O5 from Gao et al. 2012, fused silica from Malitson 1965 (see
    validation/materials.py). The grid is uniform in wavenumber, as interference fringes
    are, with 20 points per period of 1/(2nd) at n = 2.1, so every fringe is sampled
    with 15-30 points (the group index of Ta2O5 puts it at ~17 in the blue).
    """
    from validation.materials import material, substrate
    from validation.synth import transmittance
    d, n = 1500.0, 2.1
    nu = np.arange(1 / 1100, 1 / 420, 1 / (2 * n * d * 20))
    wl = np.sort(1 / nu)
    T = transmittance(material("Ta2O5"), d, substrate("fused_silica"), wl)
    return wl, T


def test_fourth_differences_recover_the_noise_under_dense_fringes():
    wl, clean = _fringe_spectrum()
    assert np.ptp(clean) > 0.15                  # strong fringes, not a flat line
    sigma = 0.002
    rng = np.random.default_rng(2718)
    est2, est4 = [], []
    for _ in range(15):
        y = clean + sigma * rng.standard_normal(wl.size)
        est2.append(np.median(estimate_noise(y, order=2)))
        est4.append(np.median(estimate_noise(y, order=4)))
    # A fringe of P points per period leaks into the k-th difference with amplitude
    # (2 sin(pi/P))^k (the transfer function of the difference operator), against a
    # noise of sqrt(C(2k, k)) sigma: at P = 20 and a fringe amplitude of 0.1, 0.0098
    # against 0.0049 for k = 2 (the estimate is inflated) but 0.00096 against 0.017
    # for k = 4 (negligible).
    assert np.median(est4) == pytest.approx(sigma, rel=0.12)
    assert np.median(est2) > 1.4 * sigma
    assert np.median(est2) > 1.3 * np.median(est4)


def test_order_is_checked_and_short_spectra_fall_back_to_second_differences():
    with pytest.raises(ParameterError, match="order"):
        estimate_noise(np.ones(40), order=1)
    with pytest.raises(ParameterError, match="order"):
        estimate_noise(np.ones(40), order=7)
    # Eight points hold too few 6th differences for a robust scale: the plain second
    # difference is used, which a straight line leaves at zero.
    line = np.linspace(0.2, 0.9, 8)
    rng = np.random.default_rng(3)
    y = line + 0.01 * rng.standard_normal(8)
    np.testing.assert_allclose(estimate_noise(y, order=6), estimate_noise(y, order=2))
