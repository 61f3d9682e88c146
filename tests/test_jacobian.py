"""Derivatives of the model and of the fit residual (the Jacobian the fits use).

The stack's derivatives are checked against central differences of an outside
model: the ``tmm`` package (S. J. Byrnes, arXiv:1603.02720), ``tmm.inc_tmm``
with a coherent film on an incoherent substrate, fed the film index of our
dispersion models. The residual's Jacobian is checked against central
differences of the residual itself, for every kind of column (thickness,
material, scale, tilt, offset, prior, angle, spread).
"""

from __future__ import annotations

import numpy as np
import pytest
import tmm

from fitting.dispersion import Cauchy, Drude, Lorentz, Oscillators, TaucLorentz
from fitting.fit import FitOptions, _thinned
from fitting.objective import Objective, build_part
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate


def _tl_film():
    # Titania-like Tauc-Lorentz values (Jellison & Modine 1996 give the form; the
    # numbers are typical of sputtered titania, from memory).
    return Oscillators(2.8, [TaucLorentz(A=150.0, E0=4.2, C=1.2, Eg=3.2)])


def _tmm_T(wl, N_film, d_nm):
    """Unpolarised normal-incidence T of film | 1 mm N-BK7 from tmm.inc_tmm."""
    Ns = library_substrate("n_bk7").material.N(wl)
    return np.array([tmm.inc_tmm("s", [1, N_film[i], Ns[i], 1],
                                 [np.inf, d_nm, 1e6, np.inf], ["i", "c", "i", "i"],
                                 0.0, float(wl[i]))["T"] for i in range(wl.size)])


@pytest.mark.parametrize("material, name, rel_step", [
    (Cauchy(A=1.9, B=0.02, C=0.0), "B", 1e-4),
    (_tl_film(), "o1_E0", 1e-6),
    (_tl_film(), "eps_inf", 1e-6),
    (_tl_film(), "o1_A", 1e-6),
])
def test_stack_derivatives_match_differences_of_tmm(material, name, rel_step):
    # dT/dθ of the chain rule through N(λ) (StackModel.RT_jacobian) against a
    # central difference of tmm's T, the film's N taken from the model at θ ± h.
    wl = np.linspace(380.0, 1000.0, 40)
    d = 520.0
    stack = Stack([Layer("film", material, d)], library_substrate("n_bk7"))
    sm = stack.evaluator(wl)
    values = {k: p.value for k, p in stack.parameters().items()}
    _, T, _, dT = sm.RT_jacobian(values, ["film_thickness", "film_" + name])
    x = material.params[name].value
    h = rel_step * max(abs(x), 1.0)
    up = _tmm_T(wl, material.N(wl, {name: x + h}), d)
    dn = _tmm_T(wl, material.N(wl, {name: x - h}), d)
    ref = (up - dn) / (2 * h)
    assert np.max(np.abs(dT[1] - ref)) < 1e-4 * np.max(np.abs(ref))
    N = material.N(wl)
    ref_d = (_tmm_T(wl, N, d + 1e-3) - _tmm_T(wl, N, d - 1e-3)) / 2e-3
    assert np.max(np.abs(dT[0] - ref_d)) < 1e-4 * np.max(np.abs(ref_d))
    assert T == pytest.approx(_tmm_T(wl, N, d), abs=1e-12)


@pytest.mark.parametrize("bandwidth, spread", [(0.0, 0.0), (4.0, 0.0), (0.0, 0.03)])
def test_stack_derivatives_with_slit_and_spread(bandwidth, spread):
    # The slit average is applied after the chain rule, node by node; a thickness
    # spread averages over thickness nodes: both against central differences of RT.
    wl = np.linspace(400.0, 900.0, 60)
    stack = Stack([Layer("film", _tl_film(), 700.0)], library_substrate("fused_silica"),
                  thickness_spread=spread, bandwidth_nm=bandwidth)
    sm = stack.evaluator(wl)
    values = {k: p.value for k, p in stack.parameters().items()}
    names = ["film_thickness", "film_eps_inf", "film_o1_A", "film_o1_E0", "film_o1_C",
             "film_o1_Eg"]
    R, T, dR, dT = sm.RT_jacobian(values, names)
    assert np.array_equal(T, sm.RT(values)[1])
    for j, k in enumerate(names):
        h = 1e-6 * max(abs(values[k]), 1.0)
        Rp, Tp = sm.RT({**values, k: values[k] + h})
        Rm, Tm = sm.RT({**values, k: values[k] - h})
        for got, ref in ((dT[j], (Tp - Tm) / (2 * h)), (dR[j], (Rp - Rm) / (2 * h))):
            assert np.max(np.abs(got - ref)) < 1e-4 * max(np.max(np.abs(ref)), 1e-6), k
    # A fit to one quantity asks for its derivatives alone: the same numbers, no others.
    for only, full, other in (("T", dT, 2), ("R", dR, 3)):
        out = sm.RT_jacobian(values, names, only=only)
        assert out[other] is None
        assert np.array_equal(out[5 - other], full)


