"""Stack engine checks against outside references.

Sources named beside each check; the `tmm` package (S. J. Byrnes, arXiv:1603.02720)
is the independent transfer-matrix reference.
"""

import math

import numpy as np
import pytest
import tmm

from fitting.dispersion import Bruggeman, Cauchy, Constant, Drude, Lorentz, Oscillators, \
    Tabulated, TaucLorentz
from fitting.errors import ParameterError, RecipeError, WavelengthRangeError
from fitting.stack import Layer, Stack
from fitting.substrates import Substrate, library_substrate



def test_bare_lossless_substrate_transmission():
    # Incoherent slab, both faces: T = 2s/(s²+1) (Swanepoel 1983, J. Phys. E 16, 1214):
    # 0.9231 for s = 1.5.
    wl = np.linspace(400, 800, 5)
    T = Stack([], Substrate(Constant(1.5), 1.0)).transmittance(wl)
    assert np.allclose(T, 2 * 1.5 / (1.5 ** 2 + 1))
    assert T[0] == pytest.approx(0.9231, abs=1e-4)


def test_single_surface_reflectance():
    # Fresnel normal-incidence reflectance ((n-1)/(n+1))² = 0.04 for n = 1.5 (Born & Wolf 1.5).
    from fitting.optics import stack_RT
    wl = np.array([500.0])
    one = np.ones(1, complex)
    R, T = stack_RT(wl, one, [], [], 1.5 * one, None, one)
    assert R[0] == pytest.approx(0.04, abs=1e-12)
    assert T[0] == pytest.approx(0.96, abs=1e-12)


@pytest.mark.parametrize("angle,pol", [(0, "s"), (45, "s"), (45, "p")])
def test_single_absorbing_film_matches_tmm_inc_tmm(angle, pol):
    # Reference: tmm.inc_tmm with a coherent film and an incoherent 1 mm substrate.
    wl = np.linspace(300, 1100, 60)
    film = Cauchy(2.2, 0.03, urbach=True, k0=0.01, Eu=0.3)
    st = Stack([Layer("film", film, 600.0)], library_substrate("fused_silica", 1.0))
    R, T = st.RT(wl, angle_deg=angle, polarization=pol)
    Nf, Ns = film.N(wl), st.substrate.N(wl)
    for i, lam in enumerate(wl):
        ref = tmm.inc_tmm(pol, [1, Nf[i], Ns[i], 1], [np.inf, 600, 1e6, np.inf],
                          ["i", "c", "i", "i"], np.radians(angle), lam)
        assert R[i] == pytest.approx(ref["R"], abs=1e-9)
        assert T[i] == pytest.approx(ref["T"], abs=1e-9)


def test_negative_thickness_is_refused():
    with pytest.raises(ParameterError, match="negative"):
        Layer("film", Cauchy(), -5.0)


# ---------------------------------------------------------------------------------------
def _random_stack(seed):
    """1-4 tabulated films (exact N on the grid) on an incoherent, possibly lossy substrate."""
    rng = np.random.default_rng(seed)
    wl = np.sort(rng.uniform(320.0, 1500.0, 14))
    layers = []
    for j in range(int(rng.integers(1, 5))):
        n = rng.uniform(1.3, 3.0) + 0.02 / (wl / 1000) ** 2
        k = rng.uniform(0, 0.3) * 400 / wl if seed % 2 else 0 * wl
        layers.append(Layer(f"f{j}", Tabulated(wl, n, k, name=f"f{j}"),
                            float(rng.uniform(5, 900))))
    ns = rng.uniform(1.4, 1.9) + 0.004 / (wl / 1000) ** 2
    sub = Substrate(Tabulated(wl, ns, name="sub"), float(rng.uniform(0.3, 3.0)),
                    internal_transmittance=float(rng.uniform(0.3, 1.0)) if seed % 3 else None)
    # Immersion ambient / different exit medium in some cases.
    ambient = Constant(1.33) if seed % 5 == 0 else Constant(1.0)
    exit_medium = Constant(1.45) if seed % 4 == 1 else Constant(1.0)
    angle = 0.0 if seed % 4 == 0 else float(rng.uniform(5, 70))
    return wl, Stack(layers, sub, ambient, exit_medium), angle


