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

import math
import threading
import time
from dataclasses import asdict, dataclass, fields, replace
from collections.abc import Iterator, Mapping

import numpy as np

from . import autostart
from .errors import FitError, PellucidError, RecipeError
from .finish import finish, scanned_film
from .objective import Objective, _Stop, build_part, stage_span
from .result import FitProgress, FitResult
from .stack import POLARIZATIONS, Stack
from .startplan import plan_starts
from .verdict import SPREAD_LIMIT

__all__ = ["FitOptions", "fit_spectrum", "fit_joint", "iter_fit", "iter_fit_joint",
           "FitResult", "FitProgress", "METHODS"]

METHODS = ("auto", "leastsq", "least_squares", "differential_evolution", "basinhopping")


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
    fit_scale, fit_tilt, fit_offset : bool
        Fit a 100 % line scale, its tilt across the range and a baseline offset
        (parameters "scale", "tilt", "offset"). Scale and tilt are fitted by
        default, each with a Gaussian prior (below): an ordinary spectrophotometer's
        100 % line is good to about 1 % (common practice), and a fit that ignores
        that error biases thickness and n.
    scale_sigma, tilt_sigma : float or None
        1σ of the priors of scale (around 1) and tilt (around 0); None fits them
        freely. Defaults 0.01 and 0.005.
    fit_angle : bool
        Fit the incidence angle ("angle_deg").
    fit_spread : bool or "auto"
        Fit the thickness non-uniformity ("thickness_spread", relative 1σ).
        "auto" (the default) decides from the data: after the fit, a refit with
        the spread free is kept when it lowers χ² by more than the Bayesian
        information criterion asks for (washed-out fringes).
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
    fit_scale: bool = True
    fit_offset: bool = False
    fit_angle: bool = False
    fit_spread: bool | str = "auto"
    fit_tilt: bool = True
    scale_sigma: float | None = 0.01
    tilt_sigma: float | None = 0.005
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
        for name in ("fit_scale", "fit_offset", "fit_angle", "fit_tilt"):
            if not isinstance(getattr(self, name), bool):
                fail(name, "must be true or false")
        if self.fit_spread not in (True, False, "auto") or isinstance(self.fit_spread, int) \
                and not isinstance(self.fit_spread, bool):
            fail("fit_spread", "must be true, false or 'auto'")
        for name in ("scale_sigma", "tilt_sigma"):
            v = getattr(self, name)
            if v is not None and not (isinstance(v, (int, float)) and not isinstance(v, bool)
                                      and math.isfinite(v) and 0 < v <= 1):
                fail(name, "must be a number in (0, 1] (a relative 1σ) or null for no prior")

    def to_dict(self) -> dict:
        d = asdict(self)
        for k in ("fit_range_nm", "thickness_range_nm"):
            if d[k] is not None:
                d[k] = list(d[k])
        d["mask_windows_nm"] = [list(w) for w in self.mask_windows_nm]
        return d

    @classmethod
    def from_dict(cls, d: Mapping, *, where: str = "fit") -> FitOptions:
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
        "scale", "tilt", "offset", "angle_deg", "thickness_spread"}
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
    note: str = ""               # what kind of solution it is (shown with alternatives)
    implausible: bool = False    # a film index no dense film has (see _mirror)


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
        obj.enter("start", message="preparing")
        obj.check()
        if method == "auto":
            plan = plan_starts(obj, start, info)
            starts = plan.starts
            times["seed_and_scan"] = obj.elapsed
            yield FitProgress("scan", stage_span("scan")[2], obj.nfev, obj.best_chisqr,
                              f"{len(starts)} start(s) from the thickness scan")
            if plan.stages:
                starts = _fringe_stages(obj, starts, plan, info, fallback)
            times["fringe_stages"] = obj.elapsed - sum(times.values())
            for i, (label, values) in enumerate(starts):
                end = obj.enter("polish", i, len(starts), 60 * len(obj.var_names),
                                f"polishing {label}")
                # Starts come best first: the others only need to show whether they
                # are real alternatives, so a slow crawl along a valley is cut short.
                cap = None if i == 0 else 50 * (len(obj.var_names) + 1)
                polished.append(_polish(obj, values, label, max_nfev=cap))
                yield FitProgress("polish", end, obj.nfev, obj.best_chisqr,
                                  f"polished {label}")
                obj.check()
        elif method in ("leastsq", "least_squares"):
            obj.enter("local", expect_nfev=60 * len(obj.var_names), message=method)
            polished.append(_polish(obj, start, "start values", method=method))
        else:
            polished.append(_global(obj, options, start))
            yield FitProgress("polish", stage_span("global")[2], obj.nfev, obj.best_chisqr,
                              f"{method} done")
            obj.check()
            obj.enter("global_polish", expect_nfev=60 * len(obj.var_names),
                      message="local polish")
            polished.append(_polish(obj, polished[-1].values, f"{method} + polish"))
        if method == "auto" and options.fit_spread == "auto":
            _auto_spread(obj, polished)
        if method == "auto":
            _mirror(obj, polished)
    except _Stop:
        if not polished and fallback:
            # Stopped during the fringe stages: their best point beats the start.
            label, values = fallback[0]
            polished.append(_Polished(values, obj.chisqr_of(values), None, label))
    times["polish"] = obj.elapsed - sum(times.values())
    t_fin = time.perf_counter()
    result = finish(obj, options, start, polished, info)
    times["finish"] = time.perf_counter() - t_fin   # statistics, budget, KK check, verdict
    if obj.progress_cb is not None:
        obj.progress_cb(FitProgress("done", 1.0, obj.nfev, result.chisqr, result.message))
    yield result


