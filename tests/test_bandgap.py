"""Tauc-plot band gap against synthetic edges of the textbook forms.

Reference forms: α hν ∝ (hν - Eg)^½ for direct allowed and ∝ (hν - Eg)² for
indirect allowed transitions (Tauc, Grigorovici & Vancu 1966, Phys. Status Solidi
15, 627; Davis & Mott 1970, Philos. Mag. 22, 903), with an exponential Urbach tail
below the gap (Urbach 1953, Phys. Rev. 92, 1324). Amplitudes are invented.
"""

import numpy as np
import pytest

from fitting.bandgap import NoAbsorptionEdgeError, tauc_curve, tauc_gap
from fitting.errors import ParameterError, PellucidError
from fitting.result import BandGap
from fitting.units import HC_EV_NM

WL = np.arange(250.0, 800.0, 1.0)
E = HC_EV_NM / WL


def direct_alpha(E, Eg=3.2, Eu=0.05):
    edge = 1e5 * np.sqrt(np.clip(E - Eg, 0, None)) / E
    Et = Eg + Eu / 2                       # tail joins the edge continuously here
    tail = 1e5 * np.sqrt(Et - Eg) / Et * np.exp((E - Et) / Eu)
    return np.where(E < Et, tail, edge)


def indirect_alpha(E, Eg=1.8, Eu=0.05):
    edge = 1e4 * (E - Eg) ** 2 / E
    Et = Eg + 2 * Eu
    tail = 1e4 * (Et - Eg) ** 2 / Et * np.exp((E - Et) / Eu)
    return np.where(E < Et, tail, edge)


def noisy(a, level, seed):
    rng = np.random.default_rng(seed)
    return a * (1 + level * rng.normal(size=a.size)) + 1e-2 * level * a.max() * rng.normal(
        size=a.size)


@pytest.mark.parametrize("level", [0.0, 0.01, 0.03])
@pytest.mark.parametrize("seed", [0, 1])
def test_direct_gap_recovered(level, seed):
    g = tauc_gap(WL, noisy(direct_alpha(E), level, seed), transition="direct")
    assert isinstance(g, BandGap) and g.transition == "direct"
    assert g.Eg_eV == pytest.approx(3.2, abs=0.05)
    assert g.r_squared >= 0.99
    assert g.fit_range_eV[0] >= 3.2 - 0.05        # the Urbach tail is left out
    assert 0 <= g.sigma_eV < 0.05


@pytest.mark.parametrize("level", [0.0, 0.01, 0.03])
@pytest.mark.parametrize("seed", [0, 1])
def test_indirect_gap_recovered(level, seed):
    g = tauc_gap(WL, noisy(indirect_alpha(E), level, seed), transition="indirect")
    assert g.Eg_eV == pytest.approx(1.8, abs=0.05)
    assert g.fit_range_eV[1] - g.fit_range_eV[0] > 0.5   # a long straight window


def test_wrong_transition_type_gives_other_gap():
    # The direct-gap edge plotted as indirect is curved; the gap it gives is not 3.2 eV
    # to within the accuracy above, so the transition type matters (a test that can fail).
    g = tauc_gap(WL, direct_alpha(E), transition="indirect")
    assert abs(g.Eg_eV - 3.2) > 0.05


def test_energy_range_override():
    a = direct_alpha(E)
    g = tauc_gap(WL, a, transition="direct", energy_range_eV=(3.5, 4.2))
    assert g.fit_range_eV[0] >= 3.5 and g.fit_range_eV[1] <= 4.2
    assert g.Eg_eV == pytest.approx(3.2, abs=1e-6)      # exactly linear there
    # A range on the Urbach tail gives a different, wrong gap: the override is obeyed.
    tail = tauc_gap(WL, a, transition="direct", energy_range_eV=(2.9, 3.2))
    assert tail.Eg_eV < 3.15
    with pytest.raises(NoAbsorptionEdgeError, match="widen it"):
        tauc_gap(WL, a, energy_range_eV=(3.5, 3.51))


def test_sigma_from_covariance_matches_scatter():
    # Over many noise draws the spread of Eg matches the quoted σ within a factor 2
    # (first-order propagation with the slope-intercept covariance).
    a0 = direct_alpha(E)
    gaps, sigmas = [], []
    for seed in range(30):
        g = tauc_gap(WL, noisy(a0, 0.01, seed), transition="direct",
                     energy_range_eV=(3.3, 4.5))
        gaps.append(g.Eg_eV)
        sigmas.append(g.sigma_eV)
    assert 0.5 < np.std(gaps) / np.mean(sigmas) < 2.0


def test_transparent_film_raises_clear_error():
    with pytest.raises(NoAbsorptionEdgeError, match="transparent"):
        tauc_gap(WL, np.zeros_like(WL))
    assert issubclass(NoAbsorptionEdgeError, PellucidError)


def test_no_edge_in_range_raises():
    # Pure noise around zero: no straight rising part.
    rng = np.random.default_rng(3)
    with pytest.raises(NoAbsorptionEdgeError, match="no straight rising"):
        tauc_gap(WL, np.abs(rng.normal(0, 10, WL.size)))