@pytest.mark.parametrize("seed", range(16))
def test_random_stacks_through_stack_model_match_tmm(seed):
    # Stack.RT (the path fits use) against tmm.inc_tmm: coherent films, incoherent substrate.
    wl, st, angle = _random_stack(seed)
    Nl = [layer.material.N(wl) for layer in st.layers]
    d = [layer.thickness_nm for layer in st.layers]
    Ns, n0, ne = st.substrate.N(wl), st.ambient.N(wl), st.exit_medium.N(wl)
    ref = {}
    for pol in "sp":
        rr = []
        for i, lam in enumerate(wl):
            res = tmm.inc_tmm(pol, [n0[i]] + [N[i] for N in Nl] + [Ns[i], ne[i]],
                              [np.inf] + d + [st.substrate.thickness_nm, np.inf],
                              ["i"] + ["c"] * len(d) + ["i", "i"], np.radians(angle), lam)
            rr.append((res["R"], res["T"]))
        ref[pol] = np.array(rr).T
    ref["u"] = (ref["s"] + ref["p"]) / 2  # natural light: mean of s and p (Born & Wolf 1.4.2)
    for pol in "spu":
        R, T = st.RT(wl, angle_deg=angle, polarization=pol)
        np.testing.assert_allclose(R, ref[pol][0], rtol=0, atol=1e-9)
        np.testing.assert_allclose(T, ref[pol][1], rtol=0, atol=1e-9)


def test_model_films_on_library_substrate_match_tmm():
    # Oscillator film under a Bruggeman roughness layer on N-BK7 with bulk loss, oblique,
    # unpolarised; reference tmm.inc_tmm with the models' N.
    wl = np.linspace(320, 1500, 25)
    film = Oscillators(1.8, [TaucLorentz(90, 4.4, 1.6, 3.2), Drude(0.6, 0.12)])
    rough = Bruggeman(film, Constant(1.0), 0.45)
    st = Stack([Layer("rough", rough, 12.0), Layer("film", film, 540.0)],
               library_substrate("n_bk7", 1.1, internal_transmittance=0.93))
    R, T = st.RT(wl, angle_deg=35.0, polarization="u")
    Nr, Nf, Ns = rough.N(wl), film.N(wl), st.substrate.N(wl)
    for i, lam in enumerate(wl):
        ref = [tmm.inc_tmm(p, [1, Nr[i], Nf[i], Ns[i], 1], [np.inf, 12, 540, 1.1e6, np.inf],
                           ["i", "c", "c", "i", "i"], np.radians(35), lam) for p in "sp"]
        assert R[i] == pytest.approx((ref[0]["R"] + ref[1]["R"]) / 2, abs=1e-9)
        assert T[i] == pytest.approx((ref[0]["T"] + ref[1]["T"]) / 2, abs=1e-9)


@pytest.mark.parametrize("sub_kappa,sub_mm,exit_medium,angle", [
    (1e-3, 0.01, Constant(1.0), 60.0),        # strongly absorbing substrate, steep angle
    (3e-4, 0.05, Constant(1.33, 1e-3), 0.0),  # lossy exit medium
    (3e-4, 0.05, Constant(1.33, 0.02), 40.0),
])
def test_lossy_substrate_and_exit_medium_match_tmm(sub_kappa, sub_mm, exit_medium, angle):
    # The back-side terms with complex admittances, against tmm.inc_tmm.
    wl = np.linspace(350, 1200, 20)
    film = Cauchy(2.3, 0.03, urbach=True, k0=0.05, Eu=0.25)
    st = Stack([Layer("film", film, 400.0)], Substrate(Cauchy(1.6, 0.01), sub_mm, kappa=sub_kappa),
               Constant(1.0), exit_medium)
    Nf, Ns, Ne = film.N(wl), st.substrate.N(wl), exit_medium.N(wl)
    for pol in "sp":
        R, T = st.RT(wl, angle_deg=angle, polarization=pol)
        assert np.all(T > 0.05)  # the substrate is lossy, not opaque: T still tests something
        for i, lam in enumerate(wl):
            ref = tmm.inc_tmm(pol, [1, Nf[i], Ns[i], Ne[i]], [np.inf, 400, sub_mm * 1e6, np.inf],
                              ["i", "c", "i", "i"], np.radians(angle), lam)
            assert R[i] == pytest.approx(ref["R"], abs=1e-9)
            assert T[i] == pytest.approx(ref["T"], abs=1e-9)


