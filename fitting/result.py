"""What a fit returns: a frozen record with fixed fields, a text report and a JSON dict.

The fit engine fills a :class:`FitResult`; exports, the batch summary, the PDF
report and the GUI only read it. It holds no methods that refit or plot.
:meth:`FitResult.from_dict` reads the JSON form back (a saved project's result),
record by record.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Any
from collections.abc import Mapping

import numpy as np

from . import __version__
from .errors import RecipeError
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


    @classmethod
    def from_dict(cls, d: Mapping) -> FitResult:
        """Rebuild a result from :meth:`to_dict` (``curves=True``), every record typed.

        Parameters, optical constants, band gap, alternative basins, diagnostics,
        the uncertainty budgets (with their :class:`BudgetItem` lines) and the
        Kramers-Kronig checks come back as their classes; ``to_dict`` of the
        result is then the dict it was read from. Values written as ``null``
        (NaN or infinity in the result) come back as NaN, open bounds as ±inf.
        Diagnostics written by a version with other fields are left out (None)
        rather than guessed; fields of ``FitResult`` not named here are taken
        when they hold text (a newer version's verdict-like fields).

        Raises
        ------
        RecipeError
            Naming the field (``uncertainty.film_thickness.items[0].u``), if the
            dict is not such a result.
        """
        if not isinstance(d, Mapping):
            raise RecipeError("(result)", "must be an object")
        for k in ("params", "curves", "chisqr", "redchi", "ndata", "nvarys", "nfev"):
            if k not in d:
                raise RecipeError(k, "is missing")
        c = d["curves"]
        if not isinstance(c, Mapping) or "wavelength_nm" not in c:
            raise RecipeError("curves", "must hold wavelength_nm and the fitted curves")
        wl = _floats(c["wavelength_nm"], "curves.wavelength_nm")
        arrays = {k: _floats(c.get(k), f"curves.{k}", size=wl.size)
                  for k in ("measured", "fitted", "residuals", "sigma")}
        used = np.asarray(_floats(c.get("used"), "curves.used", size=wl.size) != 0)
        kw = dict(
            success=bool(d.get("success")), aborted=bool(d.get("aborted")),
            message=str(d.get("message", "")), params=_params(d["params"]),
            var_names=tuple(d.get("var_names") or ()), covar=_matrix(d, "covar"),
            correl=_matrix(d, "correl"), chisqr=_num(d["chisqr"], "chisqr"),
            redchi=_num(d["redchi"], "redchi"), ndata=_int(d["ndata"], "ndata"),
            nvarys=_int(d["nvarys"], "nvarys"), nfev=_int(d["nfev"], "nfev"),
            elapsed_s=_num(d.get("elapsed_s", 0.0), "elapsed_s"), wavelength_nm=wl,
            used=used, quantity=str(d.get("quantity", "T")),
            optical=_optical(d.get("optical") or {}), alternatives=_alternatives(d),
            band_gap=_band_gap(d.get("band_gap")), warnings=tuple(d.get("warnings") or ()),
            stack=dict(d.get("stack") or {}), method=str(d.get("method", "")),
            spectrum=dict(d.get("spectrum") or {}), extra=dict(d.get("extra") or {}),
            verdict=str(d.get("verdict") or ""),
            verdict_reasons=tuple(str(x) for x in d.get("verdict_reasons") or ()),
            diagnostics=_diagnostics(d.get("diagnostics")),
            uncertainty=_uncertainty(d.get("uncertainty") or {}),
            kk=_kk(d.get("kk") or {}), sigma_source=str(d.get("sigma_source") or ""),
            **arrays)
        names = {f.name for f in fields(cls)}
        kw = {k: v for k, v in kw.items() if k in names}
        # A newer version's fields pass through when they are plain text.
        for f in fields(cls):
            if f.name in kw or f.name not in d:
                continue
            v = d[f.name]
            if isinstance(v, str):
                kw[f.name] = v
            elif isinstance(v, list) and all(isinstance(x, str) for x in v):
                kw[f.name] = tuple(v)
        return cls(**kw)


def _jsonable(v) -> bool:
    return isinstance(v, (str, int, float, bool, list, dict, type(None)))


# -- reading a result back from its JSON (FitResult.from_dict) -------------------------
def _floats(v, where, *, size=None, optional=False):
    if v is None and optional:
        return None
    try:
        a = np.array([np.nan if x is None else x for x in v], dtype=float)
    except (TypeError, ValueError):
        raise RecipeError(where, "must be a list of numbers") from None
    if a.ndim != 1:
        raise RecipeError(where, "must be a flat list of numbers")
    if size is not None and a.size != size:
        raise RecipeError(where, f"has {a.size} values, expected {size} (one per wavelength)")
    return a


def _num(v, where, *, missing=math.nan) -> float:
    if v is None:
        return missing
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise RecipeError(where, f"must be a number, found {v!r}")
    return float(v)


def _opt(v, where) -> float | None:
    """A number that may be absent (None stays None)."""
    return None if v is None else _num(v, where)


def _int(v, where) -> int:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or v != int(v):
        raise RecipeError(where, f"must be a whole number, found {v!r}")
    return int(v)


def _obj(v, where) -> Mapping:
    if not isinstance(v, Mapping):
        raise RecipeError(where, "must be an object")
    return v


def _entries(d, key):
    """(name, field path, object) of every entry of the object ``d`` found under ``key``."""
    for name, v in _obj(d, key).items():
        w = f"{key}.{name}"
        yield name, w, _obj(v, w)


def _matrix(d, key):
    if d.get(key) is None:
        return None
    try:
        m = np.array([[np.nan if x is None else x for x in row] for row in d[key]], dtype=float)
    except (TypeError, ValueError):
        raise RecipeError(key, "must be a square table (list of lists) of numbers") from None
    if m.ndim != 2 or m.shape[0] != m.shape[1]:
        raise RecipeError(key, f"must be square, found shape {m.shape}")
    return m


def _params(d) -> dict:
    out = {}
    for name, p in _obj(d, "params").items():
        w = f"params.{name}"
        if not isinstance(p, Mapping) or "value" not in p:
            raise RecipeError(w, "must hold at least a value")
        expr = p.get("expr")
        out[name] = ParamResult(
            name, _num(p["value"], f"{w}.value"), _opt(p.get("stderr"), f"{w}.stderr"),
            _opt(p.get("init_value"), f"{w}.init_value"),
            _num(p.get("min"), f"{w}.min", missing=-math.inf),
            _num(p.get("max"), f"{w}.max", missing=math.inf),
            bool(p.get("vary", True)), str(p.get("unit", "")),
            None if expr is None else str(expr))
    return out


def _optical(d) -> dict:
    out = {}
    for layer, w, o in _entries(d, "optical"):
        owl = _floats(o.get("wavelength_nm"), f"{w}.wavelength_nm")
        out[layer] = OpticalConstants(
            str(o.get("layer", layer)), owl,
            *(_floats(o.get(k), f"{w}.{k}", size=owl.size) for k in ("n", "k", "alpha_cm")),
            *(_floats(o.get(k), f"{w}.{k}", size=owl.size, optional=True)
              for k in ("n_sigma", "k_sigma", "alpha_sigma")))
    return out


def _band_gap(gap) -> BandGap | None:
    if gap is None:
        return None
    gap = _obj(gap, "band_gap")
    try:
        return BandGap(_num(gap["Eg_eV"], "band_gap.Eg_eV"),
                       _num(gap.get("sigma_eV"), "band_gap.sigma_eV"), str(gap["transition"]),
                       tuple(_floats(gap["fit_range_eV"], "band_gap.fit_range_eV", size=2)),
                       _num(gap.get("r_squared"), "band_gap.r_squared"),
                       str(gap.get("layer", "")))
    except (KeyError, TypeError):
        raise RecipeError("band_gap", "must hold Eg_eV, transition and fit_range_eV") from None


def _alternatives(d) -> tuple:
    out = []
    for i, a in enumerate(d.get("alternatives") or ()):
        w = f"alternatives[{i}]"
        a = _obj(a, w)
        if not {"thickness_nm", "chisqr", "redchi"} <= set(a):
            raise RecipeError(w, "must hold thickness_nm, chisqr and redchi")
        out.append(Alternative(_num(a["thickness_nm"], f"{w}.thickness_nm"),
                               _num(a["chisqr"], f"{w}.chisqr"),
                               _num(a["redchi"], f"{w}.redchi"), str(a.get("note", ""))))
    return tuple(out)


def _diagnostics(d) -> Diagnostics | None:
    if d is None:
        return None
    d = _obj(d, "diagnostics")
    names = [f.name for f in fields(Diagnostics)]
    if set(d) != set(names):
        return None          # another version's record: not guessed at
    vals = {}
    for k in names:
        w = f"diagnostics.{k}"
        vals[k] = (str(d[k]) if k == "noise_source" else
                   _int(d[k], w) if k == "dof" else _num(d[k], w))
    return Diagnostics(**vals)


def _uncertainty(d) -> dict:
    out = {}
    for key, w, u in _entries(d, "uncertainty"):
        if not isinstance(u.get("items"), list) or "u_combined" not in u:
            raise RecipeError(w, "must hold items (the budget lines) and u_combined")
        items = []
        for i, it in enumerate(u["items"]):
            wi = f"{w}.items[{i}]"
            it = _obj(it, wi)
            items.append(BudgetItem(str(it.get("source", "")), _num(it.get("u"), f"{wi}.u"),
                                    str(it.get("note", ""))))
        out[key] = Uncertainty(str(u.get("quantity", key)), _num(u.get("value"), f"{w}.value"),
                               str(u.get("unit", "")), tuple(items),
                               _num(u["u_combined"], f"{w}.u_combined"),
                               _num(u.get("k", 2.0), f"{w}.k"))
    return out


def _kk(d) -> dict:
    out = {}
    for layer, w, c in _entries(d, "kk"):
        consistent = c.get("consistent")
        if consistent is not None and not isinstance(consistent, bool):
            raise RecipeError(f"{w}.consistent", f"must be true, false or null, found "
                                                 f"{consistent!r}")
        out[layer] = ConsistencyCheck(str(layer), consistent, str(c.get("message", "")),
                                      _opt(c.get("rms_dev"), f"{w}.rms_dev"),
                                      _opt(c.get("max_dev"), f"{w}.max_dev"))
    return out
