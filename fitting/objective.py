"""The weighted least-squares objective of a fit: used points, weights, nuisance terms.

A fit compares one or more measured spectra with the model of a layer stack.
Each spectrum with its stack is a :class:`Part`: the points that take part
(mask, fit range and excluded windows applied), their 1σ weights and a
:class:`~fitting.stack.StackModel` bound to exactly those wavelengths, so the
inner loop never re-validates or re-interpolates anything.

The residual of one part is

    r_i = (y_i - (s + t·u_i)·M_i(p) - o) / σ_i,

with M the modelled T or R, s the 100 % line scale, t its tilt (the change of
the scale from the short to the long end of the fitted range, u_i running from
-1/2 to +1/2 over it) and o the baseline offset (fixed at 1, 0 and 0 unless
fitted). A scale or tilt fitted with a prior (the default: 1 ± 1 % and
0 ± 0.5 %, the photometric accuracy of an ordinary double-beam
spectrophotometer, common practice) adds one residual each,
(s - 1)/σ_s and t/σ_t: the Gaussian prior of a maximum a posteriori fit, which
keeps a very thin film, whose spectrum barely separates scale from index,
from trading one for the other. :class:`Objective` concatenates the
parts, counts evaluations, remembers the best point seen, and enforces the
evaluation budget, the time limit and the user's stop request through lmfit's
``iter_cb`` (a True return ends the minimiser cleanly).

References
----------
.. [1] P. R. Bevington and D. K. Robinson, *Data Reduction and Error Analysis for
       the Physical Sciences*, 3rd ed., McGraw-Hill (2003), ch. 8 (weighted χ²).
"""

from __future__ import annotations

import math
import re
import threading
import time
from dataclasses import dataclass, field, replace
from collections.abc import Callable

import lmfit
import numpy as np

from .dispersion import forward_step
from .errors import FitError, PellucidError
from .reference import estimate_noise
from .result import FitProgress
from .stack import Stack, StackModel
from .trust_region import trf

__all__ = ["Part", "Objective", "build_part", "DEFAULT_SIGMA", "STAGES",
           "stage_span", "RunResult"]

#: Noise assumed when a spectrum carries no σ: 0.2 % T, typical of a double-beam
#: UV-Vis-NIR spectrometer over most of its range (common practice).
DEFAULT_SIGMA = 0.002

# Bounds of the nuisance parameters (common practice: a 100 % line off by more
# than 30 % or a baseline off by 0.2 is a measurement problem, not a fit parameter).
_NUISANCE = {
    "scale": (1.0, 0.7, 1.3, "", "100 % line scale of the measured spectrum"),
    "offset": (0.0, -0.2, 0.2, "", "baseline offset of the measured spectrum"),
    "tilt": (0.0, -0.1, 0.1, "", "change of the 100 % line scale across the fitted range"),
    "angle_deg": (0.0, 0.0, 80.0, "deg", "angle of incidence"),
    "thickness_spread": (0.0, 0.0, 0.3, "", "relative thickness non-uniformity (1σ)"),
}
#: Gaussian priors of nuisance parameters: name -> (mean, FitOptions field holding 1σ).
PRIORS = {"scale": (1.0, "scale_sigma"), "tilt": (0.0, "tilt_sigma")}
_NAME_TOKEN = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


