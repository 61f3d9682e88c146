"""The automatic start of a fit as a plan made of small steps.

:func:`plan_starts` turns a spectrum and a stack into a :class:`StartPlan`:
the start values to polish and the fringe stages to polish them on. The steps,
each a function of plain values that can be tested alone
(``tests/test_startplan.py``):

1. :func:`seed_and_edge` - what the data say before any model: the fringe
   seed (thickness and index from the extrema, :mod:`fitting.autostart`) and
   the absorption edge (:mod:`fitting.edge`);
2. :func:`hold_higher_orders` - dispersion terms too fine for the fringes;
3. :func:`seeded_values` - the film's index and dispersion from the seed, its
   absorption from the edge (:func:`pick_edge` chooses between edge shapes
   on the spectrum itself);
4. :func:`index_levels` - the index levels the thickness scan tries;
5. :func:`scan_windows` - the wavelengths the scan and the fringe stages see;
6. :func:`scan_basins` - the thickness scan and its lowest distinct minima;
7. :func:`stage_plan` - which points each fringe stage fits, and which
   absorption parameters wait for the final fit.

References
----------
.. [1] R. Swanepoel, J. Phys. E 16, 1214 (1983) (envelope seed, absorbing films).
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field

import numpy as np

from . import autostart
from .errors import PellucidError
from .finish import scanned_film
from .objective import Objective, Part

__all__ = ["StartPlan", "Film", "Levels", "plan_starts", "seed_and_edge", "choose_seed",
           "hold_higher_orders", "low_contrast", "pick_edge", "seeded_values",
           "index_levels", "scan_windows", "scan_basins", "stage_plan", "N_POLISH"]

#: How many scan basins the automatic start polishes.
N_POLISH = 3


@dataclass
class StartPlan:
    """Starts to polish, best guess first, and the fringe stages to polish them on.

    ``stages`` holds one entry per stage: a list with one bool mask per part
    (over its used points), or None for all points; ``fixed`` names the
    parameters held during the stages (the film's absorption edge).
    """

    starts: list
    stages: list = field(default_factory=list)
    fixed: list = field(default_factory=list)


@dataclass
class Film:
    """The film whose thickness the scan looks for, and its names in the fit."""

    tname: str                    # global name of its thickness
    index: int                    # layer index in the first part's stack
    part: Part
    layer: object
    gmap: dict                    # local -> global names of the first part

    @property
    def material(self):
        return self.layer.material

    def g(self, local: str) -> str:
        return self.gmap[f"{self.layer.name}_{local}"]

    def local(self, values: dict) -> dict:
        return {k: values[self.g(k)] for k in self.material.params}


@dataclass
class Levels:
    """Index levels the thickness scan tries, at one reference wavelength."""

    param: str | None            # the material's level parameter (None: one level)
    n_try: object                # a float (tried at ±6 %) or a list of levels
    n_ref: float
    wl_ref: float
    low_contrast: bool = False


def hold_higher_orders(obj: Objective, layer, gmap: dict, seed, info: dict) -> None:
    """Hold higher dispersion terms the fringes cannot support (the model's
    ``higher_orders``: a third Cauchy term follows a high-index film into the UV,
    but on a film with few fringes it only trades off against the thickness)."""
    for local, need in layer.material.higher_orders:
        g = gmap.get(f"{layer.name}_{local}")
        if g in obj.var_names and seed.n_extrema < need and obj.params[g].value == 0:
            obj.hold(g)
            info.setdefault("held", []).append(
                f"{g}: held at 0, only {seed.n_extrema} fringe extrema (needs {need})")


def low_contrast(part: Part, seed, sub_n: np.ndarray) -> bool:
    """Faint fringes: seed index within 0.12 of the substrate's, below it, or a T
    swing under 2 % in the long-wavelength half (common practice thresholds)."""
    if part.quantity != "T":
        return False
    if seed.below_substrate:
        return True
    if seed.n_ref and abs(seed.n_ref - float(np.interp(seed.wl_ref, part.wl, sub_n))) < 0.12:
        return True
    half = part.wl >= np.median(part.wl)
    y = part.y[half]
    return y.size > 10 and float(np.percentile(y, 95) - np.percentile(y, 5)) < 0.02


def pick_edge(obj: Objective, li: int, tname: str, local: dict, edge, seed, free,
               start: dict, info: dict) -> dict:
    """The film's absorption start that best fits the whole spectrum near the seed.

    Candidates are the edge shapes of :func:`autostart.edge_candidates` and the
    start as it was; each is scanned over the seed thickness ±15 % on all used
    points (absorption included, nuisance terms solved), and the lowest χ² wins.
    """
    part = obj.parts[0]
    mat = part.stack.layers[li].material
    cands = autostart.edge_candidates(mat, local, edge, seed, free, float(part.wl.min()),
                                      float(part.wl.max()))
    if len(cands) == 1 and cands[0] == local:
        return local
    cands.append(dict(local))
    d0 = seed.thickness_nm
    pth = obj.params[tname]
    lo, hi = max(0.85 * d0, pth.min), min(1.15 * d0, pth.max)
    if not hi > lo:
        return cands[0]
    n_hi = max(float(np.max(mat.N_unchecked(part.wl, c).real)) for c in cands)
    K = int(min(400, max(8, (hi - lo) / (float(part.wl.min()) / (16 * n_hi)))))
    locs = {loc: start[g] for g, loc in part.names}
    try:
        scan = autostart.scan_thickness([part], li, [locs], np.linspace(lo, hi, K), None,
                                        n_hi, float(np.median(part.wl)),
                                        autostart.Nuisance.from_options(obj.options),
                                        check=obj.check, candidates=cands)
    except PellucidError:
        return cands[0]
    best = int(np.argmin(scan.chisqr.min(axis=1)))
    info["edge_choice"] = {"candidates": len(cands), "chosen": best,
                           "chisqr": [float(c) for c in scan.chisqr.min(axis=1)]}
    return cands[best]


def seed_and_edge(part: Part, sub_n: np.ndarray):
    """Fringe seed and absorption edge of the first part, each from the data alone.

    Points at the noise floor (an opaque film) are left out of the fringe
    search, where noise would make false extrema; once the edge shows where the
    film is clear, the seed is taken again from the clear part only, where the
    extrema heights are those of a transparent film.
    """
    from .edge import absorption_edge, opaque_floor
    if part.quantity != "T":
        return choose_seed(part, sub_n), None
    keep = ~opaque_floor(part.y, part.sigma)
    seed = choose_seed(part, sub_n, keep)
    edge = absorption_edge(part.wl, part.y, part.sigma, sub_n,
                           thickness_nm=seed.thickness_nm, n_film=seed.n_ref)
    if edge.absorbs and edge.clear_nm is not None:
        clear = (part.wl >= edge.clear_nm[0]) & (part.wl <= edge.clear_nm[1])
        again = choose_seed(part, sub_n, clear)
        if again.has_fringes and again.n_ref:
            seed = again
    return seed, edge


def choose_seed(part: Part, sub_n: np.ndarray, keep=None) -> autostart.Seed:
    """The envelope seed, or the simple fringe seed where the envelope method is weak.

    The envelope method assumes a film index above the substrate's; when the
    fringes say otherwise (maxima above the bare-substrate line) the simple seed,
    which knows both cases, is used. It also needs clear envelopes: when it sees
    far fewer extrema than the simple count (strong dispersion or absorption),
    the simple seed is the better one. (Both read T against the bare-substrate
    line, so a baseline error biases n a little; the scan's index levels absorb it.)
    """
    if keep is None or keep.sum() < 12:
        keep = np.ones(part.wl.size, bool)
    wl, y, sn = part.wl[keep], part.y[keep], sub_n[keep]
    simple = autostart.fringe_seed(wl, y, part.quantity, sn)
    env = None if simple.below_substrate else autostart.envelope_seed(wl, y, part.quantity, sn)
    if env is not None and 1.5 * env.n_extrema + 2 >= simple.n_extrema:
        return env
    return simple


def drop_unresolved(seed, part: Part):
    """(seed, λ_res): fringes closer than ~4 data points are not resolved, so their
    extrema heights (and the seed's n there) are wrong; their n points are dropped."""
    wl_res = 0.0
    if seed.has_fringes and seed.thickness_nm and seed.n_ref and part.wl.size > 1:
        dl = float(np.median(np.diff(part.wl)))
        wl_res = math.sqrt(8 * 1.15 * seed.n_ref * seed.thickness_nm * dl)
        if seed.n_points:
            lam, nn = (np.asarray(a, float) for a in seed.n_points)
            ok = lam >= wl_res
            seed = dataclasses.replace(seed, n_points=(lam[ok], nn[ok]))
    return seed, wl_res


def seeded_values(obj: Objective, film: Film, start: dict, seed, edge, info: dict) -> dict:
    """Start values with the film's material set from the seed and the edge."""
    mat = film.material
    local = film.local(start)
    free = [k for k in mat.params if film.g(k) in obj.var_names]
    seeded = autostart.apply_seed(mat, local, seed, free)
    if edge is not None and film.part.quantity == "T":
        seeded = pick_edge(obj, film.index, film.tname, seeded, edge, seed, free, start, info)
    values = dict(start)
    for k, v in seeded.items():
        if film.g(k) in obj.var_names:
            values[film.g(k)] = v
    return values


def index_levels(obj: Objective, film: Film, seed, sub_n: np.ndarray,
                 n_film: np.ndarray) -> Levels:
    """The index levels of the scan: around the seed, a dense ladder for faint
    fringes, or the usual range of films when there are no fringes."""
    part = film.part
    wl_mid = float(np.median(part.wl))
    level = autostart.n_level_param(film.material)
    if level is not None and film.g(level) not in obj.var_names:
        level = None
    if level is not None and low_contrast(part, seed, sub_n):
        # Faint or no fringes on a flat spectrum: a film close to the substrate's index,
        # on either side (or a very thin one, which the low levels cover). The
        # seed's n is unreliable (a 1 % baseline error moves it a lot) and the
        # fringe amplitude grows fast with |n - n_s|: scan a dense ladder of index
        # levels on both sides (from dense fluorides up), never n_s itself.
        wl_ref = seed.wl_ref or wl_mid
        n_try = autostart.contrast_levels(float(np.interp(wl_ref, part.wl, sub_n)))
        if not seed.has_fringes:        # a thin film of any index is flat too
            n_try = sorted(set(n_try) | set(autostart.BLIND_LEVELS))
        return Levels(level, n_try, max(n_try), wl_ref, True)
    if seed.n_ref:
        return Levels(level, seed.n_ref, seed.n_ref, seed.wl_ref)
    if level is not None:
        # No fringes, so no index from the data: try the usual range of films.
        return Levels(level, autostart.BLIND_LEVELS, max(autostart.BLIND_LEVELS), wl_mid)
    n_ref = float(np.median(n_film))
    return Levels(level, n_ref, n_ref, wl_mid)


def scan_windows(part: Part, seed, edge, wl_res: float, n_film: np.ndarray) -> list:
    """Wavelength windows of the scan (the first) and of the fringe stages (all).

    Below the shortest fringe the film absorbs: those points say little about d
    but much about the (not yet fitted) absorption, so they are left out, and so
    is what the absorption edge of the data calls absorbing. With many fringes
    the scan sees only part of them (in wavenumber), on the side where the start
    model disperses least, so its dispersion error shifts the fringe phase
    least; the stages then widen to all of them (a continuation in wavelength
    that keeps the interference order).
    """
    wl_max = float(part.wl.max())
    wl_range = (0.0, math.inf)
    if seed.fringe_range_nm is not None:
        # Above the longest fringe, too, if the next extremum (about λ²/(4nd) further
        # on) would lie inside the data: the fringes die out there (free carriers).
        f_lo, f_hi = seed.fringe_range_nm
        nxt = f_hi + 1.2 * f_hi ** 2 / (4 * (seed.n_ref or 2.0) * (seed.thickness_nm or 1e3))
        wl_range = (max(0.97 * f_lo, wl_res), nxt if nxt < wl_max else math.inf)
    if edge is not None and edge.clear_nm is not None and edge.absorbs:
        c_lo, c_hi = edge.clear_nm
        wl_range = (max(wl_range[0], c_lo), min(wl_range[1], c_hi if c_hi < wl_max
                                                 else math.inf))
    if not (seed.n_extrema >= 12 and seed.fringe_range_nm is not None):
        return [wl_range]
    w_lo = max(wl_range[0], float(part.wl.min()))
    w_hi = min(seed.fringe_range_nm[1], wl_range[1], wl_max)
    nu_lo, nu_hi = 1.0 / w_hi, 1.0 / w_lo
    # Half the fringes (in wavenumber), and for many fringes first a third: each
    # holds enough fringes to fix the order. The long end for films with UV
    # resonances (Cauchy, Tauc-Lorentz), the short end for free carriers (Drude),
    # whose index falls towards the infrared.
    fracs = (1 / 3, 1 / 2) if seed.n_extrema >= 24 else (1 / 2,)
    long_side = [(1.0 / (nu_lo + f * (nu_hi - nu_lo)), wl_range[1]) for f in fracs]
    short_side = [(wl_range[0], 1.0 / (nu_hi - f * (nu_hi - nu_lo))) for f in fracs]

    def spread(r):
        sel = (part.wl >= r[0]) & (part.wl <= r[1])
        return float(np.ptp(n_film[sel])) if sel.sum() > 1 else math.inf

    side = long_side if spread(long_side[0]) <= spread(short_side[0]) else short_side
    return side + [wl_range]


def _scan_parts(obj: Objective, film: Film, values: dict):
    """Parts that share the film's thickness (their χ² add), with their local values."""
    parts, locals_ = [], []
    for p in obj.parts:
        pm = dict((loc, g) for g, loc in p.names)
        if pm.get(f"{film.layer.name}_thickness") == film.tname:
            parts.append(p)
            locals_.append({loc: values[g] for g, loc in p.names})
    return parts, locals_


def scan_basins(obj: Objective, film: Film, values: dict, seed, lv: Levels, window,
                d_typ: float, lo: float, hi: float, K: int, info: dict) -> list:
    """The thickness scan and its lowest distinct basins: (d, level values, χ²).

    The seed's own thickness is a basin too: when the start dispersion is far
    off, the χ² scan can prefer a smooth thin film or a double thickness to the
    right order, while the fringe analysis already has it.
    """
    part, mat = film.part, film.material
    parts, locals_ = _scan_parts(obj, film, values)
    t0 = time.perf_counter()
    scan = autostart.scan_thickness(parts, film.index, locals_, np.linspace(lo, hi, K),
                                    lv.param, lv.n_try, lv.wl_ref,
                                    autostart.Nuisance.from_options(obj.options),
                                    check=obj.check, wl_range=window, d_typical=d_typ)
    n_lv = [autostart._n_at(mat, lv.wl_ref, x) for x in scan.levels]
    same = float(part.wl.min()) / 8
    # Faint fringes leave many near-equal basins: polish more of them.
    n_max = N_POLISH + 2 if lv.low_contrast else N_POLISH
    basins = autostart.pick_basins(scan, n_max, n_of_level=n_lv, same_nd=same)
    if seed.has_fringes and seed.thickness_nm and lo <= seed.thickness_nm <= hi:
        mid = len(scan.levels) // 2
        nd = seed.thickness_nm * n_lv[mid]
        if all(abs(nd - b[0] * autostart._n_at(mat, lv.wl_ref, b[1])) >= same for b in basins):
            basins.append((float(seed.thickness_nm), scan.levels[mid], math.nan))
    info["scan"] = {"thickness_range_nm": [lo, hi], "points": K, "step_nm": (hi - lo) / (K - 1),
                    "levels": len(scan.levels), "time_s": time.perf_counter() - t0,
                    "basins_nm": [b[0] for b in basins]}
    return basins


def _joint_basins(obj: Objective, film: Film, values: dict, starts: list, lv: Levels,
                  n_hi: float) -> None:
    """Joint fits: films of other parts with their own thickness get their best basin."""
    options = obj.options
    for p in obj.parts[1:]:
        pm = dict((loc, g) for g, loc in p.names)
        g2 = pm.get(f"{film.layer.name}_thickness")
        if g2 is None or g2 == film.tname or g2 not in obj.var_names:
            continue
        pp = obj.params[g2]
        sd = autostart.fringe_seed(p.wl, p.y, p.quantity, p.stack.substrate.N(p.wl).real)
        lo2, hi2 = autostart.scan_range(sd, (pp.min, pp.max), float(p.wl.min()),
                                        float(p.wl.max()), options.thickness_range_nm)
        K2 = int(min(autostart._MAX_SCAN_POINTS,
                     max(8, math.ceil((hi2 - lo2) / (float(p.wl.min()) / (16 * n_hi))) + 1)))
        sc = autostart.scan_thickness([p], film.index, [{loc: values[g] for g, loc in p.names}],
                                      np.linspace(lo2, hi2, K2), None, lv.n_ref, lv.wl_ref,
                                      autostart.Nuisance.from_options(options), check=obj.check)
        b = autostart.pick_basins(sc, 1)
        if b:
            for _, v in starts:
                v[g2] = b[0][0]


def stage_plan(obj: Objective, film: Film, local: dict, windows: list, d_typ: float):
    """(stages, fixed): each fringe stage's point masks (nearly transparent points
    of its window) and the absorption-edge parameters held until the final fit."""
    mat = film.material
    edge = set(autostart.edge_params(mat))
    fixed = [film.g(k) for k in mat.params if k in edge and film.g(k) in obj.var_names]
    scan_parts, _ = _scan_parts(obj, film, {k: 0.0 for k in obj.params})
    stages = []
    for rng in windows:
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
    return stages, fixed


def plan_starts(obj: Objective, start: dict, info: dict) -> StartPlan:
    """Seed, scan and basins: the :class:`StartPlan` of an automatic fit."""
    found = scanned_film(obj)
    if found is None:
        info["scan"] = "no film thickness is fitted: a single local fit from the start values"
        return StartPlan([("start values", start)])
    tname, li = found
    part = obj.parts[0]
    film = Film(tname, li, part, part.stack.layers[li], dict((loc, g) for g, loc in part.names))
    sub_n = part.stack.substrate.N(part.wl).real
    seed, edge = seed_and_edge(part, sub_n)
    info["seed"] = seed.to_dict()
    if edge is not None:
        info["edge"] = edge.to_dict()
    hold_higher_orders(obj, film.layer, film.gmap, seed, info)
    seed, wl_res = drop_unresolved(seed, part)
    values = seeded_values(obj, film, start, seed, edge, info)
    local = film.local(values)
    n_film = film.material.N_unchecked(part.wl, local).real
    lv = index_levels(obj, film, seed, sub_n, n_film)
    if lv.low_contrast:
        info["low_contrast"] = True
    pth = obj.params[tname]
    lo, hi = autostart.scan_range(seed, (pth.min, pth.max), float(part.wl.min()),
                                  float(part.wl.max()), obj.options.thickness_range_nm,
                                  faint=lv.low_contrast)
    n_hi = 1.15 * max(float(n_film.max()), lv.n_ref) * 1.06
    step = float(part.wl.min()) / (16 * n_hi)
    K = int(min(autostart._MAX_SCAN_POINTS, max(8, math.ceil((hi - lo) / step) + 1)))
    obj.enter("scan", expect_nfev=1, message=f"scanning {K} thicknesses {lo:.0f}-{hi:.0f} nm")
    windows = scan_windows(part, seed, edge, wl_res, n_film)
    d_typ = seed.thickness_nm if seed.has_fringes and seed.thickness_nm else 0.5 * hi
    basins = scan_basins(obj, film, values, seed, lv, windows[0], d_typ, lo, hi, K, info)
    starts = []
    for d, lvals, _ in basins:
        v = dict(values)
        v[tname] = d
        for k, x in lvals.items():
            if film.g(k) in obj.var_names:
                v[film.g(k)] = x
        starts.append((f"basin at {d:.1f} nm", v))
    _joint_basins(obj, film, values, starts, lv, n_hi)
    stages, fixed = stage_plan(obj, film, local, windows, d_typ)
    return StartPlan(starts or [("start values", values)], stages, fixed)
