"""Figures of fits, optical constants and batch trends, built without pyplot.

Every builder returns a :class:`matplotlib.figure.Figure` drawn with the Agg
canvas, so it works in a batch job with no display, inside a PDF
(:mod:`fitting.report`) and inside the desktop app, which passes its own
embedded figure (or a sub-figure) as ``fig=`` to get exactly the same drawing.
``matplotlib.pyplot`` is never imported here: it keeps global state and may pick
a GUI backend (house style, checked by ``tests/test_architecture.py``).

Colours are the colour-blind-safe set of Okabe & Ito [1]_; each role (measured,
fitted, residual, n, κ) keeps one colour in every figure.

Builders accept either a :class:`~fitting.result.FitResult` or plain mappings of
arrays (what :func:`fitting.export.read_curves_csv` and
:func:`fitting.export.read_nk_csv` return), so the batch report can redraw a fit
from its exported files without the result object.

References
----------
.. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
       presentations that are friendly to colorblind people" (2002, revised 2008),
       https://jfly.uni-koeln.de/color/.
.. [2] J. Tauc, R. Grigorovici and A. Vancu, "Optical properties and electronic
       structure of amorphous germanium", Phys. Status Solidi B 15, 627 (1966).
       :DOI:`10.1002/pssb.19660150224`
"""

from __future__ import annotations

import math
from typing import Any
from collections.abc import Iterable, Mapping, Sequence

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from .labels import format_pm
from .limits import Limit
from .units import HC_EV_NM

__all__ = ["PALETTE", "fit_figure", "optical_figure", "tauc_figure", "thickness_trend_figure",
           "thickness_histogram_figure", "nk_overlay_figure", "row_thickness_key", "row_ok",
           "spec_bounds", "OK_STATUSES"]

#: Okabe-Ito colours by role (see module references).
PALETTE = {
    "measured": "#000000",
    "fitted": "#0072B2",      # blue
    "residual": "#D55E00",    # vermillion
    "excluded": "#999999",
    "n": "#0072B2",
    "k": "#009E73",           # bluish green
    "alpha": "#CC79A7",       # reddish purple
    "spec": "#E69F00",        # orange
    "fail": "#D55E00",
    "ok": "#0072B2",
}
#: Cycle for many curves on one axis (overlays), Okabe-Ito without black.
CYCLE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442")

_QUANTITY_LABEL = {"T": "Transmittance T", "R": "Reflectance R"}