@dataclass(eq=False)
class Part:
    """One measured spectrum and the stack that models it, bound to its used points."""

    index: int
    spectrum: object               # fitting.spectrum.Spectrum
    stack: Stack                   # a private copy; the fit writes values into it
    used: np.ndarray               # bool, over the spectrum's full grid
    in_range: np.ndarray           # bool: inside the fit range (masked windows included)
    wl: np.ndarray                 # used wavelengths
    y: np.ndarray                  # used measured values
    sigma: np.ndarray              # used 1σ
    sigma_given: bool
    model: StackModel
    u: np.ndarray                  # used wavelengths mapped to [-1/2, 1/2] (tilt abscissa)
    quantity: str
    angle_deg: float
    polarization: str
    # lmfit name -> local name ("film_A", "scale", ...); filled by Objective
    names: list = field(default_factory=list)

    def u_at(self, wavelength_nm) -> np.ndarray:
        """Tilt abscissa at any wavelengths (linear in λ, -1/2 and +1/2 at the used ends)."""
        wl = np.asarray(wavelength_nm, dtype=float)
        span = float(self.wl[-1] - self.wl[0]) if self.wl.size > 1 else 0.0
        if span <= 0:
            return np.zeros(wl.shape)
        return (wl - 0.5 * (self.wl[0] + self.wl[-1])) / span

    def bind(self, local: dict, model: StackModel | None = None) -> StackModel:
        """The model for these local values: the angle bound in, the spread set."""
        sm = self.model if model is None else model
        if "angle_deg" in local and abs(sm.angle_rad - math.radians(local["angle_deg"])) > 1e-15:
            # The geometry is bound into the model: a new angle needs a new binding.
            sm = StackModel(self.stack, sm.wavelength_nm, angle_deg=local["angle_deg"],
                            polarization=self.polarization)
            if model is None:
                self.model = sm
        if "thickness_spread" in local:
            self.stack.thickness_spread = local["thickness_spread"]
        return sm

    def evaluate(self, local: dict, model: StackModel | None = None) -> np.ndarray:
        """Modelled quantity (scale and offset applied) for local parameter values."""
        sm = self.bind(local, model)
        R, T = sm.RT(local, only=self.quantity)
        m = T if self.quantity == "T" else R
        scale = local.get("scale", 1.0)
        if "tilt" in local:
            # The stored abscissa belongs to this part's own wavelengths; a model on
            # others (the curve over masked windows) gets its own.
            own = sm is self.model or (sm.wavelength_nm.size == self.wl.size
                                       and np.array_equal(sm.wavelength_nm, self.wl))
            u = self.u if own else self.u_at(sm.wavelength_nm)
            scale = scale + local["tilt"] * u
        return scale * m + local.get("offset", 0.0)

    def restricted(self, keep: np.ndarray) -> Part:
        """This part on a subset of its used points (``keep`` runs over them), with a
        model bound to just those wavelengths: a fit stage on part of a spectrum then
        costs what its points cost, not what the whole spectrum does."""
        idx = np.flatnonzero(keep)
        used = np.zeros_like(self.used)
        used[np.flatnonzero(self.used)[idx]] = True
        model = StackModel(self.stack, self.wl[idx], angle_deg=math.degrees(self.model.angle_rad),
                           polarization=self.polarization)
        return replace(self, used=used, wl=self.wl[idx], y=self.y[idx], sigma=self.sigma[idx],
                       u=self.u[idx], model=model, names=list(self.names))


