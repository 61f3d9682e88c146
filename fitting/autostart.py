"""Automatic start of a fit: a fringe seed, then a global scan over film thickness.

A transmission spectrum of a film has many local χ² minima in thickness, one
per interference order. A local minimiser started from a default thickness
lands in whichever basin is nearest. The automatic start avoids that:

1. **Seed.** If the spectrum shows fringes, their extrema give the film index
   in the transparent region and a rough thickness. The envelope method of
   :mod:`fitting.envelope` (Swanepoel 1983) is used when it succeeds;
   otherwise :func:`fringe_seed` does the simplest version of the same thing
   (extrema spacing for the thickness, the quarter-wave extrema against the
   bare substrate for n). The simple seed is preferred when the envelope
   method sees far fewer extrema (its envelopes need clear, resolved fringes)
   and for films below the substrate index (its formulas assume n > s). The
   seed sets the film's index level (and, for Cauchy and Sellmeier, the
   dispersion) by :func:`apply_seed`.
2. **Scan.** χ² is evaluated on a grid of thicknesses finer than one fringe
   order: the step Δd keeps the phase 4πnΔd/λ_min below π/4. The dispersion
   parameters stay at their start, except for the film's index level, tried
   at three values around the seed (at four typical film indices when there
   are no fringes). Scale and offset, if fitted, are solved in closed form at
   every grid point (they enter the model linearly). The scan is vectorised
   over thicknesses, looks only at the nearly transparent fringe region
   (:func:`fringe_region`; with 12 or more extrema only its long-wavelength
   half in wavenumber, with 24 or more its long third, where a dispersion
   error of the start shifts the fringe phase least) and runs on a subsample
   that still resolves the densest fringes.
3. **Basins.** The lowest distinct minima of the scanned χ²(d)
   (:func:`pick_basins`), plus the seed's own thickness, are the starts the
   fit engine polishes: on the growing fringe regions of the scan (long
   third, long half, all of it: a continuation in wavelength that keeps the
   interference order) with the absorption edge held (:func:`edge_params`),
   then on all points with everything free.

References
----------
.. [1] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E 16, 1214 (1983). :DOI:`10.1088/0022-3735/16/12/023`
.. [2] J. C. Manifacier, J. Gasiot and J. P. Fillard, "A simple method for the
       determination of the optical constants n, k and the thickness of a weakly
       absorbing thin film", J. Phys. E 9, 1002 (1976).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq
from scipy.signal import find_peaks

from .errors import PellucidError
from .optics import films_RT_thicknesses, outer_media

__all__ = ["Seed", "fringe_seed", "envelope_seed", "n_level_param", "set_n_level",
           "apply_seed", "scan_thickness", "fringe_region", "ScanResult", "pick_basins",
           "scan_range", "edge_params", "Nuisance", "contrast_levels", "PLAUSIBLE_N_MIN",
           "edge_candidates"]

# Largest number of thickness grid points of one scan; beyond it the step grows
# (a 50 µm film on a UV grid would otherwise need ~10⁴ points).
_MAX_SCAN_POINTS = 6000
# Index levels tried at each thickness, relative to the seed: ±6 % covers the
# error of a rough seed while keeping the grid cheap (common practice).
_N_LEVELS = (-0.06, 0.0, 0.06)
#: Without a seed: index levels spanning the usual dielectric films (fluorides to
#: titania, common practice).
BLIND_LEVELS = (1.45, 1.75, 2.1, 2.5)


#: The lowest index a dense film has (magnesium fluoride, 1.38; porous sol-gel films
#: reach 1.2): below it a result is a mirror of the real film (common practice).
PLAUSIBLE_N_MIN = 1.2


def contrast_levels(n_sub: float) -> list[float]:
    """Index levels for a film close to a substrate of index ``n_sub``: a ladder from
    the densest low-index films to 0.35 above the substrate, leaving out ±0.015
    around it (no fringes there to fit)."""
    below = np.arange(max(PLAUSIBLE_N_MIN + 0.1, n_sub - 0.3), n_sub - 0.015, 0.03)
    above = np.arange(n_sub + 0.02, n_sub + 0.35, 0.04)
    return [float(x) for x in np.round(np.r_[below, above], 4)]


@dataclass
class Seed:
    """What the fringes say before any fit."""

    has_fringes: bool
    thickness_nm: float | None = None
    n_ref: float | None = None
    wl_ref: float | None = None
    n_points: tuple = ()              # (wavelength_nm array, n array) at extrema
    source: str = "none"              # "envelope", "fringes" or "none"
    message: str = ""
    n_extrema: int = 0
    fringe_range_nm: tuple | None = None   # wavelengths spanned by the extrema
    below_substrate: bool = False          # film index below the substrate's (AR-like)


    def to_dict(self) -> dict:
        return {"has_fringes": self.has_fringes, "thickness_nm": self.thickness_nm,
                "n_ref": self.n_ref, "wl_ref": self.wl_ref, "source": self.source,
                "message": self.message, "n_extrema": self.n_extrema,
                "fringe_range_nm": None if self.fringe_range_nm is None
                else list(self.fringe_range_nm), "below_substrate": self.below_substrate}


def _noise(y: np.ndarray) -> float:
    # Second differences remove a smooth signal; var(y[i-1] - 2y[i] + y[i+1]) = 6σ².
    if y.size < 5:
        return 0.0
    d2 = y[:-2] - 2 * y[1:-1] + y[2:]
    return float(1.4826 * np.median(np.abs(d2)) / math.sqrt(6))


def _extrema(y: np.ndarray, prominence: float):
    """(all extrema, maxima, minima) indices with at least this prominence."""
    imax, _ = find_peaks(y, prominence=prominence)
    imin, _ = find_peaks(-y, prominence=prominence)
    return np.sort(np.concatenate([imax, imin])), imax, imin


def fringe_seed(wl: np.ndarray, y: np.ndarray, quantity: str, substrate_n: np.ndarray) -> Seed:
    """Thickness and index of a film from the extrema of its fringes.

    Thickness from the number of extrema k between the first and last one,
    2 n d (1/λ_first - 1/λ_last) = k/2 (adjacent extrema are half an order apart).
    Index from the quarter-wave extrema against the bare substrate (Swanepoel
    1983, eq. 24 with α = 0): M = 2s/T_m - (s² + 1)/2, n² = M ± sqrt(M² - s²),
    the + root where the film index exceeds the substrate's (minima below the
    bare-substrate line), the - root otherwise.
    """
    if wl.size < 12:
        return Seed(False, message="too few points to look for fringes")
    noise = _noise(y)
    # 8σ: the largest of hundreds of noise wiggles reaches about ±3σ, so a 6σ swing
    # of noise alone is common; real fringes worth a seed stand well above it.
    ext, imax, imin = _extrema(y, max(8 * noise, 0.003))
    if ext.size < 3 and wl.size >= 100:
        # Faint, broad fringes (a film close to the substrate's index) can hide in
        # the noise point by point: look again on a Savitzky-Golay smoothed copy
        # (31 points, quadratic), whose noise is σ·|h| (h its coefficients).
        from scipy.signal import savgol_coeffs, savgol_filter
        w = 31
        ys = savgol_filter(y, w, 2)
        h = savgol_coeffs(w, 2)
        again = _extrema(ys, max(8 * noise * float(np.sqrt(h @ h)), 0.0015))
        if again[0].size > ext.size:
            ext, imax, imin = again
    if ext.size < 3:
        return Seed(False, message=f"no interference fringes found ({ext.size} extrema)",
                    n_extrema=int(ext.size))
    s = np.asarray(substrate_n, dtype=float)
    n_ref = wl_ref = None
    n_points: tuple = ()
    high = True
    if quantity == "T":
        Ts = 2 * s / (s * s + 1)
        # Use the long-wavelength half of the extrema, where films absorb least.
        half = wl[ext].min() + 0.5 * (wl[ext].max() - wl[ext].min())
        mx = imax[wl[imax] >= half] if np.any(wl[imax] >= half) else imax
        mn = imin[wl[imin] >= half] if np.any(wl[imin] >= half) else imin
        dev_max = np.mean(np.abs(y[mx] - Ts[mx])) if mx.size else 0.0
        dev_min = np.mean(np.abs(y[mn] - Ts[mn])) if mn.size else 0.0
        qw, high = (mn, True) if dev_min >= dev_max else (mx, False)
        if qw.size:
            ss, Tm = s[qw], np.clip(y[qw], 1e-3, 0.999)
            M = np.maximum(2 * ss / Tm - (ss * ss + 1) / 2, ss)
            root = np.sqrt(np.maximum(M * M - ss * ss, 0.0))
            n = np.sqrt(M + root) if high else np.sqrt(np.maximum(M - root, 1.0))
            n_points = (wl[qw], n)
            n_ref, wl_ref = float(np.median(n)), float(np.median(wl[qw]))
    n_use = n_ref if n_ref else 2.0
    lam = wl[ext]
    k = ext.size - 1
    d = k / (4 * n_use * (1 / lam[0] - 1 / lam[-1]))
    return Seed(True, float(d), n_ref, wl_ref, n_points, "fringes",
                f"{ext.size} fringe extrema between {lam[0]:.0f} and {lam[-1]:.0f} nm",
                int(ext.size), (float(lam[0]), float(lam[-1])), below_substrate=not high)


def envelope_seed(wl, y, quantity, substrate_n) -> Seed | None:
    """Seed from :func:`fitting.envelope.swanepoel_envelope`.

    Returns None when the envelope method fails, so the caller falls back to
    :func:`fringe_seed`.
    """
    if quantity != "T":
        return None
    from .envelope import swanepoel_envelope
    try:
        env = swanepoel_envelope(wl, y, substrate_n)
    except Exception:  # a seed is optional: any failure means "use the fallback"
        return None
    if not getattr(env, "ok", False) or not env.thickness_nm or not np.isfinite(env.thickness_nm):
        return None
    lam = np.asarray(getattr(env, "wavelength_nm", ()), dtype=float)
    n = np.asarray(getattr(env, "n", ()), dtype=float)
    good = np.isfinite(lam) & np.isfinite(n) & (n > 1.0)
    lam, n = lam[good], n[good]
    if n.size == 0:
        return None
    long = lam >= np.median(lam)
    return Seed(True, float(env.thickness_nm), float(np.median(n[long])),
                float(np.median(lam[long])), (lam, n), "envelope",
                str(getattr(env, "message", "")), int(lam.size),
                (float(lam.min()), float(lam.max())))


# -- the film's index level ------------------------------------------------------------
def n_level_param(material) -> str | None:
    """The parameter that shifts a material's index up and down, if it is free."""
    cand = material.level_param
    p = material.params.get(cand) if cand else None
    if p is None or not p.vary or p.expr:
        return None
    return cand