# -- small helpers --------------------------------------------------------------------
def _new_figure(fig, size):
    """The figure to draw on: the caller's (GUI, PDF page) or a new Agg one."""
    if fig is not None:
        fig.clear()
        return fig
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _style(ax):
    ax.grid(True, color="#e6e6e6", linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _get(obj, name, default=None):
    """Attribute of a result object or key of a mapping."""
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _arr(x):
    return None if x is None else np.asarray(x, dtype=float)


def _spectrum_name(result) -> str:
    spec = _get(result, "spectrum") or {}
    name = spec.get("name") if isinstance(spec, Mapping) else None
    return name or _get(result, "name", "") or "spectrum"


def _pick_layer(optical: Mapping, layer: str | None):
    if not optical:
        raise ValueError("this result holds no optical constants (no film layers)")
    if layer is None:
        return next(iter(optical.values()))
    if layer not in optical:
        raise KeyError(f"layer {layer!r} not in result; layers are {sorted(optical)}")
    return optical[layer]


# -- single fit -----------------------------------------------------------------------
def fit_figure(result, *, fig: Figure | None = None, title: str | None = None) -> Figure:
    """Measured and fitted spectrum with the residuals in a panel below.

    Parameters
    ----------
    result : FitResult or mapping
        A fit result, or a mapping with ``wavelength_nm``, ``measured``, ``fitted`` and
        optionally ``residuals``, ``used``, ``quantity``, ``name``, ``redchi``.
    fig : Figure, optional
        Draw into this figure or sub-figure (cleared first) instead of a new one.
    title : str, optional
        Defaults to the spectrum name, film thickness and reduced χ².

    Returns
    -------
    Figure
    """
    wl = _arr(_get(result, "wavelength_nm"))
    meas, fitted = _arr(_get(result, "measured")), _arr(_get(result, "fitted"))
    if wl is None or meas is None or fitted is None:
        raise ValueError("fit_figure needs wavelength_nm, measured and fitted arrays")
    res = _arr(_get(result, "residuals"))
    res = meas - fitted if res is None else res
    used = _get(result, "used")
    used = np.ones(wl.shape, bool) if used is None else np.asarray(used, bool)
    quantity = _get(result, "quantity", "T") or "T"

    fig = _new_figure(fig, (7.0, 5.0))
    ax, axr = fig.subplots(2, 1, sharex=True, height_ratios=(3, 1))
    dense = wl.size > 400
    kw = dict(color=PALETTE["measured"], label="measured")
    if dense:   # a broad grey line under a thin fitted one: misfits show as grey edges
        ax.plot(wl, np.where(used, meas, np.nan), lw=2.2, alpha=0.4, solid_capstyle="butt",
                **kw)
    else:
        ax.plot(wl[used], meas[used], "o", ms=2.5, mew=0, **kw)
    if not used.all():
        ax.plot(wl[~used], meas[~used], ".", ms=2.5, color=PALETTE["excluded"],
                label="excluded from fit")
    ax.plot(wl, fitted, color=PALETTE["fitted"], lw=1.0 if dense else 1.4, label="fitted")
    ax.set_ylabel(f"{_QUANTITY_LABEL.get(quantity, quantity)} (fraction)")
    ax.legend(loc="best", frameon=False, fontsize="small")
    _style(ax)

    sig = _arr(_get(result, "sigma"))
    if sig is not None and np.any(np.isfinite(sig) & (sig > 0)):
        axr.fill_between(wl, -sig, sig, color="#dddddd", lw=0, label="±1σ noise")
    axr.axhline(0.0, color="#666666", lw=0.7)
    # NaN where a point is excluded, so the line breaks over masked windows
    axr.plot(wl, np.where(used, res, np.nan), color=PALETTE["residual"], lw=0.8)
    if not used.all():
        axr.plot(wl[~used], res[~used], ".", ms=2, color=PALETTE["excluded"])
    axr.set_xlabel("Wavelength (nm)")
    axr.set_ylabel("meas. − fit")
    _style(axr)

    if title is None:
        title = _spectrum_name(result)
        d, sd = _thickness_of(result)
        if d is not None:
            title += f"   d = {format_pm(d, sd, 'nm')}"
        redchi = _get(result, "redchi")
        if redchi is not None and np.isfinite(redchi):
            title += rf"   $\chi^2_\mathrm{{red}}$ = {redchi:.3g}"
    fig.suptitle(title, fontsize="medium")
    return fig


def _thickness_of(result):
    if hasattr(result, "thickness"):
        try:
            return result.thickness()
        except KeyError:
            return None, None
    return _get(result, "thickness_nm"), _get(result, "thickness_sigma_nm")


def _two_digits(x) -> str:
    """Two significant digits without exponent where plain digits read better (400, not
    4e+02)."""
    return f"{float(f'{x:.2g}'):g}"


def _band(ax, x, y, s, color, label, *, unit="", floor=None):
    ax.plot(x, y, color=color, lw=1.4, label=label)
    if s is not None and np.any(np.isfinite(s)):
        lower = y - s
        if floor is not None:
            # On a log axis a lower edge at or below zero is drawn at the panel's floor:
            # the band then says "consistent with zero" instead of vanishing.
            lower = np.where(np.isfinite(y), np.maximum(lower, floor), np.nan)
        # The largest σ goes in the legend: a band thinner than the line is still shown.
        ax.fill_between(x, lower, y + s, color=color, alpha=0.22, lw=0,
                        label=f"±1σ (at most {_two_digits(np.nanmax(s))}{unit})")
        ax.legend(loc="best", frameon=False, fontsize="small")


def optical_figure(result, *, layer: str | None = None, alpha: bool = False,
                   fig: Figure | None = None, title: str | None = None) -> Figure:
    """Refractive index n and extinction coefficient κ of one layer with 1σ bands.

    Parameters
    ----------
    result : FitResult, OpticalConstants or mapping
        A result (its ``optical[layer]`` is drawn) or one layer's constants with
        ``wavelength_nm``, ``n``, ``k`` and optional ``n_sigma``, ``k_sigma``,
        ``alpha_cm``.
    layer : str, optional
        Layer name; default the first film.
    alpha : bool
        Add a third panel with the absorption coefficient α = 4πκ/λ on a log axis.
    fig : Figure, optional
        Draw into this figure or sub-figure instead of a new one.

    Returns
    -------
    Figure
    """
    optical = _get(result, "optical")
    oc = _pick_layer(optical, layer) if optical is not None else result
    wl = _arr(_get(oc, "wavelength_nm"))
    n, k = _arr(_get(oc, "n")), _arr(_get(oc, "k"))
    ns, ks = _arr(_get(oc, "n_sigma")), _arr(_get(oc, "k_sigma"))
    fig = _new_figure(fig, (7.0, 6.5 if alpha else 5.0))
    axes = fig.subplots(3 if alpha else 2, 1, sharex=True)
    _band(axes[0], wl, n, ns, PALETTE["n"], "n")
    axes[0].set_ylabel("Refractive index n")
    _band(axes[1], wl, k, ks, PALETTE["k"], "κ")
    axes[1].set_ylabel("Extinction coefficient κ")
    if alpha:
        a = _arr(_get(oc, "alpha_cm"))
        if a is None:
            a = 4 * np.pi * k / wl * 1e7
        sa = _arr(_get(oc, "alpha_sigma"))
        if sa is None and ks is not None:
            sa = 4 * np.pi * ks / wl * 1e7      # α = 4πκ/λ is linear in κ
        a = np.where(a > 0, a, np.nan)
        if np.any(np.isfinite(a)):
            axes[2].set_yscale("log")
            floor = 0.5 * float(np.nanmin(a))
            _band(axes[2], wl, a, sa, PALETTE["alpha"], "α", unit=" cm⁻¹", floor=floor)
        else:
            axes[2].plot(wl, a, color=PALETTE["alpha"], lw=1.4)
            axes[2].text(0.5, 0.5, "κ = 0: no absorption in this range", ha="center",
                         transform=axes[2].transAxes, color="#666666")
        axes[2].set_ylabel("Absorption coeff. α (cm⁻¹)")
    for ax in axes:
        _style(ax)
    axes[-1].set_xlabel("Wavelength (nm)")
    if title is None:
        lname = _get(oc, "layer", layer) or ""
        name = _spectrum_name(result) if optical is not None else _get(oc, "name", "")
        title = " – ".join(x for x in (name, f"layer {lname}" if lname else "") if x)
    fig.suptitle(title or "Optical constants", fontsize="medium")
    return fig


def tauc_figure(result, *, fig: Figure | None = None) -> Figure:
    """Tauc plot (αhν)^r against photon energy, with the fitted line and Eg [2]_.

    r = 2 for a direct and 1/2 for an indirect allowed transition. The straight
    line is a least-squares line through the points of the result's linear range,
    drawn for the eye; the gap printed is the fit engine's ``BandGap``.

    Raises
    ------
    ValueError
        If the result holds no band gap.
    """
    gap = _get(result, "band_gap")
    if gap is None:
        raise ValueError(f"{_spectrum_name(result)}: no band gap in this result; "
                         "a Tauc plot needs an absorbing film with a gap in the data range")
    oc = _pick_layer(_get(result, "optical"), gap.layer or None)
    E = HC_EV_NM / oc.wavelength_nm
    r = 2.0 if gap.transition == "direct" else 0.5
    y = np.clip(oc.alpha_cm * E, 0, None) ** r
    order = np.argsort(E)
    E, y = E[order], y[order]
    fig = _new_figure(fig, (6.0, 4.5))
    ax = fig.subplots()
    ax.plot(E, y, color=PALETTE["alpha"], lw=1.4, label="data")
    lo, hi = gap.fit_range_eV
    sel = (E >= lo) & (E <= hi) & np.isfinite(y)
    if sel.sum() >= 2:
        # Drawn from where this line meets zero, so the eye can judge the extrapolation.
        slope, icpt = np.polyfit(E[sel], y[sel], 1)
        x0 = -icpt / slope if slope > 0 else lo
        xs = np.array([max(min(x0, lo), E[0]), hi])
        ax.plot(xs, slope * xs + icpt, "--", color=PALETTE["fitted"], lw=1.2,
                label=f"linear range {lo:.2f}–{hi:.2f} eV")
    # The gap goes in the legend: a note beside the line would sit on the rising curve.
    ax.axvline(gap.Eg_eV, color="#666666", lw=0.8, ls=":",
               label=f"Eg = {format_pm(gap.Eg_eV, gap.sigma_eV, 'eV', fmt='.3f')}")
    ax.set_ylim(bottom=0)
    # Start the axis a little below the absorption edge, not at the data's low-energy
    # end, so the edge and the extrapolated line fill the plot.
    finite = np.isfinite(y)
    if finite.any() and np.nanmax(y) > 0:
        rise = E[np.flatnonzero(finite & (y > 0.01 * np.nanmax(y)))[0]]
        left = max(float(E[0]), min(float(rise), float(gap.Eg_eV), float(lo)) - 0.5)
        ax.set_xlim(left, float(E[-1]) + 0.02 * (float(E[-1]) - left))
    power = "2" if r == 2 else "1/2"
    ax.set_xlabel(r"Photon energy $h\nu$ (eV)")
    ax.set_ylabel(rf"$(\alpha h\nu)^{{{power}}}$  ((eV cm$^{{-1}}$)$^{{{power}}}$)")
    ax.legend(loc="upper left", frameon=False, fontsize="small")
    _style(ax)
    fig.suptitle(f"{_spectrum_name(result)} – Tauc plot, {gap.transition} transition",
                 fontsize="medium")
    return fig


# -- batch ----------------------------------------------------------------------------
def row_thickness_key(rows: Sequence[Mapping]) -> str:
    """The summary-row key holding the film thickness: ``film_thickness`` if present,
    else the first ``*_thickness`` key of any row."""
    for row in rows:
        if "film_thickness" in row:
            return "film_thickness"
    for row in rows:
        for key in row:
            if key.endswith("_thickness"):
                return key
    return "film_thickness"


def _num(x):
    try:
        v = float(x)
    except (TypeError, ValueError):
        return math.nan
    return v


#: Row statuses that count as a finished fit; anything else is a failure.
OK_STATUSES = ("ok", "success", "converged", "done", "warning", "warnings")


def row_ok(row: Mapping) -> bool:
    """True if a batch summary row is a finished fit (``status`` in :data:`OK_STATUSES`;
    a row without ``status`` counts as finished)."""
    return str(row.get("status", "ok")).strip().lower() in OK_STATUSES


def _thickness_arrays(rows, key):
    d = np.array([_num(r.get(key)) for r in rows])
    s = np.array([_num(r.get(f"{key}_sigma")) for r in rows])
    ok = np.array([row_ok(r) for r in rows], bool) & np.isfinite(d)
    return d, s, ok


def spec_bounds(spec: Mapping | None, key: str) -> tuple[float | None, float | None]:
    """(min, max) of one quantity's spec limit, None where open.

    A limit may be ``{"min": a, "max": b}`` (either may be left out),
    ``{"target": x, "tol": t}`` or a :class:`fitting.limits.Limit`, read as
    :meth:`fitting.limits.Limit.coerce` reads it.
    """
    lim = (spec or {}).get(key)
    if lim is None:
        return None, None
    lo, hi = Limit.coerce(lim).bounds
    return (lo if np.isfinite(lo) else None), (hi if np.isfinite(hi) else None)


def thickness_trend_figure(rows: Sequence[Mapping], spec: Mapping | None = None, *,
                           key: str | None = None, fig: Figure | None = None) -> Figure:
    """Film thickness over the batch order, with 1σ error bars and spec limits.

    Parameters
    ----------
    rows : sequence of dict
        Batch summary rows (see :mod:`fitting.report` for the keys); the batch order is
        the row order. Failed rows are marked along the bottom edge.
    spec : dict, optional
        Limits such as ``{"film_thickness": {"min": 475, "max": 525}}``.
    key : str, optional
        Row key of the thickness; default from :func:`row_thickness_key`.
    """
    key = key or row_thickness_key(rows)
    d, s, ok = _thickness_arrays(rows, key)
    idx = np.arange(1, len(rows) + 1)
    fig = _new_figure(fig, (7.0, 3.5))
    ax = fig.subplots()
    lo, hi = spec_bounds(spec, key)
    inside = np.ones_like(ok)
    if lo is not None:
        inside &= d >= lo
    if hi is not None:
        inside &= d <= hi
    many = len(rows) > 150
    ebar = dict(fmt="o", ms=2.5 if many else 4, lw=0.6, capsize=0 if many else 2)
    good, out = ok & inside, ok & ~inside
    if good.any():
        ax.errorbar(idx[good], d[good], yerr=np.nan_to_num(s[good]), color=PALETTE["ok"],
                    label="fitted", **ebar)
    if out.any():
        ax.errorbar(idx[out], d[out], yerr=np.nan_to_num(s[out]), color=PALETTE["fail"],
                    label="outside spec", **ebar)
    for lim, name in ((lo, "min"), (hi, "max")):
        if lim is not None:
            ax.axhline(lim, color=PALETTE["spec"], lw=1.2, ls="--")
            # max above its line, min below: close limits do not print over each other
            ax.annotate(f"spec {name} {lim:g}", (1, lim), xycoords=("axes fraction", "data"),
                        xytext=(-4, 3 if name == "max" else -3), textcoords="offset points",
                        ha="right", va="bottom" if name == "max" else "top",
                        fontsize="x-small", color="#7a5300")
    failed = ~ok
    if failed.any():
        ax.plot(idx[failed], np.zeros(failed.sum()), "x", color=PALETTE["fail"], ms=5,
                transform=ax.get_xaxis_transform(), clip_on=False,
                label=f"failed ({failed.sum()})")
    ax.set_xlim(0.5, max(len(rows), 1) + 0.5)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("Spectrum (batch order)")
    ax.set_ylabel(f"{key.replace('_', ' ')} (nm)")
    if ok.any() or failed.any():
        ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncols=3, frameon=False,
                  fontsize="small", borderaxespad=0.2)
    _style(ax)
    ax.set_title("Thickness over the batch", fontsize="medium", loc="left")
    return fig


