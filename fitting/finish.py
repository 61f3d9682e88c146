"""From the best point of a fit to a :class:`~fitting.result.FitResult`, in named steps.

:func:`finish` runs, in order,

1. :func:`choose` - the best polished start; a local fit whose end point lies
   within rounding of the best point seen is kept as the result (with its
   convergence status), never thrown away;
2. :func:`statistics` - residuals against the data's own noise, χ² (with the
   prior terms) and the degrees of freedom;
3. covariance and the GUM budget (:mod:`fitting.uncertainty`);
4. parameters, fitted curves, optical constants with 1σ bands, the
   Kramers-Kronig check, other solutions, the band gap;
5. warnings, misfit diagnostics and the verdict (:mod:`fitting.verdict`).

Each step is a small function of the objective and plain values, so each can
be tested alone (``tests/test_finish.py``).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from . import uncertainty, verdict
from .errors import PellucidError
from .labels import param_label
from .objective import DEFAULT_SIGMA, Objective, Part
from .result import (Alternative, ConsistencyCheck, FitResult, OpticalConstants,
                     ParamResult)
from .stack import StackModel
from .units import HC_EV_NM, alpha_per_cm

__all__ = ["finish", "choose", "statistics", "Choice", "Stats", "ALT_CHI2_RATIO",
           "scanned_film"]

#: Other basins are reported when their χ² is below this multiple of the best.
ALT_CHI2_RATIO = 1.5
#: ... and when their χ² is above the best by less than this (scaled by χ²_red).
_ALT_DELTA_CHI2 = 25.0
#: χ² differences below this are rounding (a Jacobian step of the minimiser can land
#: a hair below the point it converged to): Δχ² = 1 is one standard deviation.
_CHI2_ROUNDING = 1e-2
_NUISANCE_UNITS = {"scale": "", "tilt": "", "offset": "", "angle_deg": "deg",
                   "thickness_spread": ""}
#: Most points a Kramers-Kronig check looks at (it is O(N²); n and κ are smooth).
_KK_POINTS = 160


@dataclass
class Choice:
    """The point a result is made of, and whether a local fit converged there."""

    values: dict
    converged: bool
    message: str
    label: str
    index: int | None            # in the list of polished starts
    order: list                  # polished starts, best first


@dataclass
class Stats:
    """Residual statistics of a point, per part and in total."""

    parts: list                  # (part, local values, sigma used)
    chisqr: float                # data + prior terms
    dof: int
    redchi: float
    residual: np.ndarray         # used points of all parts, weighted order kept
    sigma: np.ndarray
    sigma_source: str
    model: list = dataclasses.field(default_factory=list)   # each part's curve, used points


def scanned_film(obj: Objective):
    """(lmfit name, layer index) of the first film whose thickness is fitted, or None."""
    part = obj.parts[0]
    gmap = dict((loc, g) for g, loc in part.names)
    for i, layer in enumerate(part.stack.layers):
        g = gmap[f"{layer.name}_thickness"]
        if g in obj.var_names:
            return g, i
    return None


def plain_message(success: bool, msg: str) -> str:
    """The minimiser's termination message in words a technician can read."""
    why = []
    if "ftol" in msg:
        why.append("χ² stopped improving")
    if "xtol" in msg:
        why.append("the parameters stopped changing")
    if "gtol" in msg:
        why.append("the gradient vanished")
    if success:
        return " and ".join(why) if why else msg.strip() or "minimum found"
    return "the local minimiser gave up: " + (msg.strip() or "no reason given")