def _n_at(material, wl_ref: float, local: dict) -> float:
    try:
        return float(material.N_unchecked(np.array([wl_ref]), local)[0].real)
    except Exception:  # impossible parameter combination while bracketing
        return float("nan")


def set_n_level(material, local: dict, name: str, target_n: float, wl_ref: float) -> float:
    """Value of ``name`` that gives n(wl_ref) = target_n (bisection within the bounds)."""
    p = material.params[name]
    lo = p.min if math.isfinite(p.min) else local[name] - 10 * max(abs(local[name]), 1.0)
    hi = p.max if math.isfinite(p.max) else local[name] + 10 * max(abs(local[name]), 1.0)
    f = lambda x: _n_at(material, wl_ref, {**local, name: x}) - target_n  # noqa: E731
    flo, fhi = f(lo), f(hi)
    if not (np.isfinite(flo) and np.isfinite(fhi)) or flo * fhi > 0:
        # Target outside what the bounds allow: take the closer end.
        return lo if abs(flo if np.isfinite(flo) else np.inf) < abs(
            fhi if np.isfinite(fhi) else np.inf) else hi
    # Brent's method needs ~10 model calls where bisection to the same 1e-11 needs 40
    # (Brent, Algorithms for Minimization without Derivatives, 1973, ch. 4); the
    # bisection stays for a model that fails inside the bracket.
    try:
        x = brentq(f, lo, hi, xtol=1e-12)
    except (ValueError, RuntimeError):
        x = math.nan
    if math.isfinite(x) and np.isfinite(f(x)):
        return float(x)
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        fm = f(mid)
        if not np.isfinite(fm):
            break
        if fm * flo > 0:
            lo, flo = mid, fm
        else:
            hi = mid
    return 0.5 * (lo + hi)


