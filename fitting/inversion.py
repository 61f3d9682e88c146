"""Point-by-point inversion: n and κ of one film at every wavelength, no dispersion model.

With the film's thickness known (from a model fit or the envelope method) and
every other layer fixed, T(λ) and R(λ) at one wavelength are two equations for
the two unknowns n(λ), κ(λ). They have many solutions: the film's phase
4πnd/λ repeats, so besides the physical n there are others about λ/(2d) apart.
The inversion therefore walks the spectrum from the long-wavelength end, where
the film is transparent and a start value is easy, and at each wavelength
starts the 2x2 solve (Newton, with scipy's bounded least squares as the
fallback where Newton does not reach an exact solution, e.g. where noise puts
R + T beyond what any κ >= 0 allows) from the extrapolation of the solutions
already found (continuation along the physically continuous branch). A
solution that lands far from that prediction is a branch jump: it is retried
from neighbouring candidate starts and the one closest to the prediction is
kept; if none is close, the point is marked not ok and the walk goes on from
the prediction.

**T only.** One equation cannot give two unknowns. Pellucid then takes n(λ)
from a smooth prior (a dispersion model or array the caller gives, by default
the Cauchy curve of the envelope method, which needs fringes) and solves κ(λ)
alone from T. Where the film is transparent this reproduces the prior's n and
gives κ ≈ 0; near the edge κ follows the data, n stays the prior's.

The result is checked with :func:`fitting.kramers_kronig.kk_consistency`: an
inversion that followed a wrong branch, or data with a systematic error, give
n and κ that no causal material has.

Forward calculations use :mod:`fitting.optics` (the transfer-matrix engine of
:class:`fitting.stack.Stack`), including its thickness-spread averaging.
The spectral bandwidth of the stack is not applied (it couples neighbouring
wavelengths, which a point-by-point solution cannot).

References
----------
.. [1] J. C. Manifacier, J. Gasiot and J. P. Fillard, "A simple method for the
       determination of the optical constants n, k and the thickness of a weakly
       absorbing thin film", J. Phys. E 9, 1002 (1976).
.. [2] D. P. Arndt et al., "Multiple determination of the optical constants of
       thin-film coating materials", Appl. Opt. 23, 3571 (1984) (the ambiguity of
       the (T, R) inversion and the choice of the continuous branch).
.. [3] J. A. Dobrowolski, F. C. Ho and A. Waldorf, "Determination of optical
       constants of thin film coating materials based on inverse synthesis",
       Appl. Opt. 22, 3191 (1983).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from .dispersion import Dispersion, check_wavelengths
from .params import check_finite
from .errors import FitError, ParameterError, PellucidError
from .kramers_kronig import KKCheck, kk_consistency
from .optics import stack_RT

__all__ = ["InversionResult", "invert_point_by_point"]

_GH_X, _GH_W = np.polynomial.hermite_e.hermegauss(7)
_GH_W = _GH_W / _GH_W.sum()
_N_BOUNDS = (0.05, 15.0)
_K_BOUNDS = (0.0, 15.0)


@dataclass(frozen=True)
class InversionResult:
    """n and κ of one film from point-by-point inversion.

    Attributes
    ----------
    wavelength_nm, n, k : ndarray of shape (N,)
        On the input grid (input order). Points not ok hold the best solution
        found, so curves stay plottable; use ``ok`` to select.
    residual : ndarray of shape (N,)
        RMS of (model - data) over the quantities used, per point.
    ok : ndarray of bool, shape (N,)
        Solved, on the continuous branch, with T above ``min_T``.
    message : str
    mode : {"T+R", "T"}
        "T": κ from T with n from the prior.
    layer : str
    thickness_nm : float
    kk : KKCheck or None
        Kramers-Kronig check of the ok points (None if too few).
    n_sigma, k_sigma : ndarray of shape (N,)
        1σ of n and κ for a photometric noise ``sigma_data`` on T (and R), from
        the local Jacobian (first order). Large where the data barely depend on
        n, as at fringe extrema of a clear film; n_sigma is NaN in "T" mode
        (n is the prior there).
    """

    wavelength_nm: np.ndarray
    n: np.ndarray
    k: np.ndarray
    residual: np.ndarray
    ok: np.ndarray
    message: str
    mode: str
    layer: str
    thickness_nm: float
    kk: KKCheck | None = None
    n_sigma: np.ndarray | None = None
    k_sigma: np.ndarray | None = None


class _PointModel:
    """R, T of the stack at one grid wavelength with the chosen film's N replaced."""

    def __init__(self, stack, layer_name, wl, angle_deg, polarization):
        names = [layer.name for layer in stack.layers]
        if layer_name not in names:
            raise ParameterError("layer_name", layer_name,
                                 f"no such layer; the stack has {', '.join(names) or 'none'}")
        if not 0 <= angle_deg < 90:
            raise ParameterError("angle_deg", angle_deg, "angle of incidence must be in [0, 90)")
        self.j = names.index(layer_name)
        self.wl = wl
        self.N_amb = stack.ambient.N(wl)
        self.N_exit = stack.exit_medium.N(wl)
        self.N_sub = stack.substrate.N(wl)
        self.sub_d = stack.substrate.thickness_nm
        self.N_films = [None if i == self.j else layer.material.N(wl)
                        for i, layer in enumerate(stack.layers)]
        self.d = [layer.thickness.value for layer in stack.layers]
        self.spread = stack.thickness_spread
        self.angle = math.radians(angle_deg)
        self.pol = polarization

    def RT_many(self, i, N):
        """R, T at grid point ``i`` for an array of trial indices N of the film."""
        N = np.atleast_1d(np.asarray(N, complex))
        rep = lambda a: np.full(N.shape, a[i])  # noqa: E731
        Ns = [N if f is None else rep(f) for f in self.N_films]
        args = (rep(self.wl).real, rep(self.N_amb))
        tail = (rep(self.N_sub), self.sub_d, rep(self.N_exit))
        if self.spread > 0:
            R = T = 0.0
            for x, w in zip(_GH_X, _GH_W):
                Ri, Ti = stack_RT(*args, Ns, [d * (1 + self.spread * x) for d in self.d], *tail,
                                  angle_rad=self.angle, polarization=self.pol)
                R, T = R + w * Ri, T + w * Ti
            return R, T
        return stack_RT(*args, Ns, self.d, *tail, angle_rad=self.angle, polarization=self.pol)

    def RT(self, i, N):
        R, T = self.RT_many(i, N)
        return R[0], T[0]

    def RT_grid(self, idx, N):
        """R, T at grid points ``idx`` with the film index N (array over idx)."""
        Ns = [N if f is None else f[idx] for f in self.N_films]
        args = (self.wl[idx], self.N_amb[idx])
        tail = (self.N_sub[idx], self.sub_d, self.N_exit[idx])
        if self.spread > 0:
            R = T = 0.0
            for x, w in zip(_GH_X, _GH_W):
                Ri, Ti = stack_RT(*args, Ns, [d * (1 + self.spread * x) for d in self.d],
                                  *tail, angle_rad=self.angle, polarization=self.pol)
                R, T = R + w * Ri, T + w * Ti
            return R, T
        return stack_RT(*args, Ns, self.d, *tail, angle_rad=self.angle, polarization=self.pol)

    def T_grid(self, idx, N):
        return self.RT_grid(idx, N)[1]


