"""The validation cases: real film materials, ordinary instrument errors, the hard corners.

Each :class:`Case` names the film (a key of :data:`validation.materials.MATERIALS`,
whose source is in its data file or formula), the true mean thickness, the
substrate (a key of the project's substrate library, modelled independently in
:mod:`validation.materials`), the spectrometer grid, the instrument errors, the
noise seed, and the film model a technician would pick from the app's menu
(a key of ``fitting.presets.MODEL_CHOICES``):

* ``"cauchy"`` for transparent dielectrics measured in their transparent range,
* ``"tauc_lorentz"`` for absorbing semiconductors (a-Si, ZnO) and for oxides
  measured across their UV absorption edge,
* ``"drude_lorentz"`` for the transparent conductor (ITO).

``ordinary`` marks the films for which the recovery criteria of issue 11 apply
(thickness within 1 %, n(633) within 0.01): a transparent film fitted with
Cauchy in its transparent range, 100-8000 nm thick, with ordinary instrument
errors (scale within ±1 %, tilt within ±0.4 %, noise 0.1-0.3 % T,
non-uniformity up to 1 %) and enough index contrast with its substrate for the
fringes to stand well above the noise. The others (50 nm films, 2-3 %
non-uniformity, absorbing films, low contrast, an absorption edge left in a
Cauchy fit) are there to check that a wrong answer is never called "good".

A low-index film on a higher-index glass has a "mirror" twin: the quarter-wave
reflectance ((n_s - n²)/(n_s + n²))² (H. A. Macleod, Thin-Film Optical Filters,
ch. 2) is unchanged by n -> n_s/n, so a film of index n_s/n and the same optical
thickness has the same fringe extrema (SiO2 on N-BK7: 1.03; MgF2: 1.10); only
the fringe shape between the extrema and the dispersion tell them apart.

The ordinary instrument errors follow the issue: 100 % line within ±1 %,
tilt within ±0.4 %, 0.1-0.3 % T noise, up to 1 % (ordinary) or 3 % (hard)
thickness non-uniformity; spectrometer grids are 1-2 nm steps (common
practice for grating UV-Vis-NIR instruments).
"""

from __future__ import annotations

import fnmatch
import zlib
from dataclasses import dataclass, field

from .synth import Instrument

__all__ = ["Case", "CASES", "QUICK", "select", "ERRORS"]

#: Instrument error sets. Noise is always there (no real spectrum is free of it);
#: each other error appears alone and in combinations.
ERRORS = {
    "noise": Instrument(noise=0.002),
    "scale+1": Instrument(scale=1.01, noise=0.002),
    "scale-1": Instrument(scale=0.99, noise=0.002),
    "tilt+": Instrument(tilt=0.004, noise=0.002),
    "tilt-": Instrument(tilt=-0.004, noise=0.002),
    "spread1": Instrument(spread=0.01, noise=0.002),
    "spread2": Instrument(spread=0.02, noise=0.002),
    "spread3": Instrument(spread=0.03, noise=0.002),
    # ordinary instruments: all errors at once, within the limits
    "combined": Instrument(scale=1.008, tilt=-0.003, noise=0.0025, spread=0.008),
    "combined-": Instrument(scale=0.992, tilt=0.003, noise=0.0015, spread=0.005),
    "worst": Instrument(scale=0.99, tilt=0.004, noise=0.003, spread=0.01),
}