def _auto_spread(obj: Objective, polished: list) -> None:
    """Fit the thickness non-uniformity too, if the data ask for it (``fit_spread="auto"``).

    A spread washes out the fringes of thick films; a model without it reads the
    lost contrast as a lower index contrast, with no misfit to show for it on a
    low-contrast film. So for every film with fringes (three or more
    quarter-wave extrema in the range; on a thinner film a spread cannot be told
    from the thickness) a refit with the spread free is tried, and it is kept
    when it lowers χ² by more than 2, the Akaike information criterion's price
    of one more parameter (Akaike 1974): a spread is expected of real coatings,
    so the weaker criterion, and its uncertainty then enters the covariance. A
    spread above :data:`fitting.verdict.SPREAD_LIMIT` must lower χ² by ln N, the
    Bayesian information criterion's price (Schwarz 1978).
    """
    if "thickness_spread" not in obj.params or scanned_film(obj) is None or not polished:
        return
    best = min(polished, key=lambda q: q.chisqr)
    if _extrema(obj, best.values) < 3:
        return
    s0 = _spread_gain(obj, best.values)
    if s0 is None:
        return
    obj.enter("refine", 0, 2, 60 * len(obj.var_names), "trying a thickness non-uniformity")
    trial = _polish(obj, {**best.values, "thickness_spread": s0},
                    best.label + " with non-uniformity", free=("thickness_spread",),
                    max_nfev=60 * (len(obj.var_names) + 2))
    gain = best.chisqr - trial.chisqr
    # A spread beyond what coatings show over a spectrometer's spot (SPREAD_LIMIT) is
    # more often a stand-in for a wrong index contrast than real: it must then be
    # demanded by the data, by the Bayesian information criterion's price ln N
    # (Schwarz 1978) instead of Akaike's 2.
    needed = math.log(max(obj.ndata, 3)) if trial.values["thickness_spread"] > SPREAD_LIMIT \
        else 2.0
    if gain > needed:
        obj.release("thickness_spread")
        trial.lm = _refit_free(obj, trial)
        polished.append(trial)


