"""Synthetic spectra and recipes shared by test_batch, test_cli and test_dask.

Spectra are computed with ``fitting.stack.Stack.RT`` (checked against ``tmm`` in
test_stack.py) plus seeded Gaussian noise of 0.2 %T, a typical noise level of
grating spectrophotometers in the visible (common practice), and written with
the reader's own ``write_spectrum``.
"""

from pathlib import Path

import numpy as np

from fitting.dispersion import Cauchy
from fitting.reader import write_spectrum
from fitting.recipe import Recipe
from fitting.spectrum import Spectrum
from fitting.stack import Layer, Stack
from fitting.substrates import library_substrate

#: The true film: Cauchy A, B (B in µm²) on 1 mm fused silica.
TRUE_A, TRUE_B = 2.05, 0.025
NOISE = 0.002
WAVELENGTHS = np.linspace(400.0, 1000.0, 200)
BROKEN = ("empty.csv", "binary.dat", "text_in_numbers.csv")


def true_stack(thickness_nm: float) -> Stack:
    return Stack([Layer("film", Cauchy(TRUE_A, TRUE_B), thickness_nm)],
                 library_substrate("fused_silica", 1.0))


def true_n(wavelength_nm: float) -> float:
    return float(Cauchy(TRUE_A, TRUE_B).N([wavelength_nm]).real[0])


def make_recipe(**kw) -> Recipe:
    """Start values off the truth (A 2.0, B 0.02, 500 nm); plots off unless asked for."""
    stack = Stack([Layer("film", Cauchy(2.0, 0.02), 500.0)],
                  library_substrate("fused_silica", 1.0))
    kw.setdefault("exports", ("nk", "curves", "json", "report"))
    kw.setdefault("name", "test batch")
    return Recipe(stack, **kw)


def write_spectra(folder, thicknesses, *, seed: int = 0, broken: bool = False) -> dict:
    """Write one spectrum per thickness (s000.txt ...); returns {file name: thickness}."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    truth = {}
    for i, d in enumerate(thicknesses):
        T = true_stack(d).transmittance(WAVELENGTHS) + rng.normal(0, NOISE, WAVELENGTHS.size)
        name = f"s{i:03d}.txt"
        write_spectrum(folder / name, Spectrum(WAVELENGTHS, T))
        truth[name] = float(d)
    if broken:
        (folder / BROKEN[0]).write_bytes(b"")
        (folder / BROKEN[1]).write_bytes(bytes(range(256)) * 8)
        rows = [f"{w:.1f},{0.9:.4f}" for w in np.linspace(400, 1000, 40)]
        rows[17] = "612.3,n/a?"
        (folder / BROKEN[2]).write_text("wavelength_nm,T\n" + "\n".join(rows) + "\n")
    return truth
