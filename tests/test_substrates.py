"""Substrate library and Substrate objects against published index values.

Sources named beside each check. Handbook values quoted from memory are marked so.
"""

import math
import re

import numpy as np
import pytest

from fitting.dispersion import Cauchy, Constant
from fitting.errors import ParameterError, RecipeError, WavelengthRangeError
from fitting.stack import Stack
from fitting.substrates import (SUBSTRATE_LIBRARY, Substrate, caf2, fused_silica,
                                library_substrate, n_bk7, sapphire_o)


def n_at(model, wl):
    return float(model.N([wl]).real[0])


@pytest.mark.parametrize("wl,n_ref,tol", [
    # I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965), table of measured indices:
    # n_d(587.56 nm) = 1.45846, n(1064 nm) ≈ 1.4496, n(632.8 nm) = 1.4570.
    (587.56, 1.45846, 2e-5),
    (1064.0, 1.4496, 1e-4),
    (632.8, 1.4570, 1e-4),
])
def test_fused_silica_malitson(wl, n_ref, tol):
    assert n_at(fused_silica(), wl) == pytest.approx(n_ref, abs=tol)


def test_n_bk7_schott_datasheet():
    # SCHOTT N-BK7 datasheet: n_d(587.56) = 1.51680, n_e(546.07) = 1.51872,
    # n_F(486.13) = 1.52238, n_C(656.27) = 1.51432, Abbe ν_d = 64.17 (values from memory).
    m = n_bk7()
    assert n_at(m, 587.56) == pytest.approx(1.51680, abs=1e-5)
    assert n_at(m, 546.07) == pytest.approx(1.51872, abs=1e-5)
    assert n_at(m, 486.13) == pytest.approx(1.52238, abs=1e-5)
    assert n_at(m, 656.27) == pytest.approx(1.51432, abs=1e-5)
    nu_d = (n_at(m, 587.56) - 1) / (n_at(m, 486.13) - n_at(m, 656.27))
    assert nu_d == pytest.approx(64.17, abs=0.02)


def test_sapphire_ordinary_ray():
    # Sapphire n_o(589.3 nm) ≈ 1.768 (Malitson & Dodge, J. Opt. Soc. Am. 62, 1405 (1972);
    # handbook value, from memory); n_o(1064) ≈ 1.7545 (same source, from memory).
    assert n_at(sapphire_o(), 589.3) == pytest.approx(1.768, abs=5e-4)
    assert n_at(sapphire_o(), 1064.0) == pytest.approx(1.7545, abs=5e-4)


def test_caf2():
    # CaF2 n(589.3 nm) ≈ 1.4338 (Malitson, Appl. Opt. 2, 1103 (1963); handbook value,
    # from memory).
    assert n_at(caf2(), 589.3) == pytest.approx(1.4338, abs=2e-4)


@pytest.mark.parametrize("key", sorted(SUBSTRATE_LIBRARY))
def test_library_materials_are_lossless_and_normally_dispersive(key):
    # Transparent glasses and crystals: κ = 0 and dn/dλ < 0 in the visible (normal
    # dispersion away from absorption bands; common practice); generic glass is constant by design.
    m = library_substrate(key).material
    wl = np.linspace(400, 800, 41)
    N = m.N(wl)
    assert np.all(N.imag == 0)
    if key == "generic_glass":
        assert np.ptp(N.real) == 0
    else:
        assert np.all(np.diff(N.real) < 0)
        assert np.all((N.real > 1.3) & (N.real < 1.8))


@pytest.mark.parametrize("factory,lo,hi", [
    # Validity ranges of the published fits (sources in fitting/substrates.py).
    (fused_silica, 210, 3710), (n_bk7, 300, 2500), (sapphire_o, 200, 5500), (caf2, 230, 9700)])
def test_outside_published_range_is_refused(factory, lo, hi):
    m = factory()
    m.N([lo, hi])  # the limits themselves are fine
    with pytest.raises(WavelengthRangeError, match=rf"valid from {lo:g} to {hi:g} nm"):
        m.N([lo - 60.0, 600.0])
    with pytest.raises(WavelengthRangeError, match="restrict the fit range"):
        m.N([hi * 1.1])


def test_fused_silica_at_150_nm_names_the_material():
    with pytest.raises(WavelengthRangeError, match=r"fused silica is valid from 210"):
        library_substrate("fused_silica").N([150.0, 500.0])


def test_internal_transmittance_gives_the_stated_single_pass_loss():
    # τ_i = exp(-α d) with α = 4πκ/λ (Beer-Lambert; Born & Wolf ch. 14).
    wl = np.array([400.0, 700.0, 1000.0])
    sub = Substrate(Constant(1.5), 2.0, internal_transmittance=0.9)
    kappa = sub.N(wl).imag
    assert np.allclose(np.exp(-4 * np.pi * kappa * sub.thickness_nm / wl), 0.9, rtol=1e-12)


