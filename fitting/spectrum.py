"""The measured spectrum as every part of Pellucid sees it.

A :class:`Spectrum` is what the reader produces and what the fit engine, the
batch runner and the GUI consume: an ascending wavelength grid in nm and the
measured quantity as a *fraction* (T or R in 0..1, never percent), with an
optional per-point noise estimate, a mask of points to use, and provenance.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, replace

import numpy as np

__all__ = ["Spectrum", "QUANTITIES", "sha256_of_file"]

#: Measured quantities Pellucid fits. Absorbance files are converted to T on read.
QUANTITIES = ("T", "R")


def sha256_of_file(path) -> str:
    """Hex SHA-256 of a file's bytes (provenance of every result)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@dataclass(frozen=True)
class Spectrum:
    """One measured spectrum.

    Parameters
    ----------
    wavelength_nm : ndarray of shape (N,)
        Strictly ascending vacuum wavelengths in nm.
    values : ndarray of shape (N,)
        Transmittance or reflectance as a fraction (1.0 = 100 %).
    quantity : {"T", "R"}
        What ``values`` hold.
    sigma : ndarray of shape (N,) or None
        1-sigma noise of each point, as a fraction; None if unknown.
    mask : ndarray of bool, shape (N,) or None
        True where a point is used in fits; None means all points.
    name : str
        Short display name (usually the file stem).
    source : str
        Path of the file it came from ("" if synthesised).
    sha256 : str
        SHA-256 of the source file's bytes ("" if synthesised).
    metadata : dict
        Header "key: value" lines and reader notes.
    warnings : tuple of str
        Non-fatal problems found while reading (dropped rows, values > 100 % ...).
    """

    wavelength_nm: np.ndarray
    values: np.ndarray
    quantity: str = "T"
    sigma: np.ndarray | None = None
    mask: np.ndarray | None = None
    name: str = ""
    source: str = ""
    sha256: str = ""
    metadata: dict = field(default_factory=dict)
    warnings: tuple = ()

    def __post_init__(self):
        wl = np.asarray(self.wavelength_nm, dtype=float)
        y = np.asarray(self.values, dtype=float)
        if wl.ndim != 1 or wl.shape != y.shape:
            raise ValueError(f"wavelength_nm and values must be 1-D of equal length, "
                             f"got shapes {wl.shape} and {y.shape}")
        if wl.size and np.any(np.diff(wl) <= 0):
            raise ValueError("wavelength_nm must be strictly ascending")
        if self.quantity not in QUANTITIES:
            raise ValueError(f"quantity must be one of {QUANTITIES}, got {self.quantity!r}")
        object.__setattr__(self, "wavelength_nm", wl)
        object.__setattr__(self, "values", y)
        for name in ("sigma", "mask"):
            arr = getattr(self, name)
            if arr is not None:
                arr = np.asarray(arr, dtype=bool if name == "mask" else float)
                if arr.shape != wl.shape:
                    raise ValueError(f"{name} must have shape {wl.shape}, got {arr.shape}")
                object.__setattr__(self, name, arr)

    def __len__(self) -> int:
        return self.wavelength_nm.size

    @property
    def used(self) -> np.ndarray:
        """Boolean array: points that take part in a fit."""
        if self.mask is None:
            return np.ones(self.wavelength_nm.shape, dtype=bool)
        return self.mask

    def with_mask(self, mask) -> Spectrum:
        return replace(self, mask=np.asarray(mask, dtype=bool))

    def cropped(self, start_nm: float | None = None, stop_nm: float | None = None) -> Spectrum:
        """A copy restricted to ``start_nm <= wavelength <= stop_nm``."""
        lo = -np.inf if start_nm is None else start_nm
        hi = np.inf if stop_nm is None else stop_nm
        keep = (self.wavelength_nm >= lo) & (self.wavelength_nm <= hi)
        pick = lambda a: None if a is None else a[keep]  # noqa: E731
        return replace(self, wavelength_nm=self.wavelength_nm[keep], values=self.values[keep],
                       sigma=pick(self.sigma), mask=pick(self.mask))

    def masked_windows(self, windows_nm) -> Spectrum:
        """A copy with the given ``[(start, stop), ...]`` windows excluded from fits."""
        use = self.used.copy()
        for lo, hi in windows_nm:
            use &= ~((self.wavelength_nm >= lo) & (self.wavelength_nm <= hi))
        return replace(self, mask=use)