def edge_params(material) -> tuple:
    """Parameters of a material that mostly set its absorption edge, not n in the clear.

    The fringes of the transparent region say little about them, so the first
    stage of a fit holds them at their start (each model names its own:
    :meth:`fitting.dispersion.Dispersion.edge_params`).
    """
    return material.edge_params()


def apply_seed(material, local: dict, seed: Seed, free=None) -> dict:
    """Start values of a film's material from a seed (a copy of ``local``, updated).

    With n at three or more extrema spanning a useful range, the index level
    and one shape parameter (Cauchy B, the first oscillator's strength ...) are
    fitted to those n values by bounded least squares; otherwise only the level
    is set so that n(λ_ref) matches the seed.
    """
    from scipy.optimize import least_squares

    out = dict(local)
    if not seed.n_ref:
        return out
    free = set(material.params) if free is None else set(free)
    level = n_level_param(material)
    if level is None or level not in free:
        return out
    out[level] = set_n_level(material, out, level, seed.n_ref, seed.wl_ref)
    lam, n = seed.n_points if seed.n_points else ((), ())
    lam, n = np.asarray(lam, float), np.asarray(n, float)
    names = [level] + [k for k in material.shape_params
                       if k in material.params and k in free and material.params[k].vary
                       and not material.params[k].expr][:1]
    if len(names) < 2 or n.size < 3 or lam.max() / lam.min() < 1.3:
        return out
    # Seed n rising with wavelength is not a film's normal dispersion but a sign of
    # damped fringes (absorption, thickness spread) misread as low n: level only.
    if np.polyfit(1.0 / lam ** 2, n, 1)[0] <= 0:
        return out
    lo = np.array([material.params[k].min for k in names])
    hi = np.array([material.params[k].max for k in names])
    x0 = np.clip([out[k] for k in names], lo, hi)

    def f(x):
        try:
            with np.errstate(all="ignore"):
                r = material.N_unchecked(lam, {**out, **dict(zip(names, x))}).real - n
        except Exception:  # impossible combination while searching
            return np.full(n.size, 10.0)
        return np.where(np.isfinite(r), r, 10.0)

    try:
        sol = least_squares(f, x0, bounds=(lo, hi), x_scale="jac", max_nfev=200)
    except ValueError:
        return out
    if np.sqrt(np.mean(sol.fun ** 2)) < np.sqrt(np.mean(f(x0) ** 2)):
        out.update({k: float(v) for k, v in zip(names, sol.x)})
    return out