def build_part(index: int, spectrum, stack: Stack, options) -> Part:
    """Select the used points of ``spectrum`` and bind a private copy of ``stack`` to them.

    Raises
    ------
    FitError
        If no usable point remains, or the stack cannot be evaluated there.
    """
    name = spectrum.name or f"spectrum {index + 1}"
    try:
        stack = Stack.from_dict(stack.to_dict())
    except PellucidError as e:
        raise FitError(f"{name}: the start values cannot be computed: {e}; change them "
                       f"before fitting") from e
    wl = spectrum.wavelength_nm
    if wl.size == 0:
        raise FitError(f"{name}: the spectrum holds no data points")
    if (spectrum.metadata or {}).get("ordinate") == "counts":
        # Raw detector counts are not a transmittance: they need the 100 % line first.
        raise FitError(f"{name}: the file holds raw detector counts, not T or R; divide it by "
                       f"a 100 % line (reference correction with baseline and dark) first")
    in_range = np.ones(wl.shape, dtype=bool)
    if options.fit_range_nm is not None:
        lo, hi = options.fit_range_nm
        in_range = (wl >= lo) & (wl <= hi)
        if not in_range.any():
            raise FitError(f"{name}: no data point lies in the fit range {lo:g}-{hi:g} nm "
                           f"(the data cover {wl[0]:g}-{wl[-1]:g} nm); widen the fit range")
    used = in_range & spectrum.used & np.isfinite(spectrum.values)
    for lo, hi in options.mask_windows_nm:
        used &= ~((wl >= lo) & (wl <= hi))
    sigma_given = spectrum.sigma is not None
    if sigma_given:
        used &= np.isfinite(spectrum.sigma) & (spectrum.sigma > 0)
    if not used.any():
        raise FitError(f"{name}: no usable data points remain after the mask, the fit range "
                       f"and the excluded windows; check the fit range and the mask")
    if sigma_given:
        sig = spectrum.sigma[used]
    elif used.sum() >= 12:
        # Noise from the spectrum itself (4th differences), before any model: χ² then
        # compares the misfit with the data's own noise. Estimated over the whole fit
        # range, so masked windows do not put steps into the differences.
        pool = in_range & np.isfinite(spectrum.values)
        noise = np.full(wl.shape, np.nan)
        noise[pool] = estimate_noise(spectrum.values[pool], order=4)
        sig = noise[used]
    else:
        sig = np.full(int(used.sum()), DEFAULT_SIGMA)
    wl_used = wl[used]
    span = float(wl_used[-1] - wl_used[0]) if wl_used.size > 1 else 1.0
    u = (wl_used - 0.5 * (wl_used[0] + wl_used[-1])) / (span if span > 0 else 1.0)
    try:
        model = StackModel(stack, wl[used], angle_deg=options.angle_deg,
                           polarization=options.polarization)
    except PellucidError as e:
        raise FitError(f"{name}: the stack cannot be computed on the data: {e}") from e
    return Part(index, spectrum, stack, used, in_range, wl_used, spectrum.values[used], sig,
                sigma_given, model, u, spectrum.quantity, options.angle_deg, options.polarization)


#: The stages of a fit, as reported to a progress bar: (key, reported stage name,
#: share of the bar). The shares of an automatic fit add up to 1; the local and
#: global methods use the "local" and "global" rows.
STAGES = (("start", "start", 0.05), ("scan", "scan", 0.25), ("fringe", "polish", 0.25),
          ("polish", "polish", 0.38), ("refine", "polish", 0.07))
_OTHER_STAGES = {"global": ("scan", 0.05, 0.8), "local": ("polish", 0.05, 0.95),
                 "global_polish": ("polish", 0.8, 0.95)}


def stage_span(key: str, i: int = 0, n: int = 1) -> tuple[str, float, float]:
    """(reported name, start, end) of the i-th of n runs of a stage on the progress bar."""
    if key in _OTHER_STAGES:
        name, lo, hi = _OTHER_STAGES[key]
    else:
        lo = 0.0
        for k, stage_name, share in STAGES:
            if k == key:
                name, hi = stage_name, lo + share
                break
            lo += share
        else:
            raise KeyError(key)
    width = (hi - lo) / max(n, 1)
    return name, lo + i * width, lo + (i + 1) * width


class _Value:
    """One parameter of a run: its value, whether the run varies it, its bounds."""

    __slots__ = ("value", "vary", "min", "max", "expr")

    def __init__(self, value: float, vary: bool, lo: float, hi: float):
        self.value, self.vary, self.min, self.max, self.expr = value, vary, lo, hi, None


class _RunValues(dict):
    """Parameters of one direct run, read like lmfit.Parameters (``p[k].value``,
    ``valuesdict()``) without lmfit's deep copies (its symbol table)."""

    @classmethod
    def start(cls, params: lmfit.Parameters, values, fixed, free, bounds) -> _RunValues:
        out = cls()
        for k, p in params.items():
            vary = (p.vary or k in free) and k not in fixed
            lo, hi = p.min, p.max
            if bounds and k in bounds:
                lo, hi = max(bounds[k][0], lo), min(bounds[k][1], hi)
            x = p.value
            if values and k in values and p.vary:
                # Only parameters the fit varies take a start value (held ones keep
                # theirs), clipped into their own bounds as lmfit does.
                x = float(min(max(values[k], p.min), p.max))
            if vary:
                x = float(min(max(x, lo), hi))    # and into the run's own bounds
            out[k] = _Value(x, vary, lo, hi)
        return out

    def valuesdict(self) -> dict:
        return {k: p.value for k, p in self.items()}

    def copy(self) -> _RunValues:
        out = _RunValues()
        for k, p in self.items():
            out[k] = _Value(p.value, p.vary, p.min, p.max)
        return out