def test_bad_arguments():
    with pytest.raises(ParameterError, match="transition"):
        tauc_gap(WL, direct_alpha(E), transition="forbidden")
    with pytest.raises(ParameterError, match="shape"):
        tauc_gap(WL, direct_alpha(E)[:-1])


def test_tauc_curve_is_ascending_in_energy():
    Ec, y = tauc_curve(WL, direct_alpha(E), transition="direct")
    assert np.all(np.diff(Ec) > 0)
    assert np.allclose(y, (direct_alpha(Ec) * Ec) ** 2)


def test_stricter_straightness_narrows_the_window_on_a_curved_edge():
    # A Tauc-Lorentz film (Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996)): its ε2
    # follows Tauc's (E - Eg)² law only near Eg and bends above, so (αhν)^½ is curved.
    from fitting.dispersion import Oscillators, TaucLorentz
    from fitting.units import alpha_per_cm
    wl = np.arange(200.0, 700.0, 1.0)
    k = Oscillators(2.0, [TaucLorentz(120.0, 4.5, 1.8, 3.0)]).N(wl).imag
    loose = tauc_gap(wl, alpha_per_cm(k, wl), transition="indirect")
    strict = tauc_gap(wl, alpha_per_cm(k, wl), transition="indirect", r2_min=0.999)
    width = lambda g: g.fit_range_eV[1] - g.fit_range_eV[0]  # noqa: E731
    assert strict.r_squared >= 0.999 > loose.r_squared
    assert width(strict) < width(loose)
    assert 3.0 <= loose.Eg_eV < 3.2          # above the model's Eg: the bend, not an error


def test_docstring_examples():
    import doctest

    import fitting.bandgap as mod
    assert doctest.testmod(mod).failed == 0


def _plain_loop_window(E, y, min_points=5, r2_min=0.99):
    """The window rule of fitting.bandgap written as a loop over every window, one
    least-squares line each (an independent check of the prefix-sum scan)."""
    n = E.size
    X, Y = (E - E.mean()) / np.ptp(E), y / np.max(np.abs(y))
    d2 = np.diff(Y, 2) ** 2 / 6.0          # white noise: E[(second difference)²] = 6σ²
    d2 = np.concatenate(([d2[0]], d2, [d2[-1]]))
    noise = np.array([d2[max(0, i - 5):i + 6].mean() for i in range(n)])
    found = []                              # (i, j, points, slope, slope - 2σ)
    for i in range(n):
        for j in range(i + min_points - 1, n):
            x, v = X[i:j + 1], Y[i:j + 1]
            m = j - i + 1
            dx, dv = x - x.mean(), v - v.mean()
            sxx, syy = dx @ dx, dv @ dv
            a = (dx @ dv) / sxx
            ssr = max(syy - a * (dx @ dv), 0.0)
            b = v.mean() - a * x.mean()
            if not (syy > 0 and 1 - ssr / syy >= r2_min and a > 0 and -b / a <= x[0]):
                continue
            s2 = max(ssr / (m - 2), noise[i:j + 1].mean())
            found.append((i, j, m, a, a - 2 * np.sqrt(s2 / sxx)))
    pool = [w for w in found if w[2] >= max(min_points, n // 10)] or found
    a_edge = max(w[4] for w in pool)
    steep = [w for w in found if w[3] >= 0.85 * a_edge] or found
    best = min(steep, key=lambda w: (-w[2], -w[3]))   # longest, then steepest
    return best[0], best[1]


def _tauc_lorentz_alpha(wl):
    # Tauc-Lorentz (Jellison & Modine, Appl. Phys. Lett. 69, 371 (1996)): a curved edge,
    # so which window is the longest steep straight part matters.
    from fitting.dispersion import Oscillators, TaucLorentz
    from fitting.units import alpha_per_cm
    k = Oscillators(2.0, [TaucLorentz(120.0, 4.5, 1.8, 3.0)]).N(wl).imag
    return alpha_per_cm(k, wl)


def _saturating_alpha(wl):
    # A direct edge that flattens at high α (invented amplitudes): the straight part
    # ends inside the data.
    return 3e5 * np.tanh(direct_alpha(HC_EV_NM / wl) / 3e5)


@pytest.mark.parametrize("transition,alpha,level,seed", [
    ("direct", lambda wl: direct_alpha(HC_EV_NM / wl), 0.01, 1),
    ("direct", _tauc_lorentz_alpha, 0.0, 0), ("indirect", _tauc_lorentz_alpha, 0.01, 1),
    ("indirect", _saturating_alpha, 0.0, 0), ("indirect", _saturating_alpha, 0.01, 1)])
def test_window_scan_matches_a_plain_loop(transition, alpha, level, seed):
    # The automatic window (prefix sums over all windows at once) is the one a
    # straightforward loop over the windows picks by the rule of the module docstring.
    wl = np.linspace(200.0, 800.0, 100)
    a = noisy(alpha(wl), level, seed)
    Ec, y = tauc_curve(wl, a, transition=transition)
    i, j = _plain_loop_window(Ec, y)
    g = tauc_gap(wl, a, transition=transition)
    assert g.fit_range_eV == (Ec[i], Ec[j])
    assert j - i + 1 >= 5