# -- the absorption edge -----------------------------------------------------------------
def _edge_energy(edge, wl_min: float, wl_max: float) -> float | None:
    """Photon energy (eV) where αd ≈ 1 on the short-wavelength edge, from the data."""
    from .units import HC_EV_NM
    if edge is None or not edge.absorbs:
        return None
    lo = edge.clear_nm[0] if edge.clear_nm is not None else wl_max
    sel = edge.wavelength_nm < lo
    if sel.any():
        wl, ad = edge.wavelength_nm[sel], edge.alpha_d[sel]
        i = int(np.argmin(np.abs(np.log(np.maximum(ad, 1e-3)))))
        return float(HC_EV_NM / wl[i])
    if edge.opaque_below_nm is not None:
        return float(HC_EV_NM / edge.opaque_below_nm)
    return None


def edge_candidates(material, local: dict, edge, seed: Seed, free, wl_min: float,
                    wl_max: float) -> list[dict]:
    """Start values of a film's absorption from the measured edge, one per edge shape.

    The model's α is fitted to the edge estimates of
    :func:`fitting.edge.alpha_targets` (log α; one-sided in the clear and the
    opaque parts) together with the fringe seed's n, from a few typical edge
    shapes. Returns copies of ``local``, the best-matching first; the caller
    chooses between them on the spectrum itself. Models without an absorption
    edge (Cauchy without a tail, Sellmeier) give ``[local]``.
    """
    from .edge import alpha_targets, target_arrays, target_residuals_and_slopes
    from .trust_region import trf
    from .units import HC_EV_NM, alpha_per_cm
    if edge is None or not seed.thickness_nm:
        return [dict(local)]
    free = set(free)
    E_edge = _edge_energy(edge, wl_min, wl_max)
    starts = material.edge_starts(local, E_edge, HC_EV_NM / wl_min)
    names = [k for k in material.edge_fit_params() if k in free]
    level = n_level_param(material)
    if names and level is not None and level in free:
        names.append(level)
    if not names or not starts:
        return [dict(local)]
    targets = alpha_targets(edge, seed.thickness_nm, wl_min, wl_max)
    lam_t = np.array([t[0] for t in targets])
    lam_n, n_n = (np.asarray(a, float) for a in (seed.n_points or ((), ())))
    if n_n.size == 0 and seed.n_ref:
        lam_n, n_n = np.array([seed.wl_ref]), np.array([seed.n_ref])
    if edge.clear_nm is not None and lam_n.size > 1:
        # The envelope's n is good where the film is clear; on the edge, where it
        # absorbs, the extrema shift with the falling T and n comes out low (Swanepoel
        # 1983 assumes weak absorption), bending the oscillator the wrong way.
        keep = lam_n >= edge.clear_nm[0]
        if not keep.any():
            keep = lam_n == lam_n.max()
        lam_n, n_n = lam_n[keep], n_n[keep]
    lo = np.array([material.params[k].min for k in names])
    hi = np.array([material.params[k].max for k in names])

    lam_all = np.r_[lam_t, lam_n]          # one model call for both sets of points
    t_arrays = target_arrays(targets)
    n_t = lam_t.size

    def priors(base):
        out = []
        for k in names:
            tail = k.rsplit("_", 1)[-1]
            if tail == "A" and k != "A":
                out.append((k, 100.0, 1.5))
            elif tail in ("C", "E0") and k != "C":
                out.append((k, base[k], 0.7 if tail == "C" else 0.3))
        return out

    def model(x, base):
        v = {**base, **dict(zip(names, (float(t) for t in x)))}
        try:
            with np.errstate(all="ignore"):
                return v, material.N_unchecked(lam_all, v)
        except Exception:  # impossible combination while searching
            return v, None

    last = {}          # the point resid saw last: jac is asked there next (trf)

    def resid(x, base, pri):
        v, N_all = model(x, base)
        if N_all is None:
            return np.full(lam_all.size + len(pri), 10.0)
        a = alpha_per_cm(np.maximum(N_all[:n_t].imag, 0.0), lam_t)
        # n from the fringes is good to about 0.03, α from the envelope to a factor
        # of about 2.7 (one unit of log α); weak priors (log-normal) keep an
        # oscillator typical where the data say little: amplitude near 100 eV, C
        # and E0 near the shape's.
        r_t, slope = target_residuals_and_slopes(a, t_arrays)
        last.update(x=x.tobytes(), base=base, v=v, N=N_all, slope=slope)
        r = np.concatenate([r_t, (N_all[n_t:].real - n_n) / 0.03,
                            [math.log(max(v[k], 1e-9) / ref) / w for k, ref, w in pri]])
        return np.where(np.isfinite(r), r, 10.0)

    def jac(x, base, pri):
        # Exact through the chain rule: d log α = dκ/κ, dn, and the priors' 1/(x w).
        if last.get("x") == x.tobytes() and last["base"] is base:
            v, N_all, slope = last["v"], last["N"], last["slope"]
        else:
            v, N_all = model(x, base)
            slope = None
        J = np.zeros((lam_all.size + len(pri), len(names)))
        if N_all is None:
            return J
        try:
            dN = material.dN(lam_all, v, names, N_all)
        except PellucidError:
            return J
        kap = N_all[:n_t].imag
        if slope is None:
            _, slope = target_residuals_and_slopes(
                alpha_per_cm(np.maximum(kap, 0.0), lam_t), t_arrays)
        with np.errstate(all="ignore"):
            J[:n_t] = (slope * np.where(kap > 0, 1.0 / kap, 0.0))[:, None] * dN[:, :n_t].imag.T
        J[n_t:lam_all.size] = dN[:, n_t:].real.T / 0.03
        col = {k: j for j, k in enumerate(names)}
        for i, (k, _, w) in enumerate(pri):
            J[lam_all.size + i, col[k]] = 1.0 / (max(v[k], 1e-9) * w) if v[k] > 1e-9 else 0.0
        J[~np.isfinite(J)] = 0.0
        return J

    found = []
    for st in starts:
        base = {**local, **st}
        if level := n_level_param(material):
            if level in free and seed.n_ref:
                base[level] = set_n_level(material, base, level, seed.n_ref, seed.wl_ref)
        x0 = np.clip([base[k] for k in names], lo, hi)
        try:
            # A start needs the right neighbourhood, not the last digit: with the exact
            # Jacobian 15 steps reach it (every validation and demo result is
            # the same as with 50).
            sol = trf(resid, jac, x0, lo, hi, args=(base, priors(base)), x_scale="jac",
                      max_nfev=15, ftol=1e-3, xtol=1e-3)
        except ValueError:
            continue
        found.append((float(sol.cost), {**base, **dict(zip(names, (float(v) for v in sol.x)))}))
    return [v for _, v in sorted(found, key=lambda t: t[0])] or [dict(local)]