def _spread_gain(obj: Objective, values: dict, s_probe: float = 0.01) -> float | None:
    """A start for the spread refit, or None when a linearised refit says it cannot help.

    A refit with the spread free costs several times a plain one (the model is
    averaged over thickness nodes), so it is screened first: T depends on the
    spread s through s², so the residual of a spread s is about
    r₀ + J·δθ + (s/s_p)²·δr, with δr the change at a probe spread s_p and J
    the Jacobian of the other parameters. The least-squares (δθ, a = (s/s_p)²)
    predicts the χ² gain; below 2 (the acceptance threshold) the refit is not
    run.
    """
    from .uncertainty import jacobian, residual_vector
    names = list(obj.var_names)
    old = [p.stack.thickness_spread for p in obj.parts]
    try:
        r0, J = jacobian(obj, values, names)
        probe = residual_vector(obj, {**values, "thickness_spread": s_probe})
    except PellucidError:
        return 0.005
    finally:
        for p, s in zip(obj.parts, old):     # evaluating a spread set it in the stack
            p.stack.thickness_spread = s
    A = np.column_stack([J, probe - r0])
    sol, *_ = np.linalg.lstsq(A, -r0, rcond=None)
    a = float(sol[-1])
    if not a > 0:
        return None
    gain = float(r0 @ r0 - np.sum((r0 + A @ sol) ** 2))
    if gain < 2.0:
        return None
    return float(min(max(s_probe * math.sqrt(a), 0.002), 0.08))


def _film_n(obj: Objective, values: dict, wl_nm: float) -> float:
    """n of the scanned film at one wavelength for a set of values (NaN if undefined)."""
    tname, li = scanned_film(obj)
    part = obj.parts[0]
    layer = part.stack.layers[li]
    local = obj.local_values(part, values)
    pre = layer.name + "_"
    return autostart._n_at(layer.material, wl_nm, {k: local[pre + k]
                                                   for k in layer.material.params})


def _mirror(obj: Objective, polished: list) -> None:
    """Try the mirror of a film below the substrate's index, and flag implausible ones.

    In transmission a film of index n on a substrate of index n_s and one of
    index n' = n_s/n with the same optical thickness are exchanged by swapping
    the two interface reflections, r01 ↔ r12: at normal incidence and without
    dispersion their spectra are identical (Macleod, *Thin-Film Optical Filters*,
    ch. 2, for the quarter-wave case). The fit cannot choose; physics can when
    one index is below any dense film's (``PLAUSIBLE_N_MIN``). So: the best fit
    is polished once more from its mirror; a mirror below the floor is not
    tried, a best fit below it is marked implausible (the plausible mirror is
    then preferred when it fits as well), and two plausible mirrors are both
    reported.
    """
    found = scanned_film(obj)
    if found is None or not polished or obj.parts[0].quantity != "T":
        return
    tname, li = found
    part = obj.parts[0]
    layer = part.stack.layers[li]
    mat = layer.material
    gmap = dict((loc, g) for g, loc in part.names)
    pre = layer.name + "_"
    level = autostart.n_level_param(mat)
    if level is None or gmap[pre + level] not in obj.var_names:
        return
    best = min(polished, key=lambda q: q.chisqr)
    wl_ref = float(np.median(part.wl))
    n = _film_n(obj, best.values, wl_ref)
    ns = float(np.interp(wl_ref, part.wl, part.stack.substrate.N(part.wl).real))
    best.implausible = bool(n < autostart.PLAUSIBLE_N_MIN)
    if not (1.0 < n < ns):
        return
    n_m = ns / n
    if n_m < autostart.PLAUSIBLE_N_MIN or abs(n_m - n) < 0.03:
        return
    local = {k: best.values[gmap[pre + k]] for k in mat.params}
    moved = {**local, level: autostart.set_n_level(mat, local, level, n_m, wl_ref)}
    v = dict(best.values)
    for k, x in moved.items():
        if gmap[pre + k] in obj.var_names:
            v[gmap[pre + k]] = x
    v[tname] = best.values[tname] * n / n_m
    obj.enter("refine", 1, 2, 60 * len(obj.var_names), "trying the mirror solution")
    q = _polish(obj, v, "mirror of " + best.label, max_nfev=60 * (len(obj.var_names) + 1))
    n_q = _film_n(obj, q.values, wl_ref)
    q.implausible = bool(n_q < autostart.PLAUSIBLE_N_MIN)
    q.note = (f"the mirror solution, n = {n_q:.3f} at {wl_ref:.0f} nm against {n:.3f}: "
              f"n·n′ ≈ n of the substrate gives nearly the same T")
    polished.append(q)