# -- 1. the point ------------------------------------------------------------------------
def choose(obj: Objective, polished: list, start: dict, method: str) -> Choice:
    """The best polished start, or the best point seen if no local fit ran."""
    stopped = obj.stop_reason
    if not polished:
        values = dict(obj.best_values) if obj.best_values is not None else dict(start)
        why = stopped or ("the local polish after the global search did not finish"
                          if method in ("differential_evolution", "basinhopping")
                          else "no local fit finished")
        return Choice(values, False, why, "best point seen", None, [])
    order = sorted(range(len(polished)), key=lambda i: polished[i].chisqr)
    # A film index no dense film has yields to a plausible solution that fits
    # almost as well (see fitting.fit._mirror).
    if getattr(polished[order[0]], "implausible", False):
        c0 = polished[order[0]].chisqr
        rc = c0 / max(obj.ndata - len(obj.var_names), 1)
        for i in order[1:]:
            q = polished[i]
            if not getattr(q, "implausible", False) \
                    and (q.chisqr - c0) / max(rc, 1.0) < _ALT_DELTA_CHI2:
                order.remove(i)
                order.insert(0, i)
                break
    best = polished[order[0]]
    values = dict(best.values)
    lm = best.lm
    if lm is None:
        converged = False
        message = stopped or "no local fit finished"
    elif getattr(lm, "aborted", False):
        converged = False
        message = stopped or "the local fit was cut short by its evaluation cap"
    else:
        converged = bool(lm.success)
        message = plain_message(converged, str(getattr(lm, "message", "") or ""))
    # A local fit that ended is the result, even if a Jacobian step of it landed a
    # hair lower. Only a run cut short yields to a point seen that is better by more
    # than rounding.
    if not converged and obj.best_values is not None \
            and obj.best_chisqr < best.chisqr - _CHI2_ROUNDING \
            and all(obj.params[k].vary or obj.best_values[k] == values.get(k)
                    for k in obj.best_values if k in obj.params and not obj.params[k].expr):
        values = dict(obj.best_values)
    return Choice(values, converged, message, best.label, order[0], order)


# -- 2. statistics -----------------------------------------------------------------------
def statistics(obj: Objective, values: dict) -> Stats:
    """χ² of ``values`` against each part's σ (given, or the spectrum's own noise)."""
    parts, res, sig, model, chisqr = [], [], [], [], 0.0
    sources = set()
    for part in obj.parts:
        local = obj.local_values(part, values)
        with np.errstate(all="ignore"):
            m = part.evaluate(local)
            r = part.y - m
        model.append(m)
        chisqr += float(np.sum((r / part.sigma) ** 2))
        parts.append((part, local, part.sigma))
        res.append(r)
        sig.append(part.sigma)
        sources.add("given with the spectrum" if part.sigma_given else
                    "estimated from the spectrum itself before the fit (4th differences)")
    prior = obj.prior_residual(values)
    chisqr += float(prior @ prior)
    dof = max(obj.ndata + prior.size - len(obj.var_names), 1)
    sigma = np.concatenate(sig)
    src = "; ".join(sorted(sources)) + f", median {100 * float(np.median(sigma)):.3g} %"
    return Stats(parts, chisqr, dof, chisqr / dof, np.concatenate(res), sigma, src, model)


# -- 4. parameters, curves, optical constants -------------------------------------------
def _units(obj: Objective) -> dict:
    out = {}
    for part in obj.parts:
        lp = part.stack.parameters()
        for g, loc in part.names:
            out[g] = lp[loc].unit if loc in lp else _NUISANCE_UNITS.get(loc, "")
    return out


def _stderr(obj: Objective, values: dict, C) -> dict:
    """1σ of every varied parameter, and of tied ones through their ties."""
    if C is None:
        return {}
    names = list(obj.var_names)
    out = {k: float(math.sqrt(max(C[i, i], 0.0))) for i, k in enumerate(names)}
    tied = [k for k, p in obj.params.items() if p.expr]
    if tied:
        base = obj.tied_values(values)
        G = np.zeros((len(tied), len(names)))
        for j, k in enumerate(names):
            h = 1e-6 * max(abs(values[k]), 1e-3)
            moved = obj.tied_values({**values, k: values[k] + h})
            for i, t in enumerate(tied):
                G[i, j] = (moved[t] - base[t]) / h
        for i, t in enumerate(tied):
            out[t] = float(math.sqrt(max(G[i] @ C @ G[i], 0.0)))
    return out