def test_energy_balance_through_stack():
    # Lossless everything: R + T = 1 (Born & Wolf 1.1.4); lossy film: 0 < A = 1 - R - T < 1
    # and A equals tmm's Poynting-vector absorption (tmm.inc_absorp_in_each_layer).
    wl = np.linspace(350, 1200, 40)
    st = Stack([Layer("film", Cauchy(2.1, 0.02), 750.0)], library_substrate("fused_silica"))
    for pol in "spu":
        R, T = st.RT(wl, angle_deg=50.0, polarization=pol)
        assert np.max(np.abs(R + T - 1)) < 1e-12
    film = Cauchy(2.3, 0.03, urbach=True, k0=0.05, Eu=0.25)
    st = Stack([Layer("film", film, 400.0)], library_substrate("fused_silica"))
    R, T = st.RT(wl, polarization="s")
    A = 1 - R - T
    assert np.all(A > 0) and np.all(A < 1)
    Nf, Ns = film.N(wl), st.substrate.N(wl)
    for i, lam in enumerate(wl[::4]):
        j = 4 * i
        data = tmm.inc_tmm("s", [1, Nf[j], Ns[j], 1], [np.inf, 400, 1e6, np.inf],
                           ["i", "c", "i", "i"], 0.0, lam)
        assert A[j] == pytest.approx(sum(tmm.inc_absorp_in_each_layer(data)[1:-1]), abs=1e-9)


# ---------------------------------------------------------------------------------------
# Thickness non-uniformity: E over d(1 + s x), x ~ N(0, 1), against our own brute force,
# a 400-point trapezoid rule on x in [-6, 6] (errors < 1e-9 for these fringe spacings).

def _brute_spread(stack, wl, spread, n_nodes=400):
    x = np.linspace(-6, 6, n_nodes)
    w = np.exp(-x * x / 2)
    w /= w.sum()
    ev = Stack(stack.layers, stack.substrate).evaluator(wl, polarization="s")
    d0 = {f"{layer.name}_thickness": layer.thickness_nm for layer in stack.layers}
    R = T = 0.0
    for xi, wi in zip(x, w):
        # The Gaussian tail below zero thickness (weight < 5e-4) is lumped at d = 0.
        Ri, Ti = ev.RT({k: d * max(1 + spread * xi, 0.0) for k, d in d0.items()})
        R, T = R + wi * Ri, T + wi * Ti
    return R, T


@pytest.mark.parametrize("n,d,spread,tol", [
    (2.2, 1000.0, 0.02, 1e-7),   # phase spread ~1.4 rad at 400 nm
    (2.2, 5000.0, 0.02, 1e-6),   # ~7 rad: fringes nearly washed out in the blue
    (3.5, 3000.0, 0.01, 5e-5),   # strong reflections: many harmonics
    (2.0, 150.0, 0.3, 1e-6),     # widest allowed spread: the kink at d = 0 costs accuracy
])
def test_thickness_spread_equals_brute_force_gaussian_average(n, d, spread, tol):
    wl = np.linspace(400, 1000, 241)
    layers = [Layer("film", Cauchy(n, 0.02 if n < 3 else 0.0), d)]
    st = Stack(layers, Substrate(Constant(1.52), 1.0), thickness_spread=spread)
    R, T = st.RT(wl, polarization="s")
    Rb, Tb = _brute_spread(st, wl, spread)
    assert np.max(np.abs(T - Tb)) < tol
    assert np.max(np.abs(R - Rb)) < tol


