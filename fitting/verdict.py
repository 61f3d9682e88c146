"""An honest verdict on every fit: good, check or poor, with the reasons in plain words.

A fit that converged is not necessarily right. :func:`judge` looks at what a
careful analyst would look at before trusting a thickness:

* **misfit against the data's own noise** - the noise is estimated from the
  spectrum before any model (:func:`fitting.reference.estimate_noise`, 4th
  differences), so the reduced χ² says whether the model describes the data;
  a shaped misfit is told from noise by the Wald-Wolfowitz runs test of the
  residual signs [1]_ and the lag-1 autocorrelation (Durbin & Watson [2]_);
  where the misfit sits tells what to change (an absorption edge the model
  lacks, fringes it does not match);
* **parameters at a bound**, **strong correlations** of the thickness with
  another parameter, **other solutions** that fit almost as well, a 100 % line
  far outside its expected ±1 %;
* **the uncertainty** itself: an expanded uncertainty (GUM, k = 2) of the
  thickness above 5 % of it means the data do not fix it.

The thresholds are set on the project's validation set (spectra made with the
independent ``tmm`` package from published n, κ with ordinary instrument
errors, see ``validation/``) so that no grossly wrong result is called good;
a misfit smaller than the photometric accuracy of an ordinary
spectrophotometer (0.3 % T, common practice) alone does not make a fit
"check".

References
----------
.. [1] A. Wald and J. Wolfowitz, "On a test whether two samples are from the same
       population", Ann. Math. Stat. 11, 147 (1940).
.. [2] J. Durbin and G. S. Watson, "Testing for serial correlation in least squares
       regression I", Biometrika 37, 409 (1950).
.. [3] JCGM 100:2008, *Evaluation of measurement data - Guide to the expression of
       uncertainty in measurement* (GUM).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .autostart import PLAUSIBLE_N_MIN
from .labels import format_pm, param_label, two_digits
from .result import Diagnostics

__all__ = ["diagnose", "judge", "runs_test_z", "Reason", "PHOTOMETRIC_ACCURACY",
           "MAX_RELATIVE_U"]

#: Misfit (RMS, as a fraction of T or R) below which a model is as good as an ordinary
#: double-beam spectrophotometer can tell (±0.3 % T photometric accuracy, common practice).
PHOTOMETRIC_ACCURACY = 0.003
#: Misfit (RMS) at which the model plainly does not describe the data.
GROSS_MISFIT = 0.02
#: A misfit this large (over 3x an instrument's photometric accuracy) that is also
#: systematic (runs test z < SYSTEMATIC_RUNS_Z) is no instrument error either: the
#: film model cannot describe the film (common practice threshold).
GROSS_SYSTEMATIC_MISFIT = 0.01
#: Largest expanded uncertainty (k = 2) of a thickness, relative, for a "good" verdict.
MAX_RELATIVE_U = 0.05
#: |correlation| of a thickness with another parameter that means "not separable".
THICKNESS_CORRELATION = 0.98
#: A scale further than this from 1 (2.5σ of its ±1 % prior) is a baseline or model
#: problem, not an instrument tolerance.
SCALE_LIMIT = 0.025
#: A scale this far from 1 (7.5σ of its prior) is beyond any instrument's baseline:
#: the fit is hiding a model or substrate error in it (common practice threshold).
SCALE_POOR = 3 * SCALE_LIMIT
#: Runs-test z below which a misfit is systematic however small (chance: |z| < 4).
SYSTEMATIC_RUNS_Z = -8.0
#: A fitted thickness non-uniformity above this (rms, relative) is more than coatings
#: show over a spectrometer's spot: the fit is using it to hide a model error.
SPREAD_LIMIT = 0.05


@dataclass(frozen=True)
class Reason:
    """One reason for a verdict: how serious ("check" or "poor") and what to do."""

    level: str
    text: str


# -- residual statistics ---------------------------------------------------------------
def runs_test_z(residual: np.ndarray) -> float:
    """z-score of the number of sign runs of ``residual`` (Wald & Wolfowitz 1940).

    For independent residuals the number of runs R of n₊ positive and n₋
    negative signs has mean μ = 2n₊n₋/n + 1 and variance
    σ² = (μ - 1)(μ - 2)/(n - 1); z = (R - μ)/σ is about N(0, 1). A misfit with a
    shape makes long runs, so z is strongly negative.
    """
    r = np.asarray(residual, dtype=float)
    r = r[np.isfinite(r) & (r != 0)]
    n = r.size
    if n < 10:
        return 0.0
    pos = r > 0
    n1 = int(pos.sum())
    n2 = n - n1
    if n1 == 0 or n2 == 0:
        return -math.inf
    runs = 1 + int(np.count_nonzero(pos[1:] != pos[:-1]))
    mu = 2.0 * n1 * n2 / n + 1.0
    var = (mu - 1.0) * (mu - 2.0) / (n - 1.0)
    return float((runs - mu) / math.sqrt(var)) if var > 0 else 0.0


def _lag1(r: np.ndarray) -> float:
    r = r - r.mean()
    den = float(r @ r)
    return float(r[1:] @ r[:-1] / den) if den > 0 and r.size > 2 else 0.0


def _running_mean(r: np.ndarray, width: int = 9) -> np.ndarray:
    if r.size < width:
        return np.full(r.size, r.mean() if r.size else 0.0)
    c = np.convolve(r, np.ones(width) / width, mode="same")
    return c


def diagnose(residual, sigma, *, dof: int, redchi: float, noise_source: str) -> Diagnostics:
    """Misfit statistics of the used points (ordered by wavelength)."""
    r = np.asarray(residual, dtype=float)
    s = np.asarray(sigma, dtype=float)
    ok = np.isfinite(r) & np.isfinite(s)
    r, s = r[ok], s[ok]
    rms = float(np.sqrt(np.mean(r * r))) if r.size else math.nan
    return Diagnostics(noise_sigma=float(np.median(s)) if s.size else math.nan,
                       noise_source=noise_source, rms_residual=rms, redchi=float(redchi),
                       runs_z=runs_test_z(r), lag1=_lag1(r),
                       structured_rms=float(np.sqrt(np.mean(_running_mean(r) ** 2)))
                       if r.size else math.nan, dof=int(dof))


# -- the verdict -----------------------------------------------------------------------
def _shaped(d: Diagnostics) -> bool:
    """The misfit is clearly more than noise and has a shape."""
    return d.redchi > 2.0 and d.runs_z < -4.0


def _misfit_region(result) -> tuple[float, float] | None:
    """Wavelength span (nm) of the sixth of the used points with the largest misfit."""
    used = np.asarray(result.used, bool)
    wl = np.asarray(result.wavelength_nm)[used]
    r = np.asarray(result.residuals)[used]
    if wl.size < 30:
        return None
    sm = _running_mean(np.nan_to_num(r), 9) ** 2
    parts = np.array_split(np.arange(wl.size), 6)
    worst = max(parts, key=lambda ix: float(sm[ix].mean()))
    return float(wl[worst[0]]), float(wl[worst[-1]])


def _misfit_advice(result) -> str:
    """What to change, from where the misfit sits and what the model does there."""
    region = _misfit_region(result)
    used = np.asarray(result.used, bool)
    wl = np.asarray(result.wavelength_nm)[used]
    if region is None or wl.size == 0:
        return "check the model, the substrate and the fit range"
    lo, hi = region
    short_end = lo <= float(wl.min()) + 1e-9
    absorbs = False
    for oc in result.optical.values():
        sel = (oc.wavelength_nm >= lo) & (oc.wavelength_nm <= hi)
        if sel.any() and float(np.nanmax(oc.k[sel])) > 1e-3:
            absorbs = True
    y = np.asarray(result.measured)[used]
    low_T = float(np.nanmedian(y[(wl >= lo) & (wl <= hi)])) < 0.5 * float(np.nanmax(y))
    if short_end and not absorbs and low_T:
        return (f"the data fall off towards short wavelengths ({lo:.0f}-{hi:.0f} nm) but the "
                f"model has no absorption there: try a model with an absorption edge "
                f"(Cauchy + Urbach tail or Tauc-Lorentz), or fit from {hi:.0f} nm up")
    if short_end and absorbs:
        return (f"the misfit is largest at the short-wavelength end ({lo:.0f}-{hi:.0f} nm), "
                f"where the film absorbs: try a model with a different absorption edge "
                f"(Tauc-Lorentz), or start the fit range at {hi:.0f} nm")
    if short_end:
        return (f"the misfit is largest at the short-wavelength end ({lo:.0f}-{hi:.0f} nm): "
                f"the model's dispersion or a weak absorption edge there is not described; "
                f"try a model with an absorption edge (Cauchy + Urbach tail, Tauc-Lorentz) "
                f"or Sellmeier, or start the fit range at {hi:.0f} nm")
    return (f"the misfit is largest at {lo:.0f}-{hi:.0f} nm: check the substrate choice, the "
            f"film model and thickness non-uniformity, and whether the data there are "
            f"usable (detector change-over, stray light)")


def _extrema_in_range(result) -> int | None:
    """Quarter-wave extrema λ = 4nd/m (m = 1, 2, ...) of the first film inside the used range."""
    names = [k for k in result.params if k.endswith("_thickness") and result.params[k].vary]
    if not names or not result.optical:
        return None
    layer = names[0][: -len("_thickness")]
    oc = result.optical.get(layer)
    used = np.asarray(result.used, bool)
    if oc is None or not used.any():
        return None
    wl = np.asarray(result.wavelength_nm)[used]
    lo, hi = float(wl.min()), float(wl.max())
    nd = float(np.median(oc.n)) * result.params[names[0]].value
    # 4nd/m in [lo, hi]  <=>  4nd/hi <= m <= 4nd/lo
    return max(0, math.floor(4 * nd / lo) - max(math.ceil(4 * nd / hi), 1) + 1)


def _fmt_u(u) -> str:
    return format_pm(u.value, u.expanded, u.unit, fmt=".4g", sigma_fmt=two_digits)


def reasons(result) -> list[Reason]:
    """Every reason the result should not be called good, most serious first."""
    out: list[Reason] = []
    names = [layer.get("name", "") for layer in (result.stack or {}).get("layers", [])]
    label = lambda k: param_label(k, names)  # noqa: E731
    if result.aborted:
        out.append(Reason("poor", f"The fit was stopped before it finished ({result.message}); "
                                  f"the values are the best found so far. Fit again, with a "
                                  f"longer time limit if needed."))
    elif not result.success:
        out.append(Reason("check", f"The fit did not converge ({result.message}); fit again "
                                   f"from the result, or fix a parameter the data cannot "
                                   f"determine."))
    d = result.diagnostics
    if d is not None and math.isfinite(d.redchi) and _shaped(d):
        if d.rms_residual > GROSS_MISFIT or (d.rms_residual > GROSS_SYSTEMATIC_MISFIT
                                             and d.runs_z < SYSTEMATIC_RUNS_Z):
            out.append(Reason("poor", f"The model misses the data by {100 * d.rms_residual:.1f} % "
                                      f"RMS ({d.rms_residual / d.noise_sigma:.0f} times the "
                                      f"noise): {_misfit_advice(result)}."))
        elif d.rms_residual > PHOTOMETRIC_ACCURACY:
            out.append(Reason("check", f"The model misses the data by "
                                       f"{100 * d.rms_residual:.2f} % RMS, more than the noise "
                                       f"({100 * d.noise_sigma:.2f} %) and than an ordinary "
                                       f"instrument's accuracy: {_misfit_advice(result)}."))
    if d is not None and math.isfinite(d.redchi) and d.redchi > 1.5 \
            and d.runs_z < SYSTEMATIC_RUNS_Z and d.rms_residual <= PHOTOMETRIC_ACCURACY:
        # Small but far from chance: a film close to the substrate's index can sit in a
        # wrong basin with a misfit this small (the validation set's faint-fringe cases).
        out.append(Reason("check", f"The model misses the data by only "
                                   f"{100 * d.rms_residual:.2f} % RMS, but systematically "
                                   f"(runs test z = {d.runs_z:.0f}): with faint fringes another "
                                   f"thickness may fit better; {_misfit_advice(result)}."))
    for a in result.alternatives:
        extra = f" ({a.note})" if getattr(a, "note", "") else ""
        out.append(Reason("check", f"Another solution fits almost as well: thickness "
                                   f"{a.thickness_nm:.1f} nm{extra}, reduced χ² {a.redchi:.3g}. "
                                   f"The data cannot decide between them; a known index, a "
                                   f"wider wavelength range or a second sample with another "
                                   f"thickness can."))
    for p in result.params.values():
        # No non-uniformity at all is a legitimate answer, not a bound problem.
        if p.at_bound and not (p.name.endswith("thickness_spread")
                               and p.value - p.min <= p.max - p.value):
            side = "lower" if abs(p.value - p.min) <= abs(p.max - p.value) else "upper"
            level = "poor" if p.name.endswith("_thickness") else "check"
            out.append(Reason(level, f"{label(p.name)} ended at its {side} bound "
                                     f"({p.min if side == 'lower' else p.max:g} {p.unit}"
                                     .rstrip() + "): the best value may lie beyond it; widen "
                                     "the bound or change the model."))
    if result.correl is not None:
        vn = list(result.var_names)
        for i, a in enumerate(vn):
            u = result.uncertainty.get(a)
            # A correlation matters where it costs precision: a thickness known to
            # better than 1 % is fine however correlated with the index it is.
            if not a.endswith("_thickness") or (
                    u is not None and u.value > 0 and u.expanded <= 0.01 * u.value):
                continue
            for j, b in enumerate(vn):
                c = float(result.correl[i, j])
                if j != i and abs(c) > THICKNESS_CORRELATION and b not in ("scale", "tilt"):
                    out.append(Reason("check", f"{label(a)} and {label(b)} are hardly separable "
                                               f"(correlation {c:+.3f}): the data fix their "
                                               f"combination, not each; a thicker film, a "
                                               f"wider range or a known index helps."))
                    break
    for u in result.uncertainty.values():
        if u.quantity.endswith("_thickness") and u.value > 0 \
                and u.expanded > MAX_RELATIVE_U * u.value:
            out.append(Reason("check", f"{label(u.quantity)} = {_fmt_u(u)} (k = 2): the "
                                       f"uncertainty is more than "
                                       f"{100 * MAX_RELATIVE_U:.0f} % of the value."))
    few = _extrema_in_range(result)
    if few is not None and few < 2:
        what = "one interference extremum" if few else "no interference extremum"
        out.append(Reason("check", f"The film shows {what} in the fitted range: its "
                                   f"thickness and index are fixed "
                                   f"together by the T level, not separately by fringes, and a "
                                   f"small model or baseline error moves both. Fit with a "
                                   f"known index, or measure further into the UV or a thicker "
                                   f"film."))
    s = result.params.get("scale")
    if s is not None and s.vary and abs(s.value - 1) > SCALE_POOR:
        out.append(Reason("poor", f"The 100 % line scale came out at {s.value:.3f}: no "
                                  f"instrument's baseline is {100 * abs(s.value - 1):.0f} % "
                                  f"off, so the fit used it to hide a model or substrate "
                                  f"error. Check the baseline/reference measurement, the "
                                  f"substrate and the film model; do not use these values."))
    elif s is not None and s.vary and abs(s.value - 1) > SCALE_LIMIT:
        out.append(Reason("check", f"The 100 % line scale came out at {s.value:.3f}, far outside "
                                   f"the ±1 % an instrument's baseline allows: check the "
                                   f"baseline/reference measurement, the substrate and the "
                                   f"model."))
    sp = result.params.get("thickness_spread")
    if sp is not None and sp.vary and sp.value > SPREAD_LIMIT:
        out.append(Reason("check", f"The fit needed a thickness non-uniformity of "
                                   f"{100 * sp.value:.1f} % rms to match the fringe contrast, "
                                   f"more than coatings vary over a spectrometer's spot: the "
                                   f"model's absorption or dispersion is probably off; try "
                                   f"another model or a narrower range."))
    for name, oc in result.optical.items():
        vis = (oc.wavelength_nm >= 380) & (oc.wavelength_nm <= 780)
        n_vis = float(np.nanmedian(oc.n[vis])) if vis.any() else math.nan
        if 1.0 <= n_vis < PLAUSIBLE_N_MIN:
            out.append(Reason("check", f"{name}: n = {n_vis:.3f} in the visible is below any "
                                       f"dense film's (magnesium fluoride 1.38); such a "
                                       f"result is usually the mirror of a film of index "
                                       f"n_substrate/n. Fix n near its expected value and "
                                       f"fit again."))
        if vis.any() and np.nanmin(oc.n[vis]) < 1.0:
            out.append(Reason("check", f"{name}: n drops below 1 in the visible (min "
                                       f"{np.nanmin(oc.n[vis]):.3f}), which no ordinary film "
                                       f"does; check the model and the data."))
    order = {"poor": 0, "check": 1}
    return sorted(out, key=lambda r: order[r.level])


def judge(result) -> tuple[str, tuple[str, ...]]:
    """The verdict ("good", "check" or "poor") and its reasons for a FitResult."""
    rs = reasons(result)
    if any(r.level == "poor" for r in rs):
        return "poor", tuple(r.text for r in rs)
    if rs:
        return "check", tuple(r.text for r in rs)
    return "good", ()
