"""The fit engine: thickness and optical constants of films from measured spectra.

:func:`fit_spectrum` fits one spectrum with one stack, :func:`fit_joint` several
spectra at once (T and R of one sample, or films of several thicknesses of one
material) with chosen parameters shared. Both return a
:class:`~fitting.result.FitResult` and never raise for a fit that merely fails
to converge; they raise :class:`~fitting.errors.FitError` only for a setup that
cannot be fitted at all. :func:`iter_fit` is the generator form for worker
threads: it yields :class:`~fitting.result.FitProgress` between stages and the
result last.

The default method ``"auto"`` is

1. a fringe seed and a scan over the first film's thickness
   (:mod:`fitting.autostart`), which finds the interference order;
2. a staged, bounded local least-squares polish (trust-region reflective,
   numerical 2-point Jacobian) from the best few basins and the seed: first
   on the transparent fringe region (its long-wavelength third and half
   first when there are many fringes), with the film's absorption edge held;
   a basin far worse than the best (χ² ratio > 3) is dropped after each
   stage; then all varied parameters on all points;
3. the best basin wins; others within a χ² ratio of 1.5 are reported as
   alternatives (and warned about).

If the spectrum carries no σ, the points are weighted equally and σ is
estimated afterwards from the residuals (1.4826·MAD), which rescales χ² but
not the fitted values or the (reduced-χ²-scaled) covariance.

Uncertainties are the usual linearised ones: C = (JᵀWJ)⁻¹ scaled by the reduced
χ², and 1σ bands of n, κ and α propagate C through the numerical Jacobian of
the dispersion model, diag(J_n C J_nᵀ).

References
----------
.. [1] M. A. Branch, T. F. Coleman and Y. Li, "A subspace, interior, and conjugate
       gradient method for large-scale bound-constrained minimization problems",
       SIAM J. Sci. Comput. 21, 1 (1999) (scipy's ``least_squares`` 'trf').
.. [2] M. Newville et al., "LMFIT: Non-linear least-square minimization and
       curve-fitting for Python", Zenodo (2014). :DOI:`10.5281/zenodo.11813`
.. [3] W. H. Press et al., *Numerical Recipes*, 3rd ed., Cambridge (2007),
       sec. 15.5-15.6 (covariance of fitted parameters, error propagation).
.. [4] R. Swanepoel, J. Phys. E 16, 1214 (1983) (envelope seed).
"""

from __future__ import annotations

import dataclasses
import math
import threading
import time
from dataclasses import asdict, dataclass, fields
from typing import Iterator, Mapping

import numpy as np

from . import autostart
from .errors import FitError, PellucidError, RecipeError
from .objective import DEFAULT_SIGMA, Objective, Part, _Stop, build_part, robust_sigma
from .result import (Alternative, FitProgress, FitResult, OpticalConstants,
                     ParamResult)
from .stack import POLARIZATIONS, Stack, StackModel
from .units import HC_EV_NM, alpha_per_cm

__all__ = ["FitOptions", "fit_spectrum", "fit_joint", "iter_fit", "iter_fit_joint",
           "FitResult", "FitProgress", "METHODS"]

METHODS = ("auto", "leastsq", "least_squares", "differential_evolution", "basinhopping")
#: Other basins are reported when their χ² is below this multiple of the best.
ALT_CHI2_RATIO = 1.5
#: How many scan basins the automatic start polishes.
N_POLISH = 3
_NUISANCE_UNITS = {"scale": "", "offset": "", "angle_deg": "deg", "thickness_spread": ""}


