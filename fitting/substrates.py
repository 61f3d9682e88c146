"""Thick substrates and the built-in library of common substrate glasses and crystals.

A :class:`Substrate` is a material (any dispersion model), a thickness in mm and
an optional extra absorption, given either as κ or as an internal
transmittance for its thickness. It is treated incoherently by the stack
engine (its thickness is many coherence lengths).

The library's Sellmeier coefficients are the published ones (λ in µm, C in µm²):

=================  =============================================================
fused silica       I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965); 210-3710 nm
N-BK7              maker's datasheet Sellmeier fit (SCHOTT optical glass data);
                   300-2500 nm
sapphire (o-ray)   I. H. Malitson and M. J. Dodge, J. Opt. Soc. Am. 62, 1405
                   (1972) (ordinary ray); 200-5500 nm
CaF2               I. H. Malitson, Appl. Opt. 2, 1103 (1963); 230-9700 nm
=================  =============================================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from collections.abc import Mapping

import numpy as np

from .dispersion import Constant, Dispersion, Sellmeier, model_from_dict
from .errors import ParameterError, RecipeError
from .params import check_finite

__all__ = ["Substrate", "SUBSTRATE_LIBRARY", "library_substrate", "fused_silica", "n_bk7",
           "sapphire_o", "caf2", "generic_glass"]


def _sellmeier(name, B, C, valid_nm):
    m = Sellmeier(len(B), valid_nm=valid_nm)
    m.label = name
    for i, (b, c) in enumerate(zip(B, C), start=1):
        m.set(f"B{i}", b, widen=True)
        m.set(f"C{i}", c, widen=True)
        m.params[f"B{i}"].vary = m.params[f"C{i}"].vary = False
    return m


def fused_silica() -> Sellmeier:
    """Fused silica, Malitson (1965), 210-3710 nm."""
    return _sellmeier("fused silica", (0.6961663, 0.4079426, 0.8974794),
                      (0.0684043 ** 2, 0.1162414 ** 2, 9.896161 ** 2), (210.0, 3710.0))


def n_bk7() -> Sellmeier:
    """N-BK7 borosilicate crown, maker's datasheet Sellmeier coefficients, 300-2500 nm."""
    return _sellmeier("N-BK7", (1.03961212, 0.231792344, 1.01046945),
                      (0.00600069867, 0.0200179144, 103.560653), (300.0, 2500.0))


def sapphire_o() -> Sellmeier:
    """Sapphire ordinary ray, Malitson & Dodge (1972), 200-5500 nm."""
    return _sellmeier("sapphire (ordinary ray)", (1.4313493, 0.65054713, 5.3414021),
                      (0.0726631 ** 2, 0.1193242 ** 2, 18.028251 ** 2), (200.0, 5500.0))


def caf2() -> Sellmeier:
    """Calcium fluoride, Malitson (1963), 230-9700 nm."""
    return _sellmeier("CaF2", (0.5675888, 0.4710914, 3.8484723),
                      (0.050263605 ** 2, 0.1003909 ** 2, 34.649040 ** 2), (230.0, 9700.0))


def generic_glass(n: float = 1.52) -> Constant:
    """A glass described by one wavelength-independent index n."""
    m = Constant(n, 0.0)
    m.label = f"glass n = {n:g}"
    return m


#: Library name -> factory of the substrate material.
SUBSTRATE_LIBRARY = {
    "fused_silica": fused_silica,
    "n_bk7": n_bk7,
    "sapphire_o": sapphire_o,
    "caf2": caf2,
    "generic_glass": generic_glass,
}


@dataclass
class Substrate:
    """A thick, incoherent substrate.

    Parameters
    ----------
    material : Dispersion
        Its complex index (κ of the material is used as is).
    thickness_mm : float
        Physical thickness in mm.
    kappa : float, optional
        Extra extinction coefficient added to the material's κ (constant).
    internal_transmittance : float, optional
        Alternative to ``kappa``: single-pass internal transmittance τ_i (0 < τ_i <= 1)
        of this thickness at normal incidence, taken as wavelength independent
        in α (so κ = -ln(τ_i) λ / (4π d)).
    library : str
        Library key it came from ("" for a custom material), saved in recipes.
    """

    material: Dispersion
    thickness_mm: float = 1.0
    kappa: float = 0.0
    internal_transmittance: float | None = None
    library: str = ""

    def __post_init__(self):
        self.thickness_mm = check_finite("substrate thickness_mm", self.thickness_mm)
        if self.thickness_mm <= 0:
            raise ParameterError("substrate thickness_mm", self.thickness_mm,
                                 "must be positive (in mm)")
        self.kappa = check_finite("substrate kappa", self.kappa)
        if self.kappa < 0:
            raise ParameterError("substrate kappa", self.kappa, "κ must not be negative")
        if self.internal_transmittance is not None:
            ti = check_finite("substrate internal_transmittance", self.internal_transmittance)
            if not 0 < ti <= 1:
                raise ParameterError("substrate internal_transmittance", ti,
                                     "must be in (0, 1]")
            self.internal_transmittance = ti

    @property
    def name(self) -> str:
        return self.material.describe()

    @property
    def thickness_nm(self) -> float:
        return self.thickness_mm * 1e6

    def N(self, wavelength_nm) -> np.ndarray:
        """Complex index including the extra absorption."""
        wl = np.asarray(wavelength_nm, dtype=float)
        N = self.material.N(wl)
        extra = self.kappa
        if self.internal_transmittance is not None:
            extra = extra - math.log(self.internal_transmittance) * wl / (
                4 * np.pi * self.thickness_nm)
        return N + 1j * extra

    def to_dict(self) -> dict:
        d = {"thickness_mm": self.thickness_mm, "kappa": self.kappa,
             "internal_transmittance": self.internal_transmittance}
        if self.library:
            d["library"] = self.library
            if self.library == "generic_glass":
                d["n"] = self.material.params["n"].value
        else:
            d["material"] = self.material.to_dict()
        return d

    @classmethod
    def from_dict(cls, d: Mapping, *, where: str = "substrate") -> Substrate:
        if not isinstance(d, Mapping):
            raise RecipeError(where, "must be an object")
        known = {"thickness_mm", "kappa", "internal_transmittance", "library", "material", "n"}
        extra = set(d) - known
        if extra:
            raise RecipeError(f"{where}.{sorted(extra)[0]}", "unknown field")
        lib = d.get("library", "")
        try:
            if lib:
                if lib == "generic_glass":
                    material = generic_glass(float(d.get("n", 1.52)))
                else:
                    material = library_substrate(lib).material
            elif "material" in d:
                material = model_from_dict(d["material"], where=f"{where}.material")
            else:
                raise RecipeError(where, "needs either 'library' or 'material'")
            return cls(material, d.get("thickness_mm", 1.0), d.get("kappa", 0.0),
                       d.get("internal_transmittance"), lib)
        except ParameterError as e:
            raise RecipeError(f"{where}.{e.name.replace('substrate ', '')}", e.reason) from None


def library_substrate(key: str, thickness_mm: float = 1.0, **kw) -> Substrate:
    """A substrate from :data:`SUBSTRATE_LIBRARY` by key, e.g. ``"fused_silica"``."""
    if key not in SUBSTRATE_LIBRARY:
        raise ParameterError("substrate library", key,
                             f"not in the library; choose one of {', '.join(SUBSTRATE_LIBRARY)}")
    return Substrate(SUBSTRATE_LIBRARY[key](), thickness_mm, library=key, **kw)