def _prior_on_grid(n_prior, wl):
    if n_prior is None:
        return None
    if isinstance(n_prior, Dispersion):
        return np.real(n_prior.N(wl))
    a = np.asarray(n_prior, dtype=float)
    if a.shape != wl.shape or not np.all(np.isfinite(a)):
        raise ParameterError("n_prior", f"shape {a.shape}",
                             f"must be a dispersion model or finite n on the grid {wl.shape}")
    return a


def _envelope_prior(stack, model, wl, T):
    """Smooth n(λ) prior for T-only inversion when the caller gives none.

    The envelope method's Cauchy curve (Swanepoel 1983) is refined by a
    least-squares fit of n = A + B/λ² + C/λ⁴ with κ = 0 to T where the film is
    transparent (the upper envelope within 1 % of its highest value, where
    Swanepoel's eq. A holds best), at the stack's fixed thickness: the envelope
    n alone is good to ~1 %, not enough to put the fringes of a micron-thick
    film in the right place.
    """
    from .envelope import cauchy_start, swanepoel_envelope
    env = swanepoel_envelope(wl, T, np.real(model.N_sub))
    if not env.ok:
        raise FitError("point-by-point inversion from T alone needs n from somewhere: "
                       f"the envelope method found none ({env.message}); give n_prior "
                       "(a dispersion model or an n array) or measure R as well")
    c = cauchy_start(env)
    lu2 = (wl * 1e-3) ** 2
    TM = env.T_max_env
    top = np.nanmax(TM)
    clear = np.isfinite(TM) & (TM >= 0.99 * top)
    # Past the longest extremum the film is at least as transparent.
    clear |= wl >= env.wavelength_nm.max()
    idx = np.flatnonzero(clear)
    x0 = np.array([c["A"], c["B"], 0.0])
    if idx.size >= 8:
        def resid(p):
            N = p[0] + p[1] / lu2[idx] + p[2] / lu2[idx] ** 2 + 0j
            return model.T_grid(idx, N) - T[idx]
        sol = least_squares(resid, x0, x_scale=[0.1, 0.01, 0.001], method="lm")
        x0 = sol.x
    return x0[0] + x0[1] / lu2 + x0[2] / lu2 ** 2


