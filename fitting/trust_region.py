"""Bounded nonlinear least squares for small dense problems: trust-region reflective.

The fits here have a few parameters (n ≈ 3-10) and many residuals (m ≈ 100-2000).
scipy's ``least_squares(method="trf")`` solves them well, but each of its steps
works on the whole m×n Jacobian (scaling it, an SVD of the (m+n)×n augmented
matrix, products with J for every trial step) and goes through several layers
of wrappers: on these problems that costs more than the model evaluations.

:func:`trf` is the same algorithm step for step -- the trust-region reflective
method of Branch, Coleman & Li (1999) with the exact subproblem solution of
Moré (1977), as scipy implements it for ``tr_solver="exact"`` (BSD-3-Clause;
the decisions, constants and termination tests below follow scipy 1.17's
``_lsq/trf.py`` and ``_lsq/common.py``) -- with one change of representation:
the Jacobian is factored once per step, J = QR, and everything after works on
the n×n factor R and on Qᵀf. That is exact, not an approximation:

* the scaled Jacobian is J·D = Q(R·D), so ‖J·D p‖ = ‖R·D p‖ for every step p,
  which is all the quadratic model, the reflections and the 1-D line searches
  ask of J;
* the augmented matrix [J·D; diag(√c)] = diag(Q, I)·[R·D; diag(√c)] has the
  singular values and right singular vectors of the small 2n×n matrix, and
  Uᵀ[f; 0] of the big one is U_smallᵀ[Qᵀf; 0].

So the iterates are scipy's up to rounding, at a fraction of the cost per step.

References
----------
.. [1] M. A. Branch, T. F. Coleman and Y. Li, "A subspace, interior, and conjugate
       gradient method for large-scale bound-constrained minimization problems",
       SIAM J. Sci. Comput. 21, 1-23 (1999).
.. [2] J. J. Moré, "The Levenberg-Marquardt algorithm: implementation and theory",
       in *Numerical Analysis*, ed. G. A. Watson, Lecture Notes in Mathematics 630,
       Springer (1977), pp. 105-116.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import copysign, sqrt

import numpy as np
from scipy.linalg.lapack import dgeqrf as _geqrf, dgesdd as _gesdd
from scipy.optimize import least_squares

__all__ = ["TRFResult", "trf"]

_EPS = np.finfo(float).eps

#: scipy's termination messages (the fit reports them in words, see finish.plain_message).
MESSAGES = {
    0: "The maximum number of function evaluations is exceeded.",
    1: "`gtol` termination condition is satisfied.",
    2: "`ftol` termination condition is satisfied.",
    3: "`xtol` termination condition is satisfied.",
    4: "Both `ftol` and `xtol` termination conditions are satisfied.",
}


@dataclass
class TRFResult:
    """What :func:`trf` found: the point, its residuals and how the run ended."""

    x: np.ndarray
    fun: np.ndarray          # residuals at x
    cost: float              # ½ fᵀf
    nfev: int
    njev: int
    status: int              # 0 budget; 1 gtol; 2 ftol; 3 xtol; 4 ftol and xtol

    @property
    def success(self) -> bool:
        return self.status > 0

    @property
    def message(self) -> str:
        return MESSAGES[self.status]


def trf(fun, jac, x0, lb, ub, *, x_scale=1.0, ftol: float = 1e-8, xtol: float = 1e-8,
        gtol: float = 1e-8, max_nfev: int | None = None, args=()) -> TRFResult:
    """Minimise ½‖fun(x)‖² for lb ≤ x ≤ ub by the trust-region reflective method.

    Parameters
    ----------
    fun, jac : callable
        ``fun(x, *args)`` returns the m residuals, ``jac(x, *args)`` their m×n
        Jacobian (dense). ``jac`` is called only at accepted points, right after
        ``fun`` was evaluated there.
    x0 : array_like of shape (n,)
        Start; must lie within the bounds (it is moved strictly inside).
    lb, ub : array_like of shape (n,)
        Bounds, lb < ub; infinite bounds are allowed (with none finite, scipy's
        unbounded variant runs).
    x_scale : float, array_like or "jac"
        As in :func:`scipy.optimize.least_squares`.
    ftol, xtol, gtol : float
        Termination tolerances, as in :func:`scipy.optimize.least_squares`.
    max_nfev : int, optional
        Most evaluations of ``fun`` (default 100 n, scipy's).

    Returns
    -------
    TRFResult

    Raises
    ------
    ValueError
        For inconsistent bounds, a start outside them or non-finite residuals
        at the start (as scipy does).
    """
    x0 = np.atleast_1d(np.asarray(x0, dtype=float))
    n = x0.size
    lb = np.broadcast_to(np.asarray(lb, dtype=float), (n,)).copy()
    ub = np.broadcast_to(np.asarray(ub, dtype=float), (n,)).copy()
    if np.any(lb >= ub):
        raise ValueError("Each lower bound must be strictly less than each upper bound.")
    if not np.all((x0 >= lb) & (x0 <= ub)):
        raise ValueError("Initial guess is outside of provided bounds")
    if np.all(np.isneginf(lb)) and np.all(np.isposinf(ub)):
        # No bounds at all: scipy runs a different variant then; let it.
        sol = least_squares(fun, x0, jac=jac, args=args, method="trf", x_scale=x_scale,
                            ftol=ftol, xtol=xtol, gtol=gtol, max_nfev=max_nfev)
        return TRFResult(x=sol.x, fun=sol.fun, cost=float(sol.cost), nfev=sol.nfev,
                         njev=sol.njev, status=sol.status)
    x = _strictly_feasible(x0, lb, ub, 1e-10)
    f = np.atleast_1d(np.asarray(fun(x.copy(), *args), dtype=float))
    if not np.all(np.isfinite(f)):
        raise ValueError("Residuals are not finite in the initial point.")
    J = np.asarray(jac(x.copy(), *args), dtype=float)
    m = f.size
    if J.shape != (m, n):
        raise ValueError(f"The return value of `jac` has wrong shape: expected {(m, n)}, "
                         f"actual {J.shape}.")
    if max_nfev is None:
        max_nfev = 100 * n
    nfev = njev = 1
    cost = 0.5 * float(f @ f)
    fac = _Factor(m, n)
    R, qf, g, col_norm = fac(J, f)
    jac_scale = isinstance(x_scale, str) and x_scale == "jac"
    if jac_scale:
        scale_inv = col_norm.copy()
        scale_inv[scale_inv == 0] = 1.0
        scale = 1.0 / scale_inv
    else:
        scale = np.broadcast_to(np.asarray(x_scale, dtype=float), (n,)).copy()
        scale_inv = 1.0 / scale
    finite_lb, finite_ub = np.isfinite(lb), np.isfinite(ub)

    v, dv = _cl_scaling(x, g, lb, ub, finite_lb, finite_ub)
    v[dv != 0] *= scale_inv[dv != 0]
    Delta = float(np.linalg.norm(x * scale_inv / v ** 0.5))
    if Delta == 0:
        Delta = 1.0
    alpha = 0.0                               # the Levenberg-Marquardt parameter
    status = None
    aug = np.zeros((qf.size + n, n), order="F")   # [R·D; diag(√c)], refilled each step
    cols = np.arange(n)

    while True:
        v, dv = _cl_scaling(x, g, lb, ub, finite_lb, finite_ub)
        g_norm = float(np.max(np.abs(g * v)))
        if g_norm < gtol:
            status = 1
        if status is not None or nfev == max_nfev:
            break
        moving = dv != 0
        v[moving] *= scale_inv[moving]
        d = v ** 0.5 * scale                  # Coleman-Li scaling times x_scale
        diag_h = g * dv * scale
        g_h = d * g
        R_h = R * d                           # J·D = Q (R·D)
        aug[:qf.size] = R_h
        aug[cols + qf.size, cols] = diag_h ** 0.5
        U, s, Vt, _ = _gesdd(aug, full_matrices=0)
        V = Vt.T
        uf = U[:qf.size].T @ qf
        theta = max(0.995, 1 - g_norm)
        actual_reduction = -1.0
        while actual_reduction <= 0 and nfev < max_nfev:
            p_h, alpha = _lsq_trust_region(n, m, uf, s, V, Delta, alpha)
            p = d * p_h
            step, step_h, predicted = _select_step(x, R_h, diag_h, g_h, p, p_h, d, Delta,
                                                   lb, ub, theta)
            x_new = _strictly_feasible(x + step, lb, ub, 0.0)
            f_new = np.atleast_1d(np.asarray(fun(x_new.copy(), *args), dtype=float))
            nfev += 1
            step_h_norm = sqrt(float(step_h @ step_h))
            if not np.all(np.isfinite(f_new)):
                Delta = 0.25 * step_h_norm
                continue
            cost_new = 0.5 * float(f_new @ f_new)
            actual_reduction = cost - cost_new
            Delta_new, ratio = _update_radius(Delta, actual_reduction, predicted,
                                              step_h_norm, step_h_norm > 0.95 * Delta)
            status = _termination(actual_reduction, cost, sqrt(float(step @ step)),
                                  sqrt(float(x @ x)), ratio, ftol, xtol)
            if status is not None:
                break
            alpha *= Delta / Delta_new
            Delta = Delta_new
        if actual_reduction > 0:
            x, f, cost = x_new, f_new, cost_new
            J = np.asarray(jac(x.copy(), *args), dtype=float)
            njev += 1
            R, qf, g, col_norm = fac(J, f)
            if jac_scale:
                scale_inv = np.maximum(col_norm, scale_inv)
                scale = 1.0 / scale_inv
    return TRFResult(x=x, fun=f, cost=cost, nfev=nfev, njev=njev,
                     status=0 if status is None else status)


class _Factor:
    """R, Qᵀf, the gradient Jᵀf = RᵀQᵀf and J's column norms (those of R), from one
    Householder QR of [J f] (LAPACK dgeqrf; its last column is Qᵀf, so Q itself is
    never formed)."""

    def __init__(self, m: int, n: int):
        self.k = min(m, n)
        self.buf = np.empty((m, n + 1), order="F")
        self.lower = np.tri(self.k, n, -1, dtype=bool)

    def __call__(self, J, f):
        n = J.shape[1]
        self.buf[:, :n] = J
        self.buf[:, n] = f
        qr, _, _, info = _geqrf(self.buf, overwrite_a=1)
        if info != 0:
            raise ValueError(f"QR factorisation failed (LAPACK info {info})")
        R = qr[:self.k, :n].copy()
        R[self.lower] = 0.0
        qf = qr[:self.k, n].copy()
        return R, qf, R.T @ qf, np.sqrt(np.einsum("ij,ij->j", R, R))


def _cl_scaling(x, g, lb, ub, finite_lb, finite_ub):
    """Coleman-Li scaling vector v and its derivative dv (Branch et al. 1999, eq. 2.2)."""
    v = np.ones_like(x)
    dv = np.zeros_like(x)
    mask = (g < 0) & finite_ub
    v[mask] = ub[mask] - x[mask]
    dv[mask] = -1
    mask = (g > 0) & finite_lb
    v[mask] = x[mask] - lb[mask]
    dv[mask] = 1
    return v, dv


def _strictly_feasible(x, lb, ub, rstep: float):
    """x moved inside the bounds: by rstep relative, or to the next float when rstep=0."""
    if rstep == 0 and np.all((x > lb) & (x < ub)):
        return x.copy()                       # already inside: nothing moves
    x_new = x.copy()
    if rstep == 0:
        lower = x <= lb
        upper = x >= ub
        x_new[lower] = np.nextafter(lb[lower], ub[lower])
        x_new[upper] = np.nextafter(ub[upper], lb[upper])
    else:
        lower_dist, upper_dist = x - lb, ub - x
        lower = np.isfinite(lb) & (lower_dist <= np.minimum(
            upper_dist, rstep * np.maximum(1, np.abs(lb))))
        upper = np.isfinite(ub) & (upper_dist <= np.minimum(
            lower_dist, rstep * np.maximum(1, np.abs(ub))))
        lower &= ~upper                       # as scipy: the upper bound wins a tie
        x_new[lower] = lb[lower] + rstep * np.maximum(1, np.abs(lb[lower]))
        x_new[upper] = ub[upper] - rstep * np.maximum(1, np.abs(ub[upper]))
    tight = (x_new < lb) | (x_new > ub)
    x_new[tight] = 0.5 * (lb[tight] + ub[tight])
    return x_new


def _lsq_trust_region(n, m, uf, s, V, Delta, alpha, rtol=0.01, max_iter=10):
    """Moré's (1977) trust-region step from one SVD: (p, Levenberg-Marquardt α)."""
    suf = s * uf
    full_rank = m >= n and s[-1] > _EPS * m * s[0]
    if full_rank:
        p = -V @ (uf / s)
        if np.linalg.norm(p) <= Delta:
            return p, 0.0

    def phi_and_derivative(a):
        denom = s ** 2 + a
        p_norm = float(np.linalg.norm(suf / denom))
        return p_norm - Delta, -float(np.sum(suf ** 2 / denom ** 3)) / p_norm

    alpha_upper = float(np.linalg.norm(suf)) / Delta
    if full_rank:
        phi, phi_prime = phi_and_derivative(0.0)
        alpha_lower = -phi / phi_prime
    else:
        alpha_lower = 0.0
    if not full_rank and alpha == 0:
        alpha = max(0.001 * alpha_upper, (alpha_lower * alpha_upper) ** 0.5)
    for _ in range(max_iter):
        if alpha < alpha_lower or alpha > alpha_upper:
            alpha = max(0.001 * alpha_upper, (alpha_lower * alpha_upper) ** 0.5)
        phi, phi_prime = phi_and_derivative(alpha)
        if phi < 0:
            alpha_upper = alpha
        ratio = phi / phi_prime
        alpha_lower = max(alpha_lower, alpha - ratio)
        alpha -= (phi + Delta) * ratio / Delta
        if abs(phi) < rtol * Delta:
            break
    p = -V @ (suf / (s ** 2 + alpha))
    p *= Delta / np.linalg.norm(p)            # exactly on the trust-region boundary
    return p, alpha


def _quadratic(R, g, s, diag):
    """½ sᵀ(JᵀJ + diag)s + gᵀs, with ‖J s‖ = ‖R s‖."""
    Rs = R @ s
    return 0.5 * (float(Rs @ Rs) + float((s * diag) @ s)) + float(s @ g)


def _quadratic_1d(R, g, s, diag, s0=None):
    """Coefficients of the model along s from s0: a t² + b t (+ c)."""
    v = R @ s
    a = 0.5 * (float(v @ v) + float((s * diag) @ s))
    b = float(g @ s)
    if s0 is None:
        return a, b
    u = R @ s0
    b += float(u @ v) + float((s0 * diag) @ s)
    c = 0.5 * float(u @ u) + float(g @ s0) + 0.5 * float((s0 * diag) @ s0)
    return a, b, c


def _minimize_1d(a, b, lo, hi, c=0.0):
    """Minimum of a t² + b t + c over [lo, hi]: (t, value)."""
    ts = [lo, hi]
    if a != 0:
        extremum = -0.5 * b / a
        if lo < extremum < hi:
            ts.append(extremum)
    ys = [t * (a * t + b) + c for t in ts]
    i = min(range(len(ys)), key=ys.__getitem__)
    return ts[i], ys[i]


def _step_to_bound(x, s, lb, ub):
    """Smallest t ≥ 0 with x + t s on a bound, and which bounds it hits (-1, 0, 1)."""
    steps = np.full_like(x, np.inf)
    nz = s != 0
    with np.errstate(over="ignore"):
        steps[nz] = np.maximum((lb - x)[nz] / s[nz], (ub - x)[nz] / s[nz])
    t = float(np.min(steps))
    return t, np.equal(steps, t) * np.sign(s).astype(int)


def _intersect_radius(x, s, Delta):
    """Roots t of ‖x + t s‖ = Delta (the negative, the positive)."""
    a = float(s @ s)
    b = float(x @ s)
    c = float(x @ x) - Delta ** 2
    d = sqrt(max(b * b - a * c, 0.0))
    q = -(b + copysign(d, b))
    t1, t2 = q / a, c / q
    return (t1, t2) if t1 < t2 else (t2, t1)


def _select_step(x, R_h, diag_h, g_h, p, p_h, d, Delta, lb, ub, theta):
    """The best of the trust-region step (kept strictly inside), its reflection off
    the first bound hit, and the scaled gradient step (Branch et al. 1999)."""
    if np.all((x + p >= lb) & (x + p <= ub)):
        return p, p_h, -_quadratic(R_h, g_h, p_h, diag_h)
    p_stride, hits = _step_to_bound(x, p, lb, ub)
    r_h = p_h.copy()
    r_h[hits.astype(bool)] *= -1
    r = d * r_h
    p = p * p_stride
    p_h = p_h * p_stride
    x_on_bound = x + p
    _, to_tr = _intersect_radius(p_h, r_h, Delta)
    to_bound, _ = _step_to_bound(x_on_bound, r, lb, ub)
    r_stride = min(to_bound, to_tr)
    if r_stride > 0:
        r_stride_l = (1 - theta) * p_stride / r_stride
        r_stride_u = theta * to_bound if r_stride == to_bound else to_tr
    else:
        r_stride_l, r_stride_u = 0.0, -1.0
    if r_stride_l <= r_stride_u:
        a, b, c = _quadratic_1d(R_h, g_h, r_h, diag_h, s0=p_h)
        r_stride, r_value = _minimize_1d(a, b, r_stride_l, r_stride_u, c=c)
        r_h = r_h * r_stride + p_h
        r = r_h * d
    else:
        r_value = np.inf
    p = p * theta
    p_h = p_h * theta
    p_value = _quadratic(R_h, g_h, p_h, diag_h)
    ag_h = -g_h
    ag = d * ag_h
    to_tr = Delta / float(np.linalg.norm(ag_h))
    to_bound, _ = _step_to_bound(x, ag, lb, ub)
    ag_stride = theta * to_bound if to_bound < to_tr else to_tr
    a, b = _quadratic_1d(R_h, g_h, ag_h, diag_h)
    ag_stride, ag_value = _minimize_1d(a, b, 0.0, ag_stride)
    if p_value < r_value and p_value < ag_value:
        return p, p_h, -p_value
    if r_value < p_value and r_value < ag_value:
        return r, r_h, -r_value
    return ag * ag_stride, ag_h * ag_stride, -ag_value


def _update_radius(Delta, actual, predicted, step_norm, bound_hit):
    """New trust radius and the ratio of actual to predicted reduction."""
    if predicted > 0:
        ratio = actual / predicted
    elif predicted == actual == 0:
        ratio = 1.0
    else:
        ratio = 0.0
    if ratio < 0.25:
        Delta = 0.25 * step_norm
    elif ratio > 0.75 and bound_hit:
        Delta *= 2.0
    return Delta, ratio


def _termination(dF, F, dx_norm, x_norm, ratio, ftol, xtol):
    ftol_ok = dF < ftol * F and ratio > 0.25
    xtol_ok = dx_norm < xtol * (xtol + x_norm)
    if ftol_ok and xtol_ok:
        return 4
    if ftol_ok:
        return 2
    if xtol_ok:
        return 3
    return None
