"""Where a film absorbs, read from the measured spectrum before any model.

A transparent film only redistributes light between T and R: the maxima of
its fringes touch a smooth line set by the substrate (Swanepoel 1983). Where
the film absorbs, the whole fringe pattern sinks below that line and, deep in
the absorption edge, T falls to the noise. :func:`absorption_edge` measures
that sinking as the film's transparency

    x(λ) = U(λ) / (T_s(λ) · c),

with U the upper envelope of the measured spectrum (the smaller of the running
maxima over one fringe period λ²/(2nd) on either side, from the fringe seed:
at an edge the envelope never reaches into the clear side, so a clear span
never holds absorbing points, at the price of edge estimates that may come
from a maximum up to a period away on the absorbing side), T_s = 2s/(s² + 1) the bare
substrate's transmittance and c the level of U/T_s where the film is clearest.
Interference averages out of an envelope, so -ln x ≈ αd: a first estimate of
the absorption coefficient along the edge, good to a factor of order two,
which is all a starting point needs (Swanepoel 1983, eq. 15-16 with the
interference terms averaged; Manifacier et al. 1976).

Dispersion models turn these estimates into start values for their absorption
parameters (:meth:`fitting.dispersion.Dispersion.guess_edge`); the fit engine
uses the clear part of the spectrum for the thickness scan, where the start
model's unknown absorption cannot mislead it.

References
----------
.. [1] R. Swanepoel, "Determination of the thickness and optical constants of
       amorphous silicon", J. Phys. E 16, 1214 (1983). :DOI:`10.1088/0022-3735/16/12/023`
.. [2] J. C. Manifacier, J. Gasiot and J. P. Fillard, "A simple method for the
       determination of the optical constants n, k and the thickness of a weakly
       absorbing thin film", J. Phys. E 9, 1002 (1976).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["EdgeData", "absorption_edge", "opaque_floor", "CLEAR", "OPAQUE_AD"]

#: Transparency above which the film counts as clear (the rest of x is the 100 %
#: line's ±1 % and the envelope's noise).
CLEAR = 0.93
#: αd assumed where the spectrum is at its noise floor (T < 3 % of the clear level).
OPAQUE_AD = 3.5


@dataclass(frozen=True)
class EdgeData:
    """What the spectrum says about the film's absorption.

    Attributes
    ----------
    clear_nm : (float, float) or None
        The wavelength span where the film is clear (transparency >= 0.93),
        around the clearest point; None if the film is clear nowhere.
    opaque_below_nm, opaque_above_nm : float or None
        T is at the noise floor below / above these wavelengths (None: nowhere).
    wavelength_nm, alpha_d : ndarray
        Points on the edges where the film partly absorbs, and αd there.
    absorbs : bool
        True if the film absorbs anywhere in the range.
    """

    clear_nm: tuple | None
    opaque_below_nm: float | None = None
    opaque_above_nm: float | None = None
    wavelength_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    alpha_d: np.ndarray = field(default_factory=lambda: np.zeros(0))
    absorbs: bool = False

    def to_dict(self) -> dict:
        return {"clear_nm": None if self.clear_nm is None else list(self.clear_nm),
                "opaque_below_nm": self.opaque_below_nm, "opaque_above_nm": self.opaque_above_nm,
                "edge_points": int(self.alpha_d.size), "absorbs": self.absorbs}


def opaque_floor(y: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Points where T is indistinguishable from zero: below 4σ of the noise or 0.5 %."""
    return y < np.maximum(4.0 * sigma, 0.005)