@pytest.mark.parametrize("model", [
    Oscillators(3.5, [Drude(1.5, 0.1), Lorentz(1.0, 6.0, 0.5)]),
    _tl_film(),
    Cauchy(A=1.6, B=0.01, C=1e-4),
])
def test_dispersion_dN_matches_central_differences(model):
    # dN/dθ = (dε/dθ)/(2N) with exact amplitude terms, against differences of N.
    wl = np.linspace(300.0, 1600.0, 80)
    v = {k: p.value for k, p in model.params.items()}
    names = list(v)
    got = model.dN(wl, v, names)
    for j, k in enumerate(names):
        h = 1e-6 * max(abs(v[k]), 1.0)
        ref = (model.N(wl, {k: v[k] + h}) - model.N(wl, {k: v[k] - h})) / (2 * h)
        assert np.max(np.abs(got[j] - ref)) < 1e-5 * max(np.max(np.abs(ref)), 1e-9), k


# -- the residual's Jacobian -----------------------------------------------------------------
def _objective(opts, **stack_kw):
    wl = np.linspace(420.0, 1000.0, 90)
    d = 480.0
    truth = Stack([Layer("film", Cauchy(A=2.05, B=0.015, C=0.0), d)],
                  library_substrate("n_bk7"), **stack_kw)
    y = truth.RT(wl)[1] * 1.01 + 0.002 * np.random.default_rng(3).standard_normal(wl.size)
    start = Stack([Layer("film", Cauchy(A=2.0, B=0.01, C=0.0), 470.0)],
                  library_substrate("n_bk7"), **stack_kw)
    part = build_part(0, Spectrum(wl, y), start, opts)
    return Objective([part], opts)


@pytest.mark.parametrize("opts", [
    FitOptions(),                                                    # scale, tilt, priors
    FitOptions(fit_offset=True, fit_tilt=True),
    FitOptions(fit_angle=True, angle_deg=8.0, polarization="p"),
    FitOptions(fit_spread=True),
])
def test_residual_jacobian_matches_central_differences(opts):
    obj = _objective(opts)
    values = obj.params.valuesdict()
    values = {**values, "film_C": 1e-4, "scale": 1.004}
    names = list(obj.var_names)
    n0 = obj.nfev
    J = obj.jacobian(values, names)
    assert obj.nfev - n0 == len(names)   # a Jacobian counts as len(names) evaluations
    r0 = obj.residual(values)
    assert J.shape == (r0.size, len(names))
    for j, k in enumerate(names):
        p = obj.params[k]
        h = 1e-6 * max(abs(values[k]), 1.0)
        up, dn = min(values[k] + h, p.max), max(values[k] - h, p.min)
        ref = (obj.residual({**values, k: up}) - obj.residual({**values, k: dn})) / (up - dn)
        assert np.max(np.abs(J[:, j] - ref)) < 2e-4 * max(np.max(np.abs(ref)), 1e-3), k


def test_a_restricted_part_gives_the_masked_residual():
    obj = _objective(FitOptions())
    part = obj.parts[0]
    keep = np.zeros(part.wl.size, bool)
    keep[5:60:3] = True
    sub = part.restricted(keep)
    local = obj.local_values(part, obj.params)
    assert sub.wl.size == keep.sum() and sub.model.wavelength_nm.size == keep.sum()
    np.testing.assert_array_equal(sub.u, part.u[keep])
    np.testing.assert_allclose(obj.part_residual(sub, local),
                               obj.part_residual(part, local)[keep], rtol=0, atol=1e-13)