@dataclass(frozen=True)
class FitOptions:
    """How to fit: method, data selection, geometry, nuisance terms and limits.

    Parameters
    ----------
    method : {"auto", "leastsq", "least_squares", "differential_evolution", "basinhopping"}
        "auto": fringe seed, thickness scan and local polish (the default).
        "leastsq" (Levenberg-Marquardt) and "least_squares" (trust-region
        reflective) are local fits from the stack's values. The two global
        methods of lmfit need finite bounds (differential evolution) and end
        with a local polish.
    fit_range_nm : (float, float) or None
        Only points inside this wavelength range are fitted.
    mask_windows_nm : tuple of (float, float)
        Windows excluded from the fit (detector changeover, lamp lines ...).
    angle_deg, polarization : float, {"s", "p", "u"}
        Geometry of the measurement.
    fit_scale, fit_offset : bool
        Fit a 100 % line scale and a baseline offset (parameters "scale", "offset").
    fit_angle, fit_spread : bool
        Fit the incidence angle ("angle_deg") and the thickness non-uniformity
        ("thickness_spread").
    thickness_range_nm : (float, float) or None
        Range of the thickness scan; default from the fringes and the bounds.
    max_nfev : int
        Budget of model evaluations of the whole fit.
    time_limit_s : float
        Wall-clock limit of the whole fit.
    band_gap : {None, "direct", "indirect"}
        Tauc band gap of the first absorbing film.
    """

    method: str = "auto"
    fit_range_nm: tuple[float, float] | None = None
    mask_windows_nm: tuple[tuple[float, float], ...] = ()
    angle_deg: float = 0.0
    polarization: str = "u"
    fit_scale: bool = False
    fit_offset: bool = False
    fit_angle: bool = False
    fit_spread: bool = False
    thickness_range_nm: tuple[float, float] | None = None
    max_nfev: int = 20000
    time_limit_s: float = 60.0
    band_gap: str | None = None

    def __post_init__(self):
        def fail(name, why):
            raise FitError(f"fit option {name!r} = {getattr(self, name)!r}: {why}")

        if self.method not in METHODS:
            fail("method", f"choose one of {', '.join(METHODS)}")
        for name in ("fit_range_nm", "thickness_range_nm"):
            v = getattr(self, name)
            if v is not None:
                try:
                    lo, hi = (float(x) for x in v)
                except (TypeError, ValueError):
                    fail(name, "must be a pair of numbers (start, stop)")
                if not (math.isfinite(lo) and math.isfinite(hi)) or not 0 <= lo < hi:
                    fail(name, "needs 0 <= start < stop")
                object.__setattr__(self, name, (lo, hi))
        try:
            wins = tuple((float(a), float(b)) for a, b in self.mask_windows_nm)
        except (TypeError, ValueError):
            fail("mask_windows_nm", "must be a list of (start, stop) pairs")
        if any(not a < b for a, b in wins):
            fail("mask_windows_nm", "each window needs start < stop")
        object.__setattr__(self, "mask_windows_nm", wins)
        if not (isinstance(self.angle_deg, (int, float)) and 0 <= self.angle_deg < 90):
            fail("angle_deg", "angle of incidence must be in [0, 90) degrees")
        if self.polarization not in POLARIZATIONS:
            fail("polarization", "must be 's', 'p' or 'u' (unpolarised)")
        if not (isinstance(self.max_nfev, int) and self.max_nfev >= 10):
            fail("max_nfev", "must be an integer >= 10")
        if not (isinstance(self.time_limit_s, (int, float)) and self.time_limit_s > 0):
            fail("time_limit_s", "must be a positive number of seconds")
        if self.band_gap not in (None, "direct", "indirect"):
            fail("band_gap", "must be None, 'direct' or 'indirect'")

    def to_dict(self) -> dict:
        d = asdict(self)
        for k in ("fit_range_nm", "thickness_range_nm"):
            if d[k] is not None:
                d[k] = list(d[k])
        d["mask_windows_nm"] = [list(w) for w in self.mask_windows_nm]
        return d

    @classmethod
    def from_dict(cls, d: Mapping, *, where: str = "fit") -> "FitOptions":
        """Rebuild from :meth:`to_dict`; refuses unknown keys with :class:`RecipeError`."""
        if not isinstance(d, Mapping):
            raise RecipeError(where, "must be an object of fit options")
        known = {f.name for f in fields(cls)}
        extra = sorted(set(d) - known)
        if extra:
            raise RecipeError(f"{where}.{extra[0]}", f"unknown fit option; known: "
                                                     f"{', '.join(sorted(known))}")
        kw = dict(d)
        for k in ("fit_range_nm", "thickness_range_nm"):
            if kw.get(k) is not None:
                kw[k] = tuple(kw[k])
        if "mask_windows_nm" in kw:
            kw["mask_windows_nm"] = tuple(tuple(w) for w in kw["mask_windows_nm"] or ())
        try:
            return cls(**kw)
        except FitError as e:
            name = str(e).split("'")[1] if "'" in str(e) else where
            raise RecipeError(f"{where}.{name}", str(e)) from None
        except TypeError as e:
            raise RecipeError(where, str(e)) from None


# ----------------------------------------------------------------------------------------
def fit_spectrum(spectrum, stack: Stack, options: FitOptions | None = None, *, progress=None,
                 stop: threading.Event | None = None) -> FitResult:
    """Fit one measured spectrum with a layer stack.

    Parameters
    ----------
    spectrum : Spectrum
        Measured T or R (fractions); its ``sigma`` weights the points if given,
        else a constant σ is estimated from the fit residuals.
    stack : Stack
        The model; parameters with ``vary=True`` are fitted, ``expr`` ties are
        honoured. The stack is not modified.
    options : FitOptions, optional
    progress : callable(FitProgress), optional
        Called from the fitting thread, at most every 50 ms and at stage changes.
    stop : threading.Event, optional
        Set it from another thread to end the fit early (``aborted=True``).

    Returns
    -------
    FitResult

    Raises
    ------
    FitError
        No usable data points, no free parameter, or a stack that cannot be
        evaluated on the data's wavelengths.

    Examples
    --------
    >>> from fitting.dispersion import Cauchy
    >>> from fitting.stack import Layer, Stack
    >>> from fitting.substrates import library_substrate
    >>> from fitting.spectrum import Spectrum
    >>> st = Stack([Layer("film", Cauchy(2.0, 0.02), 800.0)], library_substrate("fused_silica"))
    >>> wl = np.linspace(400, 1000, 300)
    >>> res = fit_spectrum(Spectrum(wl, st.transmittance(wl)), st)
    >>> round(res.thickness()[0])
    800
    """
    result = None
    for item in iter_fit(spectrum, stack, options, progress=progress, stop=stop):
        result = item
    return result


