"""Make Pellucid's synthetic demo data set (run from the repository root).

    python demo_data/make_demo.py

The scenario is invented: a small pilot coating line ("pilot line 2" of an
unnamed optics workshop) deposits titania-like films on fused-silica witness
slides and nitride-like films on borosilicate (N-BK7-type) witness slides, and
measures each slide in a UV-Vis-NIR spectrophotometer. The spectra are
*calculated* with Pellucid's own stack engine from the "true" values below,
then made realistic:

* white noise of 0.2 % T (1σ),
* a 100 % line (baseline) error: T is multiplied by a scale drawn from
  1 ± 1 % and shifted by an offset of ± 0.1 % T,
* a small step at the 860 nm detector changeover in some files (the recipes
  mask 850-870 nm),
* files written in a mix of export dialects (delimiters, decimal comma,
  encodings, units, percent/fraction/absorbance, sort order, metadata blocks).

The random generator has a fixed seed, so the script always writes the same
files. ``truth.json`` records the values used, for checking the demo fits.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT.parent))

from fitting.dispersion import Cauchy, Oscillators, TaucLorentz  # noqa: E402
from fitting.fit import FitOptions  # noqa: E402
from fitting.reader import Dialect, write_spectrum  # noqa: E402
from fitting.recipe import Limit, Recipe, save_recipe  # noqa: E402
from fitting.spectrum import Spectrum  # noqa: E402
from fitting.stack import Layer, Stack  # noqa: E402
from fitting.substrates import library_substrate  # noqa: E402

SEED = 20261202
WL = np.arange(300.0, 1100.0 + 0.5, 1.0)         # nm, 1 nm steps
NOISE = 0.002                                    # 0.2 % T
CHANGEOVER_NM = 860.0

# "True" film materials of the invented line.
def titania_like():
    return Oscillators(eps_inf=1.9, terms=[TaucLorentz(A=150.0, E0=4.4, C=1.6, Eg=3.15)])


def nitride_like():
    return Cauchy(1.93, 0.018, urbach=True, k0=2e-3, Eu=0.3, E_edge=4.5)


# (file stem, thickness nm, dialect) per film family. Stems are the line's lot codes.
TITANIA_RUNS = [
    ("PL2-T-0101", 62.0), ("PL2-T-0102", 148.0), ("PL2-T-0103", 231.0),
    ("PL2-T-0104", 305.0), ("PL2-T-0105", 412.0), ("PL2-T-0106", 498.0),
    ("PL2-T-0107", 503.0), ("PL2-T-0108", 511.0), ("PL2-T-0109", 640.0),
    ("PL2-T-0110", 785.0), ("PL2-T-0111", 960.0), ("PL2-T-0112", 1230.0),
    ("PL2-T-0113", 1510.0), ("PL2-T-0114", 1835.0),
]
NITRIDE_RUNS = [
    ("PL2-N-0201", 120.0), ("PL2-N-0202", 260.0), ("PL2-N-0203", 395.0),
    ("PL2-N-0204", 540.0), ("PL2-N-0205", 720.0), ("PL2-N-0206", 1100.0),
]

# A mix of export dialects, cycled over the files.
DIALECTS = [
    ("csv", Dialect(delimiter=",", x_unit="nm", y_kind="T_fraction", metadata_style="none")),
    ("csv", Dialect(delimiter=";", decimal=",", x_unit="nm", y_kind="T_percent",
                    encoding="latin-1", x_order="descending")),
    ("txt", Dialect(delimiter="\t", x_unit="nm", y_kind="T_percent", encoding="utf-8-sig",
                    metadata_style="colon")),
    ("dat", Dialect(delimiter=" ", x_unit="um", y_kind="T_fraction", metadata_style="comment")),
    ("txt", Dialect(delimiter="\t", x_unit="nm", y_kind="T_percent", encoding="utf-16-le",
                    newline="\r\n", x_order="descending")),
    ("csv", Dialect(delimiter=",", x_unit="nm", y_kind="absorbance", metadata_style="colon")),
    ("csv", Dialect(delimiter=";", decimal=",", x_unit="cm-1", y_kind="T_percent",
                    metadata_style="colon")),
    ("txt", Dialect(delimiter="\t", x_unit="eV", y_kind="T_fraction", metadata_style="equals")),
]


def measured(T_true, rng, *, glitch: bool):
    """Noise, baseline error and (optionally) a detector changeover step."""
    scale = 1 + rng.uniform(-0.01, 0.01)
    offset = rng.uniform(-0.001, 0.001)
    T = scale * T_true + offset + rng.normal(0, NOISE, T_true.size)
    if glitch:
        T = T + np.where(WL > CHANGEOVER_NM, 0.004, 0.0) * (np.abs(WL - CHANGEOVER_NM) < 8)
    return T, scale, offset


def header(stem, substrate, film):
    return {"Sample": stem, "Instrument": "double-beam UV-Vis-NIR (invented)",
            "Line": "pilot line 2", "Substrate": substrate, "Film": film,
            "Scan": "1100-300 nm, 1 nm steps", "Slit": "2 nm"}


def write_family(folder: Path, runs, material, substrate_key, substrate_label, film_label,
                 rng, start_dialect: int, truth: dict):
    folder.mkdir(parents=True, exist_ok=True)
    for i, (stem, d) in enumerate(runs):
        stack = Stack([Layer("film", material(), d)], library_substrate(substrate_key, 1.0))
        T_true = stack.transmittance(WL)
        T, scale, offset = measured(T_true, rng, glitch=(i % 3 == 1))
        ext, dialect = DIALECTS[(start_dialect + i) % len(DIALECTS)]
        if dialect.y_kind == "absorbance":
            T = np.clip(T, 1e-4, None)   # absorbance needs T > 0
        spec = Spectrum(WL, T, name=stem,
                        metadata={"header": header(stem, substrate_label, film_label)})
        path = write_spectrum(folder / f"{stem}.{ext}", spec, dialect=dialect)
        truth[stem] = {"file": str(path.relative_to(ROOT)), "thickness_nm": d,
                       "scale": scale, "offset": offset,
                       "n_633": float(material().N(np.array([633.0]))[0].real),
                       "dialect": dialect.to_dict()}


def write_references(folder: Path, rng):
    """Bare substrate, 100 % line, dark and one raw-counts sample for reference correction."""
    folder.mkdir(parents=True, exist_ok=True)
    bare = Stack([], library_substrate("fused_silica", 1.0)).transmittance(WL)
    T, *_ = measured(bare, rng, glitch=False)
    write_spectrum(folder / "bare_fused_silica.csv",
                   Spectrum(WL, T, name="bare fused silica",
                            metadata={"header": {"Sample": "bare witness slide, fused silica"}}),
                   dialect=Dialect(delimiter=",", y_kind="T_fraction"))
    # Raw detector counts: a smooth lamp x detector response, a dark level.
    lamp = 4.0e4 * np.exp(-((WL - 650.0) / 420.0) ** 2) + 2.0e3
    dark = np.full(WL.shape, 310.0)
    counts = Dialect(delimiter="\t", y_kind="counts", columns=("Wavelength (nm)", "Counts"))
    for name, values in (("baseline_100pct", lamp + dark), ("dark", dark)):
        noisy = values + rng.normal(0, 15.0, WL.size)
        write_spectrum(folder / f"{name}.txt",
                       Spectrum(WL, noisy, name=name, metadata={"header": {"Signal": name}}),
                       dialect=counts)
    film = Stack([Layer("film", titania_like(), 505.0)], library_substrate("fused_silica", 1.0))
    sample = film.transmittance(WL) * lamp + dark + rng.normal(0, 15.0, WL.size)
    write_spectrum(folder / "PL2-T-0115_raw_counts.txt",
                   Spectrum(WL, sample, name="PL2-T-0115",
                            metadata={"header": {"Sample": "PL2-T-0115", "Signal": "raw counts"}}),
                   dialect=counts)


def recipe_for(material, substrate_key, name, notes, limits):
    stack = Stack([Layer("film", material, 500.0)], library_substrate(substrate_key, 1.0))
    stack.layers[0].thickness.max = 3000.0
    return Recipe(stack=stack, name=name, notes=notes,
                  fit_options=FitOptions(fit_scale=True, band_gap="direct").to_dict(),
                  range_nm=(330.0, 1100.0), masks_nm=[(850.0, 870.0)], limits=limits)


def main() -> None:
    rng = np.random.default_rng(SEED)
    truth: dict = {}
    write_family(ROOT / "spectra", TITANIA_RUNS, titania_like, "fused_silica", "fused silica",
                 "titania-like", rng, 0, truth)
    write_family(ROOT / "nitride_on_borosilicate" / "spectra", NITRIDE_RUNS, nitride_like,
                 "n_bk7", "borosilicate (N-BK7 type)", "nitride-like", rng, 3, truth)
    write_references(ROOT / "references", rng)
    # Default model starts: the recipes name the model kind, not the answer.
    tl = Oscillators(terms=[TaucLorentz()])
    save_recipe(recipe_for(tl, "fused_silica", "titania-like on fused silica, pilot line 2",
                           "Tauc-Lorentz film on a 1 mm fused-silica witness slide; 100 % line "
                           "scale fitted; detector changeover window masked.",
                           {"film_thickness": Limit(target=500.0, tol=25.0)}),
                ROOT / "recipe.json")
    save_recipe(recipe_for(Cauchy(urbach=True), "n_bk7",
                           "nitride-like on borosilicate, pilot line 2",
                           "Cauchy film with Urbach tail on a 1 mm N-BK7-type witness slide.",
                           {}),
                ROOT / "nitride_on_borosilicate" / "recipe.json")
    (ROOT / "truth.json").write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {len(truth)} spectra, references and 2 recipes under {ROOT}")


if __name__ == "__main__":
    main()