def thickness_histogram_figure(rows: Sequence[Mapping], spec: Mapping | None = None, *,
                               key: str | None = None, fig: Figure | None = None) -> Figure:
    """Histogram of the fitted film thickness of successful rows, with spec limits."""
    key = key or row_thickness_key(rows)
    d, _, ok = _thickness_arrays(rows, key)
    vals = d[ok]
    fig = _new_figure(fig, (7.0, 3.5))
    ax = fig.subplots()
    lo, hi = spec_bounds(spec, key)
    title = "Thickness distribution"
    if vals.size:
        bins = int(np.clip(np.sqrt(vals.size) * 1.5, 5, 60))
        ax.hist(vals, bins=bins, color=PALETTE["ok"], alpha=0.85, edgecolor="white", lw=0.5)
        title += f":  N = {vals.size},  mean {vals.mean():.1f} nm"
        if vals.size > 1:
            title += f",  std {vals.std(ddof=1):.3g} nm"
    else:
        ax.text(0.5, 0.5, "no successful fits", transform=ax.transAxes, ha="center",
                color="#666666")
    for lim, name in ((lo, "min"), (hi, "max")):
        if lim is not None:
            ax.axvline(lim, color=PALETTE["spec"], lw=1.4, ls="--", zorder=3,
                       label=f"spec {name} {lim:g}")
    if lo is not None or hi is not None:
        ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncols=2, frameon=False,
                  fontsize="small", borderaxespad=0.2)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(f"{key.replace('_', ' ')} (nm)")
    ax.set_ylabel("Spectra")
    _style(ax)
    ax.set_title(title, fontsize="medium", loc="left")
    return fig