@dataclass(frozen=True)
class Case:
    """One synthetic measurement and how a technician would fit it.

    Attributes
    ----------
    name : str
        Unique id, ``material-thickness-what``.
    material : str
        Film material key (see :mod:`validation.materials`).
    thickness_nm : float
        True mean film thickness.
    substrate : str
        Substrate key (1 mm thick), the same key as in the project's library.
    range_nm : (start, stop, step)
        Spectrometer grid in nm.
    errors : str
        Key of :data:`ERRORS`.
    model : str
        Film model from the app's menu.
    ordinary : bool
        Whether the recovery criteria apply (see the module docstring).
    quick : bool
        Member of the ``--quick`` subset.
    why : str
        What the case checks.
    """

    name: str
    material: str
    thickness_nm: float
    substrate: str
    range_nm: tuple[float, float, float]
    errors: str
    model: str
    ordinary: bool
    quick: bool = False
    why: str = ""
    seed: int = field(default=0, compare=False)

    def __post_init__(self):
        if self.errors not in ERRORS:
            raise ValueError(f"case {self.name}: unknown error set {self.errors!r}")
        if not self.seed:
            # Stable across Python runs and case-list edits (hash() is salted).
            object.__setattr__(self, "seed", zlib.crc32(self.name.encode()))

    @property
    def instrument(self) -> Instrument:
        return ERRORS[self.errors]


_FS, _BK7, _SAP = "fused_silica", "n_bk7", "sapphire_o"
_VIS = (400.0, 1100.0, 1.0)           # silicon-detector UV-Vis grid
_UV = (300.0, 1100.0, 1.0)
_C, _TL, _DL = "cauchy", "tauc_lorentz", "drude_lorentz"