def invert_point_by_point(stack, layer_name: str, wavelength_nm, T, R=None, *,
                          n_start: float | None = None, n_prior=None, angle_deg: float = 0.0,
                          polarization: str = "u", min_T: float = 1e-4,
                          residual_tol: float = 1e-3, kk_check: bool = True,
                          sigma_data: float = 1e-3) -> InversionResult:
    """Solve n(λ), κ(λ) of one film at every wavelength from measured T (and R).

    Parameters
    ----------
    stack : Stack
        The sample; the film ``layer_name`` has its thickness set (it is not
        varied), every other layer and the substrate are used as they are.
    layer_name : str
        The film whose n and κ are sought.
    wavelength_nm, T : array_like of shape (N,)
        Measured transmittance as a fraction.
    R : array_like of shape (N,), optional
        Measured front-side reflectance. Without it, see ``n_prior``.
    n_start : float, optional
        n at the longest wavelength to start the continuation from (T+R mode).
        Default: from the envelope method's Cauchy curve, else the film
        material's n there.
    n_prior : Dispersion or array_like of shape (N,), optional
        T-only mode: n used at every wavelength while κ is solved from T.
        Default: the envelope method's Cauchy curve.
    angle_deg, polarization
        Geometry, as for :meth:`fitting.stack.Stack.RT`.
    min_T : float
        Points with T below this carry no information on the film bulk and
        are marked not ok.
    residual_tol : float
        Largest RMS residual (fraction) for a point to count as solved. The
        default 1e-3 is about the photometric noise of a good spectrophotometer:
        with noise, R + T can exceed what any κ >= 0 allows, and no exact
        solution exists.
    kk_check : bool
        Run :func:`~fitting.kramers_kronig.kk_consistency` on the ok points.
    sigma_data : float
        Photometric 1σ noise of T and R (fraction) for ``n_sigma``/``k_sigma``.

    Returns
    -------
    InversionResult

    Raises
    ------
    ParameterError
        For malformed input (shapes, unknown layer, NaN).
    FitError
        T-only mode with no n prior and no fringes to take one from.

    Notes
    -----
    A branch jump is a solution whose n differs from the prediction by more
    than 0.3 λ/(2d), a third of the spacing of the ambiguous solutions. Near
    fringe extrema of a transparent film both T and R are stationary in n, so
    n is least certain there (its error grows as the square root of the data
    error) although the continuation still keeps the right branch.

    Known limit: the physical and the mirror solution touch at every fringe
    extremum of a clear film. With noisy data on a coarse grid (fewer than
    about 20 points per fringe) the walk can leave there on the mirror branch;
    the result then shows branch jumps or fails the Kramers-Kronig check.
    Sample more densely, or use a model fit.

    References
    ----------
    .. [1] D. P. Arndt et al., Appl. Opt. 23, 3571 (1984).
    .. [2] J. C. Manifacier, J. Gasiot and J. P. Fillard, J. Phys. E 9, 1002 (1976).
    """
    wl = check_wavelengths(wavelength_nm)
    T = np.asarray(T, dtype=float)
    if wl.ndim != 1 or T.shape != wl.shape or not np.all(np.isfinite(T)):
        raise ParameterError("T", f"shape {T.shape}",
                             f"must be finite numbers with the shape of wavelength_nm {wl.shape}")
    if R is not None:
        R = np.asarray(R, dtype=float)
        if R.shape != wl.shape or not np.all(np.isfinite(R)):
            raise ParameterError("R", f"shape {R.shape}",
                                 f"must be finite numbers with the shape of wavelength_nm "
                                 f"{wl.shape}")
    if max(T.max(), -T.min()) > 1.5 or (R is not None and R.max() > 1.5):
        raise ParameterError("T", float(T.max()), "must be a fraction 0..1 (divide percent "
                             "by 100)")
    model = _PointModel(stack, layer_name, wl, float(angle_deg), polarization)
    d = model.d[model.j]
    if not d > 0:
        raise ParameterError(f"{layer_name}_thickness", d,
                             "point-by-point inversion needs the film's thickness (> 0)")
    mode = "T+R" if R is not None else "T"
    prior = _prior_on_grid(n_prior, wl)
    if mode == "T" and prior is None:
        prior = _envelope_prior(stack, model, wl, T)

    order = np.argsort(wl)[::-1]                 # long wavelengths first
    n_out = np.full(wl.shape, np.nan)
    k_out = np.full(wl.shape, np.nan)
    res_out = np.full(wl.shape, np.nan)
    ok = np.zeros(wl.shape, bool)
    jumps = 0

    if mode == "T+R":
        if n_start is None:
            n0 = _default_n_start(stack, layer_name, model, wl, T, order[0])
        else:
            n0 = np.full(wl.shape, check_finite("n_start", n_start))
        hist: list[tuple[float, float, float]] = []    # (λ, n, κ) of accepted points
        for i in order:
            lam = wl[i]
            n_pred, k_pred = _predict(hist, lam, float(n0[i]))
            spacing = lam / (2 * d)
            jump = min(0.3 * spacing, 0.5)
            fun = _residual_TR(model, i, T[i], R[i])
            x, res = _newton_TR(model, i, T[i], R[i], (n_pred, k_pred))
            if res > 1e-10:
                x, res = _solve(fun, (n_pred, k_pred))
            # Look for other solutions unless this one is close to the prediction: at
            # fringe extrema the physical and the mirror branch touch, and the solver
            # may land on either.
            if T[i] >= min_T and not (res <= residual_tol
                                      and abs(x[0] - n_pred) <= 0.1 * spacing):
                best = (x, res)
                for start in _candidate_starts(model, i, T[i], R[i], n_pred, k_pred, spacing):
                    xc, rc = _newton_TR(model, i, T[i], R[i], start)
                    if rc > 1e-10:
                        xc, rc = _solve(fun, start)
                    if rc <= residual_tol and (
                            best[1] > residual_tol
                            or abs(xc[0] - n_pred) < abs(best[0][0] - n_pred)):
                        best = (xc, rc)
                x, res = best
                if abs(x[0] - n_pred) > jump:
                    jumps += 1
            n_out[i], k_out[i], res_out[i] = x[0], x[1], res
            good = res <= residual_tol and abs(x[0] - n_pred) <= jump and T[i] >= min_T
            ok[i] = good
            if good:
                # Only accepted points steer the prediction: after a failure (opaque,
                # no solution, jump) the walk goes on from the smooth curve so far.
                hist.append((lam, x[0], x[1]))
    else:
        k_prev = 0.0
        for i in order:
            fun = _residual_T(model, i, T[i], prior[i])
            (kx,), res = _solve(fun, (max(k_prev, 0.0),), bounds=([_K_BOUNDS[0]], [_K_BOUNDS[1]]))
            n_out[i], k_out[i], res_out[i] = prior[i], kx, res
            ok[i] = res <= residual_tol and T[i] >= min_T
            if ok[i]:
                k_prev = kx

    kk = None
    if kk_check and ok.sum() >= 12:
        try:
            kk = kk_consistency(wl[ok], n_out[ok], k_out[ok])
        except ParameterError:
            kk = None
    nbad = int((~ok).sum())
    parts = [f"{mode} inversion of {layer_name!r} (d = {d:.1f} nm): {int(ok.sum())} of "
             f"{wl.size} points solved"]
    if nbad:
        opaque = int((T < min_T).sum())
        parts.append(f"{nbad} not ok" + (f" ({opaque} opaque, T < {min_T:g})" if opaque else ""))
    if jumps:
        parts.append(f"{jumps} branch jumps not resolved (check the thickness)")
    if kk is not None:
        parts.append("Kramers-Kronig consistent" if kk.consistent else
                     "NOT Kramers-Kronig consistent")
    if stack.bandwidth_nm > 0:
        parts.append(f"the instrument bandwidth ({stack.bandwidth_nm:g} nm) is not applied "
                     "point by point")
    n_sig, k_sig = _sigmas(model, n_out, k_out, mode, float(sigma_data))
    return InversionResult(wl, n_out, k_out, res_out, ok, "; ".join(parts), mode, layer_name, d,
                           kk, n_sig, k_sig)


