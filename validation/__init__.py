"""An independent yardstick for Pellucid's fit engine: published n, κ made into spectra by `tmm`.

Nothing here uses the project's own optics: the film data are published
measurements (``data/*.csv``, each naming its paper and licence) or published
dispersion formulas, the substrates are written from their published Sellmeier
coefficients, and the spectra come from the independent ``tmm`` package
(S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720) with the
errors of an ordinary spectrophotometer added.

* :mod:`validation.materials` - film materials and substrates (published data).
* :mod:`validation.synth` - the spectrum generator (coherent film, incoherent
  substrate, 100 % line scale and tilt, noise, thickness non-uniformity).
* :mod:`validation.cases` - the validation cases and what each one checks.
* :mod:`validation.run` - ``python -m validation.run``: fit every case from the
  defaults a technician gets and report recovery, verdicts and silent failures.
"""
