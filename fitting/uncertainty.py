"""Uncertainties of a fit: covariance from the Jacobian, and a GUM budget.

:func:`jacobian` differentiates the weighted residual (data and priors) with
respect to the varied parameters at the fitted point; the covariance is
C = (JᵀJ)⁻¹ (Press et al. 2007, sec. 15.5), inflated by χ²_red when the
model does not fit within the data's own noise (χ²_red > 1; GUM
practice for a type A evaluation of a model that leaves a misfit, and the
Birge ratio).

:func:`budget` adds the influence quantities a fit of a transmission spectrum
depends on but cannot determine from the spectrum alone - the 100 % line
scale and tilt when they are not fitted, the substrate's index and thickness,
the film's thickness non-uniformity - following the law of propagation of
uncertainty (GUM 5.1.2): each influence X with standard uncertainty u(X) shifts
the fitted parameters by the linearised refit

    δθ = -(JᵀJ)⁻¹ Jᵀ (∂r/∂X) u(X),

so its contribution to a result quantity q(θ) is |∇q · δθ|. Contributions are
combined in quadrature and expanded with k = 2 (GUM 6.2-6.3). One residual
evaluation per influence quantity: cheap next to the fit.

References
----------
.. [1] JCGM 100:2008, *Evaluation of measurement data - Guide to the expression of
       uncertainty in measurement* (GUM), sec. 5.1 and 6.
.. [2] W. H. Press et al., *Numerical Recipes*, 3rd ed., Cambridge (2007), sec. 15.5.
.. [3] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932) (scaling errors by the square root of χ²_red).
"""

from __future__ import annotations

import math

import numpy as np

from .errors import PellucidError
from .result import BudgetItem, Uncertainty

__all__ = ["jacobian", "covariance", "budget", "SUBSTRATE_INDEX_U", "SPREAD_U",
           "SUBSTRATE_THICKNESS_U_MM"]

#: Standard uncertainty of a catalogue glass's index (melt-to-melt tolerance of
#: ±5e-4 on n_d of optical glass datasheets; value from memory).
SUBSTRATE_INDEX_U = 5e-4
#: ... of a substrate given by a constant index or a table (a user's estimate).
SUBSTRATE_INDEX_U_OTHER = 2e-3
#: Standard uncertainty of the thickness of a 1 mm slide (caliper, common practice).
SUBSTRATE_THICKNESS_U_MM = 0.02
#: Relative thickness non-uniformity over the beam spot when it is not fitted (0.5 %
#: rms; common practice for a coating of good uniformity).
SPREAD_U = 0.005


def residual_vector(obj, values: dict) -> np.ndarray:
    """Weighted residuals of every part plus the prior terms, for a dict of values."""
    r = [obj.part_residual(p, obj.local_values(p, values)) for p in obj.parts]
    return np.concatenate(r + [obj.prior_residual(values)])


def _step(p, x: float) -> float:
    span = p.max - p.min
    scale = max(abs(x), 1e-3 * span if math.isfinite(span) else 0.0, 1e-3)
    return 1e-5 * scale


def jacobian(obj, values: dict, names) -> tuple[np.ndarray, np.ndarray]:
    """(r0, J): residual vector at ``values`` and its derivatives (central differences).

    At a bound the difference is one-sided, inwards. Tied parameters follow
    their ties (lmfit's constraint update) through ``obj.tied_values``. Without
    ties the fit's own Jacobian (:meth:`Objective.jacobian`, the chain rule
    through each film's N(λ)) is used: as accurate, for a fraction of the calls.
    """
    r0 = residual_vector(obj, values)
    if not obj.tied:
        return r0, obj.jacobian(values, names, count=False)
    J = np.empty((r0.size, len(names)))
    for j, k in enumerate(names):
        p = obj.params[k]
        x = values[k]
        h = _step(p, x)
        up, dn = x + h, x - h
        if up > p.max:
            up = x
        if dn < p.min:
            dn = x
        ru = residual_vector(obj, obj.tied_values({**values, k: up}))
        rd = residual_vector(obj, obj.tied_values({**values, k: dn}))
        J[:, j] = (ru - rd) / (up - dn)
    return r0, J


def covariance(J: np.ndarray, redchi: float):
    """(C, inflation) with C = (JᵀJ)⁻¹ · max(1, χ²_red), or (None, f) if J is rank-deficient."""
    f = max(1.0, float(redchi)) if math.isfinite(redchi) else 1.0
    if J.size == 0:
        return None, f
    try:
        u, s, vt = np.linalg.svd(J, full_matrices=False)
    except np.linalg.LinAlgError:
        return None, f
    if s.size == 0 or s[-1] <= 1e-12 * s[0]:
        return None, f
    C = (vt.T / s ** 2) @ vt
    return C * f, f


