"""What a fit returns: a frozen record with fixed fields, a text report and a JSON dict.

The fit engine fills a :class:`FitResult`; exports, the batch summary, the PDF
report and the GUI only read it. It holds no methods that refit or plot.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import __version__
from .jsonsafe import finite_or_none, is_plain_json, json_safe
from .labels import format_pm

__all__ = ["ParamResult", "OpticalConstants", "Alternative", "BandGap", "FitResult",
           "FitProgress", "Diagnostics", "BudgetItem", "Uncertainty", "ConsistencyCheck",
           "VERDICTS"]

#: The verdicts a fit can get, best first: "good" (use it), "check" (look at the
#: reasons before using it), "poor" (do not use it as it is).
VERDICTS = ("good", "check", "poor")


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
        fin = finite_or_none
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
    note: str = ""

    def to_dict(self) -> dict:
        return {"thickness_nm": self.thickness_nm, "chisqr": self.chisqr, "redchi": self.redchi,
                "note": self.note}


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
class Diagnostics:
    """How well the model describes the data, judged against the data's own noise.

    Attributes
    ----------
    noise_sigma : float
        Median 1σ of the measured points (given with the spectrum or estimated
        from it before the fit, see ``noise_source``).
    noise_source : str
    rms_residual : float
        RMS of measured - fitted over the used points.
    redchi : float
        χ² / degrees of freedom with that noise (about 1 for a model that fits).
    runs_z : float
        Wald-Wolfowitz runs test of the residual signs along wavelength: about
        N(0, 1) for white residuals, strongly negative when the misfit has a
        shape (Wald & Wolfowitz 1940).
    lag1 : float
        Lag-1 autocorrelation of the residuals (0 for white noise).
    structured_rms : float
        RMS of the residuals after a running mean over 9 points: the part of the
        misfit that is not noise.
    dof : int
    """

    noise_sigma: float
    noise_source: str
    rms_residual: float
    redchi: float
    runs_z: float
    lag1: float
    structured_rms: float
    dof: int

    def to_dict(self) -> dict:
        return json_safe(self.__dict__)


@dataclass(frozen=True)
class BudgetItem:
    """One line of an uncertainty budget: a source and the standard uncertainty it adds."""

    source: str
    u: float
    note: str = ""

    def to_dict(self) -> dict:
        return {"source": self.source, "u": finite_or_none(self.u), "note": self.note}


@dataclass(frozen=True)
class Uncertainty:
    """Uncertainty budget of one result quantity after the GUM (JCGM 100:2008).

    ``items`` are standard uncertainties from each source (the statistical one
    first, inflated by √χ²_red when the model does not fit within the noise);
    they are combined in quadrature (sources taken as independent, GUM 5.1.2)
    into ``u_combined``, and ``expanded`` = k·u_combined with coverage factor
    k = 2 (about 95 %, GUM 6.2-6.3).
    """

    quantity: str
    value: float
    unit: str
    items: tuple
    u_combined: float
    k: float = 2.0

    @property
    def expanded(self) -> float:
        return self.k * self.u_combined

    def to_dict(self) -> dict:
        return {"quantity": self.quantity, "value": finite_or_none(self.value), "unit": self.unit,
                "items": [i.to_dict() for i in self.items],
                "u_combined": finite_or_none(self.u_combined), "k": self.k,
                "expanded": finite_or_none(self.expanded)}


@dataclass(frozen=True)
class ConsistencyCheck:
    """Kramers-Kronig consistency of one fitted layer's n and κ (None: not checked)."""

    layer: str
    consistent: bool | None
    message: str
    rms_dev: float | None = None
    max_dev: float | None = None

    def to_dict(self) -> dict:
        return {"consistent": self.consistent, "message": self.message,
                "rms_dev": finite_or_none(self.rms_dev), "max_dev": finite_or_none(self.max_dev)}


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
    verdict : {"good", "check", "poor"}
        The overall judgement of :func:`fitting.verdict.judge`.
    verdict_reasons : tuple of str
        Why the verdict is not "good", each with advice, most serious first.
    diagnostics : Diagnostics or None
        Misfit statistics against the data's own noise.
    uncertainty : dict of str -> Uncertainty
        Expanded uncertainty (GUM) of the film thicknesses and n(633), by quantity.
    kk : dict of layer -> ConsistencyCheck
        Kramers-Kronig consistency of each fitted layer.
    sigma_source : str
        Where the 1σ of the points came from.
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
    verdict: str = ""
    verdict_reasons: tuple = ()
    diagnostics: Diagnostics | None = None
    uncertainty: dict = field(default_factory=dict)
    kk: dict = field(default_factory=dict)
    sigma_source: str = ""

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
        lines = []
        if self.verdict:
            lines.append(f"[[Verdict]] {self.verdict.upper()}")
            lines += [f"    - {r}" for r in self.verdict_reasons]
        lines += ["[[Fit statistics]]",
                 f"    method          = {self.method}",
                 f"    status          = {'converged' if self.success else 'NOT converged'}"
                 f"{' (stopped)' if self.aborted else ''}: {self.message}",
                 f"    data points     = {self.ndata}",
                 f"    variables       = {self.nvarys}",
                 f"    evaluations     = {self.nfev}",
                 f"    chi-square      = {self.chisqr:.6g}",
                 f"    reduced chi-sq. = {self.redchi:.6g}",
                 f"    time            = {self.elapsed_s:.3f} s"]
        if self.sigma_source:
            lines.append(f"    noise (1 sigma) = {self.sigma_source}")
        d = self.diagnostics
        if d is not None:
            lines.append(f"    residual rms    = {d.rms_residual:.3g} (noise {d.noise_sigma:.3g}; "
                         f"runs test z = {d.runs_z:+.1f}, lag-1 autocorrelation "
                         f"{d.lag1:+.2f})")
        lines.append("[[Parameters]]")
        for p in self.params.values():
            if p.vary and p.stderr is not None and np.isfinite(p.stderr):
                rel = f" ({100 * p.stderr / abs(p.value):.2f}%)" if p.value else ""
                val = format_pm(p.value, p.stderr, fmt=".6g", sigma_fmt=".3g", sep=" +/- ") + rel
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
            lines.append(f"    Tauc {g.transition}: Eg = "
                         f"{format_pm(g.Eg_eV, g.sigma_eV, 'eV', fmt='.3f', sep=' +/- ')} "
                         f"(linear range {g.fit_range_eV[0]:.2f}-{g.fit_range_eV[1]:.2f} eV)")
        if self.uncertainty:
            lines.append("[[Uncertainty budget]] (GUM; standard uncertainties, "
                         "expanded U with k = 2)")
            for u in self.uncertainty.values():
                lines.append(f"    {u.quantity} = {u.value:.6g} {u.unit}: U = "
                             f"{u.expanded:.3g} {u.unit} (u_c = {u.u_combined:.3g})".rstrip())
                lines += [f"        {i.source:<28s} {i.u:.3g}"
                          + (f"  ({i.note})" if i.note else "") for i in u.items]
        if self.kk:
            lines.append("[[Kramers-Kronig check]]")
            lines += [f"    {layer}: {c.message}" for layer, c in self.kk.items()]
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
            "verdict": self.verdict, "verdict_reasons": list(self.verdict_reasons),
            "diagnostics": None if self.diagnostics is None else self.diagnostics.to_dict(),
            "uncertainty": {k: u.to_dict() for k, u in self.uncertainty.items()},
            "kk": {k: c.to_dict() for k, c in self.kk.items()},
            "sigma_source": self.sigma_source,
            "extra": {k: v for k, v in self.extra.items() if is_plain_json(v)},
        }
        if curves:
            d["curves"] = {"wavelength_nm": _arr(self.wavelength_nm),
                           "measured": _arr(self.measured),
                           "fitted": _arr(self.fitted), "residuals": _arr(self.residuals),
                           "sigma": _arr(self.sigma), "used": _arr(self.used)}
            d["optical"] = {k: v.to_dict() for k, v in self.optical.items()}
        return d