def test_thickness_spread_two_layers_and_damping():
    wl = np.linspace(400, 1000, 241)
    layers = [Layer("hi", Cauchy(2.3, 0.02), 900.0), Layer("lo", Cauchy(1.46, 0.004), 1400.0)]
    uniform = Stack(layers, library_substrate("fused_silica"))
    spread = Stack(layers, library_substrate("fused_silica"), thickness_spread=0.02)
    T0 = uniform.transmittance(wl, polarization="s")
    T1 = spread.transmittance(wl, polarization="s")
    assert np.max(np.abs(T1 - _brute_spread(spread, wl, 0.02)[1])) < 1e-7
    # Averaging over thickness damps the fringes (Swanepoel 1984, J. Phys. E 17, 896; from memory).
    blue = wl < 600  # the phase spread grows as 1/λ: strongest damping in the blue
    assert np.ptp(T1[blue]) < 0.7 * np.ptp(T0[blue])
    assert np.ptp(T1) < np.ptp(T0)
    assert abs(np.mean(T1) - np.mean(T0)) < 0.01


def test_spread_and_slit_together_at_oblique_incidence():
    # Both averages at once, unpolarised at 40°, against thickness-averaged slit spectra:
    # the two averages commute (Fubini), so brute force over d of the slit-only engine.
    wl = np.linspace(400, 1000, 121)
    film = Cauchy(2.1, 0.02, urbach=True, k0=0.01, Eu=0.3, E_edge=3.5)
    both = Stack([Layer("film", film, 1800.0)], library_substrate("n_bk7"),
                 thickness_spread=0.015, bandwidth_nm=3.0)
    R, T = both.RT(wl, angle_deg=40.0, polarization="u")
    slit_only = Stack(both.layers, both.substrate, bandwidth_nm=3.0).evaluator(
        wl, angle_deg=40.0, polarization="u")
    x = np.linspace(-6, 6, 400)
    w = np.exp(-x * x / 2)
    w /= w.sum()
    Rb = Tb = 0.0
    for xi, wi in zip(x, w):
        Ri, Ti = slit_only.RT({"film_thickness": 1800.0 * (1 + 0.015 * xi)})
        Rb, Tb = Rb + wi * Ri, Tb + wi * Ti
    assert np.max(np.abs(T - Tb)) < 1e-6 and np.max(np.abs(R - Rb)) < 1e-6


# Finite bandwidth: a triangular slit of FWHM w (base 2w) against a brute-force average of
# single-wavelength spectra on a 1601-point grid (trapezoid rule, with a node on the kink
# at u = 0; its own error is ~2e-8 for 1-3 µm films and ~1e-6 for 10 µm).

def _brute_slit(stack, wl, fwhm, n_nodes=1601):
    u = np.linspace(-1, 1, n_nodes)
    w = 1 - np.abs(u)
    w /= np.trapezoid(w, u)
    plain = Stack(stack.layers, stack.substrate)
    shifted = wl[None, :] + fwhm * u[:, None]  # all single-wavelength spectra in one call
    Ts = plain.transmittance(shifted.ravel(), polarization="s").reshape(shifted.shape)
    return np.trapezoid(w[:, None] * Ts, u, axis=0)


