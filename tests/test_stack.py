"""Stack engine checks against outside references.

Sources named beside each check; the `tmm` package (S. J. Byrnes, arXiv:1603.02720)
is the independent transfer-matrix reference.
"""

import numpy as np
import pytest

from fitting.dispersion import Cauchy, Constant
from fitting.errors import ParameterError
from fitting.stack import Layer, Stack
from fitting.substrates import Substrate, library_substrate

tmm = pytest.importorskip("tmm")


def test_bare_lossless_substrate_transmission():
    # Incoherent slab, both faces: T = 2s/(s²+1) (Swanepoel 1983, J. Phys. E 16, 1214, eq. 3):
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