def _params(obj: Objective, values: dict, start: dict, stderr: dict) -> dict:
    units = _units(obj)
    out = {}
    for k, p in obj.params.items():
        out[k] = ParamResult(k, float(values[k]), stderr.get(k), float(start.get(k, values[k])),
                             float(p.min), float(p.max), bool(p.vary and not p.expr),
                             units.get(k, ""), p.expr)
    return out


def _curves(part: Part, local: dict, sigma_used: np.ndarray, model_used=None) -> dict:
    """Fitted curve on every point of the fit range (NaN where the model is undefined).

    ``model_used`` is the curve on the used points at the same values, from
    :func:`statistics`; then only the unused points of the range (masked windows,
    dropped rows) are computed here.
    """
    sp = part.spectrum
    wl = sp.wavelength_nm
    fit = np.full(wl.shape, np.nan)
    covered = part.in_range.copy()            # where the curve is given
    done = np.zeros_like(covered)
    # The used points' curve comes from statistics(); only the rest of the range
    # (masked windows, dropped rows) is computed here.
    if model_used is not None:
        fit[part.used] = model_used
        done = part.used
    todo = covered & ~done
    if todo.any():
        try:
            sm = StackModel(part.stack, wl[todo], angle_deg=part.angle_deg,
                            polarization=part.polarization)
        except PellucidError:                 # undefined off the used points: NaN there
            covered = part.used.copy()
            todo, sm = covered & ~done, part.model
        if todo.any():
            with np.errstate(all="ignore"):
                fit[todo] = part.evaluate(local, sm)
    sigma = np.full(wl.shape, np.nan)
    if part.sigma_given:
        sigma = np.where(np.isfinite(sp.sigma), sp.sigma, np.nan)
    else:
        sigma[covered] = float(np.median(sigma_used)) if sigma_used.size else DEFAULT_SIGMA
    sigma[part.used] = sigma_used
    return {"wl": wl, "y": sp.values, "fit": fit, "sigma": sigma, "used": part.used.copy()}


def _optical(part: Part, layer, local: dict, gmap: dict, covar, cov_index) -> OpticalConstants:
    """n, κ, α of one layer on the data grid with 1σ bands from the covariance."""
    wl = part.spectrum.wavelength_nm[part.in_range]
    mat = layer.material
    pre = layer.name + "_"
    lv = {k: local[pre + k] for k in mat.params}
    with np.errstate(all="ignore"):
        N = mat.N_unchecked(wl, lv)
    n_sig = k_sig = a_sig = None
    cols = [(k, cov_index[gmap[pre + k]]) for k in mat.params if gmap[pre + k] in cov_index]
    if covar is not None and cols:
        J = np.empty((wl.size, len(cols)), dtype=complex)
        for j, (k, _) in enumerate(cols):
            p = mat.params[k]
            x = lv[k]
            h = 1e-6 * max(abs(x), 1e-3)
            if x + h > p.max:      # step inwards at an upper bound
                h = -h
            with np.errstate(all="ignore"):
                try:
                    J[:, j] = (mat.N_unchecked(wl, {**lv, k: x + h}) - N) / h
                except PellucidError:
                    J[:, j] = (N - mat.N_unchecked(wl, {**lv, k: x - h})) / h
        idx = [i for _, i in cols]
        C = covar[np.ix_(idx, idx)]
        var_n = np.einsum("ij,jk,ik->i", J.real, C, J.real)
        var_k = np.einsum("ij,jk,ik->i", J.imag, C, J.imag)
        n_sig = np.sqrt(np.maximum(var_n, 0.0))
        k_sig = np.sqrt(np.maximum(var_k, 0.0))
        a_sig = alpha_per_cm(k_sig, wl)
    k = np.maximum(N.imag, 0.0)
    return OpticalConstants(layer.name, wl, N.real, k, alpha_per_cm(k, wl), n_sig, k_sig, a_sig)


