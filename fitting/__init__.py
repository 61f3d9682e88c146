"""Pellucid science core: optics, dispersion models, spectra, fitting, batch and I/O.

This package never imports Qt; the desktop app in ``app/`` uses only the public
names re-exported here and in the submodules' ``__all__``.
"""

__version__ = "0.1.0"
