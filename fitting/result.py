"""What a fit returns: a frozen record with fixed fields, a text report and a JSON dict.

The fit engine fills a :class:`FitResult`; exports, the batch summary, the PDF
report and the GUI only read it. It holds no methods that refit or plot.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import __version__

__all__ = ["ParamResult", "OpticalConstants", "Alternative", "BandGap", "FitResult",
           "FitProgress"]


def _arr(a):
    return None if a is None else np.asarray(a).tolist()


@dataclass(frozen=True)
class ParamResult:
    """One parameter after a fit (global name, e.g. ``film_thickness``)."""

    name: str
    value: float
    stderr: float | None = None
    init_value: float | None = None
    min: float = -np.inf
    max: float = np.inf
    vary: bool = True
    unit: str = ""
    expr: str | None = None

    @property
    def at_bound(self) -> bool:
        """True if a varied parameter ended within 1e-6 of its span from a bound."""
        if not self.vary or not (np.isfinite(self.min) or np.isfinite(self.max)):
            return False
        span = (self.max - self.min) if np.isfinite(self.max - self.min) else max(
            abs(self.value), 1.0)
        tol = 1e-6 * span
        return bool(self.value - self.min <= tol or self.max - self.value <= tol)

    def to_dict(self) -> dict:
        fin = lambda x: float(x) if x is not None and np.isfinite(x) else None  # noqa: E731
        return {"value": self.value, "stderr": fin(self.stderr), "init_value": fin(self.init_value),
                "min": fin(self.min), "max": fin(self.max), "vary": self.vary, "unit": self.unit,
                "expr": self.expr, "at_bound": self.at_bound}


@dataclass(frozen=True)
class OpticalConstants:
    """n, κ and α of one layer on the data grid, with 1σ bands (None if unknown)."""

    layer: str
    wavelength_nm: np.ndarray
    n: np.ndarray
    k: np.ndarray
    alpha_cm: np.ndarray
    n_sigma: np.ndarray | None = None
    k_sigma: np.ndarray | None = None
    alpha_sigma: np.ndarray | None = None

    def at(self, wavelength_nm: float) -> tuple[float, float]:
        """(n, κ) interpolated at one wavelength (NaN outside the grid)."""
        wl = self.wavelength_nm
        if not wl[0] <= wavelength_nm <= wl[-1]:
            return float("nan"), float("nan")
        return (float(np.interp(wavelength_nm, wl, self.n)),
                float(np.interp(wavelength_nm, wl, self.k)))

    def to_dict(self) -> dict:
        return {"layer": self.layer, "wavelength_nm": _arr(self.wavelength_nm), "n": _arr(self.n),
                "k": _arr(self.k), "alpha_cm": _arr(self.alpha_cm), "n_sigma": _arr(self.n_sigma),
                "k_sigma": _arr(self.k_sigma), "alpha_sigma": _arr(self.alpha_sigma)}


@dataclass(frozen=True)
class Alternative:
    """Another thickness basin and how well it fits (uniqueness report)."""

    thickness_nm: float
    chisqr: float
    redchi: float

    def to_dict(self) -> dict:
        return {"thickness_nm": self.thickness_nm, "chisqr": self.chisqr, "redchi": self.redchi}


@dataclass(frozen=True)
class BandGap:
    """Optical gap from a Tauc plot: (αhν)^r linear in hν, extrapolated to zero."""

    Eg_eV: float
    sigma_eV: float
    transition: str            # "direct" (r = 2) or "indirect" (r = 1/2)
    fit_range_eV: tuple[float, float]
    r_squared: float
    layer: str = ""

    def to_dict(self) -> dict:
        return {"Eg_eV": self.Eg_eV, "sigma_eV": self.sigma_eV, "transition": self.transition,
                "fit_range_eV": list(self.fit_range_eV), "r_squared": self.r_squared,
                "layer": self.layer}


@dataclass(frozen=True)
class FitProgress:
    """Passed to progress callbacks: which stage, how far, best χ² so far."""

    stage: str                 # "start", "scan", "polish", "done"
    fraction: float            # 0..1 of the whole fit
    nfev: int
    best_chisqr: float
    message: str = ""


@dataclass(frozen=True)
class FitResult:
    """Everything one fit produced.

    Attributes
    ----------
    success, aborted : bool
        Converged; stopped by the user or the time/evaluation budget.
    message : str
        Why it ended, in words.
    params : dict of str -> ParamResult
        All parameters (varied and fixed), global names.
    var_names : tuple of str
        Names of the varied parameters, in the order of ``covar`` and ``correl``.
    covar, correl : ndarray of shape (P, P) or None
        Covariance (scaled by reduced χ²) and correlation matrices.
    chisqr, redchi : float
        Weighted χ² and χ² / (ndata - nvarys).
    ndata, nvarys, nfev : int
    elapsed_s : float
    wavelength_nm, measured, fitted, residuals : ndarray of shape (N,)
        On the full data grid; ``residuals`` = measured - fitted.
    sigma : ndarray of shape (N,)
        Per-point 1σ used as weights.
    used : ndarray of bool, shape (N,)
        Points that took part in the fit.
    quantity : {"T", "R"}
    optical : dict of layer name -> OpticalConstants
    alternatives : tuple of Alternative
        Other thickness basins with χ² close to the best (empty if unique).
    band_gap : BandGap or None
    warnings : tuple of str
        Plain-language warnings (at bounds, correlations > 0.95, unphysical, not converged).
    stack : dict
        The fitted stack as ``Stack.to_dict()``.
    method : str
    spectrum : dict
        name, source path, sha256 of the input.
    extra : dict
        Joint-fit parts, envelope start and other method-specific records.
    """

    success: bool
    aborted: bool
    message: str
    params: dict
    var_names: tuple
    covar: np.ndarray | None
    correl: np.ndarray | None
    chisqr: float
    redchi: float
    ndata: int
    nvarys: int
    nfev: int
    elapsed_s: float
    wavelength_nm: np.ndarray
    measured: np.ndarray
    fitted: np.ndarray
    residuals: np.ndarray
    sigma: np.ndarray
    used: np.ndarray
    quantity: str = "T"
    optical: dict = field(default_factory=dict)
    alternatives: tuple = ()
    band_gap: BandGap | None = None
    warnings: tuple = ()
    stack: dict = field(default_factory=dict)
    method: str = ""
    spectrum: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)

    # -- convenience ----------------------------------------------------------------
    def thickness(self, layer: str | None = None) -> tuple[float, float | None]:
        """(thickness nm, 1σ) of a layer (default: the first film)."""
        names = [k for k in self.params if k.endswith("_thickness")]
        if not names:
            raise KeyError("this stack has no film layers")
        key = names[0] if layer is None else f"{layer}_thickness"
        p = self.params[key]
        return p.value, p.stderr

    def correlations(self, threshold: float = 0.0) -> list[tuple[str, str, float]]:
        """Pairs of varied parameters with |correlation| above ``threshold``, largest first."""
        if self.correl is None:
            return []
        out = []
        n = len(self.var_names)
        for i in range(n):
            for j in range(i + 1, n):
                c = float(self.correl[i, j])
                if abs(c) > threshold:
                    out.append((self.var_names[i], self.var_names[j], c))
        return sorted(out, key=lambda t: -abs(t[2]))

    def report(self) -> str:
        """Plain-text report in fixed sections (statistics, parameters, correlations, warnings)."""
        lines = ["[[Fit statistics]]",
                 f"    method          = {self.method}",
                 f"    status          = {'converged' if self.success else 'NOT converged'}"
                 f"{' (stopped)' if self.aborted else ''}: {self.message}",
                 f"    data points     = {self.ndata}",
                 f"    variables       = {self.nvarys}",
                 f"    evaluations     = {self.nfev}",
                 f"    chi-square      = {self.chisqr:.6g}",
                 f"    reduced chi-sq. = {self.redchi:.6g}",
                 f"    time            = {self.elapsed_s:.3f} s",
                 "[[Parameters]]"]
        for p in self.params.values():
            if p.vary and p.stderr is not None and np.isfinite(p.stderr):
                rel = f" ({100 * p.stderr / abs(p.value):.2f}%)" if p.value else ""
                val = f"{p.value:.6g} +/- {p.stderr:.3g}{rel}"
            elif p.vary:
                val = f"{p.value:.6g} +/- (not estimated)"
            else:
                val = f"{p.value:.6g} (fixed)" if not p.expr else f"{p.value:.6g} == '{p.expr}'"
            flag = "  AT BOUND" if p.at_bound else ""
            lines.append(f"    {p.name:<22s} {val} {p.unit}{flag}")
        corr = self.correlations(0.1)
        if corr:
            lines.append("[[Correlations]] (|c| > 0.1)")
            lines += [f"    C({a}, {b}) = {c:+.3f}" for a, b, c in corr]
        if self.band_gap is not None:
            g = self.band_gap
            lines.append("[[Band gap]]")
            lines.append(f"    Tauc {g.transition}: Eg = {g.Eg_eV:.3f} +/- {g.sigma_eV:.3f} eV "
                         f"(linear range {g.fit_range_eV[0]:.2f}-{g.fit_range_eV[1]:.2f} eV)")
        kk = self.extra.get("kk") or {}
        if kk:
            lines.append("[[Kramers-Kronig check]]")
            lines += [f"    {layer}: {c.get('message', '')}" for layer, c in kk.items()]
        if self.alternatives:
            lines.append("[[Other thickness basins]]")
            lines += [f"    d = {a.thickness_nm:.1f} nm: chi-sq. = {a.chisqr:.6g} "
                      f"(reduced {a.redchi:.4g})" for a in self.alternatives]
        if self.warnings:
            lines.append("[[Warnings]]")
            lines += [f"    - {w}" for w in self.warnings]
        return "\n".join(lines)

    def to_dict(self, *, curves: bool = True) -> dict[str, Any]:
        """JSON-ready dict. ``curves=False`` leaves out the per-wavelength arrays."""
        d: dict[str, Any] = {
            "software": {"name": "pellucid", "version": __version__},
            "spectrum": dict(self.spectrum), "method": self.method, "success": self.success,
            "aborted": self.aborted, "message": self.message, "chisqr": self.chisqr,
            "redchi": self.redchi, "ndata": self.ndata, "nvarys": self.nvarys, "nfev": self.nfev,
            "elapsed_s": self.elapsed_s, "quantity": self.quantity,
            "params": {k: p.to_dict() for k, p in self.params.items()},
            "var_names": list(self.var_names),
            "correl": _arr(self.correl), "covar": _arr(self.covar),
            "alternatives": [a.to_dict() for a in self.alternatives],
            "band_gap": None if self.band_gap is None else self.band_gap.to_dict(),
            "warnings": list(self.warnings), "stack": self.stack,
            "extra": {k: v for k, v in self.extra.items() if _jsonable(v)},
        }
        if curves:
            d["curves"] = {"wavelength_nm": _arr(self.wavelength_nm), "measured": _arr(self.measured),
                           "fitted": _arr(self.fitted), "residuals": _arr(self.residuals),
                           "sigma": _arr(self.sigma), "used": _arr(self.used)}
            d["optical"] = {k: v.to_dict() for k, v in self.optical.items()}
        return d


def _jsonable(v) -> bool:
    return isinstance(v, (str, int, float, bool, list, dict, type(None)))