# -- the scan ----------------------------------------------------------------------------
@dataclass
class ScanResult:
    """χ² over the thickness grid (rows: index levels) and the level values."""

    thickness_nm: np.ndarray
    chisqr: np.ndarray                      # shape (levels, K)
    levels: list = field(default_factory=list)   # dicts of local material values per level


def scan_range(seed: Seed, bounds: tuple[float, float], wl_min: float, wl_max: float,
               user: tuple[float, float] | None = None, *,
               faint: bool = False) -> tuple[float, float]:
    """Thickness range of the scan: user choice, else from the seed and the layer bounds.

    With fringes: 5 nm to twice the seed's thickness. ``faint`` fringes (a film
    close to the substrate's index) stand barely above the noise: missed
    extrema make the seed too thin by any factor, so the scan goes to three
    times the seed and at least 2 µm. Without (fewer than three
    extrema): k extrema in [λ1, λ2] mean 4nd(1/λ1 - 1/λ2) < k + 2, so with n no
    lower than 1.4 the film is thinner than (k + 2)/(5.6 (1/λ1 - 1/λ2)); at
    least 1 µm is scanned (a film matched in index to the substrate shows no
    fringes at any thickness).
    """
    lo_b, hi_b = bounds
    if user is not None:
        lo, hi = float(user[0]), float(user[1])
    elif seed.has_fringes and seed.thickness_nm:
        lo, hi = 5.0, 2.0 * seed.thickness_nm + 50.0
        if faint:
            hi = max(3.0 * seed.thickness_nm + 50.0, 2000.0)
    else:
        span = 1.0 / wl_min - 1.0 / wl_max
        lo, hi = 5.0, max((seed.n_extrema + 2) / (5.6 * span), 1000.0)
    lo, hi = max(lo, lo_b), min(hi, hi_b)
    if hi <= lo:
        lo, hi = lo_b, min(hi_b, max(lo_b * 2, lo_b + 1000.0))
    return lo, hi