CASES: tuple[Case, ...] = (
    # --- TiO2 (Sarkar 2019): high index, UV edge at ~365 nm
    Case("TiO2-250-noise", "TiO2", 250, _FS, _VIS, "noise", _C, True, True,
         "high-index film, a few fringes"),
    Case("TiO2-600-scale+1", "TiO2", 600, _FS, _VIS, "scale+1", _C, True, False,
         "100 % line 1 % high"),
    Case("TiO2-600-scale-1", "TiO2", 600, _FS, _VIS, "scale-1", _C, True, False,
         "100 % line 1 % low"),
    Case("TiO2-1000-tilt+", "TiO2", 1000, _FS, _VIS, "tilt+", _C, True, False,
         "100 % line tilted +0.4 %"),
    Case("TiO2-1000-combined", "TiO2", 1000, _FS, _VIS, "combined", _C, True, True,
         "all ordinary errors at once"),
    Case("TiO2-1000-spread3", "TiO2", 1000, _FS, _VIS, "spread3", _C, False, False,
         "3 % non-uniformity: damped fringes at short wavelengths"),
    Case("TiO2-400-edge-TL", "TiO2", 400, _FS, _UV, "combined", _TL, False, False,
         "absorption edge in range, Tauc-Lorentz"),
    Case("TiO2-600-edge-cauchy", "TiO2", 600, _FS, _UV, "noise", _C, False, True,
         "Cauchy chosen although the UV edge is in the data: must not be 'good'"),
    Case("TiO2-50-thin", "TiO2", 50, _FS, _VIS, "combined-", _C, False, True,
         "50 nm film: no fringe, thickness and index correlated"),
    # --- Ta2O5 (Gao 2012): weak residual absorption below 500 nm
    Case("Ta2O5-300-noise", "Ta2O5", 300, _FS, _VIS, "noise", _C, True, False,
         "high-index film, small residual absorption in the blue"),
    Case("Ta2O5-800-combined", "Ta2O5", 800, _FS, _VIS, "combined", _C, True, True,
         "all ordinary errors at once"),
    Case("Ta2O5-1500-tilt-", "Ta2O5", 1500, _FS, _VIS, "tilt-", _C, True, False,
         "many fringes, 100 % line tilted -0.4 %"),
    Case("Ta2O5-3000-worst", "Ta2O5", 3000, _FS, (450.0, 1500.0, 1.0), "worst", _C, True,
         False, "3 µm film, every error at its ordinary limit"),
    # --- Nb2O5 (Lemarchand 2013): highest-index oxide, edge near 400 nm
    Case("Nb2O5-200-scale+1", "Nb2O5", 200, _FS, (450.0, 1100.0, 1.0), "scale+1", _C, True,
         False, "thin high-index film, 100 % line 1 % high"),
    Case("Nb2O5-700-combined", "Nb2O5", 700, _FS, (450.0, 1100.0, 1.0), "combined", _C, True,
         False, "all ordinary errors at once"),
    Case("Nb2O5-1200-spread1", "Nb2O5", 1200, _FS, (450.0, 1100.0, 1.0), "spread1", _C, True,
         False, "1 % non-uniformity on a high-index film"),
    Case("Nb2O5-400-edge-TL", "Nb2O5", 400, _FS, _UV, "noise", _TL, False, False,
         "strong absorption edge in range, Tauc-Lorentz"),
    # --- HfO2 (Al-Kuhaili 2004): transparent far into the UV
    Case("HfO2-150-noise", "HfO2", 150, _FS, _UV, "noise", _C, True, False,
         "thin film, half a fringe"),
    Case("HfO2-500-combined", "HfO2", 500, _FS, _UV, "combined", _C, True, False,
         "all ordinary errors at once"),
    Case("HfO2-1200-scale-1", "HfO2", 1200, _FS, _UV, "scale-1", _C, True, False,
         "100 % line 1 % low"),
    Case("HfO2-800-spread3", "HfO2", 800, _FS, _UV, "spread3", _C, False, False,
         "3 % non-uniformity"),
    Case("HfO2-50-thin", "HfO2", 50, _FS, _UV, "noise", _C, False, False,
         "50 nm medium-index film"),
    # --- Al2O3 (Boidin 2016): medium index, low contrast on silica
    Case("Al2O3-100-combined", "Al2O3", 100, _FS, _UV, "combined", _C, True, False,
         "100 nm medium-index film, no full fringe"),
    Case("Al2O3-500-noise", "Al2O3", 500, _FS, _UV, "noise", _C, True, False,
         "medium index, shallow fringes"),
    Case("Al2O3-1000-tilt+", "Al2O3", 1000, _FS, _UV, "tilt+", _C, True, True,
         "shallow fringes, 100 % line tilted +0.4 %"),
    Case("Al2O3-1500-spread2", "Al2O3", 1500, _FS, _UV, "spread2", _C, False, False,
         "2 % non-uniformity"),
    Case("Al2O3-8000-thick", "Al2O3", 8000, _FS, (450.0, 1650.0, 1.0), "combined-", _C, True,
         False, "8 µm film, dense fringes (about 10 points per fringe at 450 nm)"),
    # --- SiO2 (Lemarchand 2013): low index
    Case("SiO2-BK7-300-noise", "SiO2", 300, _BK7, (350.0, 1100.0, 1.0), "noise", _C, False,
         True, "low-index film on higher-index glass: the mirror index n_glass/n_film = 1.03 "
         "gives the same fringe extrema"),
    Case("SiO2-BK7-800-combined", "SiO2", 800, _BK7, (350.0, 1100.0, 1.0), "combined", _C,
         False, False, "low-index film on higher-index glass with ordinary errors"),
    Case("SiO2-BK7-1500-noise", "SiO2", 1500, _BK7, (350.0, 1100.0, 1.0), "noise", _C, False,
         False, "low-index film on higher-index glass, many shallow fringes"),
    Case("SiO2-FS-1000-noise", "SiO2", 1000, _FS, _UV, "noise", _C, False, False,
         "nearly index-matched (Δn 0.015): fringes at the noise level, seed too thin"),
    Case("SiO2-sapphire-1000-combined", "SiO2", 1000, _SAP, _VIS, "combined", _C, True, False,
         "low-index film on sapphire: clear contrast"),
    # --- Si3N4 (Luke 2015)
    Case("Si3N4-120-noise", "Si3N4", 120, _FS, (350.0, 1100.0, 1.0), "noise", _C, True, False,
         "thin nitride, half a fringe"),
    Case("Si3N4-500-scale+1", "Si3N4", 500, _FS, (350.0, 1100.0, 1.0), "scale+1", _C, True,
         False, "100 % line 1 % high"),
    Case("Si3N4-900-combined", "Si3N4", 900, _FS, (350.0, 1100.0, 1.0), "combined", _C, True,
         True, "all ordinary errors at once"),
    Case("Si3N4-1500-spread2", "Si3N4", 1500, _FS, (350.0, 1100.0, 1.0), "spread2", _C, False,
         False, "2 % non-uniformity"),
    # --- MgF2 (Dodge 1984): lowest index
    Case("MgF2-BK7-250-combined", "MgF2", 250, _BK7, (350.0, 1100.0, 1.0), "combined", _C,
         True, False, "classic anti-reflection layer on glass"),
    Case("MgF2-BK7-600-scale-1", "MgF2", 600, _BK7, (350.0, 1100.0, 1.0), "scale-1", _C, True,
         True, "low index on glass, 100 % line 1 % low; mirror index n_glass/n_film = 1.10"),
    Case("MgF2-FS-1000-tilt+", "MgF2", 1000, _FS, _UV, "tilt+", _C, True, False,
         "low index on silica, 100 % line tilted"),
    Case("MgF2-BK7-100-noise", "MgF2", 100, _BK7, (350.0, 1100.0, 1.0), "noise", _C, False,
         False, "100 nm low-index film: a fraction of a fringe"),
    # --- ZnO (Aguilar 2019): absorbing everywhere, UV edge
    Case("ZnO-300-noise", "ZnO", 300, _FS, _UV, "noise", _TL, False, False,
         "absorbing everywhere, edge at 380 nm"),
    Case("ZnO-800-combined", "ZnO", 800, _FS, _UV, "combined", _TL, False, True,
         "absorbing everywhere: damped fringes"),
    Case("ZnO-500-noise-vis", "ZnO", 500, _FS, _VIS, "noise", _TL, False, False,
         "absorbing everywhere, edge outside the range"),
    # --- ITO (Minenkov 2024): free carriers
    Case("ITO-110-noise", "ITO", 110, _FS, (310.0, 1650.0, 2.0), "noise", _DL, False, True,
         "transparent conductor, plasma edge near 1.25 µm"),
    Case("ITO-250-combined", "ITO", 250, _FS, (310.0, 1650.0, 2.0), "combined", _DL, False,
         False, "transparent conductor with ordinary errors"),
    Case("ITO-150-vis", "ITO", 150, _FS, (310.0, 1100.0, 1.0), "noise", _DL, False, False,
         "transparent conductor seen only to 1100 nm"),
    # --- a-Si (Pierce & Spicer 1972): opaque below ~600 nm
    Case("aSi-500-noise", "a-Si", 500, _FS, _VIS, "noise", _TL, False, True,
         "opaque below ~600 nm: no fringes there, noise around T = 0"),
    Case("aSi-300-combined", "a-Si", 300, _FS, _VIS, "combined", _TL, False, False,
         "thinner a-Si with ordinary errors"),
    Case("aSi-1000-nir", "a-Si", 1000, _FS, (500.0, 1700.0, 2.0), "noise", _TL, False, False,
         "1 µm a-Si measured into the near infrared"),
)

#: Names of the ``--quick`` subset.
QUICK = tuple(c.name for c in CASES if c.quick)


def select(pattern: str | None = None, *, quick: bool = False) -> list[Case]:
    """Cases whose name matches a shell-style ``pattern`` (substring if it has no wildcard)."""
    out = [c for c in CASES if c.quick or not quick]
    if pattern:
        pat = pattern if any(ch in pattern for ch in "*?[") else f"*{pattern}*"
        out = [c for c in out if fnmatch.fnmatch(c.name.lower(), pat.lower())]
    return out


def _check_unique():
    names = [c.name for c in CASES]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise ValueError(f"duplicate case names: {sorted(dup)}")


_check_unique()