def _range_max(y: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """max(y[a_i : b_i + 1]) for every i (a_i <= b_i), by a sparse table of maxima over
    power-of-two spans: two lookups per window instead of a scan (exact: a maximum of
    overlapping spans is the maximum of their union)."""
    table = [y]
    span = 1
    while 2 * span <= y.size:
        prev = table[-1]
        table.append(np.maximum(prev[:-span], prev[span:]))
        span *= 2
    k = np.floor(np.log2(b - a + 1)).astype(int)
    out = np.empty(a.size, dtype=y.dtype)
    for level in np.unique(k):
        sel = k == level
        t = table[level]
        out[sel] = np.maximum(t[a[sel]], t[b[sel] - (1 << level) + 1])
    return out


def _running_max(wl: np.ndarray, y: np.ndarray, width: np.ndarray,
                 floor: np.ndarray | None = None) -> np.ndarray:
    """Upper envelope: the smaller of the maxima over one window to the left and one
    to the right of each point. Each window holds a fringe maximum where the film is
    clear; at an absorption edge the window on the absorbing side does not reach
    into the clear side, as a centred window would (it would lift the envelope
    half a period into the edge)."""
    lo = np.searchsorted(wl, wl - width)
    hi = np.searchsorted(wl, wl + width, side="right")
    idx = np.arange(wl.size)
    left = _range_max(y, lo, idx)
    right = _range_max(y, idx, np.maximum(hi, idx + 1) - 1)
    # A window cut short by the end of the data may hold no maximum: there the
    # other side alone counts (both cut: the larger) - unless the cut window holds
    # opaque points, whose darkness is the film's, not the data's end.
    dark = np.zeros(wl.size, bool) if floor is None else floor
    cs = np.r_[0, np.cumsum(dark)]
    cut_l = (wl - width < wl[0]) & (cs[idx + 1] - cs[lo] == 0)
    cut_r = (wl + width > wl[-1]) & (cs[np.maximum(hi, idx + 1)] - cs[idx] == 0)
    out = np.minimum(left, right)
    out = np.where(cut_l & ~cut_r, right, out)
    out = np.where(cut_r & ~cut_l, left, out)
    return np.where(cut_l & cut_r, np.maximum(left, right), out)


def absorption_edge(wl, y, sigma, substrate_n, *, thickness_nm: float | None,
                    n_film: float | None) -> EdgeData:
    """Transparency of the film along the spectrum, and αd estimates on its edges.

    Parameters
    ----------
    wl, y, sigma : ndarray of shape (W,)
        Wavelengths (nm, increasing), measured T and its 1σ.
    substrate_n : ndarray of shape (W,)
        Real index of the substrate.
    thickness_nm, n_film : float or None
        Rough thickness and index from the fringes (sets the envelope window);
        without them (no fringes: a thin film's one broad extremum) the window is
        the whole range.
    """
    wl = np.asarray(wl, float)
    y = np.asarray(y, float)
    if wl.size < 12:
        return EdgeData(None)
    s = np.asarray(substrate_n, float)
    Ts = 2 * s / (s * s + 1)
    if thickness_nm and n_film:
        # One full fringe period (maximum to maximum), however wide.
        width = np.clip(wl * wl / (2 * n_film * thickness_nm), 4 * np.median(np.diff(wl)),
                        float(wl[-1] - wl[0]))
    else:
        width = np.full(wl.size, float(wl[-1] - wl[0]))
    # The running maximum of noise is biased up by about 2σ, but evenly.
    sig = np.asarray(sigma, float)
    U = _running_max(wl, y, 1.3 * width, opaque_floor(y, sig))
    ratio = U / Ts
    above = ~opaque_floor(U, sig)
    if not above.any():                 # at the noise floor everywhere: opaque
        return EdgeData(None, float(wl[-1]), None, absorbs=True)
    level = float(np.percentile(ratio[above], 95))
    if not level > 0:
        return EdgeData(None)
    x = np.clip(ratio / level, 1e-6, None)
    floor = opaque_floor(y, sig) | (x < 0.03)
    clear = (x >= CLEAR) & ~floor
    if not clear.any():
        return EdgeData(None, float(wl[floor].max()) if floor.any() else None, absorbs=True)
    # The clear span: the longest run of clear points.
    edges = np.flatnonzero(np.diff(np.r_[0, clear.astype(int), 0]))
    runs = edges.reshape(-1, 2)
    a, b = max(runs, key=lambda r: r[1] - r[0])
    clear_nm = (float(wl[a]), float(wl[b - 1]))
    below = wl < clear_nm[0]
    above = wl > clear_nm[1]
    opaque_below = float(wl[below & floor].max()) if (below & floor).any() else None
    opaque_above = float(wl[above & floor].min()) if (above & floor).any() else None
    part = (below | above) & ~floor & (x < CLEAR)
    absorbs = bool((below | above).any() and ((x[below | above] < 0.85).any()))
    ad = -np.log(x[part])
    return EdgeData(clear_nm, opaque_below, opaque_above, wl[part], ad, absorbs)


def alpha_targets(edge: EdgeData, thickness_nm: float, wl_min: float, wl_max: float):
    """(λ nm, α 1/cm, kind) targets for fitting a model's absorption to the edge.

    kind is "=" on the edge (αd measured), "<" in the clear span (α below
    0.03/d) and ">" in the opaque part (α above 3.5/d); at most 40 points each.
    """
    d_cm = thickness_nm * 1e-7
    out = []
    if edge.alpha_d.size:
        idx = np.unique(np.linspace(0, edge.alpha_d.size - 1, min(40, edge.alpha_d.size))
                        .astype(int))
        out += [(float(edge.wavelength_nm[i]), float(edge.alpha_d[i] / d_cm), "=") for i in idx]
    if edge.clear_nm is not None:
        for w in np.linspace(edge.clear_nm[0], edge.clear_nm[1], 8):
            out.append((float(w), 0.03 / d_cm, "<"))
    if edge.opaque_below_nm is not None:
        for w in np.geomspace(wl_min, edge.opaque_below_nm, 5):
            out.append((float(w), OPAQUE_AD / d_cm, ">"))
    if edge.opaque_above_nm is not None:
        for w in np.geomspace(edge.opaque_above_nm, wl_max, 5):
            out.append((float(w), OPAQUE_AD / d_cm, ">"))
    return out


def target_residuals(alpha_model: np.ndarray, targets) -> np.ndarray:
    """Log-ratio residuals of model α against :func:`alpha_targets` (one-sided for < >)."""
    return target_residuals_and_slopes(alpha_model, targets)[0]


def target_residuals_and_slopes(alpha_model: np.ndarray, targets):
    """(r, s): :func:`target_residuals` and dr/dα·α, the slope by a relative change of α
    (1 where the residual follows log α, 0 where it is clipped or one-sided at rest).

    ``targets`` may also be the pair (α targets, kinds) of arrays, to skip rebuilding them.
    """
    if isinstance(targets, tuple) and len(targets) == 2 and isinstance(targets[0], np.ndarray):
        a, kind = targets
    else:
        a, kind = target_arrays(targets)
    alpha = np.asarray(alpha_model, float)
    q = np.log(np.maximum(alpha, 1e-3) / a)
    active = (alpha > 1e-3) & ((kind == "=") | ((kind == "<") & (q > 0))
                               | ((kind == ">") & (q < 0)))
    r = np.where(kind == "=", q, np.where(kind == "<", np.maximum(q, 0.0),
                                          np.minimum(q, 0.0)))
    return r, active.astype(float)


def target_arrays(targets):
    """(α targets, kinds) of :func:`alpha_targets` as arrays."""
    return (np.array([t[1] for t in targets], dtype=float),
            np.array([t[2] for t in targets]))