def iter_fit(spectrum, stack: Stack, options: FitOptions | None = None, *, progress=None,
             stop: threading.Event | None = None) -> Iterator:
    """Generator form of :func:`fit_spectrum`: yields FitProgress per stage, then the FitResult."""
    options = options or FitOptions()
    parts = [build_part(0, spectrum, stack, options)]
    obj = Objective(parts, options, progress=progress, stop=stop)
    yield from _run(obj, options)


def fit_joint(spectra, stacks, shared, options: FitOptions | None = None, *, progress=None,
              stop: threading.Event | None = None) -> FitResult:
    """Fit several spectra at once with some parameters shared.

    Parameters
    ----------
    spectra : list of Spectrum
        E.g. T and R of one sample, or T of films of one material with
        different thicknesses.
    stacks : list of Stack
        One per spectrum (the same object may be passed twice).
    shared : list of str
        Global parameter names (``film_A``, ``film_thickness``, ``scale`` ...)
        that take one value for all spectra; every other parameter is fitted
        per spectrum and named with a prefix ``p1_``, ``p2_`` ...
    options, progress, stop
        As for :func:`fit_spectrum`.

    Returns
    -------
    FitResult
        The curves of the first spectrum at the top level; every spectrum's
        curves in ``extra["parts"]``.
    """
    result = None
    for item in iter_fit_joint(spectra, stacks, shared, options, progress=progress, stop=stop):
        result = item
    return result


def iter_fit_joint(spectra, stacks, shared, options=None, *, progress=None, stop=None):
    """Generator form of :func:`fit_joint`."""
    options = options or FitOptions()
    spectra, stacks = list(spectra), list(stacks)
    if not spectra:
        raise FitError("a joint fit needs at least one spectrum")
    if len(spectra) != len(stacks):
        raise FitError(f"a joint fit needs one stack per spectrum: got {len(spectra)} spectra "
                       f"and {len(stacks)} stacks")
    shared = set(shared)
    known = set().union(*(set(s.parameters()) for s in stacks)) | {
        "scale", "offset", "angle_deg", "thickness_spread"}
    unknown = sorted(shared - known)
    if unknown:
        raise FitError(f"shared parameter {unknown[0]!r} is in none of the stacks; known: "
                       f"{', '.join(sorted(known))}")
    parts = [build_part(i, sp, st, options) for i, (sp, st) in enumerate(zip(spectra, stacks))]
    obj = Objective(parts, options, shared=shared, progress=progress, stop=stop)
    yield from _run(obj, options)


# ----------------------------------------------------------------------------------------
@dataclass
class _Polished:
    values: dict
    chisqr: float
    lm: object | None            # lmfit MinimizerResult
    label: str


def _run(obj: Objective, options: FitOptions):
    """The stages of a fit; yields FitProgress and finally the FitResult."""
    method = options.method
    start = obj.params.valuesdict()
    info: dict = {}
    polished: list[_Polished] = []
    fallback: list = []          # best (label, values) of the fringe stages so far
    times: dict = {}             # wall time of each stage, s (for the benchmark)
    info["stage_times_s"] = times
    try:
        obj.set_stage("start", 0.0, 0.05, message="preparing")
        obj.check()
        if method == "auto":
            starts, plan = _auto_starts(obj, options, start, info)
            times["seed_and_scan"] = obj.elapsed
            yield FitProgress("scan", 0.3, obj.nfev, obj.best_chisqr,
                              f"{len(starts)} start(s) from the thickness scan")
            if plan is not None:
                starts = _fringe_stages(obj, starts, plan, info, fallback)
            times["fringe_stages"] = obj.elapsed - sum(times.values())
            for i, (label, values) in enumerate(starts):
                lo = 0.55 + 0.4 * i / len(starts)
                obj.set_stage("polish", lo, lo + 0.4 / len(starts), 60 * len(obj.var_names),
                              f"polishing {label}")
                polished.append(_polish(obj, values, label))
                yield FitProgress("polish", lo + 0.4 / len(starts), obj.nfev, obj.best_chisqr,
                                  f"polished {label}")
                obj.check()
        elif method in ("leastsq", "least_squares"):
            obj.set_stage("polish", 0.05, 0.95, 60 * len(obj.var_names), method)
            polished.append(_polish(obj, start, "start values", method=method))
        else:
            polished.append(_global(obj, options, start))
            yield FitProgress("polish", 0.8, obj.nfev, obj.best_chisqr, f"{method} done")
            obj.check()
            obj.set_stage("polish", 0.8, 0.95, 60 * len(obj.var_names), "local polish")
            polished.append(_polish(obj, polished[-1].values, f"{method} + polish"))
    except _Stop:
        if not polished and fallback:
            # Stopped during the fringe stages: their best point beats the start.
            label, values = fallback[0]
            polished.append(_Polished(values, obj.chisqr_of(values), None, label))
    times["polish"] = obj.elapsed - sum(times.values())
    result = _finish(obj, options, start, polished, info)
    if obj.progress_cb is not None:
        obj.progress_cb(FitProgress("done", 1.0, obj.nfev, result.chisqr, result.message))
    yield result


