"""Building blocks of the automatic start (fitting/autostart.py), each on its own.

Spectra come from the independent ``tmm`` package through ``validation.synth`` with
published n, κ (Ta2O5: Gao 2012; a-Si: Pierce & Spicer 1972) on fused silica (Malitson
1965); the fringe relations are Swanepoel's (J. Phys. E 16, 1214, 1983).
"""

import dataclasses
import math

import numpy as np
import pytest
from scipy.optimize import least_squares

from fitting import autostart
from fitting.dispersion import Cauchy, Oscillators, Sellmeier, TaucLorentz
from fitting.edge import absorption_edge
from fitting.reference import estimate_noise
from validation.materials import material, substrate
from validation.synth import Instrument, grid, measure

FS = substrate("fused_silica")


def _spectrum(key, d, lo=400.0, hi=1100.0, step=1.0, seed=2):
    wl = grid(lo, hi, step)
    T, _ = measure(material(key), d, FS, wl, Instrument(noise=0.002), seed)
    return wl, T


def test_fringe_seed_counts_extrema_and_gives_swanepoel_thickness():
    # Ta2O5 900 nm: 4nd/m in 400-1100 nm gives m = 7..19, i.e. 13 quarter-wave extrema
    # (Gao's n ≈ 2.1-2.2); the seed's thickness from the extrema spacing
    # (2nd(1/λ1 - 1/λ2) = k/2) is within 10 % and n within 0.1 of the source.
    wl, T = _spectrum("Ta2O5", 900.0)
    s = FS.N(wl).real
    seed = autostart.fringe_seed(wl, T, "T", s)
    n = material("Ta2O5").n(float(seed.wl_ref))
    assert seed.has_fringes and 11 <= seed.n_extrema <= 15
    assert seed.thickness_nm == pytest.approx(900.0, rel=0.10)
    assert seed.n_ref == pytest.approx(n, abs=0.1)
    assert not seed.below_substrate


def test_noise_alone_makes_no_fringes():
    wl = grid(400.0, 1100.0, 1.0)
    y = 0.92 + 0.002 * np.random.default_rng(0).standard_normal(wl.size)
    assert not autostart.fringe_seed(wl, y, "T", FS.N(wl).real).has_fringes


def test_level_parameter_sets_n_at_the_reference_wavelength():
    for m in (Cauchy(), Sellmeier(1), Oscillators(2.0, [TaucLorentz()])):
        name = autostart.n_level_param(m)
        assert name == m.level_param
        v = autostart.set_n_level(m, m.values(), name, 2.05, 633.0)
        assert autostart._n_at(m, 633.0, {**m.values(), name: v}) == pytest.approx(2.05,
                                                                                   abs=1e-6)
    fixed = Cauchy()
    fixed.params["A"] = fixed.params["A"].copy(vary=False)
    assert autostart.n_level_param(fixed) is None         # a fixed level is not moved


def test_apply_seed_fits_level_and_dispersion_to_the_fringe_n():
    # n points of a Cauchy film (A = 2.0, B = 0.02 µm²): the seed fit recovers both.
    lam = np.linspace(450, 1050, 8)
    n = 2.0 + 0.02 / (lam * 1e-3) ** 2
    seed = autostart.Seed(True, 800.0, float(np.median(n)), float(np.median(lam)), (lam, n),
                          "test", n_extrema=8)
    out = autostart.apply_seed(Cauchy(A=1.7, B=0.0, C=0.0), Cauchy().values(), seed,
                               free=("A", "B"))
    assert out["A"] == pytest.approx(2.0, abs=0.01) and out["B"] == pytest.approx(0.02,
                                                                                abs=0.003)


def test_profiled_chi2_solves_scale_and_tilt_with_their_priors_in_closed_form():
    # The closed form must equal a numerical least-squares fit of (s, t) with the same
    # Gaussian prior rows (the normal equations of linear least squares).
    rng = np.random.default_rng(1)
    W = 200
    u = np.linspace(-0.5, 0.5, W)
    m = 0.8 + 0.1 * np.sin(np.linspace(0, 12, W))
    y = (1.012 + 0.004 * u) * m + 0.002 * rng.standard_normal(W)
    w = np.full(W, 1 / 0.002 ** 2)
    nuis = autostart.Nuisance(scale=True, tilt=True, scale_sigma=0.01, tilt_sigma=0.005)
    chi = autostart._profiled_chi2(m[None, :], y, w, u, nuis)[0]

    def r(x):
        s, t = x
        return np.r_[(y - (s + t * u) * m) * np.sqrt(w), (s - 1) / 0.01, t / 0.005]
    sol = least_squares(r, [1.0, 0.0])
    assert chi == pytest.approx(float(sol.fun @ sol.fun), rel=1e-6)
    # without priors the data alone decide: χ² can only be lower
    free = autostart.Nuisance(scale=True, tilt=True)
    assert autostart._profiled_chi2(m[None, :], y, w, u, free)[0] <= chi