def _sigmas(model, n, k, mode, sigma):
    """First-order 1σ of (n, κ) from the Jacobian of (T, R) at every point at once."""
    idx = np.arange(n.size)
    good = np.isfinite(n) & np.isfinite(k)
    n0, k0 = np.where(good, n, 2.0), np.where(good, np.maximum(k, 0.0), 0.0)
    hn, hk = 1e-6 * np.maximum(1.0, n0), 1e-7 + 1e-6 * k0
    R0, T0 = model.RT_grid(idx, n0 + 1j * k0)
    Rn, Tn = model.RT_grid(idx, n0 + hn + 1j * k0)
    Rk, Tk = model.RT_grid(idx, n0 + 1j * (k0 + hk))
    dTn, dTk = (Tn - T0) / hn, (Tk - T0) / hk
    dRn, dRk = (Rn - R0) / hn, (Rk - R0) / hk
    with np.errstate(divide="ignore", invalid="ignore"):
        if mode == "T":
            return np.full(n.shape, np.nan), np.where(good, sigma / np.abs(dTk), np.nan)
        # Square 2x2 system: cov = σ² J⁻¹ J⁻ᵀ.
        det = dTn * dRk - dTk * dRn
        inv = np.array([[dRk, -dTk], [-dRn, dTn]]) / det
        n_s = sigma * np.sqrt(inv[0, 0] ** 2 + inv[0, 1] ** 2)
        k_s = sigma * np.sqrt(inv[1, 0] ** 2 + inv[1, 1] ** 2)
    bad = ~good | ~np.isfinite(n_s)
    return np.where(bad, np.inf, n_s), np.where(bad, np.inf, k_s)