def _solve_shift(J: np.ndarray, dr: np.ndarray) -> np.ndarray:
    """Linearised refit: parameter change that best absorbs a residual change dr."""
    sol, *_ = np.linalg.lstsq(J, -dr, rcond=None)
    return sol


def _influences(obj, values: dict, options):
    """(source, u, note, δr) for each influence quantity this fit does not fit."""
    out = []
    parts = obj.parts
    locs = [obj.local_values(p, values) for p in parts]
    n_prior = len(obj.priors)

    with np.errstate(all="ignore"):
        y0s = [p.evaluate(local) for p, local in zip(parts, locs)]   # the fitted curves

    def dr_of(models) -> np.ndarray:
        rs = [-(y_new - y0) / p.sigma for p, y0, y_new in zip(parts, y0s, models)]
        return np.concatenate(rs + [np.zeros(n_prior)])

    def nuisance(name, u, note):
        models = []
        for p, local, y0 in zip(parts, locs, y0s):
            with np.errstate(all="ignore"):
                base = p.evaluate({**local, "scale": 1.0, "offset": 0.0, "tilt": 0.0})
            shape = base if name == "scale" else base * p.u
            models.append(y0 + u * shape)
        out.append((f"100 % line {name}", u, note, dr_of(models)))

    if "scale" not in obj.var_names:
        u = options.scale_sigma or 0.01
        nuisance("scale", u, f"not fitted; ±{100 * u:g} % assumed")
    if "tilt" not in obj.var_names:
        u = options.tilt_sigma or 0.005
        nuisance("tilt", u, f"not fitted; ±{100 * u:g} % across the range assumed")
    if "thickness_spread" not in obj.var_names:
        models = []
        for p, local in zip(parts, locs):
            old = p.stack.thickness_spread
            p.stack.thickness_spread = min(old + SPREAD_U, 0.3)
            try:
                with np.errstate(all="ignore"):
                    models.append(p.evaluate({k: v for k, v in local.items()
                                              if k != "thickness_spread"}))
            finally:
                p.stack.thickness_spread = old
        out.append(("thickness non-uniformity", SPREAD_U, "not fitted", dr_of(models)))
    for layer in parts[0].stack.layers:
        # A known layer's thickness came from an earlier fit with its own σ: it is an
        # influence quantity of this one (fitting.known keeps it in layer.source).
        src = (getattr(layer, "source", None) or {}).get("thickness") or {}
        u = src.get("stderr")
        key = f"{layer.name}_thickness"
        if not getattr(layer, "known", False) or not isinstance(u, (int, float)) \
                or not math.isfinite(u) or u <= 0:
            continue
        models = []
        for p, local in zip(parts, locs):
            with np.errstate(all="ignore"):
                models.append(p.evaluate({**local, key: local[key] + u}) if key in local
                              else p.evaluate(local))
        out.append((f"{layer.name} thickness (known)", float(u), f"±{u:.3g} nm from its "
                    f"earlier fit", dr_of(models)))
    sub = parts[0].stack.substrate
    catalogue = bool(sub.library) and sub.library != "generic_glass"
    u_n = SUBSTRATE_INDEX_U if catalogue else SUBSTRATE_INDEX_U_OTHER
    try:
        models = [p.evaluate(local, p.model.with_substrate(dn=u_n))
                  for p, local in zip(parts, locs)]
        out.append(("substrate index", u_n, f"±{u_n:g}", dr_of(models)))
        d_mm = SUBSTRATE_THICKNESS_U_MM
        models = [p.evaluate(local, p.model.with_substrate(thickness_nm=(
            p.stack.substrate.thickness_mm + d_mm) * 1e6)) for p, local in zip(parts, locs)]
        out.append(("substrate thickness", d_mm * 1e6, f"±{d_mm:g} mm", dr_of(models)))
    except (PellucidError, AttributeError):
        pass
    return out