def test_scan_and_basins_find_the_interference_order():
    # Ta2O5 600 nm, scanned at its index from the seed: the lowest basin is the truth
    # within a scan step, the next ones are other orders (n·d off by λ/4 or more).
    from fitting.fit import FitOptions
    from fitting.objective import Objective, build_part
    from fitting.presets import default_stack
    from fitting.spectrum import Spectrum
    wl, T = _spectrum("Ta2O5", 600.0, step=2.0)
    opts = FitOptions()
    obj = Objective([build_part(0, Spectrum(wl, T), default_stack("cauchy"), opts)], opts)
    part = obj.parts[0]
    local = {loc: obj.params[g].value for g, loc in part.names}
    # Cauchy A, B, C from Gao's n over the range (least squares), so the scan looks
    # for the order only, not for the dispersion.
    n_src = np.array([material("Ta2O5").n(float(x)) for x in wl])
    X = np.column_stack([np.ones_like(wl), (wl * 1e-3) ** -2, (wl * 1e-3) ** -4])
    (A, B, C), *_ = np.linalg.lstsq(X, n_src, rcond=None)
    local.update(film_A=A, film_B=B, film_C=C)
    grid_d = np.linspace(50, 1500, 600)
    scan = autostart.scan_thickness([part], 0, [local], grid_d, None, 2.13, 633.0,
                                    autostart.Nuisance.from_options(opts))
    basins = autostart.pick_basins(scan, 3, same_nd=wl.min() / 8)
    assert abs(basins[0][0] - 600.0) < 3 * (grid_d[1] - grid_d[0])
    assert all(abs(b[0] - basins[0][0]) * 2.13 > wl.min() / 8 for b in basins[1:])


def test_contrast_ladder_straddles_the_substrate_and_skips_it():
    lv = np.asarray(autostart.contrast_levels(1.52))
    assert lv.min() >= autostart.PLAUSIBLE_N_MIN and lv.max() > 1.8
    assert np.all(np.abs(lv - 1.52) >= 0.015) and (lv < 1.52).any() and (lv > 1.52).any()


def test_edge_candidates_put_the_tauc_lorentz_gap_below_the_measured_edge():
    # a-Si 1 µm (Pierce & Spicer): opaque below ~750 nm; every Tauc-Lorentz candidate
    # absorbs there (αd > 1 at 700 nm) and is nearly clear at 1050 nm (αd < 0.3).
    wl, T = _spectrum("a-Si", 1000.0, lo=500.0)
    s = FS.N(wl).real
    sig = estimate_noise(T, order=4)
    n_ref = float(material("a-Si").n(1000.0))
    edge = absorption_edge(wl, T, sig, s, thickness_nm=1000.0, n_film=n_ref)
    seed = autostart.Seed(True, 1000.0, n_ref, 1000.0, (), "test", n_extrema=4)
    m = Oscillators(2.0, [TaucLorentz()])
    cands = autostart.edge_candidates(m, m.values(), edge, seed, set(m.params), 500.0, 1100.0)
    assert len(cands) == len(TaucLorentz.SHAPES)
    for c in cands:
        k = m.N_unchecked(np.array([700.0, 1050.0]), c).imag
        ad = 4 * math.pi * k / np.array([700.0, 1050.0]) * 1000.0
        assert ad[0] > 1.0 and ad[1] < 0.3, c


def test_scan_range_reaches_past_a_seed_made_thin_by_faint_fringes():
    # A film within 0.02 of the substrate's index (SiO2 on fused silica) swings T by
    # about 0.1 %, near the noise: the seed saw 5 of about 12 extrema and said 338 nm
    # for a 1000 nm film. Fringe count 4nd(1/λ1 - 1/λ2) (common practice): missed
    # extrema make a seed too thin, never too thick, so a faint seed's scan must
    # reach well past 2x.
    seed = autostart.Seed(True, 338.0, 1.476, 750.0, n_extrema=5)
    bounds = (1.0, 50_000.0)
    lo, hi = autostart.scan_range(seed, bounds, 312.0, 1100.0)
    assert hi == pytest.approx(2 * 338.0 + 50.0)          # clear fringes: 2x the seed
    lo_f, hi_f = autostart.scan_range(seed, bounds, 312.0, 1100.0, faint=True)
    assert lo_f == lo and hi_f >= 3 * 338.0 and hi_f >= 2000.0
    # The layer's own bounds and a range the user chose still rule.
    assert autostart.scan_range(seed, (1.0, 1500.0), 312.0, 1100.0, faint=True)[1] == 1500.0
    assert autostart.scan_range(seed, bounds, 312.0, 1100.0, (100.0, 400.0),
                                faint=True) == (100.0, 400.0)


def test_edge_start_takes_the_envelope_index_only_where_the_film_is_clear():
    # a-Si (Pierce & Spicer 1972) 500 nm on fused silica, made with tmm: on its edge
    # (650-950 nm) the falling T shifts the fringe extrema and the envelope's n comes
    # out 0.4 low, with the wrong dispersion (Swanepoel 1983 assumes weak absorption).
    # The edge fit must use the n points of the clear part only: the same starts
    # with or without the points on the edge.
    from fitting.fit import FitOptions
    from fitting.objective import build_part
    from fitting.presets import default_stack
    from fitting.spectrum import Spectrum
    from fitting.startplan import seed_and_edge

    wl = grid(400.0, 1100.0, 2.0)
    T, _ = measure(material("a-Si"), 500.0, substrate("fused_silica"), wl,
                   Instrument(noise=0.002), 5)
    stack = default_stack("tauc_lorentz", "fused_silica")
    part = build_part(0, Spectrum(wl, T), stack, FitOptions())
    seed, edge = seed_and_edge(part, part.stack.substrate.N(part.wl).real)
    lam, n = (np.asarray(a, float) for a in seed.n_points)
    clear = lam >= edge.clear_nm[0]
    assert clear.any() and not clear.all()        # the case has points on both sides
    mat = stack.layers[0].material
    free = [k for k, p in mat.params.items() if p.vary]
    args = (mat, mat.values(), edge)
    both = autostart.edge_candidates(*args, seed, free, 400.0, 1100.0)
    only_clear = autostart.edge_candidates(
        *args, dataclasses.replace(seed, n_points=(lam[clear], n[clear])), free, 400.0, 1100.0)
    assert both == only_clear
