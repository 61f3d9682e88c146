"""Why a validation case fails: the same spectrum fitted several ways, side by side.

Usage::

    python -m validation.diagnose PATTERN [--jobs N]

For each matching case it fits

* ``default``   - the app's defaults (what :mod:`validation.run` reports:
  100 % line scale and tilt fitted with their priors, non-uniformity decided
  from the data);
* ``bare``      - no nuisance terms at all (scale 1, no tilt, no spread);
* ``+spread``   - the defaults with the thickness non-uniformity always fitted;
* ``truth-start`` - a local fit (``least_squares``) started at the true
  thickness, with Cauchy A, B started at a least-squares fit of the true n
  (other models at their defaults), scale and spread fitted.

and prints thickness, n(633), the rms residual in %T (comparable between the
variants) and the fitted scale. A
``truth-start`` with a clearly lower rms than ``default`` means the automatic
start missed the right basin; a ``default`` that ``bare`` matches means the
nuisance terms do not matter for that case, and one only cured by ``+spread``
means a non-uniformity the automatic choice left out; a ``truth-start`` that
drifts away from the truth with an rms no better means the model or the data
cannot decide.
"""

from __future__ import annotations

import argparse
import dataclasses
import multiprocessing
import sys

import numpy as np

from .cases import Case, select
from .materials import material, substrate
from .run import REF_NM
from .synth import grid, measure

__all__ = ["diagnose", "main"]

VARIANTS = ("default", "bare", "+spread", "truth-start")


def _rms(res) -> float:
    r = res.residuals[res.used]
    return float(100 * np.sqrt(np.mean(r * r)))


def diagnose(case: Case) -> list[dict]:
    """Fit one case in every :data:`VARIANTS`; one dict per variant."""
    from fitting.fit import fit_spectrum
    from fitting.presets import default_stack
    from fitting.recipe import Recipe
    from fitting.spectrum import Spectrum

    film = material(case.material)
    wl = grid(*case.range_nm)
    T, _ = measure(film, case.thickness_nm, substrate(case.substrate), wl, case.instrument,
                   case.seed)
    spectrum = Spectrum(wl, T, name=case.name)
    rec = Recipe(default_stack(case.model, case.substrate))
    base = rec.make_fit_options(spectrum)
    out = []
    for v in VARIANTS:
        stack = rec.new_stack()
        opts = base
        if v == "bare":
            opts = dataclasses.replace(opts, fit_scale=False, fit_tilt=False,
                                       fit_spread=False)
        if v in ("+spread", "truth-start"):
            opts = dataclasses.replace(opts, fit_spread=True)
        if v == "truth-start":
            opts = dataclasses.replace(opts, method="least_squares")
            stack.layers[0].thickness.value = case.thickness_nm
            if case.model == "cauchy":
                n = film.N(wl).real
                X = np.column_stack([np.ones_like(wl), (wl * 1e-3) ** -2])
                (A, B), *_ = np.linalg.lstsq(X, n, rcond=None)
                stack.layers[0].material.set("A", float(A), widen=True)
                stack.layers[0].material.set("B", float(B), widen=True)
        try:
            res = fit_spectrum(spectrum, stack, opts)
        except Exception as e:  # noqa: BLE001 - report and go on
            out.append({"case": case.name, "variant": v, "error": f"{type(e).__name__}: {e}"})
            continue
        d = res.thickness()[0]
        n633 = res.optical["film"].at(REF_NM)[0] if wl[0] <= REF_NM <= wl[-1] else None
        p = res.params
        out.append({"case": case.name, "variant": v, "d": d,
                    "dd_pct": 100 * (d - case.thickness_nm) / case.thickness_nm,
                    "n633": n633, "rms_pct": _rms(res),
                    "scale": p["scale"].value if "scale" in p else None,
                    "spread": p["thickness_spread"].value if "thickness_spread" in p else None,
                    "alternatives": [round(a.thickness_nm, 1) for a in res.alternatives],
                    "warnings": len(res.warnings), "message": res.message})
    return out


def _print(case: Case, rows: list[dict]) -> None:
    film = material(case.material)
    wl0, wl1 = case.range_nm[0], case.range_nm[1]
    n_true = film.n(REF_NM) if wl0 <= REF_NM <= wl1 else None
    print(f"{case.name}: d = {case.thickness_nm:g} nm, n(633) = "
          f"{'—' if n_true is None else f'{n_true:.4f}'}, {case.instrument.describe()}, "
          f"model {case.model}")
    for r in rows:
        if "error" in r:
            print(f"  {r['variant']:14s} {r['error']}")
            continue
        n = "—" if r["n633"] is None else f"{r['n633']:.4f}"
        sc = "" if r["scale"] is None else f" scale {r['scale']:.4f}"
        sp = "" if r["spread"] is None else f" spread {r['spread']:.4f}"
        alt = f" alt {r['alternatives']}" if r["alternatives"] else ""
        print(f"  {r['variant']:14s} d {r['d']:8.1f} ({r['dd_pct']:+6.2f} %)  n633 {n:>7s}  "
              f"rms {r['rms_pct']:.3f} %T{sc}{sp}{alt}  [{r['message']}]")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m validation.diagnose",
                                 description="Fit validation cases several ways to see why "
                                             "they fail.")
    ap.add_argument("pattern", help="case name part or * ? pattern (see validation.run --list)")
    ap.add_argument("--jobs", type=int, default=2)
    a = ap.parse_args(argv)
    cases = select(a.pattern)
    if not cases:
        ap.error(f"no case matches {a.pattern!r}")
    if a.jobs > 1 and len(cases) > 1:
        with multiprocessing.get_context("spawn").Pool(min(a.jobs, len(cases))) as pool:
            results = pool.map(diagnose, cases)
    else:
        results = [diagnose(c) for c in cases]
    for c, rows in zip(cases, results):
        _print(c, rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