def _extrema(obj: Objective, values: dict) -> int:
    """Quarter-wave extrema 4nd/m of the scanned film inside the first part's range."""
    found = scanned_film(obj)
    if found is None:
        return 0
    tname, li = found
    part = obj.parts[0]
    layer = part.stack.layers[li]
    local = obj.local_values(part, values)
    pre = layer.name + "_"
    try:
        with np.errstate(all="ignore"):
            n = layer.material.N_unchecked(part.wl, {k: local[pre + k]
                                                     for k in layer.material.params}).real
    except PellucidError:
        return 0
    nd = float(np.median(n)) * values[tname]
    lo, hi = float(part.wl.min()), float(part.wl.max())
    return max(0, math.floor(4 * nd / lo) - max(math.ceil(4 * nd / hi), 1) + 1)


def _refit_free(obj: Objective, trial):
    """A short final polish with the spread now among the varied parameters."""
    res = obj.minimize("least_squares", trial.values, x_scale="jac",
                       max_nfev=40 * (len(obj.var_names) + 1))
    trial.values = res.params.valuesdict()
    trial.chisqr = obj.chisqr_of(trial.values)
    return res


def _fringe_stages(obj: Objective, starts, plan, info: dict, fallback: list):
    """Polish every start on the fringe region(s) with the absorption edge held.

    Each stage runs for every surviving start; one whose χ² is more than 3 times
    the best after a stage is dropped (common practice: a wrong order never
    recovers). A right basin converges in a few Jacobians, so each run is capped
    at 10 (P + 1) evaluations; every start after the first gets 3 (P + 1) first
    and the rest only if it is then within 5 times the best χ² so far. On a
    dense grid the stages use every k-th point (see :func:`_thinned`). Returns
    the surviving (label, values), best first.
    """
    pool = [(math.inf, label, values) for label, values in starts]
    n_st = len(plan.stages)
    # Bringing a start into its basin does not need every point of a dense grid.
    plan = replace(plan, stages=[_thinned(obj, masks, [v for *_, v in pool])
                                 for masks in plan.stages])
    cap = 10 * (len(obj.var_names) + 1)
    first = 3 * (len(obj.var_names) + 1)
    for j, masks in enumerate(plan.stages):
        done = []
        for i, (_, label, values) in enumerate(pool):
            obj.enter("fringe", j * len(pool) + i, n_st * len(pool), cap,
                      f"fringe fit of {label}")
            kw = dict(fixed=plan.fixed, masks=masks, x_scale="jac")
            if done:
                # Later starts get a few steps first; one still far worse than the
                # best so far is not worth the rest (a wrong order). The 5x margin
                # leaves room for a basin that looks poor before it moves.
                res = obj.minimize("least_squares", values, max_nfev=first, **kw)
                if float(res.chisqr) <= 5.0 * min(c for c, *_ in done):
                    res = obj.minimize("least_squares", res.params.valuesdict(),
                                       max_nfev=cap - first, **kw)
            else:
                res = obj.minimize("least_squares", values, max_nfev=cap, **kw)
            done.append((float(res.chisqr), label, res.params.valuesdict()))
            best = min(done, key=lambda t: t[0])
            fallback[:] = [(best[1], best[2])]
            obj.check()
        best_a = min(c for c, *_ in done)
        pool = _distinct(sorted((t for t in done if t[0] <= 3.0 * best_a),
                                key=lambda t: t[0]), scanned_film(obj))
        info.setdefault("stage_a", []).append(
            [{"label": label, "chisqr": c} for c, label, _ in done])
    return [(label, v) for _, label, v in pool]


#: Fewest points per fringe period a thinned fringe stage keeps (common practice:
#: a period sampled by ~10 points or more is fitted as well as by all of them).
MIN_POINTS_PER_FRINGE = 12
#: Thinning never keeps fewer than one point in this many.
MAX_THINNING = 4