def test_absorbing_bare_slab_closed_form():
    # Incoherent slab with single-pass transmittance τ, both faces R = ((s-1)/(s+1))²:
    # T = (1-R)² τ / (1 - R² τ²), R_tot = R + R (1-R)² τ² / (1 - R² τ²)
    # (e.g. Swanepoel 1983, J. Phys. E 16, 1214, appendix; Harbecke 1986, Appl. Phys. B 39, 165).
    s, tau = 1.5, 0.8
    wl = np.linspace(400, 900, 6)
    R1 = ((s - 1) / (s + 1)) ** 2
    Rst, Tst = Stack([], Substrate(Constant(s), 1.0, internal_transmittance=tau)).RT(wl)
    # κ ~ 1e-8 changes R1 only at the 1e-16 level, so the lossless R1 is exact here.
    assert np.allclose(Tst, (1 - R1) ** 2 * tau / (1 - R1 ** 2 * tau ** 2), atol=1e-12)
    assert np.allclose(Rst, R1 + R1 * (1 - R1) ** 2 * tau ** 2 / (1 - R1 ** 2 * tau ** 2),
                       atol=1e-12)


def test_extra_kappa_adds_to_material():
    sub = Substrate(Cauchy(1.5, 0.004), 1.0, kappa=2e-6)
    wl = np.array([500.0, 600.0])
    assert np.allclose(sub.N(wl), Cauchy(1.5, 0.004).N(wl) + 2e-6j, rtol=0, atol=1e-15)


@pytest.mark.parametrize("kw,match", [
    ({"thickness_mm": 0.0}, "must be positive"),
    ({"thickness_mm": -1.0}, "must be positive"),
    ({"thickness_mm": math.nan}, "finite"),
    ({"kappa": -1e-6}, "must not be negative"),
    ({"kappa": math.inf}, "finite"),
    ({"internal_transmittance": 0.0}, r"in \(0, 1\]"),
    ({"internal_transmittance": 1.2}, r"in \(0, 1\]"),
    ({"internal_transmittance": math.nan}, "finite"),
])
def test_bad_substrate_parameters(kw, match):
    with pytest.raises(ParameterError, match=match):
        Substrate(Constant(1.5), **kw)


def test_unknown_library_key():
    with pytest.raises(ParameterError, match="not in the library; choose one of"):
        library_substrate("unobtainium")


@pytest.mark.parametrize("sub", [
    library_substrate("n_bk7", 0.7),
    library_substrate("generic_glass", 1.1),
    Substrate(Cauchy(1.47, 0.0035), 3.0, kappa=1e-7),
    library_substrate("sapphire_o", 0.43, internal_transmittance=0.97),
], ids=["library", "generic", "custom", "with-loss"])
def test_substrate_round_trip(sub):
    back = Substrate.from_dict(sub.to_dict())
    wl = np.linspace(400, 1600, 25)
    assert np.array_equal(back.N(wl), sub.N(wl))
    assert back.thickness_mm == sub.thickness_mm
    assert back.to_dict() == sub.to_dict()


@pytest.mark.parametrize("d,match", [
    ({"library": "n_bk7", "colour": "blue"}, "colour.*unknown field"),
    ({"thickness_mm": 1.0}, "needs either 'library' or 'material'"),
    ({"library": "n_bk7", "thickness_mm": -2}, "thickness_mm.*must be positive"),
    ({"material": {"kind": "glassy"}}, "unknown model 'glassy'"),
    ({"library": "unobtainium"}, r"'substrate\.library'.*not in the library"),
])
def test_bad_substrate_records(d, match):
    with pytest.raises(RecipeError, match=match):
        Substrate.from_dict(d)


@pytest.mark.parametrize("key", ["fused_silica", "n_bk7", "sapphire_o", "caf2"])
def test_library_material_used_as_film_keeps_its_name_and_range(key):
    # A library glass saved as a film material (recipe JSON) must come back with its name and
    # its published validity range, so that range errors still name the material.
    import json
    from fitting.dispersion import model_from_dict
    m = library_substrate(key).material
    back = model_from_dict(json.loads(json.dumps(m.to_dict())))
    assert back.describe() == m.describe() != "Sellmeier"
    assert back.valid_nm == m.valid_nm
    wl = np.linspace(*m.valid_nm, 50)
    assert np.array_equal(back.N(wl), m.N(wl))
    with pytest.raises(WavelengthRangeError, match=re.escape(m.describe())):
        back.N([m.valid_nm[0] - 20.0])