def _fringe_stages(obj: Objective, starts, plan: dict, info: dict, fallback: list):
    """Polish every start on the fringe region(s) with the absorption edge held.

    Each stage runs for every surviving start; one whose χ² is more than 3 times
    the best after a stage is dropped (common practice: a wrong order never
    recovers). A right basin converges in a few Jacobians, so each run is capped
    at 10 (P + 1) evaluations. Returns the surviving (label, values), best first.
    """
    pool = [(math.inf, label, values) for label, values in starts]
    n_st = len(plan["stages"])
    cap = 10 * (len(obj.var_names) + 1)
    for j, masks in enumerate(plan["stages"]):
        done = []
        for i, (_, label, values) in enumerate(pool):
            lo = 0.3 + 0.25 * (j + i / len(pool)) / n_st
            obj.set_stage("polish", lo, lo + 0.25 / (n_st * len(pool)), cap,
                          f"fringe fit of {label}")
            res = obj.minimize("least_squares", values, fixed=plan["fixed"], masks=masks,
                               x_scale="jac", max_nfev=cap)
            done.append((float(res.chisqr), label, res.params.valuesdict()))
            best = min(done, key=lambda t: t[0])
            fallback[:] = [(best[1], best[2])]
            obj.check()
        best_a = min(c for c, *_ in done)
        pool = sorted((t for t in done if t[0] <= 3.0 * best_a), key=lambda t: t[0])
        info.setdefault("stage_a", []).append(
            [{"label": label, "chisqr": c} for c, label, _ in done])
    return [(label, v) for _, label, v in pool]


def _polish(obj: Objective, values: dict, label: str, method: str = "least_squares"):
    kws = {"x_scale": "jac"} if method == "least_squares" else {}
    res = obj.minimize(method, values, **kws)
    vals = res.params.valuesdict()
    chi2 = obj.chisqr_of(vals)
    if res.aborted and obj.best_values is not None and obj.best_chisqr < chi2:
        vals, chi2 = dict(obj.best_values), obj.best_chisqr
    return _Polished(vals, chi2, res, label)


def _global(obj: Objective, options: FitOptions, start: dict) -> _Polished:
    method = options.method
    obj.set_stage("scan", 0.05, 0.8, min(options.max_nfev, 5000), f"global search ({method})")
    if method == "differential_evolution":
        open_ = [k for k in obj.var_names
                 if not (np.isfinite(obj.params[k].min) and np.isfinite(obj.params[k].max))]
        if open_:
            raise FitError(f"differential evolution needs finite bounds on every varied "
                           f"parameter; {open_[0]!r} has "
                           f"[{obj.params[open_[0]].min:g}, {obj.params[open_[0]].max:g}]")
        res = obj.minimize(method, start, seed=0, polish=False)
    else:
        res = obj.minimize(method, start, niter=25, seed=0)
    vals = res.params.valuesdict()
    chi2 = obj.chisqr_of(vals)
    if obj.best_values is not None and obj.best_chisqr < chi2:
        vals, chi2 = dict(obj.best_values), obj.best_chisqr
    return _Polished(vals, chi2, None, method)


def _scanned_film(obj: Objective):
    """(lmfit name, layer index) of the first film whose thickness is fitted, or None."""
    part = obj.parts[0]
    gmap = dict((loc, g) for g, loc in part.names)
    for i, layer in enumerate(part.stack.layers):
        g = gmap[f"{layer.name}_thickness"]
        if g in obj.var_names:
            return g, i
    return None


def _choose_seed(part: Part, sub_n: np.ndarray) -> autostart.Seed:
    """The envelope seed, or the simple fringe seed where the envelope method is weak.

    The envelope method assumes a film index above the substrate's; when the
    fringes say otherwise (maxima above the bare-substrate line) the simple seed,
    which knows both cases, is used. It also needs clear envelopes: when it sees
    far fewer extrema than the simple count (strong dispersion or absorption),
    the simple seed is the better one. (Both read T against the bare-substrate
    line, so a baseline error biases n a little; the scan's index levels absorb it.)
    """
    simple = autostart.fringe_seed(part.wl, part.y, part.quantity, sub_n)
    env = None if simple.below_substrate else autostart.envelope_seed(
        part.wl, part.y, part.quantity, sub_n)
    if env is not None and 1.5 * env.n_extrema + 2 >= simple.n_extrema:
        return env
    return simple