def _subsample(wl: np.ndarray, n_hi: float, d_max: float) -> np.ndarray:
    """Indices of a subsample with at least 5 points per fringe at thickness d_max.

    Fringes are periodic in 1/λ with period 1/(2nd), i.e. λ²/(2nd) in λ: the
    subsample is denser at short wavelengths, where fringes are closest.
    """
    W = wl.size
    if W < 64:
        return np.arange(W)
    need = wl * wl / (10 * n_hi * max(d_max, 1.0))     # wanted spacing at each λ
    idx, last = [0], wl[0]
    for i in range(1, W):
        if wl[i] - last >= need[i] * 0.999:
            idx.append(i)
            last = wl[i]
    if len(idx) < 48:         # thin films: keep enough points for a smooth χ²
        return np.unique(np.linspace(0, W - 1, min(W, 48)).astype(int))
    return np.asarray(idx)


def fringe_region(part, material, local: dict, wl_range, d_typical) -> np.ndarray | None:
    """Used points inside ``wl_range`` where the film at ``local`` is nearly transparent.

    "Nearly transparent": one pass through ``d_typical`` absorbs under 20 %
    (4πκd/λ < 0.22). Returns None (use every point) if fewer than 24 remain.
    """
    if wl_range is None:
        return None
    keep = (part.wl >= wl_range[0]) & (part.wl <= wl_range[1])
    if d_typical:
        with np.errstate(all="ignore"):
            kap = material.N_unchecked(part.wl, local).imag
        keep &= 4 * np.pi * kap * d_typical / part.wl < 0.22
    return keep if keep.sum() >= 24 else None