@pytest.mark.parametrize("d,fwhm,tol", [
    # The engine's slit rule is Gauss-Jacobi on each half of the triangle, exact for
    # polynomials of degree 11 on either side of the kink: for fringe periods
    # P = λ²/(2nd) (Swanepoel 1983) much wider than the slit it is exact to the brute
    # force's own error ...
    (1000.0, 2.0, 1e-7),
    (1000.0, 5.0, 1e-7),
    (3000.0, 2.0, 1e-7),
    # ... and it degrades gracefully when the slit spans about one fringe (P ≈ 7 nm),
    (5000.0, 5.0, 2e-5),
    # or 1.5 fringes (P ≈ 3.4 nm at 400 nm): still below a good photometer's noise.
    (10000.0, 5.0, 2e-3),
])
def test_bandwidth_equals_brute_force_slit_average(d, fwhm, tol):
    wl = np.linspace(400, 1000, 121)
    st = Stack([Layer("film", Cauchy(2.2, 0.02), d)], Substrate(Constant(1.52), 1.0),
               bandwidth_nm=fwhm)
    T = st.transmittance(wl, polarization="s")
    Tb = _brute_slit(st, wl, fwhm)
    T0 = Stack(st.layers, st.substrate).transmittance(wl, polarization="s")
    assert np.max(np.abs(T - Tb)) < tol
    # ... and the slit does damp the fringes, by much more than that error.
    assert np.ptp(T0) - np.ptp(T) > max(1e-3, 10 * tol)


# ---------------------------------------------------------------------------------------
def test_stack_round_trip():
    st = Stack([Layer("rough", Bruggeman(Cauchy(2.0, 0.02), Constant(1.0), 0.4), 15.0),
                Layer("film", Oscillators(1.5, [TaucLorentz(), Lorentz(0.2, 8.0, 1.0)]), 650.0)],
               library_substrate("sapphire_o", 0.5), Constant(1.0), Constant(1.33),
               thickness_spread=0.01, bandwidth_nm=1.5)
    back = Stack.from_dict(st.to_dict())
    wl = np.linspace(300, 1200, 50)
    for pol, angle in (("u", 0.0), ("p", 40.0)):
        assert np.array_equal(np.array(back.RT(wl, angle_deg=angle, polarization=pol)),
                              np.array(st.RT(wl, angle_deg=angle, polarization=pol)))
    assert back.to_dict() == st.to_dict()


def test_evaluator_follows_parameter_changes():
    # The evaluator caches N per layer; new values must give the fresh result (common practice
    # check of a cache: compare with an uncached evaluation).
    wl = np.linspace(400, 900, 30)
    st = Stack([Layer("film", Cauchy(2.0, 0.02), 500.0)], library_substrate("fused_silica"))
    ev = st.evaluator(wl)
    first = ev.RT({"film_A": 2.1, "film_thickness": 480.0})
    second = ev.RT({"film_A": 2.3, "film_thickness": 480.0})
    fresh = Stack([Layer("film", Cauchy(2.3, 0.02), 480.0)],
                  library_substrate("fused_silica")).RT(wl)
    assert not np.allclose(first[1], second[1])
    assert np.array_equal(np.array(second), np.array(fresh))
    assert np.array_equal(np.array(ev.RT({"film_A": 2.1, "film_thickness": 480.0})),
                          np.array(first))


# ---------------------------------------------------------------------------------------
# Bad input: specific errors with actionable messages, never NaN.

def _simple():
    return Stack([Layer("film", Cauchy(2.0, 0.02), 500.0)], library_substrate("fused_silica"))


@pytest.mark.parametrize("values,match", [
    ({"film_thickness": -1.0}, "'film_thickness'.*non-negative"),
    ({"film_thickness": math.nan}, "'film_thickness'.*non-negative"),
    ({"film_A": math.nan}, "'film_A'.*finite"),
    ({"film_B": math.inf}, "'film_B'.*finite"),
])
def test_bad_values_in_fit_path(values, match):
    ev = _simple().evaluator(np.linspace(400, 800, 5))
    with pytest.raises(ParameterError, match=match):
        ev.RT(values)


def test_pole_in_fit_path_is_an_error_not_nan():
    # An undamped Lorentz oscillator exactly on a grid wavelength (E0 = hc/λ).
    from fitting.units import HC_EV_NM
    wl = np.array([500.0, 600.0, 700.0])
    st = Stack([Layer("film", Oscillators(2.0, [Lorentz(0.5, 4.0, 0.1)]), 300.0)],
               library_substrate("fused_silica"))
    ev = st.evaluator(wl)
    assert np.all(np.isfinite(ev.RT()[1]))
    with pytest.raises(ParameterError, match="non-finite"):
        ev.RT({"film_o1_gamma": 0.0, "film_o1_E0": HC_EV_NM / 600.0})