def optical_constants(obj: Objective, stats: Stats, values: dict, C) -> tuple[dict, list]:
    """n, κ, α of every layer (each material once), and the layers that could not be computed."""
    cov_index = {k: i for i, k in enumerate(obj.var_names)}
    optical, errors = {}, []
    for part, local, _ in stats.parts:
        gmap = dict((loc, g) for g, loc in part.names)
        for layer in part.stack.layers:
            gnames = [gmap[f"{layer.name}_{k}"] for k in layer.material.params]
            key = layer.name
            if part.index > 0:
                g0 = dict((loc, g) for g, loc in obj.parts[0].names)
                same = [g0.get(f"{layer.name}_{k}") for k in layer.material.params]
                if all(g == h or (h is not None and values[g] == values[h])
                       for g, h in zip(gnames, same)):
                    continue          # the same material as in the first part
                key = f"p{part.index + 1}_{layer.name}"
            try:
                optical[key] = _optical(part, layer, local, gmap, C, cov_index)
            except PellucidError as e:   # a model undefined at the fitted values
                errors.append(f"n and κ of {key} could not be computed at the fitted values: "
                              f"{e}")
    return optical, errors


def kk_checks(optical: dict) -> dict:
    """Kramers-Kronig consistency of each fitted layer's n, κ (see fitting.kramers_kronig).

    The check is O(N²) in the points while n and κ of a model are smooth, so
    it runs on at most 160 points, evenly spread in photon energy.
    """
    from .kramers_kronig import kk_consistency
    out = {}
    for key, oc in optical.items():
        wl, n, k = oc.wavelength_nm, oc.n, oc.k
        if wl.size < 10:
            continue
        if wl.size > _KK_POINTS:
            E = HC_EV_NM / wl
            Eg = np.linspace(E.min(), E.max(), _KK_POINTS)
            idx = np.unique(np.clip(np.searchsorted(-E, -Eg), 0, wl.size - 1))
            wl, n, k = wl[idx], n[idx], k[idx]
        try:
            chk = kk_consistency(wl, n, k)
        except (PellucidError, ValueError) as e:
            out[key] = ConsistencyCheck(key, None, f"not checked: {e}")
            continue
        out[key] = ConsistencyCheck(key, bool(chk.consistent), chk.message,
                                    float(chk.rms_dev), float(chk.max_dev))
    return out


def alternatives(obj: Objective, polished: list, choice: Choice, stats: Stats,
                 stderr: dict) -> list:
    """Other polished basins that fit almost as well, at distinct thicknesses.

    "Almost as well": χ² above the best by less than 25 (a 5σ difference for
    one parameter), after dividing by the best χ²_red when the model leaves a
    misfit (Birge 1932), or by less than ``ALT_CHI2_RATIO`` of it when that is
    the smaller.
    """
    found = scanned_film(obj)
    if found is None or choice.index is None:
        return []
    tname = found[0]
    best = polished[choice.index]
    d_best = choice.values[tname]
    tol = max(0.005 * abs(d_best), 2 * (stderr.get(tname) or 0.0), 1.0)
    seen = [d_best]
    out = []
    f = stats.chisqr / best.chisqr if best.chisqr > 0 else 1.0
    for i in choice.order[1:]:
        q = polished[i]
        d = q.values[tname]
        close = (q.chisqr - best.chisqr) / max(stats.redchi, 1.0) < _ALT_DELTA_CHI2
        if close and q.chisqr < ALT_CHI2_RATIO * best.chisqr \
                and all(abs(d - s) > tol for s in seen):
            out.append(Alternative(float(d), float(q.chisqr * f),
                                   float(q.chisqr * f / stats.dof), getattr(q, "note", "")))
            seen.append(d)
    return out