def _curve_of(item) -> dict[str, Any]:
    """(label, wl, n, k) from a FitResult, an OpticalConstants or a mapping."""
    optical = _get(item, "optical")
    label = _spectrum_name(item) if optical is not None else _get(item, "name", "") or ""
    oc = _pick_layer(optical, None) if optical is not None else item
    return {"label": label or _get(oc, "layer", ""),
            "wavelength_nm": _arr(_get(oc, "wavelength_nm")),
            "n": _arr(_get(oc, "n")), "k": _arr(_get(oc, "k"))}


def nk_overlay_figure(results_or_curves: Iterable, *, max_curves: int = 60,
                      fig: Figure | None = None, title: str | None = None) -> Figure:
    """n and κ curves of many spectra on shared axes, evenly subsampled.

    Parameters
    ----------
    results_or_curves : iterable
        FitResults, OpticalConstants, or mappings with ``wavelength_nm``, ``n``, ``k``
        and optional ``name`` and ``order`` (batch position, used for the colour
        scale when more than 7 curves are drawn).
    max_curves : int
        At most this many curves are drawn, picked evenly over the sequence (the
        title says so), so a 1000-spectrum batch stays legible and small.
    """
    items = list(results_or_curves)
    total = len(items)
    order = [_get(it, "order", None) for it in items]
    if any(o is None for o in order):
        order = list(range(1, total + 1))
    if total > max_curves:
        pick = np.unique(np.linspace(0, total - 1, max_curves).round().astype(int))
        items, order = [items[i] for i in pick], [order[i] for i in pick]
    curves = [_curve_of(it) for it in items]
    fig = _new_figure(fig, (7.0, 5.5))
    axn, axk = fig.subplots(2, 1, sharex=True)
    few = len(curves) <= 7
    # Many curves are coloured by batch order (viridis: perceptually uniform and
    # colour-blind safe), so a drift through the batch shows as a colour gradient.
    cmap = matplotlib.colormaps["viridis"]
    norm = Normalize(min(order), max(order) if max(order) > min(order) else min(order) + 1) \
        if curves else None
    for i, c in enumerate(curves):
        color = CYCLE[i % len(CYCLE)] if few else cmap(norm(order[i]))
        kw = dict(lw=1.2 if few else 0.7, alpha=1.0 if few else 0.6, color=color)
        axn.plot(c["wavelength_nm"], c["n"], label=c["label"] if few else None, **kw)
        axk.plot(c["wavelength_nm"], c["k"], **kw)
    if curves and not few:
        cb = fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=[axn, axk], shrink=0.8,
                          pad=0.02)
        cb.set_label("Spectrum (batch order)")
        cb.locator = MaxNLocator(integer=True)
        cb.update_ticks()
    if not curves:
        axn.text(0.5, 0.5, "no optical constants to show", transform=axn.transAxes,
                 ha="center", color="#666666")
    if few and curves:
        axn.legend(loc="best", frameon=False, fontsize="x-small")
    axn.set_ylabel("Refractive index n")
    axk.set_ylabel("Extinction coefficient κ")
    axk.set_xlabel("Wavelength (nm)")
    for ax in (axn, axk):
        _style(ax)
    if title is None:
        title = f"n and κ of {total} spectra"
        if total > len(curves):
            title += f" ({len(curves)} shown, evenly spaced in batch order)"
    fig.suptitle(title, fontsize="medium")
    return fig
