"""Published optical constants of film materials and substrates, independent of ``fitting``.

Film materials come from measured thin-film n, κ tables (``data/*.csv``, each
file's header names the paper, its DOI, where the numbers were taken from and
the licence) or from dispersion formulas with published coefficients. Tables
are interpolated with a shape-preserving cubic (Fritsch & Carlson 1980,
SIAM J. Numer. Anal. 17, 238; ``scipy.interpolate.PchipInterpolator``), which
neither overshoots between rows nor makes κ negative.

Substrates are written here from their published Sellmeier coefficients,
separately from ``fitting/substrates.py``, so that a typing error in either
shows up as a disagreement:

=================  ==========================================================
fused silica       I. H. Malitson, J. Opt. Soc. Am. 55, 1205-1209 (1965),
                   doi:10.1364/JOSA.55.001205
N-BK7              SCHOTT optical glass datasheet N-BK7 (Sellmeier B1-3, C1-3)
sapphire, o-ray    I. H. Malitson, M. J. Dodge, J. Opt. Soc. Am. 62, 1405 (1972)
=================  ==========================================================

Substrates are taken as lossless, as the project's library substrates are; the
weak UV absorption of real N-BK7 below ~350 nm is left out on purpose so that
the cases test the film fit, not the substrate model.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Callable

import numpy as np
from scipy.interpolate import PchipInterpolator

__all__ = ["Material", "MATERIALS", "SUBSTRATES", "material", "substrate", "DATA_DIR",
           "read_table"]

DATA_DIR = Path(__file__).with_name("data")


@dataclass(frozen=True)
class Material:
    """A material with a published complex index N = n + iκ.

    Attributes
    ----------
    key : str
        Short name used by the cases ("TiO2", "fused_silica").
    name : str
        What it is, in words.
    source : str
        The original publication (authors, journal, year, DOI).
    range_nm : (float, float)
        Wavelengths the data cover; :meth:`N` refuses anything outside.
    absorbing : bool
        True if κ is not zero somewhere in the range.
    """

    key: str
    name: str
    source: str
    range_nm: tuple[float, float]
    _nk: Callable[[np.ndarray], np.ndarray] = field(repr=False)
    absorbing: bool = False
    table: str = ""

    def N(self, wavelength_nm) -> np.ndarray:
        """Complex index n + iκ (κ > 0 absorbs, the convention of ``tmm``)."""
        wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=float))
        lo, hi = self.range_nm
        if wl.min() < lo - 1e-9 or wl.max() > hi + 1e-9:
            raise ValueError(f"{self.key}: {wl.min():g}-{wl.max():g} nm is outside the "
                             f"published data ({lo:g}-{hi:g} nm, {self.source})")
        return self._nk(wl)

    def n(self, wavelength_nm: float) -> float:
        """Real index at one wavelength."""
        return float(self.N([wavelength_nm])[0].real)


# --------------------------------------------------------------------------------
# Tables
def read_table(path) -> tuple[dict, np.ndarray, np.ndarray, np.ndarray]:
    """Read a ``data/*.csv`` table: (header fields, wavelength nm, n, κ).

    Header lines start with ``#`` and hold ``key: value``; the first other line
    names the columns ``wavelength_nm,n,k``.
    """
    path = Path(path)
    header, rows, columns = {}, [], None
    with open(path, newline="", encoding="utf-8") as fh:
        for lineno, line in enumerate(fh, start=1):
            line = line.strip()
            if not line:
                continue
            if line.startswith("#"):
                key, _, value = line[1:].partition(":")
                header[key.strip()] = value.strip()
                continue
            cells = next(csv.reader([line]))
            if columns is None:
                columns = [c.strip() for c in cells]
                if columns != ["wavelength_nm", "n", "k"]:
                    raise ValueError(f"{path.name}, line {lineno}: columns must be "
                                     f"wavelength_nm,n,k, got {line!r}")
                continue
            try:
                rows.append([float(x) for x in cells])
            except ValueError:
                raise ValueError(f"{path.name}, line {lineno}: {line!r} is not three "
                                 f"numbers") from None
            if len(rows[-1]) != 3:
                raise ValueError(f"{path.name}, line {lineno}: {line!r} is not three numbers")
    a = np.array(rows)
    if np.any(np.diff(a[:, 0]) <= 0):
        raise ValueError(f"{path.name}: wavelengths must ascend")
    return header, a[:, 0], a[:, 1], a[:, 2]


def _table(key: str, filename: str) -> Material:
    header, wl, n, k = read_table(DATA_DIR / filename)
    n_of = PchipInterpolator(wl, n, extrapolate=False)
    k_of = PchipInterpolator(wl, k, extrapolate=False)

    def nk(w):
        return n_of(w) + 1j * np.maximum(k_of(w), 0.0)

    return Material(key, header.get("material", key), header["source"],
                    (float(wl[0]), float(wl[-1])), nk, bool(np.any(k > 0)), filename)


# --------------------------------------------------------------------------------
# Formulas (λ in µm, as the papers give them)
def _sellmeier(B, C_um):
    """n² = 1 + Σ B_i λ² / (λ² - C_i²), with the resonance wavelengths C_i in µm."""
    def nk(w):
        l2 = (w * 1e-3) ** 2
        return np.sqrt(1 + sum(b * l2 / (l2 - c * c) for b, c in zip(B, C_um))) + 0j
    return nk


def _sellmeier_c2(B, C_um2):
    """n² = 1 + Σ B_i λ² / (λ² - C_i), with C_i in µm² (glass makers' form)."""
    def nk(w):
        l2 = (w * 1e-3) ** 2
        return np.sqrt(1 + sum(b * l2 / (l2 - c) for b, c in zip(B, C_um2))) + 0j
    return nk


def _cauchy(A, B, C):
    """n = A + B/λ² + C/λ⁴."""
    def nk(w):
        l2 = (w * 1e-3) ** 2
        return A + B / l2 + C / (l2 * l2) + 0j
    return nk


def _build():
    films = [
        _table("TiO2", "tio2_sarkar2019.csv"),
        _table("Ta2O5", "ta2o5_gao2012.csv"),
        _table("Nb2O5", "nb2o5_lemarchand2013.csv"),
        Material("HfO2", "HfO2 (hafnium oxide), electron-beam evaporated thin film",
                 "M. F. Al-Kuhaili, Opt. Mater. 27, 383-387 (2004), "
                 "doi:10.1016/j.optmat.2004.04.014 (Cauchy coefficients)",
                 (200.0, 2000.0), _cauchy(1.875, 6.28e-3, 5.80e-4)),
        _table("Al2O3", "al2o3_boidin2016.csv"),
        _table("SiO2", "sio2_lemarchand2013.csv"),
        Material("Si3N4", "Si3N4 (silicon nitride), 340 nm LPCVD film on thermal oxide",
                 "K. Luke, Y. Okawachi, M. R. E. Lamont, A. L. Gaeta, M. Lipson, Opt. Lett. 40, "
                 "4823-4826 (2015), doi:10.1364/OL.40.004823 (Sellmeier coefficients)",
                 (310.0, 5504.0), _sellmeier((3.0249, 40314.0), (0.1353406, 1239.842))),
        _table("ZnO", "zno_aguilar2019.csv"),
        _table("ITO", "ito_minenkov2024.csv"),
        _table("a-Si", "asi_pierce1972.csv"),
        # Dodge measured bulk crystal; evaporated MgF2 films are close to its ordinary
        # index (common practice for MgF2 anti-reflection layers).
        Material("MgF2", "MgF2 (magnesium fluoride), ordinary ray",
                 "M. J. Dodge, Appl. Opt. 23, 1980-1985 (1984), doi:10.1364/AO.23.001980 "
                 "(Sellmeier coefficients, ordinary ray, 19 °C)",
                 (200.0, 7000.0),
                 _sellmeier((0.48755108, 0.39875031, 2.3120353),
                            (0.04338408, 0.09461442, 23.793604))),
    ]
    subs = [
        Material("fused_silica", "fused silica",
                 "I. H. Malitson, J. Opt. Soc. Am. 55, 1205-1209 (1965), "
                 "doi:10.1364/JOSA.55.001205",
                 (210.0, 3710.0),
                 _sellmeier((0.6961663, 0.4079426, 0.8974794), (0.0684043, 0.1162414, 9.896161))),
        Material("n_bk7", "N-BK7 borosilicate crown glass",
                 "SCHOTT optical glass datasheet N-BK7 (Sellmeier coefficients)",
                 (300.0, 2500.0),
                 _sellmeier_c2((1.03961212, 0.231792344, 1.01046945),
                               (0.00600069867, 0.0200179144, 103.560653))),
        Material("sapphire_o", "sapphire (Al2O3 crystal), ordinary ray",
                 "I. H. Malitson, M. J. Dodge, J. Opt. Soc. Am. 62, 1405 (1972)",
                 (200.0, 5500.0),
                 _sellmeier((1.4313493, 0.65054713, 5.3414021), (0.0726631, 0.1193242, 18.028251))),
    ]
    return {m.key: m for m in films}, {m.key: m for m in subs}


#: Film materials by key; :data:`SUBSTRATES` by the project's substrate-library keys.
MATERIALS, SUBSTRATES = _build()


def material(key: str) -> Material:
    try:
        return MATERIALS[key]
    except KeyError:
        raise KeyError(f"no validation material {key!r}; known: {', '.join(MATERIALS)}") from None


def substrate(key: str) -> Material:
    try:
        return SUBSTRATES[key]
    except KeyError:
        raise KeyError(f"no validation substrate {key!r}; known: {', '.join(SUBSTRATES)}") \
            from None