@dataclass
class RunResult:
    """A minimiser run that was cut short: the best point it saw, in lmfit's terms.

    Has the attributes of lmfit's ``MinimizerResult`` that the engine reads
    (``params``, ``aborted``, ``success``, ``message``, ``chisqr``, ``nfev``,
    ``var_names``, ``covar``), so both kinds of run are handled alike.
    """

    params: lmfit.Parameters
    aborted: bool
    success: bool
    message: str
    chisqr: float
    nfev: int
    var_names: list
    covar: None = None


class _RunEnded(Exception):
    """Raised inside one minimiser run when its cap, the budget or a stop ends it."""


class _Stop(Exception):
    """Raised inside the engine when the budget, the time limit or the user ends a fit."""


class Objective:
    """Residual over all parts, with lmfit parameters, budget and best-point tracking.

    Parameters
    ----------
    parts : list of Part
    options : FitOptions
    shared : set of str or None
        Local parameter names shared by all parts (None: single part, no prefixes).
        A name not shared is prefixed per part: ``p2_film_thickness``.
    progress : callable(FitProgress) or None
    stop : threading.Event or None
    """

    def __init__(self, parts: list[Part], options, *, shared=None, progress=None,
                 stop: threading.Event | None = None):
        self.parts, self.options = parts, options
        self.progress_cb: Callable | None = progress
        self.stop_event = stop
        self.t0 = time.perf_counter()
        self.deadline = self.t0 + float(options.time_limit_s)
        self.max_nfev = int(options.max_nfev)
        self.nfev = 0
        self.best_chisqr = math.inf
        self.best_values: dict | None = None
        self.stop_reason = ""
        self.stage, self._frac = "start", (0.0, 0.05)
        self._stage_nfev0, self._stage_expect = 0, 1
        self._last_report = 0.0
        self._staged = False        # a run on part of the points (its χ² is not the fit's)
        self._restricted = None     # (masks, parts) of the last staged run
        self._stage_limit = math.inf  # evaluation cap of the current minimiser run
        self._run_best = (math.inf, None)  # best point of the current minimiser run
        self.priors: list[tuple[str, float, float]] = []   # (name, mean, 1σ)
        self.params = self._make_params(shared)
        self.ndata = sum(p.y.size for p in parts)
        self.var_names = [k for k, p in self.params.items() if p.vary and not p.expr]
        if not [k for k in self.var_names if k not in _NUISANCE
                and not any(k == f"p{p.index + 1}_{n}" for p in parts for n in _NUISANCE)]:
            every_known = all(getattr(layer, "known", False) for p in parts
                              for layer in p.stack.layers)
            raise FitError("no parameter is free to vary: " + (
                "every layer is marked known; untick 'known' on a layer to fit it"
                if every_known else "tick 'fit' for at least one thickness or material "
                "parameter (the 100 % line scale and tilt alone are not a fit)"))
        for part in parts:
            try:
                part.evaluate(self.local_values(part, self.params))
            except PellucidError as e:
                raise FitError(f"the start values cannot be computed: {e}; change them "
                               f"before fitting") from e
        if self.ndata <= len(self.var_names):
            raise FitError(f"{self.ndata} usable data points cannot determine "
                           f"{len(self.var_names)} free parameters; widen the fit range or "
                           f"fix some parameters")

    # -- parameters -----------------------------------------------------------------
    def _make_params(self, shared) -> lmfit.Parameters:
        params = lmfit.Parameters()
        opts = self.options
        multi = shared is not None and len(self.parts) > 1
        pending_expr = []
        hold: set = set()
        for part in self.parts:
            local_params = dict(part.stack.parameters())
            for key, flag in (("scale", opts.fit_scale), ("tilt", opts.fit_tilt),
                              ("offset", opts.fit_offset), ("angle_deg", opts.fit_angle),
                              ("thickness_spread", opts.fit_spread in (True, "auto"))):
                if flag:
                    value, lo, hi = _NUISANCE[key][:3]
                    if key == "thickness_spread" and opts.fit_spread == "auto":
                        # Held until the fit asks for it (see fitting.fit, "auto").
                        hold.add(key)
                    if key == "angle_deg":
                        value = min(max(part.angle_deg, lo), hi)
                    elif key in hold:
                        # Auto: at the stack's value (usually 0, the fast model) and at
                        # most 10 % (wider is a wedge, not a non-uniformity).
                        value, hi = min(part.stack.thickness_spread, 0.1), 0.1
                    elif key == "thickness_spread":
                        value = min(max(part.stack.thickness_spread, 0.002), hi)
                    local_params[key] = (value, lo, hi)
            local_names = set(local_params)

            def gname(local, _part=part):
                if not multi or local in shared:
                    return local
                return f"p{_part.index + 1}_{local}"

            for local, p in local_params.items():
                g = gname(local)
                part.names.append((g, local))
                if g in params:
                    continue
                prior = PRIORS.get(local)
                if prior is not None and getattr(opts, prior[1]) is not None:
                    self.priors.append((g, prior[0], float(getattr(opts, prior[1]))))
                if isinstance(p, tuple):
                    params.add(g, value=p[0], min=p[1], max=p[2], vary=local not in hold)
                else:
                    params.add(g, value=p.value, min=p.min, max=p.max, vary=p.vary)
                    if p.expr:
                        # Rename the names the tie refers to the way this part's names are.
                        expr = _NAME_TOKEN.sub(
                            lambda m, names=local_names: gname(m.group(0))
                            if m.group(0) in names else m.group(0), p.expr)
                        pending_expr.append((g, expr))
        for g, expr in pending_expr:
            try:
                params[g].set(expr=expr)
                params.update_constraints()
            except Exception as e:  # lmfit raises NameError/SyntaxError for a bad tie
                raise FitError(f"parameter {g!r}: the tie expression {expr!r} cannot be "
                               f"evaluated ({e}); it may name only parameters of this fit, "
                               f"numbers and arithmetic") from None
        return params

    @property
    def tied(self) -> list:
        """Names of the parameters set by a tie expression."""
        return [k for k, p in self.params.items() if p.expr]

    def tied_values(self, values: dict) -> dict:
        """``values`` with every tied parameter recomputed from its tie expression."""
        tied = self.tied
        if not tied:
            return values
        params = self.params.copy()
        for k, v in values.items():
            if k in params and not params[k].expr:
                params[k].value = v
        params.update_constraints()
        return {**values, **{k: params[k].value for k in tied}}

    def local_values(self, part: Part, values) -> dict:
        """Local parameter values of one part from an lmfit Parameters or a plain dict."""
        if isinstance(values, lmfit.Parameters):
            return {loc: values[g].value for g, loc in part.names}
        return {loc: values[g] for g, loc in part.names}

    # -- residual -------------------------------------------------------------------
    def part_residual(self, part: Part, local: dict) -> np.ndarray:
        try:
            with np.errstate(all="ignore"):
                r = (part.y - part.evaluate(local)) / part.sigma
        except PellucidError:
            # An impossible combination (e.g. Tauc-Lorentz C >= 2 E0) on the way:
            # a large, flat residual steers the minimiser back.
            return np.full(part.y.size, 1e3)
        if not np.all(np.isfinite(r)):
            r = np.where(np.isfinite(r), r, 1e3)
        return r

    def residual(self, params) -> np.ndarray:
        """Concatenated weighted residuals (the function lmfit minimises)."""
        out = [self.part_residual(p, self.local_values(p, params)) for p in self.parts]
        if self.priors:
            out.append(self.prior_residual(params))
        r = out[0] if len(out) == 1 else np.concatenate(out)
        self.nfev += 1
        chi2 = float(r @ r)
        if chi2 < self._run_best[0]:
            self._run_best = (chi2, params.valuesdict() if isinstance(params, lmfit.Parameters)
                              else dict(params))
            if not self._staged and chi2 < self.best_chisqr:
                self.best_chisqr, self.best_values = chi2, self._run_best[1]
        return r

    def jacobian(self, params, names, *, count: bool = True) -> np.ndarray:
        """d residual / d parameter for the varied ``names``, shape (residuals, names).

        Residual r = (y - (s + t·u)·M - o)/σ: the scale, tilt and offset columns
        are exact (-M/σ, -u·M/σ, -1/σ), the stack's thickness and material
        columns come from :meth:`StackModel.RT_jacobian` (the chain rule through
        each film's N(λ)), and anything else (angle, thickness spread) from a
        forward difference of the part's residual. Each call counts as
        ``len(names)`` evaluations, what a forward-difference Jacobian costs, so
        the evaluation caps of the fit stages keep their meaning in iterations
        (``count=False``: statistics after the fit, not counted).
        """
        names = list(names)
        col = {k: j for j, k in enumerate(names)}
        blocks = []
        for part in self.parts:
            local = self.local_values(part, params)
            blocks.append(self._part_jacobian(part, local, [
                (col[g], loc) for g, loc in part.names if g in col], len(names)))
        if self.priors:
            prior = np.zeros((len(self.priors), len(names)))
            for i, (k, _, sd) in enumerate(self.priors):
                if k in col:
                    prior[i, col[k]] = 1.0 / sd
            blocks.append(prior)
        if count:
            self.nfev += len(names)
        return blocks[0] if len(blocks) == 1 else np.concatenate(blocks)

    def _part_jacobian(self, part: Part, local: dict, cols, width: int) -> np.ndarray:
        J = np.zeros((part.y.size, width))
        names = part.model.parameter_names
        stack_cols = [(j, loc) for j, loc in cols if loc in names]
        other = [(j, loc) for j, loc in cols if loc not in names]
        try:
            with np.errstate(all="ignore"):
                sm = part.bind(local)
                R, T, dR, dT = sm.RT_jacobian(local, [loc for _, loc in stack_cols],
                                              only=part.quantity)
        except PellucidError:
            return J               # a refused point: the flat residual has no slope
        M, dM = (T, dT) if part.quantity == "T" else (R, dR)
        scale = local.get("scale", 1.0) + (local["tilt"] * part.u if "tilt" in local else 0.0)
        with np.errstate(all="ignore"):
            for row, (j, _) in enumerate(stack_cols):
                J[:, j] = -scale * dM[row] / part.sigma
            r0 = None
            for j, loc in other:
                if loc == "scale":
                    J[:, j] = -M / part.sigma
                elif loc == "tilt":
                    J[:, j] = -part.u * M / part.sigma
                elif loc == "offset":
                    J[:, j] = -1.0 / part.sigma
                else:
                    if r0 is None:
                        r0 = self.part_residual(part, local)
                    J[:, j] = self._difference(part, local, loc, r0)
        J[~np.isfinite(J)] = 0.0
        return J

    def _difference(self, part: Part, local: dict, loc: str, r0) -> np.ndarray:
        """Forward difference of a part's residual by one local parameter (inwards at
        the upper bound)."""
        g = next(g for g, name in part.names if name == loc)
        x = local[loc]
        h = forward_step(x, self.params[g].max)
        r1 = self.part_residual(part, {**local, loc: x + h})
        self.part_residual(part, local)     # rebind the model to the point itself
        return (r1 - r0) / h

    def _least_squares(self, params: _RunValues, **kws) -> RunResult:
        """Trust-region reflective least squares (scipy's method, see
        :mod:`fitting.trust_region`) from ``params`` (varied ones free within their
        bounds), with lmfit's default tolerances."""
        names = [k for k, p in params.items() if p.vary]
        base = params.valuesdict()
        x0 = np.array([base[k] for k in names], dtype=float)
        lo = np.array([params[k].min for k in names], dtype=float)
        hi = np.array([params[k].max for k in names], dtype=float)

        def at(x):
            v = dict(base)
            v.update(zip(names, (float(t) for t in x)))
            return v

        def fun(x):
            r = self.residual(at(x))
            if self.iter_cb(None, self.nfev, r):
                raise _RunEnded
            return r

        def jac(x):
            if self.nfev + len(names) > self.max_nfev:
                # A Jacobian counts as len(names) evaluations: one that would pass
                # the budget is not started.
                self.stop_reason = self.stop_reason or self._budget_message()
                raise _RunEnded
            return self.jacobian(at(x), names)

        opts = dict(ftol=1e-8, xtol=1e-8, gtol=1e-8, x_scale=1.0, max_nfev=10 ** 9)
        opts.update(kws)
        # scipy's trust-region reflective steps, each on the n×n QR factor (see
        # fitting.trust_region): the same iterates at less cost per step.
        sol = trf(fun, jac, x0, lo, hi, **opts)
        for k, x in zip(names, sol.x):
            params[k].value = float(x)
        return RunResult(params=params, aborted=False, success=bool(sol.success),
                         message=str(sol.message), chisqr=float(sol.fun @ sol.fun),
                         nfev=self.nfev, var_names=names)

    def prior_residual(self, values) -> np.ndarray:
        """(x - mean)/σ of each parameter with a Gaussian prior (an empty array if none)."""
        get = (lambda k: values[k].value) if isinstance(values, lmfit.Parameters) \
            else values.__getitem__
        return np.array([(get(k) - mu) / sd for k, mu, sd in self.priors])

    def chisqr_of(self, values: dict) -> float:
        r = np.concatenate([self.part_residual(p, self.local_values(p, values))
                            for p in self.parts] + [self.prior_residual(values)])
        return float(r @ r)

    # -- budget, stop and progress --------------------------------------------------
    def should_stop(self) -> bool:
        if self.stop_reason:
            return True
        if self.stop_event is not None and self.stop_event.is_set():
            self.stop_reason = "stopped on request"
        elif time.perf_counter() > self.deadline:
            self.stop_reason = (f"time limit of {self.options.time_limit_s:g} s reached; "
                                f"raise the time limit or give a better start")
        elif self.nfev >= self.max_nfev:
            self.stop_reason = self._budget_message()
        return bool(self.stop_reason)

    def _budget_message(self) -> str:
        return (f"evaluation budget of {self.max_nfev} model evaluations used up; raise "
                f"max_nfev or give a better start")

    def iter_cb(self, params, it, resid, *args, **kws) -> bool:
        """lmfit iteration callback: report progress, return True to abort."""
        self.report()
        return self.should_stop() or self.nfev >= self._stage_limit

    def check(self) -> None:
        """Between stages: raise :class:`_Stop` if the fit must end."""
        if self.should_stop():
            raise _Stop(self.stop_reason)

    def remaining_nfev(self) -> int:
        return max(self.max_nfev - self.nfev, 1)

    def enter(self, key: str, i: int = 0, n: int = 1, expect_nfev: int = 100,
              message: str = "") -> float:
        """Start the i-th of n runs of a stage of :data:`STAGES`; returns its end."""
        name, lo, hi = stage_span(key, i, n)
        self.set_stage(name, lo, hi, expect_nfev, message)
        return hi

    def set_stage(self, stage: str, frac_lo: float, frac_hi: float, expect_nfev: int = 100,
                  message: str = "") -> None:
        self.stage, self._frac = stage, (frac_lo, frac_hi)
        self._stage_nfev0, self._stage_expect = self.nfev, max(expect_nfev, 1)
        self.report(force=True, message=message)

    def report(self, *, force: bool = False, message: str = "") -> None:
        if self.progress_cb is None:
            return
        now = time.perf_counter()
        if not force and now - self._last_report < 0.05:
            return
        self._last_report = now
        lo, hi = self._frac
        done = min(1.0, (self.nfev - self._stage_nfev0) / self._stage_expect)
        self.progress_cb(FitProgress(self.stage, lo + (hi - lo) * done, self.nfev,
                                     self.best_chisqr, message))

    @property
    def elapsed(self) -> float:
        return time.perf_counter() - self.t0

    def release(self, name: str) -> None:
        """Make a held parameter (``fit_spread="auto"``) a varied one from now on."""
        self.params[name].vary = True
        if name not in self.var_names:
            self.var_names.append(name)

    def hold(self, name: str) -> None:
        """Keep a varied parameter at its start value for the whole fit."""
        self.params[name].vary = False
        if name in self.var_names:
            self.var_names.remove(name)

    def minimize(self, method: str, values: dict | None = None, *, fixed=(), free=(),
                 masks=None, max_nfev: int | None = None, bounds=None, **kws):
        """Run one minimiser from ``values`` (default: the current parameters): the
        trust-region reflective least squares of :mod:`fitting.trust_region` directly
        for ``"least_squares"`` without ties, lmfit otherwise.

        ``fixed`` names varied parameters held at their value for this run, ``free``
        held ones varied in it; ``bounds`` narrows some parameters' bounds for it;
        ``masks`` (one bool array per part, over its used points) restricts the
        residual to a subset of points. Either makes a *stage* whose χ² is not
        the fit's, so the best-point record is not updated during it.
        ``max_nfev`` caps this run alone (it then ends with ``aborted=True``
        but the fit goes on).
        """
        # least_squares runs the solver directly, with the Jacobian of :meth:`jacobian`:
        # lmfit's wrapper copies the parameters (twice) per run and adds a call per
        # evaluation, which a fit of a few hundred evaluations notices. Ties need lmfit.
        direct = method == "least_squares" and not self.tied
        if direct:
            params = _RunValues.start(self.params, values, fixed, free, bounds)
        else:
            params = self.params.copy()
            if values:
                for k, v in values.items():
                    if k in params and params[k].vary and not params[k].expr:
                        p = params[k]
                        params[k].value = float(min(max(v, p.min), p.max))
                params.update_constraints()
            for k in fixed:
                params[k].vary = False
            for k in free:
                params[k].vary = True
            for k, (lo, hi) in (bounds or {}).items():
                params[k].set(min=max(lo, params[k].min), max=min(hi, params[k].max))
        parts = self.parts
        if masks is not None:
            # A stage on part of the points: each part bound to just those wavelengths
            # (bound once per stage: every start of a stage passes the same masks).
            masks = list(masks)
            cached = self._restricted
            if cached is None or len(cached[0]) != len(masks) \
                    or not all(a is b for a, b in zip(cached[0], masks)):
                cached = (masks, [p if m is None or np.all(m) else p.restricted(m)
                                  for p, m in zip(parts, masks)])
                self._restricted = cached
            self.parts = cached[1]
            self._staged = True
        self._stage_limit = math.inf if max_nfev is None else self.nfev + max_nfev
        self._run_best = (math.inf, None)
        try:
            with np.errstate(all="ignore"):
                if direct:
                    res = self._least_squares(params, **kws)
                else:
                    mini = lmfit.Minimizer(self.residual, params, iter_cb=self.iter_cb,
                                           max_nfev=self.remaining_nfev() + 10 ** 7,
                                           scale_covar=True)
                    res = mini.minimize(method=method, **kws)
        except (lmfit.minimizer.AbortFitException, _RunEnded):
            # Some of lmfit's scalar minimisers let the abort through.
            res = None
        finally:
            self.parts = parts
            self._staged = False
            self._stage_limit = math.inf
        if res is not None and not res.aborted:
            return res
        # Stopped early (budget, stage cap, user): the best point this run saw, not
        # the last one asked for (which may be a Jacobian step).
        chi2, best = self._run_best
        out = params.copy()
        if best is not None:
            for k, v in best.items():
                if k in out and not out[k].expr:
                    out[k].value = v
            if not direct:
                out.update_constraints()
        return RunResult(params=out, aborted=True, success=False, message="stopped early",
                         chisqr=chi2, nfev=self.nfev,
                         var_names=[k for k, p in out.items() if p.vary and not p.expr])
