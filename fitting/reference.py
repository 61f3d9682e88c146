"""What a measured spectrum says about itself: reference correction and noise.

Two operations that turn raw spectrometer output into fit input:

* :func:`reference_correct` divides a sample signal by a 100 % line (baseline)
  after subtracting the dark signal, on the sample's wavelength grid;
* :func:`estimate_noise` estimates the 1-sigma noise of every point from the
  spectrum itself, for weighting fits when the instrument gives no error bars.

Both take and return :class:`~fitting.spectrum.Spectrum` objects (or arrays) and
never modify their inputs.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
from scipy.ndimage import median_filter, uniform_filter1d

from .errors import ParameterError, SpectrumFormatError
from .spectrum import Spectrum

__all__ = ["reference_correct", "estimate_noise", "MIN_POINTS", "MAD_TO_SIGMA"]

#: Fewest points a spectrum must keep to be worth fitting.
MIN_POINTS = 5

#: 1 / Phi^-1(3/4): the median absolute deviation of a normal sample times this
#: factor estimates its standard deviation (Hampel 1974).
MAD_TO_SIGMA = 1.482602218505602

#: Points whose (baseline - dark) falls below this fraction of its median carry
#: no usable signal (lamp or detector cut-off) and are dropped.
_NO_SIGNAL_FRACTION = 1e-3

#: Absolute floor of an estimated sigma, as a fraction (0.0001 %T): no
#: spectrophotometer resolves less, and a zero sigma would break weighted fits.
_SIGMA_FLOOR = 1e-6


def _label(spectrum: Spectrum) -> str:
    return spectrum.source or spectrum.name or "<spectrum>"


def _span(spectrum: Spectrum) -> str:
    if len(spectrum) == 0:
        return "no points"
    return f"{spectrum.wavelength_nm[0]:g}-{spectrum.wavelength_nm[-1]:g} nm"


def reference_correct(sample: Spectrum, baseline: Spectrum, dark: Spectrum | None = None
                      ) -> Spectrum:
    """Convert raw sample, 100 % line and dark signals into T (or R).

    .. math:: T(\\lambda) = \\frac{S(\\lambda) - D(\\lambda)}{B(\\lambda) - D(\\lambda)}

    The baseline and dark are interpolated linearly onto the sample grid; the
    result covers the wavelength range all inputs share.

    Parameters
    ----------
    sample : Spectrum
        Signal measured through (or reflected by) the sample, usually read with
        ``ReaderOptions(y_kind="counts")``.
    baseline : Spectrum
        Signal with nothing in the beam (T) or from the reference mirror (R):
        the 100 % line, in the same units as ``sample``.
    dark : Spectrum, optional
        Signal with the beam blocked. Omitted means zero dark signal.

    Returns
    -------
    Spectrum
        ``quantity`` of the sample, values as a fraction, on the sample grid
        restricted to the common range. If the inputs carry ``sigma``, it is
        propagated to first order:
        ``sigma_T**2 = (sigma_S**2 + T**2 sigma_B**2 + (1-T)**2 sigma_D**2) / (B-D)**2``.
        Points where ``B - D`` is below 0.1 % of its median (no light reaches
        the detector) are dropped, with a warning.

    Raises
    ------
    SpectrumFormatError
        If the spectra share no wavelength range, or fewer than 5 sample points,
        or if ``B - D`` is about zero (or negative) at most points, which means
        the wrong files were paired.

    Notes
    -----
    Dark-corrected ratioing against a 100 % line is the standard practice of
    single- and double-beam spectrophotometry (common practice).
    """
    for what, spec in (("sample", sample), ("baseline", baseline), ("dark", dark)):
        if spec is not None and not isinstance(spec, Spectrum):
            raise TypeError(f"{what} must be a Spectrum, got {type(spec).__name__}")
    refs = [baseline] + ([dark] if dark is not None else [])
    for ref in refs:
        if len(ref) == 0 or len(sample) == 0 or (
                ref.wavelength_nm[-1] < sample.wavelength_nm[0]
                or ref.wavelength_nm[0] > sample.wavelength_nm[-1]):
            raise SpectrumFormatError(
                _label(ref), None, "shares no wavelength range with the sample "
                f"{_label(sample)!r}; measure the reference over the sample's range",
                expected=f"wavelengths within {_span(sample)}", found=_span(ref))
    lo = max(s.wavelength_nm[0] for s in [sample, *refs])
    hi = min(s.wavelength_nm[-1] for s in [sample, *refs])
    wl_all = sample.wavelength_nm
    keep = (wl_all >= lo) & (wl_all <= hi)
    n_keep = int(keep.sum())
    if n_keep < MIN_POINTS:
        raise SpectrumFormatError(
            _label(sample), None, f"only {n_keep} sample points lie in the range "
            f"{lo:g}-{hi:g} nm shared with the reference spectra",
            expected=f"at least {MIN_POINTS} points", found=str(n_keep))
    wl = wl_all[keep]
    s_val = sample.values[keep]
    b_val = np.interp(wl, baseline.wavelength_nm, baseline.values)
    d_val = np.zeros_like(wl) if dark is None else np.interp(wl, dark.wavelength_nm, dark.values)
    denom = b_val - d_val
    scale = float(np.median(np.abs(denom)))
    if scale > 0:
        ok = np.isfinite(denom) & (denom > _NO_SIGNAL_FRACTION * scale)
    else:
        ok = np.zeros(wl.shape, dtype=bool)
    n_ok = int(ok.sum())
    if n_ok < MIN_POINTS or n_ok < 0.5 * wl.size:
        raise SpectrumFormatError(
            _label(baseline), None,
            f"baseline minus dark is about zero or negative at {wl.size - n_ok} of "
            f"{wl.size} points, so no transmittance can be formed; check that the "
            f"100 % line and the dark spectrum were not swapped or mislabelled",
            expected="baseline signal well above the dark signal",
            found=f"median(B - D) = {float(np.median(denom)):.4g}")
    warnings = list(sample.warnings)
    if n_keep < len(sample):
        warnings.append(f"restricted to {lo:g}-{hi:g} nm, the range covered by the sample "
                        f"and its reference spectra ({len(sample) - n_keep} points dropped)")
    if n_ok < wl.size:
        bad = wl[~ok]
        warnings.append(f"{wl.size - n_ok} points where the baseline is not above the dark "
                        f"signal were dropped ({bad.min():g}-{bad.max():g} nm)")
    t = (s_val - d_val)[ok] / denom[ok]          # denom[ok] > 0 by construction
    sigma = None
    if any(s is not None and s.sigma is not None for s in (sample, baseline, dark)):
        def sigma_on_grid(spec):
            if spec is None or spec.sigma is None:
                return np.zeros(n_ok)
            return np.interp(wl, spec.wavelength_nm, spec.sigma)[ok]
        # dT/dS = 1/(B-D), dT/dB = -T/(B-D), dT/dD = (T-1)/(B-D)
        sigma = np.sqrt(sigma_on_grid(sample) ** 2 + (t * sigma_on_grid(baseline)) ** 2
                        + ((1 - t) * sigma_on_grid(dark)) ** 2) / denom[ok]
    mask = None if sample.mask is None else sample.mask[keep][ok]
    metadata = dict(sample.metadata)
    metadata["ordinate"] = "fraction"
    metadata["reference_correction"] = {
        "formula": "(S - D) / (B - D)",
        "range_nm": [float(lo), float(hi)],
        "baseline": {"name": baseline.name, "source": baseline.source,
                     "sha256": baseline.sha256},
        "dark": None if dark is None else {"name": dark.name, "source": dark.source,
                                           "sha256": dark.sha256},
    }
    return replace(sample, wavelength_nm=wl[ok], values=t, sigma=sigma, mask=mask,
                   metadata=metadata, warnings=tuple(warnings))


def _mad(a: np.ndarray) -> float:
    return float(np.median(np.abs(a - np.median(a))))


def estimate_noise(spectrum, *, window: int | None = 201) -> np.ndarray:
    """Estimate the 1-sigma noise of each point from the spectrum itself.

    The second difference ``d2[i] = y[i-1] - 2 y[i] + y[i+1]`` removes a locally
    smooth signal (it is zero for any straight line) and leaves, for white noise
    of standard deviation sigma, a variable of variance ``6 sigma**2``. A robust
    scale of ``d2`` therefore gives

    .. math:: \\hat\\sigma = 1.4826\\, \\mathrm{MAD}(d_2) / \\sqrt{6}.

    Parameters
    ----------
    spectrum : Spectrum or array_like of shape (N,)
        The spectrum (its ``values``) or the values themselves.
    window : int or None, optional
        Number of second differences in the sliding window of the local
        estimate (default 201), so that noise that grows towards the ends of
        a detector's range is followed. ``None``, or a spectrum shorter than
        two windows, gives one global value for all points.

    Returns
    -------
    ndarray of shape (N,)
        sigma of each point, in the units of the values (a fraction for T, R).
        Never below a quarter of the global estimate nor below 1e-6.

    Raises
    ------
    ParameterError
        If there are fewer than 5 points or ``window`` is below 5.

    Notes
    -----
    The signal must be smooth on the scale of three points: sharp lines or
    interference fringes sampled with fewer than about 15 points per period
    leak into ``d2`` and inflate the estimate. Estimating noise from the MAD of
    high-pass coefficients scaled by 1/0.6745 follows Donoho and Johnstone [2]_;
    applying it to the second difference is common practice.

    References
    ----------
    .. [1] F. R. Hampel, "The influence curve and its role in robust
           estimation", J. Am. Stat. Assoc. 69, 383 (1974).
           :DOI:`10.1080/01621459.1974.10482962`
    .. [2] D. L. Donoho and I. M. Johnstone, "Ideal spatial adaptation by
           wavelet shrinkage", Biometrika 81, 425-455 (1994).
           :DOI:`10.1093/biomet/81.3.425`

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> y = 0.5 + 0.01 * rng.standard_normal(5000)
    >>> bool(abs(np.median(estimate_noise(y)) / 0.01 - 1) < 0.1)
    True
    """
    y = np.asarray(getattr(spectrum, "values", spectrum), dtype=float)
    if y.ndim != 1 or y.size < MIN_POINTS:
        raise ParameterError("spectrum", f"{y.size} points",
                             f"noise estimation needs at least {MIN_POINTS} points")
    if window is not None and (not isinstance(window, (int, np.integer)) or window < 5):
        raise ParameterError("window", window, "must be an integer of at least 5 or None")
    y = np.where(np.isfinite(y), y, np.nanmedian(y) if np.isfinite(y).any() else 0.0)
    d2 = y[:-2] - 2.0 * y[1:-1] + y[2:]
    factor = MAD_TO_SIGMA / math.sqrt(6.0)
    global_sigma = factor * _mad(d2)
    floor = max(0.25 * global_sigma, _SIGMA_FLOOR)
    if window is None or d2.size < 2 * window:
        return np.full(y.size, max(global_sigma, floor))
    centre = median_filter(d2, size=window, mode="reflect")
    local = factor * median_filter(np.abs(d2 - centre), size=window, mode="reflect")
    # A running median of |d2| jumps between neighbouring order statistics; the
    # mean over one more window makes the weights it feeds smooth.
    local = uniform_filter1d(local, size=window, mode="reflect")
    return np.maximum(np.pad(local, 1, mode="edge"), floor)