def _n_gradient(obj, values: dict, layer_index: int, wl_nm: float, names) -> np.ndarray:
    """∂n(wl)/∂θ of a film of the first part over the varied parameters ``names``."""
    part = obj.parts[0]
    layer = part.stack.layers[layer_index]
    gmap = dict((loc, g) for g, loc in part.names)
    pre = layer.name + "_"
    wl = np.array([wl_nm])

    def n_of(vals):
        lv = {k: vals[gmap[pre + k]] for k in layer.material.params}
        with np.errstate(all="ignore"):
            return float(layer.material.N_unchecked(wl, lv)[0].real)

    g = np.zeros(len(names))
    for j, k in enumerate(names):
        if not k.startswith(pre) or k == pre + "thickness":
            continue
        p = obj.params[k]
        x = values[k]
        h = _step(p, x)
        up, dn = min(x + h, p.max), max(x - h, p.min)
        try:
            g[j] = (n_of(obj.tied_values({**values, k: up}))
                    - n_of(obj.tied_values({**values, k: dn}))) / (up - dn)
        except PellucidError:
            g[j] = 0.0
    return g


def budget(obj, values: dict, J: np.ndarray, C: np.ndarray | None, inflation: float,
           options, *, n_at_nm: float = 633.0) -> dict:
    """Uncertainty budgets of each fitted film thickness and of the first film's n(633).

    Returns a dict quantity -> :class:`~fitting.result.Uncertainty`; empty if the
    covariance is unknown.
    """
    if C is None:
        return {}
    names = list(obj.var_names)
    quantities = []               # (key, value, unit, gradient)
    part = obj.parts[0]
    gmap = dict((loc, g) for g, loc in part.names)
    for layer in part.stack.layers:
        k = gmap.get(f"{layer.name}_thickness")
        if k in names:
            g = np.zeros(len(names))
            g[names.index(k)] = 1.0
            quantities.append((k, values[k], "nm", g))
    films = [i for i, layer in enumerate(part.stack.layers)
             if any(gmap.get(f"{layer.name}_{m}") in names for m in layer.material.params)]
    if films and part.wl.min() <= n_at_nm <= part.wl.max():
        i = films[0]
        layer = part.stack.layers[i]
        lv = {m: values[gmap[f"{layer.name}_{m}"]] for m in layer.material.params}
        try:
            n0 = float(layer.material.N_unchecked(np.array([n_at_nm]), lv)[0].real)
            quantities.append((f"{layer.name}_n@{n_at_nm:g}", n0, "",
                               _n_gradient(obj, values, i, n_at_nm, names)))
        except PellucidError:
            pass
    if not quantities:
        return {}
    redchi = max(inflation, 1.0)
    shifts = []
    for src, u, note, dr in _influences(obj, values, options):
        shift = _solve_shift(J, dr)
        if src == "thickness non-uniformity":
            # A spread acts quadratically (T depends on s²), so its derivative at
            # s = 0 is zero and linear propagation says nothing. Instead: the
            # largest spread the data allow, where the part of its effect that no
            # refit absorbs raises χ² by χ²_red (one standard deviation), capped
            # at the assumed SPREAD_U; its effect scales as (s/SPREAD_U)².
            left = dr + J @ shift
            e0 = float(left @ left)
            s1 = u * min(1.0, (redchi / e0) ** 0.25) if e0 > 0 else u
            shift = shift * (s1 / u) ** 2
            note = f"not fitted; the data allow up to {100 * s1:.2g} % rms"
        shifts.append((src, note, shift))
    fitted_nuis = [k for k in ("scale", "tilt", "thickness_spread") if k in names]
    stat_note = "noise" + (f", with {', '.join(fitted_nuis)} fitted" if fitted_nuis else "")
    if inflation > 1.0:
        stat_note += f"; inflated by √χ²_red = {math.sqrt(inflation):.2f}"
    out = {}
    for key, value, unit, g in quantities:
        items = [BudgetItem("statistical", float(math.sqrt(max(g @ C @ g, 0.0))), stat_note)]
        for src, note, shift in shifts:
            items.append(BudgetItem(src, float(abs(g @ shift)), note))
        u_c = math.sqrt(sum(i.u ** 2 for i in items))
        out[key] = Uncertainty(key, float(value), unit, tuple(items), float(u_c))
    return out


def with_model_choice(unc: Uncertainty, other_value: float, other_model: str) -> Uncertainty:
    """Add a model-choice line: half the difference to the runner-up model, rectangular.

    A rectangular distribution of half-width a has u = a/√3 (GUM 4.3.7).
    """
    a = abs(other_value - unc.value) / 2.0
    item = BudgetItem("model choice", a / math.sqrt(3.0), f"vs {other_model}")
    items = tuple(i for i in unc.items if i.source != "model choice") + (item,)
    return Uncertainty(unc.quantity, unc.value, unc.unit, items,
                       math.sqrt(sum(i.u ** 2 for i in items)), unc.k)