@pytest.mark.parametrize("wl,kw,exc,match", [
    ([400.0, math.nan], {}, ParameterError, "finite"),
    ([[400.0, 500.0]], {}, ParameterError, "1-D"),
    ([150.0, 500.0], {}, WavelengthRangeError, "fused silica is valid from 210"),
    ([400.0], {"angle_deg": 90.0}, ParameterError, r"\[0, 90\)"),
    ([400.0], {"angle_deg": math.nan}, ParameterError, "finite"),
    ([400.0], {"polarization": "x"}, ParameterError, "'s', 'p' or 'u'"),
])
def test_bad_geometry_and_wavelengths(wl, kw, exc, match):
    with pytest.raises(exc, match=match):
        _simple().RT(wl, **kw)


def test_table_film_outside_its_table():
    st = Stack([Layer("film", Tabulated([400, 900], [2.0, 1.9], name="film.nk"), 300.0)],
               library_substrate("fused_silica"))
    with pytest.raises(WavelengthRangeError, match="table film.nk is valid from 400 to 900"):
        st.RT([350.0, 600.0])
    # The slit's side nodes must lie inside the table too.
    st.bandwidth_nm = 5.0
    with pytest.raises(WavelengthRangeError):
        st.RT([401.0, 600.0])


@pytest.mark.parametrize("make,match", [
    (lambda: Layer("film", Cauchy(), math.nan), "finite"),
    (lambda: Layer("2nd", Cauchy(), 10.0), "must start with a letter"),
    (lambda: Layer("my film", Cauchy(), 10.0), "letters and digits"),
    (lambda: Stack([Layer("a", Cauchy(), 1.0), Layer("a", Cauchy(), 2.0)],
                   library_substrate("caf2")), "unique"),
    (lambda: Stack([], library_substrate("caf2"), thickness_spread=0.5), "above 0.3"),
    (lambda: Stack([], library_substrate("caf2"), thickness_spread=-0.01), "must not be negative"),
    (lambda: Stack([], library_substrate("caf2"), bandwidth_nm=math.nan), "finite"),
    (lambda: Stack([], library_substrate("caf2"), bandwidth_nm=-1.0), "must not be negative"),
    (lambda: Stack([], library_substrate("caf2"), Constant(1.0, 0.1)).RT([500.0], angle_deg=30),
     "lossless"),
    (lambda: Stack([], Substrate(Constant(1.5)), bandwidth_nm=500.0).RT([300.0]),
     "wider than the shortest wavelength"),
])
def test_bad_stack_setups(make, match):
    with pytest.raises(ParameterError, match=match):
        make()


@pytest.mark.parametrize("mutate,match", [
    (lambda d: d.pop("substrate"), r"'stack.substrate'.*missing"),
    (lambda d: d.update(colour="red"), r"'stack.colour'.*unknown field"),
    (lambda d: d.update(layers={}), r"'stack.layers'.*must be a list"),
    (lambda d: d["layers"][0]["thickness"].update(value=-3.0), r"layers\[0\].thickness"),
    (lambda d: d["layers"][0]["thickness"].update(min=-5.0), r"layers\[0\].thickness.*>= 0"),
    (lambda d: d["layers"][0]["material"].update(kind="magic"), r"layers\[0\].material.kind"),
    (lambda d: d.update(thickness_spread=2.0), r"'stack.thickness_spread'"),
])
def test_bad_stack_records(mutate, match):
    d = _simple().to_dict()
    mutate(d)
    with pytest.raises(RecipeError, match=match):
        Stack.from_dict(d)