def _auto_starts(obj: Objective, options: FitOptions, start: dict, info: dict):
    """Seed, scan and basins: a list of (label, start values) to polish."""
    found = _scanned_film(obj)
    if found is None:
        info["scan"] = "no film thickness is fitted: a single local fit from the start values"
        return [("start values", start)], None
    tname, li = found
    part = obj.parts[0]
    layer = part.stack.layers[li]
    mat = layer.material
    gmap = dict((loc, g) for g, loc in part.names)
    sub_n = part.stack.substrate.N(part.wl).real
    seed = _choose_seed(part, sub_n)
    info["seed"] = seed.to_dict()
    # Fringes closer than ~4 data points are not resolved: their extrema heights (and
    # so the seed's n there) are wrong, and a fit there can slip orders.
    wl_res = 0.0
    if seed.has_fringes and seed.thickness_nm and seed.n_ref and part.wl.size > 1:
        dl = float(np.median(np.diff(part.wl)))
        wl_res = math.sqrt(8 * 1.15 * seed.n_ref * seed.thickness_nm * dl)
        if seed.n_points:
            lam, nn = (np.asarray(a, float) for a in seed.n_points)
            ok = lam >= wl_res
            seed = dataclasses.replace(seed, n_points=(lam[ok], nn[ok]))
    pre = layer.name + "_"
    local = {k: start[gmap[pre + k]] for k in mat.params}
    free = [k for k in mat.params if gmap[pre + k] in obj.var_names]
    seeded = autostart.apply_seed(mat, local, seed, free)
    values = dict(start)
    for k, v in seeded.items():
        g = gmap[pre + k]
        if g in obj.var_names:
            values[g] = v
    local = {k: values[gmap[pre + k]] for k in mat.params}
    wl_mid = float(np.median(part.wl))
    n_film = mat.N_unchecked(part.wl, local).real
    level = autostart.n_level_param(mat)
    if level is not None and gmap[pre + level] not in obj.var_names:
        level = None
    if seed.n_ref and seed.below_substrate:
        # Fringes of a film below the substrate index are faint, and a baseline error
        # biases their n a lot: try the seed, the usual low-index films (fluorides,
        # silica) and up to the substrate.
        s_ref = float(np.interp(seed.wl_ref, part.wl, sub_n))
        n_try = sorted({seed.n_ref, 1.38, 0.5 * (seed.n_ref + s_ref), s_ref})
        n_ref, wl_ref = max(n_try), seed.wl_ref
    elif seed.n_ref:
        n_ref, wl_ref, n_try = seed.n_ref, seed.wl_ref, seed.n_ref
    elif level is not None:
        # No fringes, so no index from the data: try the usual range of films.
        n_ref, wl_ref, n_try = max(autostart.BLIND_LEVELS), wl_mid, autostart.BLIND_LEVELS
    else:
        n_ref, wl_ref = float(np.median(n_film)), wl_mid
        n_try = n_ref
    pth = obj.params[tname]
    lo, hi = autostart.scan_range(seed, (pth.min, pth.max), float(part.wl.min()),
                                  float(part.wl.max()), options.thickness_range_nm)
    n_hi = 1.15 * max(float(n_film.max()), n_ref) * 1.06
    step = float(part.wl.min()) / (16 * n_hi)
    K = int(min(autostart._MAX_SCAN_POINTS, max(8, math.ceil((hi - lo) / step) + 1)))
    grid = np.linspace(lo, hi, K)
    obj.set_stage("scan", 0.05, 0.3, 1, f"scanning {K} thicknesses {lo:.0f}-{hi:.0f} nm")
    # Parts that share this thickness add their χ²; each is scanned at its own film.
    scan_parts, scan_locals = [], []
    for p in obj.parts:
        pm = dict((loc, g) for g, loc in p.names)
        if pm.get(f"{layer.name}_thickness") == tname:
            scan_parts.append(p)
            scan_locals.append({loc: values[g] for g, loc in p.names})
    t0 = time.perf_counter()
    # Below the shortest fringe the film absorbs: those points say little about d
    # but much about the (not yet fitted) absorption, so the scan leaves them out.
    # Without fringes the same holds for the part of the range where the film at its
    # start values would absorb noticeably at half the scan's largest thickness.
    wl_range = (0.0, math.inf)
    if seed.fringe_range_nm is not None:
        # Above the longest fringe, too, if the next extremum (about λ²/(4nd) further
        # on) would lie inside the data: the fringes die out there (free carriers).
        f_lo, f_hi = seed.fringe_range_nm
        nxt = f_hi + 1.2 * f_hi ** 2 / (4 * (seed.n_ref or 2.0) * (seed.thickness_nm or 1e3))
        wl_range = (max(0.97 * f_lo, wl_res), nxt if nxt < float(part.wl.max()) else math.inf)
    d_typ = seed.thickness_nm if seed.has_fringes and seed.thickness_nm else 0.5 * hi
    # Many fringes: scan on the long-wavelength part (in wavenumber) only, where the
    # start's dispersion error shifts the fringe phase least; the staged polish then
    # extends to the whole fringe region (continuation in wavelength).
    ranges = [wl_range]
    if seed.n_extrema >= 12 and seed.fringe_range_nm is not None:
        w_lo = max(wl_range[0], float(part.wl.min()))
        w_hi = min(seed.fringe_range_nm[1], wl_range[1], float(part.wl.max()))
        nu_lo, nu_hi = 1.0 / w_hi, 1.0 / w_lo
        # Half the fringes (in wavenumber), and for many fringes first a third: each
        # holds enough fringes to fix the order. The side is where the start model
        # disperses least, so its dispersion error matters least: the long end for
        # films with UV resonances (Cauchy, Tauc-Lorentz), the short end for free
        # carriers (Drude), whose index falls towards the infrared.
        fracs = (1 / 3, 1 / 2) if seed.n_extrema >= 24 else (1 / 2,)
        long_side = [(1.0 / (nu_lo + f * (nu_hi - nu_lo)), wl_range[1]) for f in fracs]
        short_side = [(wl_range[0], 1.0 / (nu_hi - f * (nu_hi - nu_lo))) for f in fracs]

        def spread(r):
            sel = (part.wl >= r[0]) & (part.wl <= r[1])
            return float(np.ptp(n_film[sel])) if sel.sum() > 1 else math.inf

        side = long_side if spread(long_side[0]) <= spread(short_side[0]) else short_side
        ranges = side + ranges
    scan = autostart.scan_thickness(scan_parts, li, scan_locals, grid, level, n_try, wl_ref,
                                    options.fit_scale, options.fit_offset, check=obj.check,
                                    wl_range=ranges[0], d_typical=d_typ)
    n_lv = [autostart._n_at(mat, wl_ref, lv) for lv in scan.levels]
    basins = autostart.pick_basins(scan, N_POLISH, n_of_level=n_lv,
                                   same_nd=float(part.wl.min()) / 8)
    # The seed's own thickness is a start too: when the start dispersion is far off,
    # the χ² scan can prefer a smooth thin film or a double thickness to the right
    # order, while the fringe analysis already has it.
    if seed.has_fringes and seed.thickness_nm and lo <= seed.thickness_nm <= hi:
        mid = len(scan.levels) // 2
        nd = seed.thickness_nm * n_lv[mid]
        if all(abs(nd - b[0] * autostart._n_at(mat, wl_ref, b[1])) >= float(part.wl.min()) / 8
               for b in basins):
            basins.append((float(seed.thickness_nm), scan.levels[mid], math.nan))
    info["scan"] = {"thickness_range_nm": [lo, hi], "points": K, "step_nm": (hi - lo) / (K - 1),
                    "levels": len(scan.levels), "time_s": time.perf_counter() - t0,
                    "basins_nm": [b[0] for b in basins]}
    starts = []
    for d, lv, chi in basins:
        v = dict(values)
        v[tname] = d
        for k, x in lv.items():
            g = gmap[pre + k]
            if g in obj.var_names:
                v[g] = x
        starts.append((f"basin at {d:.1f} nm", v))
    # Joint fits: further films of other parts with their own thickness get their best basin.
    for p in obj.parts[1:]:
        pm = dict((loc, g) for g, loc in p.names)
        g2 = pm.get(f"{layer.name}_thickness")
        if g2 is None or g2 == tname or g2 not in obj.var_names:
            continue
        pp = obj.params[g2]
        sd = autostart.fringe_seed(p.wl, p.y, p.quantity, p.stack.substrate.N(p.wl).real)
        lo2, hi2 = autostart.scan_range(sd, (pp.min, pp.max), float(p.wl.min()),
                                        float(p.wl.max()), options.thickness_range_nm)
        K2 = int(min(autostart._MAX_SCAN_POINTS,
                     max(8, math.ceil((hi2 - lo2) / (float(p.wl.min()) / (16 * n_hi))) + 1)))
        sc = autostart.scan_thickness([p], li, [{loc: values[g] for g, loc in p.names}],
                                      np.linspace(lo2, hi2, K2), None, n_ref, wl_ref,
                                      options.fit_scale, options.fit_offset, check=obj.check)
        b = autostart.pick_basins(sc, 1)
        if b:
            for _, v in starts:
                v[g2] = b[0][0]
    # The staged polish: which points make up each fringe stage (the ranges above,
    # nearly transparent points only), and which parameters (the film's absorption
    # edge) wait for the full fit.
    edge = set(autostart.edge_params(mat))
    fixed = [gmap[pre + k] for k in mat.params if k in edge and gmap[pre + k] in obj.var_names]
    stages = []
    for rng in ranges:
        masks = []
        for p in obj.parts:
            m = (autostart.fringe_region(p, mat, local, rng, d_typ)
                 if any(p is q for q in scan_parts) else None)
            masks.append(np.ones(p.wl.size, bool) if m is None else m)
        if all(m.all() for m in masks):
            if not fixed:
                continue            # the same as the final fit
            masks = None
        stages.append(masks)
    plan = {"stages": stages, "fixed": fixed} if stages else None
    return starts or [("start values", values)], plan