def band_gap(optical: dict, transition: str):
    """Tauc gap of the first absorbing film, or (None, warning)."""
    from .bandgap import tauc_gap
    for name, oc in optical.items():
        if np.nanmax(oc.k) > 1e-5:
            try:
                g = tauc_gap(oc.wavelength_nm, oc.alpha_cm, transition=transition, layer=name)
            except PellucidError as e:
                return None, f"band gap of {name} not computed: {e}"
            # A straight part that ends at the short-wavelength end of the data may
            # continue beyond it: the gap is then less certain than its σ says.
            E_max = float(HC_EV_NM / np.min(oc.wavelength_nm))
            if g.fit_range_eV[1] >= E_max - 0.02:
                return g, (f"the Tauc line of {name} reaches the short-wavelength end of the "
                           f"data ({E_max:.2f} eV): the band gap {g.Eg_eV:.2f} eV may be off by "
                           f"more than its σ; measure or fit further into the UV to confirm it")
            return g, None
    return None, ("band gap not computed: no film absorbs in the fitted range "
                  "(κ is zero everywhere)")


# -- 5. warnings -------------------------------------------------------------------------
def warnings(result_params, var_names, correl, covar, values, layer_names, kk: dict,
             optical_errors, stopped: bool) -> list[str]:
    """Plain-language warnings (the verdict's reasons are listed separately)."""
    label = lambda k: param_label(k, layer_names)  # noqa: E731
    w = []
    if covar is None and var_names:
        w.append("Uncertainties could not be estimated: " + (
            "the fit ended early, away from a minimum." if stopped else
            "the parameters are not all determined by the data (fix one of a strongly "
            "correlated pair)."))
    if correl is not None:
        n = len(var_names)
        pairs = sorted(((correl[i, j], var_names[i], var_names[j]) for i in range(n)
                        for j in range(i + 1, n) if abs(correl[i, j]) > 0.95),
                       key=lambda t: -abs(t[0]))
        if pairs:
            listed = ", ".join(f"{label(a)} and {label(b)} ({c:+.3f})" for c, a, b in pairs)
            w.append(f"Strongly correlated (|c| > 0.95): {listed}. The data hardly separate "
                     f"them, so their error bars are large; consider fixing one of a pair "
                     f"or fitting a wider wavelength range.")
    for k, v in values.items():
        if k.endswith("_B") and k in result_params and result_params[k].vary and v < 0:
            w.append(f"{label(k)} = {v:.4g} is negative: a Cauchy film with normal dispersion "
                     f"has B > 0; the index is probably compensating for something else.")
    for c in kk.values():
        if c.consistent is False:
            w.append(f"{c.layer}: n and κ are not a Kramers-Kronig pair ({c.message}); the "
                     f"model's n and κ do not belong together; an oscillator model "
                     f"(Tauc-Lorentz, Lorentz) is consistent by construction.")
    w.extend(optical_errors)
    return w


def _standard_notes(optical: dict, layer_names) -> list[str]:
    """Standard wavelengths (550, 633, 1000 nm) outside the fitted range, said once."""
    from .recipe import STANDARD_WAVELENGTHS_NM
    notes = []
    for name, oc in optical.items():
        wl = oc.wavelength_nm
        if wl.size == 0:
            continue
        out = [w for w in STANDARD_WAVELENGTHS_NM if not wl[0] <= w <= wl[-1]]
        if out:
            notes.append(f"{name}: n and κ at {', '.join(f'{w:g}' for w in out)} nm are not "
                         f"reported: outside the fitted range {wl[0]:.0f}-{wl[-1]:.0f} nm "
                         f"(the model is not extrapolated)")
        break
    return notes