def _default_n_start(stack, layer_name, model, wl, T, i0):
    """Start value (as an array on the grid): the envelope's n at the longest extremum."""
    from .envelope import swanepoel_envelope
    env = swanepoel_envelope(wl, T, np.real(model.N_sub))
    if env.ok:
        # n at the longest extremum (np.interp holds the end value beyond it).
        return np.full(wl.shape, float(np.interp(wl[i0], env.wavelength_nm, env.n)))
    try:
        return np.full(wl.shape, float(np.real(
            stack.layer(layer_name).material.N(wl[i0:i0 + 1]))[0]))
    except PellucidError:
        raise FitError("point-by-point inversion needs a start value: the envelope method "
                       f"found none ({env.message}) and the film's model cannot give n at "
                       f"{wl[i0]:g} nm; pass n_start") from None


def _candidate_starts(model, i, Tm, Rm, n_pred, k_pred, spacing, keep=3):
    """Starts for a retry: the best local minima of |model - data| on an (n, κ) grid.

    One vectorised forward call scans n within ±1 solution spacing of the
    prediction and κ from 0 to well above it, so a retry costs a few polishes
    instead of many blind solves.
    """
    n_grid = n_pred + spacing * np.linspace(-1.0, 1.0, 41)
    k_grid = np.unique(np.concatenate(([0.0], k_pred * np.array([0.3, 1.0, 3.0]),
                                       np.geomspace(1e-4, max(1.0, 10 * k_pred), 9))))
    n_grid = n_grid[(n_grid > _N_BOUNDS[0]) & (n_grid < _N_BOUNDS[1])]
    NN, KK = np.meshgrid(n_grid, k_grid, indexing="ij")
    R, T = model.RT_many(i, (NN + 1j * KK).ravel())
    cost = ((T - Tm) ** 2 + (R - Rm) ** 2).reshape(NN.shape)
    # Local minima along n (each κ row), best first.
    c = np.pad(cost, ((1, 1), (0, 0)), constant_values=np.inf)
    is_min = (cost <= c[:-2]) & (cost <= c[2:])
    idx = np.argwhere(is_min)
    order = np.argsort(cost[is_min])
    starts, seen = [], []
    for a, b in idx[order]:
        if any(abs(NN[a, b] - s) < 0.2 * spacing for s in seen):
            continue
        seen.append(NN[a, b])
        starts.append((float(NN[a, b]), float(KK[a, b])))
        if len(starts) == keep:
            break
    return starts