def test_thinning_keeps_dense_fringes_only_sparsely_and_leaves_thick_films_alone():
    # Fringe period λ²/(2nd): a 480 nm film of n ≈ 2 at 420 nm has ~92 nm
    # periods, ~14 points each on this 6.5 nm grid: too few to thin (12 per
    # fringe kept). On a 0.5 nm grid the same film is thinned 4x (the cap).
    obj = _objective(FitOptions())
    v = obj.params.valuesdict()
    masks = [np.ones(obj.parts[0].wl.size, bool)]
    assert _thinned(obj, masks, [v])[0].sum() == masks[0].sum()
    wl = np.arange(420.0, 1000.0, 0.5)
    opts = FitOptions()
    stack = Stack([Layer("film", Cauchy(A=2.0, B=0.01, C=0.0), 480.0)],
                  library_substrate("n_bk7"))
    dense = Objective([build_part(0, Spectrum(wl, stack.RT(wl)[1]), stack, opts)], opts)
    m = np.ones(wl.size, bool)
    m[:100] = False                      # the stage's own mask is respected
    thin = _thinned(dense, [m], [dense.params.valuesdict()])[0]
    assert not thin[:100].any()
    kept = np.flatnonzero(thin)
    assert set(np.diff(kept)) == {4}
    # a thick film (period ~2.5 nm at 420 nm, 5 points): no thinning
    thick = {**dense.params.valuesdict(), "film_thickness": 18000.0}
    assert _thinned(dense, [m], [thick])[0].sum() == m.sum()


def test_joint_fit_jacobian_has_a_column_for_every_name():
    # Two spectra of one film: thickness shared, each its own scale and tilt. Each
    # part's rows are zero in the other part's columns.
    wl = np.linspace(420.0, 1000.0, 70)
    opts = FitOptions()
    stack = Stack([Layer("film", Cauchy(A=2.0, B=0.01, C=0.0), 470.0)],
                  library_substrate("n_bk7"))
    parts = [build_part(i, Spectrum(wl, stack.RT(wl)[1] * (1 + 0.01 * i)), stack, opts)
             for i in range(2)]
    obj = Objective(parts, opts, shared={"film_thickness", "film_A", "film_B", "film_C"})
    values = obj.params.valuesdict()
    names = list(obj.var_names)
    J = obj.jacobian(values, names)
    r0 = obj.residual(values)
    assert J.shape == (r0.size, len(names))
    n = wl.size
    assert not J[:n, names.index("p2_scale")].any() and J[n:2 * n, names.index("p2_scale")].any()
    for j, k in enumerate(names):
        h = 1e-6 * max(abs(values[k]), 1.0)
        ref = (obj.residual({**values, k: values[k] + h})
               - obj.residual({**values, k: values[k] - h})) / (2 * h)
        assert np.max(np.abs(J[:, j] - ref)) < 2e-4 * max(np.max(np.abs(ref)), 1e-3), k


def test_a_jacobian_costs_one_model_call_of_three_shifts_per_film(monkeypatch):
    # The point of the chain rule: n, κ and thickness shifts, whatever the number of
    # material parameters, evaluated together in one model call on the grid taken
    # three times; the point itself comes from the evaluation just made there (a fit
    # always evaluates before it differentiates).
    import fitting.stack as stack_module
    sizes = []
    real = stack_module.films_RT

    def counting(outer, N_films, d, **k):
        sizes.append(N_films[0].size)
        return real(outer, N_films, d, **k)

    monkeypatch.setattr(stack_module, "films_RT", counting)
    wl = np.linspace(400.0, 900.0, 50)
    stack = Stack([Layer("film", _tl_film(), 700.0)], library_substrate("fused_silica"))
    sm = stack.evaluator(wl)
    values = {k: p.value for k, p in stack.parameters().items()}
    names = ["film_thickness", "film_eps_inf", "film_o1_A", "film_o1_E0", "film_o1_C",
             "film_o1_Eg"]
    sm.RT(values)
    sizes.clear()
    sm.RT_jacobian(values, names)
    assert sizes == [3 * wl.size]
    sizes.clear()
    sm.RT_jacobian({**values, "film_o1_A": 151.0}, names)   # a new point: one more call
    assert sorted(sizes) == [wl.size, 3 * wl.size]