# -- all of it ---------------------------------------------------------------------------
def finish(obj: Objective, options, start: dict, polished: list, info: dict) -> FitResult:
    """Turn the best polished point into a FitResult (statistics, bands, verdict)."""
    choice = choose(obj, polished, start, options.method)
    values = obj.tied_values(choice.values)
    stats = statistics(obj, values)
    names = list(obj.var_names)
    C = None
    inflation = 1.0
    J = None
    if names and not obj.stop_reason:     # no covariance away from a minimum
        try:
            _, J = uncertainty.jacobian(obj, values, names)
            C, inflation = uncertainty.covariance(J, stats.redchi)
        except PellucidError:
            C = None
    correl = None
    if C is not None:
        sd = np.sqrt(np.maximum(np.diag(C), 1e-300))
        correl = C / np.outer(sd, sd)
    stderr = _stderr(obj, values, C)
    params = _params(obj, values, start, stderr)

    # The fitted values go into each part's stack, then curves and optical constants.
    for part, local, _ in stats.parts:
        part.stack.set_values(local)
        if "thickness_spread" in local:
            part.stack.thickness_spread = float(local["thickness_spread"])
    models = stats.model or [None] * len(stats.parts)
    curves = [_curves(part, local, sigma, m)
              for (part, local, sigma), m in zip(stats.parts, models)]
    optical, optical_errors = optical_constants(obj, stats, values, C)
    kk = kk_checks(optical)
    alts = alternatives(obj, polished, choice, stats, stderr)
    bg, bg_warn = (band_gap(optical, options.band_gap) if options.band_gap else (None, None))
    budget = {}
    if J is not None and C is not None:
        try:
            budget = uncertainty.budget(obj, values, J, C, inflation, options)
        except PellucidError:
            budget = {}

    layer_names = [layer.name for layer in obj.parts[0].stack.layers]
    warns = warnings(params, tuple(names), correl, C, values, layer_names, kk,
                     optical_errors, bool(obj.stop_reason))
    if bg_warn:
        warns.append(bg_warn)
    warns.extend(_standard_notes(optical, layer_names))
    success = choice.converged and not obj.stop_reason
    aborted = bool(obj.stop_reason)
    message = obj.stop_reason if aborted else choice.message
    part0, c0 = obj.parts[0], curves[0]
    diag = verdict.diagnose(stats.residual, stats.sigma, dof=stats.dof, redchi=stats.redchi,
                            noise_source=stats.sigma_source)
    sp = part0.spectrum
    extra = {**info, "starts": [{"label": q.label, "chisqr": q.chisqr} for q in polished]}
    if len(obj.parts) > 1:
        extra["parts"] = [{"name": p.spectrum.name, "quantity": p.quantity,
                           "wavelength_nm": c["wl"].tolist(), "measured": c["y"].tolist(),
                           "fitted": c["fit"].tolist(), "used": c["used"].tolist(),
                           "stack": p.stack.to_dict()} for p, c in zip(obj.parts, curves)]
    result = FitResult(
        success=success, aborted=aborted, message=message, params=params,
        var_names=tuple(names), covar=C, correl=correl, chisqr=float(stats.chisqr),
        redchi=float(stats.redchi), ndata=int(obj.ndata), nvarys=len(names),
        nfev=int(obj.nfev), elapsed_s=float(obj.elapsed), wavelength_nm=c0["wl"],
        measured=c0["y"], fitted=c0["fit"], residuals=c0["y"] - c0["fit"], sigma=c0["sigma"],
        used=c0["used"], quantity=part0.quantity, optical=optical, alternatives=tuple(alts),
        band_gap=bg, warnings=tuple(warns), stack=part0.stack.to_dict(),
        method=options.method if len(obj.parts) == 1 else f"joint {options.method}",
        spectrum={"name": sp.name, "source": sp.source, "sha256": sp.sha256}, extra=extra,
        diagnostics=diag, uncertainty=budget, kk=kk, sigma_source=stats.sigma_source)
    status, reasons = verdict.judge(result)
    return dataclasses.replace(result, verdict=status, verdict_reasons=reasons)