# ----------------------------------------------------------------------------------------
def _finish(obj: Objective, options: FitOptions, start: dict, polished: list[_Polished],
            info: dict) -> FitResult:
    """Turn the best polished point into a FitResult (statistics, bands, warnings)."""
    stopped = obj.stop_reason
    if polished:
        order = sorted(range(len(polished)), key=lambda i: polished[i].chisqr)
        best = polished[order[0]]
        values, lm = best.values, best.lm
        if obj.best_values is not None and obj.best_chisqr < best.chisqr * (1 - 1e-9):
            values, lm = dict(obj.best_values), None
    else:
        order, best, lm = [], None, None
        values = dict(obj.best_values) if obj.best_values is not None else dict(start)

    # Residuals, χ² and (if no σ was given) the noise estimate, per part.
    parts_out, chisqr, sig_note = [], 0.0, []
    for part in obj.parts:
        local = obj.local_values(part, values)
        with np.errstate(all="ignore"):
            model_used = part.evaluate(local)
        res_used = part.y - model_used
        sigma = part.sigma
        if not part.sigma_given:
            s = robust_sigma(res_used)
            if s > 0:
                sigma = np.full(part.y.size, s)
                sig_note.append(f"σ = {s:.2g} estimated from the fit residuals (MAD)")
        chisqr += float(np.sum((res_used / sigma) ** 2))
        parts_out.append((part, local, sigma))
    nv = len(obj.var_names)
    dof = max(obj.ndata - nv, 1)
    redchi = chisqr / dof

    # Covariance from the local polish of the best point.
    covar = correl = None
    var_names = tuple(obj.var_names)
    stderr: dict[str, float] = {}
    if lm is not None and getattr(lm, "covar", None) is not None and not lm.aborted:
        C = np.asarray(lm.covar, dtype=float)
        names = tuple(lm.var_names)
        if C.shape == (len(names), len(names)) and np.all(np.isfinite(C)) \
                and np.all(np.diag(C) > 0):
            idx = [names.index(k) for k in var_names]
            covar = C[np.ix_(idx, idx)]
            sd = np.sqrt(np.diag(covar))
            correl = covar / np.outer(sd, sd)
            stderr = {k: float(s) for k, s in zip(var_names, sd)}
            for k, p in lm.params.items():
                if p.expr and p.stderr is not None and np.isfinite(p.stderr):
                    stderr[k] = float(p.stderr)

    params = {}
    units = _units(obj)
    for k, p in obj.params.items():
        params[k] = ParamResult(k, float(values[k]), stderr.get(k), float(start[k]),
                                float(p.min), float(p.max), bool(p.vary and not p.expr),
                                units.get(k, ""), p.expr)

    # Write the fitted values into each part's stack, then curves and optical constants.
    for part, local, _ in parts_out:
        part.stack.set_values(local)
        if "thickness_spread" in local:
            part.stack.thickness_spread = float(local["thickness_spread"])
    cov_index = {k: i for i, k in enumerate(var_names)}
    curves = [_curves(part, local, sigma) for part, local, sigma in parts_out]
    optical: dict = {}
    for part, local, _ in parts_out:
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
                optical[key] = _optical(part, layer, local, gmap, covar, cov_index)
            except PellucidError as e:   # a model undefined at the fitted values
                info.setdefault("optical_errors", []).append(f"{key}: {e}")

    info["kk"] = _kk_checks(optical)

    alternatives = []
    found = _scanned_film(obj)
    if found is not None and best is not None:
        tname = found[0]
        d_best = values[tname]
        tol = max(0.005 * abs(d_best), 2 * (stderr.get(tname) or 0.0), 1.0)
        seen = [d_best]
        for i in order[1:]:
            q = polished[i]
            d = q.values[tname]
            if q.chisqr < ALT_CHI2_RATIO * best.chisqr and all(abs(d - s) > tol for s in seen):
                f = chisqr / best.chisqr if best.chisqr > 0 else 1.0
                alternatives.append(Alternative(float(d), float(q.chisqr * f),
                                                float(q.chisqr * f / dof)))
                seen.append(d)

    band_gap, bg_warn = None, None
    if options.band_gap:
        band_gap, bg_warn = _band_gap(optical, options.band_gap)

    aborted = bool(stopped)
    if aborted:
        success, message = False, stopped
    elif lm is None and options.method in ("differential_evolution", "basinhopping"):
        success, message = False, "the local polish after the global search did not finish"
    elif lm is None:
        success, message = False, "no local fit finished"
    else:
        success = bool(lm.success)
        message = _plain_message(success, str(getattr(lm, "message", "") or ""))

    warnings = _warnings(params, var_names, correl, optical, alternatives, success, aborted,
                         message, covar, redchi, all(p.sigma_given for p in obj.parts), values)
    if bg_warn:
        warnings.append(bg_warn)
    part0, c0 = obj.parts[0], curves[0]
    sp = part0.spectrum
    extra = {**info,
             "sigma_source": "; ".join(sig_note) if sig_note else "given with the spectrum",
             "starts": [{"label": q.label, "chisqr": q.chisqr} for q in polished]}
    if len(obj.parts) > 1:
        extra["parts"] = [{"name": p.spectrum.name, "quantity": p.quantity,
                           "wavelength_nm": c["wl"].tolist(), "measured": c["y"].tolist(),
                           "fitted": c["fit"].tolist(), "used": c["used"].tolist(),
                           "stack": p.stack.to_dict()} for p, c in zip(obj.parts, curves)]
    return FitResult(
        success=success, aborted=aborted, message=message, params=params,
        var_names=var_names, covar=covar, correl=correl, chisqr=float(chisqr),
        redchi=float(redchi), ndata=int(obj.ndata), nvarys=nv, nfev=int(obj.nfev),
        elapsed_s=float(obj.elapsed), wavelength_nm=c0["wl"], measured=c0["y"],
        fitted=c0["fit"], residuals=c0["y"] - c0["fit"], sigma=c0["sigma"], used=c0["used"],
        quantity=part0.quantity, optical=optical, alternatives=tuple(alternatives),
        band_gap=band_gap, warnings=tuple(warnings), stack=part0.stack.to_dict(),
        method=options.method if len(obj.parts) == 1 else f"joint {options.method}",
        spectrum={"name": sp.name, "source": sp.source, "sha256": sp.sha256},
        extra=extra)