# -- known layers (held as a whole by fits; see also tests/test_known.py) -------------------
def _with_known(known=True):
    barrier = Layer("barrier", Cauchy(1.65, 0.006), 100.0, known=known,
                    source={"file": "week1_nk_barrier.csv", "sha256": "ab" * 32})
    barrier.thickness.expr = "film_thickness / 4"
    return Stack([Layer("film", Cauchy(2.0, 0.02), 420.0), barrier],
                 library_substrate("fused_silica"))


def test_known_layer_parameters_are_held_copies_and_the_optics_unchanged():
    st = _with_known()
    held = st.parameters()
    live = st.parameters(live=True)
    layer = st.layer("barrier")
    for k in ("barrier_thickness", "barrier_A", "barrier_B", "barrier_C"):
        assert not held[k].vary and held[k].expr is None
        assert held[k] is not live[k] and held[k].value == live[k].value
    assert live["barrier_thickness"] is layer.thickness
    assert live["barrier_thickness"].expr == "film_thickness / 4"     # kept, only suspended
    assert held["film_thickness"] is st.layer("film").thickness       # other layers: live
    # Written values reach the layer itself (a fit writes its held values back unchanged).
    st.set_values({"barrier_thickness": 101.0, "barrier_A": 1.66})
    assert layer.thickness.value == 101.0 and layer.material.params["A"].value == 1.66
    assert layer.thickness.vary and layer.thickness.expr == "film_thickness / 4"
    assert st.known_layers() == ["barrier"]
    # "known" is about fitting only: same R, T as the same stack not known (tmm-checked optics).
    wl = np.linspace(400, 900, 20)
    np.testing.assert_array_equal(np.array(_with_known().RT(wl)),
                                  np.array(_with_known(False).RT(wl)))


def test_known_layer_is_shown_in_repr_and_describe():
    st = _with_known()
    assert "known=True" in repr(st.layer("barrier")) and "known=False" in repr(st.layer("film"))
    text = st.describe()
    assert "film: Cauchy, 420 nm, thickness fitted" in text
    assert "barrier: Cauchy, 100 nm, known (held, not fitted); tie on thickness suspended" in text
    assert "from week1_nk_barrier.csv (SHA-256 abababababab…)" in text
    assert text.splitlines()[0] == "ambient: air (n = 1)"


def test_known_layer_round_trip_and_old_layout():
    st = _with_known()
    d = st.to_dict()
    assert d["layers"][1]["known"] is True and d["layers"][1]["source"]["file"] == \
        "week1_nk_barrier.csv"
    back = Stack.from_dict(d)
    assert back.to_dict() == d and back.layer("barrier").known
    # Layers that are not known are written exactly as before (no new keys).
    assert set(d["layers"][0]) == {"name", "material", "thickness"}
    assert not Stack.from_dict(_simple().to_dict()).layers[0].known


@pytest.mark.parametrize("mutate,match", [
    (lambda ld: ld.update(known="true"), r"layers\[1\].known.*true or false"),
    (lambda ld: ld.pop("thickness"), r"layers\[1\].thickness.*known layer needs its thickness"),
    (lambda ld: ld["thickness"].pop("value"), r"layers\[1\].thickness.*is missing"),
    (lambda ld: ld.update(source="week1.csv"), r"layers\[1\].source.*object"),
    (lambda ld: ld.update(source={"file": float("nan")}), r"layers\[1\].source"),
    (lambda ld: ld.update(material={"kind": "tabulated", "file": "x.csv"}),
     r"layers\[1\].material.file.*only in a recipe file"),
    (lambda ld: ld.update(knwon=True), r"layers\[1\].knwon.*did you mean 'known'"),
])
def test_bad_known_layer_records(mutate, match):
    d = _with_known().to_dict()
    mutate(d["layers"][1])
    with pytest.raises(RecipeError, match=match):
        Stack.from_dict(d)


def test_known_flag_must_be_a_boolean():
    with pytest.raises(ParameterError, match="True or False"):
        Layer("barrier", Cauchy(), 100.0, known="no")
    assert Layer("barrier", Cauchy(), 100.0, known=np.bool_(True)).known is True