def _thinned(obj: Objective, masks, starts):
    """The stage's point masks keeping every k-th point where the fringes allow it.

    The fringe stages only have to bring each start into its basin; a fringe
    period of Δλ = λ²/(2nd) at the shortest wavelength used, sampled by
    :data:`MIN_POINTS_PER_FRINGE` points or more, is followed as well by every
    k-th point as by all of them, at 1/k of the cost. The final fit uses all.
    """
    found = scanned_film(obj)
    if found is None or not starts:
        return masks
    tname = found[0]
    part = obj.parts[0]
    m0 = np.ones(part.wl.size, bool) if masks is None or masks[0] is None else masks[0]
    wl = part.wl[m0]
    if wl.size < 4:
        return masks
    w_lo = float(wl.min())
    nd = max(max(_film_n(obj, v, w_lo), 1.0) * v[tname] for v in starts)
    if not (nd > 0 and math.isfinite(nd)):
        return masks
    step = float(np.median(np.diff(wl)))
    per_fringe = w_lo * w_lo / (2 * nd) / step
    k = int(min(MAX_THINNING, per_fringe // MIN_POINTS_PER_FRINGE))
    if k < 2:
        return masks
    out = []
    for p, m in zip(obj.parts, masks if masks is not None else [None] * len(obj.parts)):
        m = np.ones(p.wl.size, bool) if m is None else m.copy()
        idx = np.flatnonzero(m)
        m[idx[np.arange(idx.size) % k != 0]] = False
        out.append(m)
    return out


def _distinct(pool, film):
    """Drop starts that a stage brought to the same thickness as a better one (0.1 %)."""
    if film is None:
        return pool
    tname = film[0]
    out = []
    for t in pool:
        d = t[2][tname]
        if all(abs(d - u[2][tname]) > 1e-3 * max(abs(d), 1.0) for u in out):
            out.append(t)
    return out


def _polish(obj: Objective, values: dict, label: str, method: str = "least_squares",
            max_nfev: int | None = None, free=()):
    kws = {"x_scale": "jac"} if method == "least_squares" else {}
    res = obj.minimize(method, values, max_nfev=max_nfev, free=free, **kws)
    vals = res.params.valuesdict()
    chi2 = obj.chisqr_of(vals)
    if res.aborted and obj.stop_reason and obj.best_values is not None \
            and obj.best_chisqr < chi2:
        # The whole fit was stopped: the best point of all runs stands for this one.
        vals, chi2 = dict(obj.best_values), obj.best_chisqr
    return _Polished(vals, chi2, res, label)


def _global(obj: Objective, options: FitOptions, start: dict) -> _Polished:
    method = options.method
    obj.enter("global", expect_nfev=min(options.max_nfev, 5000),
              message=f"global search ({method})")
    if method == "differential_evolution":
        open_ = [k for k in obj.var_names
                 if not (np.isfinite(obj.params[k].min) and np.isfinite(obj.params[k].max))]
        if open_:
            raise FitError(f"differential evolution needs finite bounds on every varied "
                           f"parameter; {open_[0]!r} has "
                           f"[{obj.params[open_[0]].min:g}, {obj.params[open_[0]].max:g}]")
        # A global search over the whole bounds of a parameter with a prior (the 100 %
        # line scale: 0.7-1.3) wastes its population: ±5σ of the prior is enough.
        narrow = {k: (mu - 5 * sd, mu + 5 * sd) for k, mu, sd in obj.priors
                  if k in obj.var_names}
        res = obj.minimize(method, start, seed=0, polish=False, bounds=narrow)
    else:
        res = obj.minimize(method, start, niter=25, seed=0)
    vals = res.params.valuesdict()
    chi2 = obj.chisqr_of(vals)
    if obj.best_values is not None and obj.best_chisqr < chi2:
        vals, chi2 = dict(obj.best_values), obj.best_chisqr
    return _Polished(vals, chi2, None, method)