def _kk_checks(optical: dict) -> dict:
    """Kramers-Kronig consistency of each fitted layer's n, κ on the data grid.

    Oscillator models are consistent by construction, so this mainly tells
    whether a Cauchy/Urbach or tabulated result is physically self-consistent
    (see :func:`fitting.kramers_kronig.kk_consistency`).
    """
    from .kramers_kronig import kk_consistency
    out = {}
    for key, oc in optical.items():
        if oc.wavelength_nm.size < 10:
            continue
        try:
            chk = kk_consistency(oc.wavelength_nm, oc.n, oc.k)
        except (PellucidError, ValueError) as e:
            out[key] = {"consistent": None, "message": f"not checked: {e}"}
            continue
        out[key] = {"consistent": bool(chk.consistent), "rms_dev": float(chk.rms_dev),
                    "max_dev": float(chk.max_dev), "message": chk.message}
    return out


def _plain_message(success: bool, msg: str) -> str:
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


def _units(obj: Objective) -> dict:
    out = {}
    for part in obj.parts:
        lp = part.stack.parameters()
        for g, loc in part.names:
            out[g] = lp[loc].unit if loc in lp else _NUISANCE_UNITS.get(loc, "")
    return out


def _curves(part: Part, local: dict, sigma_used: np.ndarray) -> dict:
    """Fitted curve on every point of the fit range (NaN where the model is undefined)."""
    sp = part.spectrum
    wl = sp.wavelength_nm
    fit = np.full(wl.shape, np.nan)
    sel = part.in_range.copy()
    try:
        sm = StackModel(part.stack, wl[sel], angle_deg=part.angle_deg,
                        polarization=part.polarization)
    except PellucidError:
        sel = part.used.copy()
        sm = part.model
    with np.errstate(all="ignore"):
        fit[sel] = part.evaluate(local, sm)
    sigma = np.full(wl.shape, np.nan)
    if part.sigma_given:
        sigma = np.where(np.isfinite(sp.sigma), sp.sigma, np.nan)
    else:
        sigma[sel] = sigma_used[0] if sigma_used.size else DEFAULT_SIGMA
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