def _predict(hist, lam, n_start, window: int = 8):
    """(n, κ) expected at ``lam``: straight line through the last accepted points.

    A least-squares line through up to ``window`` points, not the two latest:
    extrapolating from two noisy points turns noise into slope, and a wrong
    slope is exactly what leads the walk onto the mirror branch at a fringe
    extremum (where the two solutions touch).
    """
    if not hist:
        return n_start, 1e-6
    if len(hist) < 3:
        return hist[-1][1], hist[-1][2]
    h = np.array(hist[-window:])
    x = h[:, 0] - lam
    n = np.polyfit(x, h[:, 1], 1)[-1]
    k = max(np.polyfit(x, h[:, 2], 1)[-1], 0.0)
    return float(np.clip(n, *_N_BOUNDS)), float(min(k, _K_BOUNDS[1]))


def _residual_TR(model, i, Tm, Rm):
    def f(x):
        R, T = model.RT(i, complex(x[0], x[1]))
        return np.array([T - Tm, R - Rm])
    return f


def _residual_T(model, i, Tm, n):
    def f(x):
        _, T = model.RT(i, complex(n, x[0]))
        return np.array([T - Tm])
    return f


def _newton_TR(model, i, Tm, Rm, x0, maxit: int = 12):
    """Fast path: undamped Newton on (T, R) with a forward-difference Jacobian.

    Each iteration is one vectorised forward call (the point and its two
    difference steps). Returns (x, residual); a residual above 1e-10 means
    "not converged to an exact solution" and the caller falls back to
    scipy's bounded least squares. From a good prediction Newton needs 3-5
    iterations where least_squares spends 10-20 evaluations plus overhead.
    """
    n, k = float(x0[0]), max(float(x0[1]), 0.0)
    res = math.inf
    for _ in range(maxit):
        hn, hk = 1e-7 * max(1.0, n), 1e-8 + 1e-7 * k
        R, T = model.RT_many(i, np.array([n + 1j * k, n + hn + 1j * k, n + 1j * (k + hk)]))
        F = np.array([T[0] - Tm, R[0] - Rm])
        res = float(np.sqrt(np.mean(F ** 2)))
        if res < 1e-13:
            break
        J = np.array([[(T[1] - T[0]) / hn, (T[2] - T[0]) / hk],
                      [(R[1] - R[0]) / hn, (R[2] - R[0]) / hk]])
        det = J[0, 0] * J[1, 1] - J[0, 1] * J[1, 0]
        if not abs(det) > 1e-14:
            return np.array([n, k]), math.inf
        dn = (-F[0] * J[1, 1] + F[1] * J[0, 1]) / det
        dk = (-F[1] * J[0, 0] + F[0] * J[1, 0]) / det
        n, k = n + dn, k + dk
        if not (_N_BOUNDS[0] < n < _N_BOUNDS[1] and -1e-12 <= k < _K_BOUNDS[1]):
            return np.array([n, max(k, 0.0)]), math.inf
        k = max(k, 0.0)
    return np.array([n, k]), res


def _solve(fun, x0, bounds=None):
    if bounds is None:
        bounds = ([_N_BOUNDS[0], _K_BOUNDS[0]], [_N_BOUNDS[1], _K_BOUNDS[1]])
    lo, hi = np.asarray(bounds[0]), np.asarray(bounds[1])
    x0 = np.clip(np.asarray(x0, dtype=float), lo, hi - 1e-12)
    sol = least_squares(fun, x0, bounds=(lo, hi), method="trf", x_scale="jac",
                        xtol=1e-13, ftol=1e-15, gtol=1e-15, max_nfev=100)
    res = float(np.sqrt(np.mean(sol.fun ** 2)))
    return sol.x, res