def scan_thickness(parts, layer_index: int, local_start: list[dict], d_grid: np.ndarray,
                   level_name: str | None, n_ref: float, wl_ref: float,
                   nuisance: Nuisance | None = None, check=None, chunk: int = 256,
                   wl_range: tuple | None = None, d_typical: float | None = None,
                   candidates: list | None = None) -> ScanResult:
    """χ²(d) of the first varied film over ``d_grid``, vectorised over thickness.

    Parameters
    ----------
    parts : list of Part
        Parts whose scanned film shares this thickness (their χ² add).
    layer_index : int
        Index of the scanned film in each part's stack.
    local_start : list of dict
        Each part's local parameter values at the start.
    d_grid : ndarray of shape (K,)
    level_name : str or None
        Parameter of the film's material setting its index level; None: one level.
    n_ref : float or sequence of float
        Index level at the seed (tried at ±6 %), or the list of levels to try.
    wl_ref : float
        Wavelength the index levels refer to.
    nuisance : Nuisance or None
        Scale, tilt and offset solved in closed form at every grid point (with
        their priors); None: none of them.
    check : callable or None
        Called between chunks; may raise to abort.
    wl_range : (float, float) or None
        Wavelengths the scan looks at (the fringe region); None: all used points.
    candidates : list of dict or None
        Complete local values of the film's material to scan instead of index
        levels (absorption-edge shapes to choose between).
    d_typical : float or None
        Typical film thickness (the seed's). Where the film at its start values
        would absorb more than 20 % in one pass at this thickness, the scan
        leaves the points out: an absorption edge not yet fitted would favour
        thin films there whatever the fringes say.
    """
    mat0 = parts[0].stack.layers[layer_index].material
    pre = parts[0].stack.layers[layer_index].name + "_"
    base_local = {k: local_start[0][pre + k] for k in mat0.params}
    levels = [base_local]
    if candidates:
        levels = [dict(c) for c in candidates]
        n_ref = max(float(np.max(mat0.N_unchecked(parts[0].wl, c).real)) for c in levels)
    elif level_name is not None:
        targets = n_ref if np.ndim(n_ref) else [n_ref * (1 + dl) for dl in _N_LEVELS]
        levels = [{**base_local, level_name: set_n_level(mat0, base_local, level_name,
                                                        float(t), wl_ref)} for t in targets]
        n_ref = float(np.max(targets))
    chi = np.zeros((len(levels), d_grid.size))
    for part, start in zip(parts, local_start):
        st = part.stack
        n_hi = 1.15 * n_ref * (1 + max(_N_LEVELS))
        keep = fringe_region(part, mat0, base_local, wl_range, d_typical)
        sel = np.arange(part.wl.size) if keep is None else np.flatnonzero(keep)
        idx = sel[_subsample(part.wl[sel], n_hi, float(d_grid.max()))]
        wl, y, w = part.wl[idx], part.y[idx], 1.0 / part.sigma[idx] ** 2
        W = wl.size
        N_amb, N_sub, N_exit = st.ambient.N(wl), st.substrate.N(wl), st.exit_medium.N(wl)
        Ns, ds = [], []
        for layer in st.layers:
            p = layer.name + "_"
            Ns.append(layer.material.N_unchecked(wl, {k: start[p + k]
                                                      for k in layer.material.params}))
            ds.append(start[p + "thickness"])
        angle = math.radians(start.get("angle_deg", part.angle_deg))
        scale0, offset0 = start.get("scale", 1.0), start.get("offset", 0.0)
        tilt0, u = start.get("tilt", 0.0), part.u[idx]
        mat = st.layers[layer_index].material
        # Vectorised over thickness: interfaces once on the W wavelengths, phases and
        # the Airy recursion on chunks of k thicknesses × W.
        k = max(1, min(chunk, d_grid.size, 200000 // max(W, 1)))
        outer = outer_media(wl, N_amb, N_sub, st.substrate.thickness_nm, N_exit,
                            angle_rad=angle, polarization=part.polarization)
        for li, lv in enumerate(levels):
            Ns[layer_index] = mat.N_unchecked(wl, lv)
            for a in range(0, d_grid.size, k):
                if check is not None:
                    check()
                dd = list(ds)
                dd[layer_index] = d_grid[a:a + k]
                with np.errstate(all="ignore"):
                    R, T = films_RT_thicknesses(outer, Ns, dd, want_R=part.quantity != "T")
                m = T if part.quantity == "T" else R
                kk = m.shape[0]
                chi[li, a:a + kk] += _profiled_chi2(m, y, w, u, nuisance or Nuisance(),
                                                    scale0, tilt0, offset0)
    chi[~np.isfinite(chi)] = np.inf
    return ScanResult(d_grid, chi, levels)


@dataclass(frozen=True)
class Nuisance:
    """Which linear nuisance terms a scan solves for, and their priors.

    The model is (s + t·u)·M + o (see :mod:`fitting.objective`); scale s, tilt t
    and offset o enter linearly, so at every scanned thickness they are solved in
    closed form (weighted linear least squares, with the Gaussian priors of the
    fit as extra rows), which is what profiling them out of χ² means.
    """

    scale: bool = False
    tilt: bool = False
    offset: bool = False
    scale_sigma: float | None = None
    tilt_sigma: float | None = None

    @classmethod
    def from_options(cls, options) -> Nuisance:
        return cls(bool(options.fit_scale), bool(getattr(options, "fit_tilt", False)),
                   bool(options.fit_offset), getattr(options, "scale_sigma", None),
                   getattr(options, "tilt_sigma", None))


# Bounds the closed-form nuisance solution is clipped to (those of fitting.objective).
_NUISANCE_BOUNDS = {"scale": (0.7, 1.3), "tilt": (-0.1, 0.1), "offset": (-0.2, 0.2)}


def _profiled_chi2(m, y, w, u, nuis: Nuisance, s0=1.0, t0=0.0, o0=0.0):
    """χ² of each row of ``m`` with the free nuisance terms solved by weighted linear LSQ.

    Parameters
    ----------
    m : ndarray of shape (K, W)
        Modelled T or R of K candidate films on W wavelengths.
    y, w, u : ndarray of shape (W,)
        Measured values, weights 1/σ² and the tilt abscissa (-1/2 ... 1/2).
    nuis : Nuisance
    s0, t0, o0 : float
        Values of the terms that are not solved for.
    """
    m = np.atleast_2d(m)
    K = m.shape[0]
    cols, prior = [], []             # design columns (K, W) and (mean, 1σ) per column
    fixed = np.zeros_like(m) + o0 * (not nuis.offset)
    if nuis.scale:
        cols.append(("scale", m))
        prior.append((1.0, nuis.scale_sigma))
    else:
        fixed = fixed + s0 * m
    if nuis.tilt:
        cols.append(("tilt", m * u))
        prior.append((0.0, nuis.tilt_sigma))
    else:
        fixed = fixed + t0 * m * u
    if nuis.offset:
        cols.append(("offset", np.ones_like(m)))
        prior.append((0.0, None))
    target = y - fixed
    if not cols:
        r = target
        return (r * r) @ w
    X = np.stack([c for _, c in cols], axis=1)          # (K, P, W)
    P = X.shape[1]
    A = np.einsum("kpw,kqw,w->kpq", X, X, w)
    b = np.einsum("kpw,kw,w->kp", X, target, w)
    for i, (mu, sd) in enumerate(prior):
        if sd:
            A[:, i, i] += 1.0 / sd ** 2
            b[:, i] += mu / sd ** 2
    # Regularise degenerate rows (a film giving M = 0) so the solve never fails.
    A += 1e-12 * np.eye(P)[None]
    try:
        beta = np.linalg.solve(A, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        beta = np.array([[mu for mu, _ in prior]] * K, dtype=float)
    for i, (name, _) in enumerate(cols):
        beta[:, i] = np.clip(beta[:, i], *_NUISANCE_BOUNDS[name])
    r = target - np.einsum("kpw,kp->kw", X, beta)
    chi = (r * r) @ w
    for i, (mu, sd) in enumerate(prior):
        if sd:
            chi = chi + ((beta[:, i] - mu) / sd) ** 2
    return chi


def pick_basins(scan: ScanResult, n_max: int = 3, *, n_of_level=None,
                same_nd: float = 0.0) -> list[tuple[float, dict, float]]:
    """The ``n_max`` lowest distinct minima of the scanned χ²: (d, level values, χ²).

    Minima are looked for along d in every index level. Because fringes fix the
    optical thickness n·d, the same interference order shows up at each level
    at a slightly different d; minima whose n·d differ by less than ``same_nd``
    (``n_of_level`` gives each level's n) count as one basin, the lowest kept.
    """
    cands = []
    K = scan.thickness_nm.size
    for li, row in enumerate(scan.chisqr):
        if K == 0:
            break
        left = np.r_[np.inf, row[:-1]]
        right = np.r_[row[1:], np.inf]
        for i in np.flatnonzero((row <= left) & (row <= right) & np.isfinite(row)):
            cands.append((float(row[i]), float(scan.thickness_nm[i]), li))
    cands.sort()
    out, nds, ds = [], [], []
    step = float(np.ptp(scan.thickness_nm)) / max(K - 1, 1)
    for chi, d, li in cands:
        nd = d * (n_of_level[li] if n_of_level is not None else 1.0)
        # Same order at another level, or the same thickness at another level.
        if any(abs(nd - x) < same_nd for x in nds) or any(abs(d - x) < 1.5 * step for x in ds):
            continue
        nds.append(nd)
        ds.append(d)
        out.append((d, scan.levels[li], chi))
        if len(out) >= n_max:
            break
    return out