def _band_gap(optical: dict, transition: str):
    """Tauc gap of the first absorbing film, or (None, warning)."""
    try:
        from .bandgap import tauc_gap
    except ImportError:
        return None, "band gap not computed: the Tauc analysis module is not available"
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


def _warnings(params, var_names, correl, optical, alternatives, success, aborted, message,
              covar, redchi, sigma_given, values) -> list[str]:
    w = []
    if aborted:
        w.append(f"The fit ended early ({message}); the values are the best found so far.")
    elif not success:
        w.append(f"The fit did not converge ({message}); treat the values with care.")
    for p in params.values():
        if p.at_bound:
            side = "lower" if abs(p.value - p.min) <= abs(p.max - p.value) else "upper"
            bound = p.min if side == "lower" else p.max
            w.append(f"{p.name} ended at its {side} bound ({bound:g} {p.unit}".rstrip()
                     + "): the best value may lie beyond it; widen the bound or check "
                       "the model.")
    if covar is None and var_names:
        w.append("Uncertainties could not be estimated (the fit stopped early, or the "
                 "parameters are not all determined by the data).")
    if correl is not None:
        n = len(var_names)
        pairs = sorted(((correl[i, j], var_names[i], var_names[j]) for i in range(n)
                        for j in range(i + 1, n) if abs(correl[i, j]) > 0.95),
                       key=lambda t: -abs(t[0]))
        if pairs:
            listed = ", ".join(f"{a} and {b} ({c:+.3f})" for c, a, b in pairs)
            w.append(f"Strongly correlated (|c| > 0.95): {listed}. The data hardly separate "
                     f"them, so their error bars are large; consider fixing one of a pair "
                     f"or fitting a wider wavelength range.")
    for name, oc in optical.items():
        vis = (oc.wavelength_nm >= 380) & (oc.wavelength_nm <= 780)
        if vis.any() and np.nanmin(oc.n[vis]) < 1.0:
            w.append(f"{name}: n drops below 1 in the visible (min {np.nanmin(oc.n[vis]):.3f}), "
                     f"which no ordinary dielectric film does; check the model and the data.")
    for k, v in values.items():
        if k.endswith("_B") and k in params and params[k].vary and v < 0:
            w.append(f"{k} = {v:.4g} is negative: a Cauchy film with normal dispersion has "
                     f"B > 0; the index is probably compensating for something else.")
    if "scale" in values and abs(values["scale"] - 1) > 0.05:
        w.append(f"The 100 % line scale came out at {values['scale']:.3f}; more than 5 % off "
                 f"usually means a baseline or reference problem in the measurement.")
    for a in alternatives:
        w.append(f"Another thickness, {a.thickness_nm:.1f} nm, fits almost as well "
                 f"(χ² {a.chisqr:.4g}); the thickness may not be unique. A wider "
                 f"wavelength range or a known index helps decide.")
    if sigma_given and np.isfinite(redchi) and redchi > 25:
        w.append(f"Reduced χ² = {redchi:.3g}: the model does not describe the data within "
                 f"their noise; check the model and the stack.")
    return w
