"""Joint fits: T and R of one sample, and films of two thicknesses of one material.

Reference spectra from the independent transfer-matrix package ``tmm``
(S. J. Byrnes, arXiv:1603.02720), ``tmm.inc_tmm`` per wavelength, film on an
incoherent 1 mm fused-silica substrate (Malitson 1965 Sellmeier, passed as
numbers). Noise 0.2 % (common practice for double-beam spectrometers).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
import tmm

from fitting.dispersion import Cauchy
from fitting.errors import FitError
from fitting.fit import FitOptions, fit_joint, fit_spectrum
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import fused_silica, library_substrate


WL = np.linspace(350.0, 1100.0, 300)
NOISE = 0.002


@functools.cache
def _tmm_RT(A, B, k0, Eu, d_nm):
    Nf = Cauchy(A, B, urbach=True, k0=k0, Eu=Eu).N(WL)
    Ns = fused_silica().N(WL)
    R, T = np.empty(WL.size), np.empty(WL.size)
    for i, lam in enumerate(WL):
        out = tmm.inc_tmm("s", [1.0, Nf[i], Ns[i], 1.0], [np.inf, d_nm, 1e6, np.inf],
                          ["i", "c", "i", "i"], 0.0, lam)
        R[i], T[i] = out["R"], out["T"]
    return R, T


def _spectra(truth, d, seed, quantities=("T",)):
    R, T = _tmm_RT(*truth, d)
    rng = np.random.default_rng(seed)
    out = []
    for q in quantities:
        y = (T if q == "T" else R) + NOISE * rng.standard_normal(WL.size)
        out.append(Spectrum(WL, y, quantity=q, name=f"{q} {d:.0f} nm",
                            sigma=np.full(WL.size, NOISE)))
    return out


def _start_stack():
    return Stack([Layer("film", Cauchy(urbach=True), 500.0)],
                 library_substrate("fused_silica", 1.0))


TRUTH = (2.05, 0.022, 0.004, 0.25)     # A, B (µm²), k0, Eu (eV)


def _n633(values):
    return float(Cauchy(values["film_A"], values["film_B"]).N(np.array([633.0]))[0].real)


def test_T_and_R_of_one_sample_share_every_parameter():
    d = 830.0
    sT, sR = _spectra(TRUTH, d, seed=3, quantities=("T", "R"))
    st = _start_stack()
    shared = list(st.parameters())
    res = fit_joint([sT, sR], [st, st], shared)
    assert res.success, res.message
    assert abs(res.params["film_thickness"].value - d) < 0.01 * d
    vals = {k: p.value for k, p in res.params.items()}
    assert abs(_n633(vals) - float(Cauchy(*TRUTH[:2]).N(np.array([633.0]))[0].real)) < 0.01
    assert [p["quantity"] for p in res.extra["parts"]] == ["T", "R"]
    assert res.ndata == 2 * WL.size and res.method == "joint auto"
    # R adds information: the joint thickness error is no larger than from T alone.
    alone = fit_spectrum(sT, st)
    assert res.params["film_thickness"].stderr <= alone.params["film_thickness"].stderr
    # The fitted curves of both parts follow their data within a few σ.
    for part in res.extra["parts"]:
        used = np.asarray(part["used"])
        r = np.asarray(part["measured"])[used] - np.asarray(part["fitted"])[used]
        assert np.sqrt(np.mean(r ** 2)) < 1.5 * NOISE


def test_two_thicknesses_of_one_material_share_the_dispersion():
    d1, d2 = 420.0, 1350.0
    s1 = _spectra(TRUTH, d1, seed=11)[0]
    s2 = _spectra(TRUTH, d2, seed=12)[0]
    shared = ["film_A", "film_B", "film_C", "film_k0", "film_Eu"]   # the whole dispersion
    res = fit_joint([s1, s2], [_start_stack(), _start_stack()], shared,
                    FitOptions(fit_scale=False))
    assert abs(res.params["p1_film_thickness"].value - d1) < 0.01 * d1, res.extra.get("scan")
    assert abs(res.params["p2_film_thickness"].value - d2) < 0.01 * d2
    assert "film_A" in res.params and "p2_film_A" not in res.params
    vals = {k: p.value for k, p in res.params.items()}
    assert abs(_n633(vals) - float(Cauchy(*TRUTH[:2]).N(np.array([633.0]))[0].real)) < 0.01
    # One material: one set of optical constants is reported.
    assert list(res.optical) == ["film"]


def test_joint_setup_errors():
    s = _spectra(TRUTH, 600.0, seed=1)[0]
    with pytest.raises(FitError, match="one stack per spectrum"):
        fit_joint([s, s], [_start_stack()], [])
    with pytest.raises(FitError, match="'film_X' is in none of the stacks"):
        fit_joint([s, s], [_start_stack(), _start_stack()], ["film_X"])
    with pytest.raises(FitError, match="at least one spectrum"):
        fit_joint([], [], [])
