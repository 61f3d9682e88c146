"""Which film model do the data ask for? Fit the plausible ones and rank them by BIC.

:func:`suggest_model` answers the question a technician otherwise settles by
trial: Cauchy or Sellmeier for a clear film, Tauc-Lorentz or a Cauchy with an
Urbach tail when it absorbs, Drude + Lorentz for a transparent conductor. It

1. **reads the spectrum** (:func:`classify`, no model involved). Where the
   film shows fringes (:data:`MIN_EXTREMA` or more extrema standing 6σ above
   the noise), the fringe seed (:func:`fitting.autostart.fringe_seed`) sets
   the envelope window and :func:`fitting.edge.absorption_edge` measures the
   film's transparency x(λ); the film has an *absorption edge* when its
   envelope sinks below :data:`ABSORBING_TRANSPARENCY` (85 %) of the clear
   level on the short-wavelength side (αd > -ln 0.85 = 0.16) or T reaches
   the noise floor there - far outside the ±1 % of an ordinary 100 % line
   and the ~2σ bias of a running maximum of noise. With fewer fringes a thin
   film's own quarter-wave dip looks like loss to an envelope, so an edge is
   claimed only where T falls below what any lossless film of index up to
   :data:`LOSSLESS_N_MAX` can give (:func:`lossless_floor`); otherwise the
   data are *undetermined* and both kinds of model are tried. A
   *free-carrier fall-off* (the plasma edge of a transparent conductor,
   Drude 1900) is a steady fall of T towards the infrared that no fringe
   makes (:func:`falloff_start`). These thresholds are common practice, set
   here on the project's validation spectra, not taken from a publication;
   a false alarm costs one more candidate fit, which the ranking then sorts
   out, while a miss would leave the right model untried;
2. **picks the families** (:data:`FAMILIES`): transparent - Cauchy,
   Cauchy + Urbach tail, Sellmeier; absorption edge - Tauc-Lorentz,
   Cauchy + Urbach tail; free-carrier fall-off - Drude + Lorentz (and
   Tauc-Lorentz when the band gap side cannot be read); undetermined - the
   transparent ones and Tauc-Lorentz. The user's own model is always
   a candidate, fitted exactly as the user set it up; every other family is
   fitted from its defaults (:func:`fitting.presets.make_model`) in the same
   layer of the same stack, with the same substrate, other layers and fit
   options;
3. **ranks them** by the Bayesian (Schwarz) information criterion

       BIC = χ²/ĉ + k ln N,

   with χ² the fit's weighted sum of squares against the spectrum's *own*
   noise (estimated from the spectrum before any model, so it is the same
   for every candidate), k the number of varied parameters and N the number
   of fitted points. BIC approximates -2 ln of a model's evidence
   (Schwarz 1978); only differences count.

   *Nuisance parameters* (100 % line scale and tilt, baseline offset,
   incidence angle) are counted in k like any other: they are varied in every
   candidate alike, so they shift every BIC by the same k ln N and cancel in
   ΔBIC. The thickness non-uniformity is counted only where the fit kept it
   (``fit_spread="auto"`` adds it per candidate when the data ask for it),
   since there it buys a lower χ². The Gaussian *priors* of scale and tilt
   (1 ± 1 %, 0 ± 0.5 %) enter χ² as the penalty terms of the maximum a
   posteriori fit; they are the same for every candidate, and a model that
   needs a 100 % line far from 1 to fit pays for it in χ².

   *ĉ* is 1 when the best candidate fits within the noise (χ²_red <= 1);
   when even the best candidate leaves χ²_red > 1 - a misfit no candidate
   describes, or a noise estimate too low for data that were smoothed by the
   instrument - χ² is divided by ĉ = that smallest χ²_red (the
   quasi-likelihood correction for overdispersion, Burnham & Anderson 2002,
   sec. 6.2; the Birge ratio of Birge 1932), so that χ² differences are
   measured in units of the misfit actually seen and a tiny improvement from
   one more parameter is not taken for evidence.

The rules of the choice, in order:

* a candidate whose fit failed to start (an error) or was stopped by the
  user is not ranked; one that ran out of time or evaluations is ranked but
  has the verdict "poor" (next rule);
* a candidate with the verdict "poor" (:mod:`fitting.verdict`: it grossly
  misses the data, its thickness ended at a bound, ...) is passed over for
  the best one that is not poor, whatever their BIC: a metrology tool must
  not recommend a result it would itself tell the user not to use. If every
  candidate is poor, the lowest BIC is still reported and the reason says
  that none describes the data;
* a candidate with the verdict "check" (a parameter at its bound, an index
  no dense film has, ...) yields to a "good" one whose BIC is higher by
  less than :data:`CREDIBLE` (10): evidence short of "very strong" does not
  outweigh a warning about the model itself;
* ΔBIC < 2 is "not worth more than a bare mention" (Kass & Raftery 1995,
  sec. 3.2: 0-2 barely worth mentioning, 2-6 positive, 6-10 strong, > 10 very
  strong evidence). Candidates within 2 of the best are treated as
  indistinguishable, and the one chosen among them is, in this order, one
  whose n and κ pass the Kramers-Kronig check (:mod:`fitting.kramers_kronig`:
  n and κ of a real material are linked, and a model that breaks the link,
  such as a Cauchy index with an Urbach tail, describes the film less
  faithfully), the simplest (fewest varied parameters), the one with the
  better verdict, the one with the lower BIC; the reason says which rule
  decided.

The chosen result gets a *model choice* line in its uncertainty budget
(:func:`fitting.uncertainty.with_model_choice`, half the difference to the
runner-up as a rectangular distribution, GUM 4.3.7) when the runner-up is a
credible alternative: ΔBIC < 10 (not "very strong" evidence against it), a
converged fit and a verdict that is not poor. Its verdict is judged again
with that budget, and ``result.extra["model_suggestion"]`` holds the
ranking (:meth:`Suggestion.to_dict`), so every export says how the model was
chosen.

Cost: one full fit per candidate (3-4 as a rule), each with the fit
options' time limit. :func:`iter_suggest` is the generator form for a worker
thread: it yields :class:`~fitting.result.FitProgress` and the
:class:`Suggestion` last; ``stop`` (a :class:`threading.Event`) ends the
running candidate's fit and skips the rest.

References
----------
.. [1] G. Schwarz, "Estimating the dimension of a model", Ann. Stat. 6, 461-464
       (1978). :DOI:`10.1214/aos/1176344136`
.. [2] R. E. Kass and A. E. Raftery, "Bayes factors", J. Am. Stat. Assoc. 90,
       773-795 (1995). :DOI:`10.1080/01621459.1995.10476572`
.. [3] K. P. Burnham and D. R. Anderson, *Model Selection and Multimodel
       Inference*, 2nd ed., Springer (2002), sec. 6.2 (overdispersion, ĉ).
.. [4] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932).
.. [5] R. Swanepoel, J. Phys. E 16, 1214 (1983) (envelope and transparency).
.. [6] P. Drude, "Zur Elektronentheorie der Metalle", Ann. Phys. 306, 566 (1900).
"""

from __future__ import annotations

import dataclasses
import math
import re
import threading
import time
from dataclasses import dataclass
from collections.abc import Callable, Iterator

import numpy as np

from . import fit as _fit
from . import verdict as _verdict
from .autostart import Seed, fringe_seed
from .dispersion import Bruggeman
from .edge import EdgeData, absorption_edge, opaque_floor
from .errors import FitError, PellucidError
from .jsonsafe import finite_or_none as _fin
from .objective import build_part
from .presets import MODEL_CHOICES, make_model, model_choice_of, tie_roughness
from .result import FitProgress, FitResult
from .stack import Stack
from .uncertainty import with_model_choice

__all__ = ["suggest_model", "iter_suggest", "classify", "candidate_stack", "Suggestion",
           "Candidate", "Appearance", "FAMILIES", "SUGGESTABLE", "ABSORBING_TRANSPARENCY",
           "LOSSLESS_N_MAX", "FALLOFF_DROP", "lossless_floor", "falloff_start",
           "INDISTINGUISHABLE", "CREDIBLE", "evidence_words", "add_model_choice"]

#: Model families per appearance of the data, most plausible first (issue 11).
FAMILIES = {
    "transparent": ("cauchy", "cauchy_urbach", "sellmeier"),
    "absorption edge": ("tauc_lorentz", "cauchy_urbach"),
    "free-carrier fall-off": ("drude_lorentz",),
}
#: Models a suggestion can try from their defaults (a table needs its file, a
#: roughness layer its host).
SUGGESTABLE = tuple(k for k in MODEL_CHOICES if k not in ("tabulated", "roughness"))
#: Envelope below this fraction of the clear level = the film absorbs there.
ABSORBING_TRANSPARENCY = 0.85
#: Highest index of a common dielectric film (rutile titania, about 2.7 in the
#: visible; common practice): no lossless film dims T further.
LOSSLESS_N_MAX = 2.7
#: Fringe extrema the envelope reading needs: with fewer, a thin film's own
#: quarter-wave dip passes for an absorption edge (common practice).
MIN_EXTREMA = 4
#: Relative fall of T that marks a free-carrier fall-off (common practice).
FALLOFF_DROP = 0.2
#: ΔBIC below which two models are not distinguishable (Kass & Raftery 1995).
INDISTINGUISHABLE = 2.0
#: ΔBIC below which the runner-up is a credible alternative (below "very strong").
CREDIBLE = 10.0
_VERDICT_RANK = {"good": 0, "check": 1, "poor": 2, "": 1}
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def evidence_words(delta_bic: float) -> str:
    """Kass & Raftery's (1995) words for a BIC difference (≈ 2 ln of the Bayes factor)."""
    if not math.isfinite(delta_bic):
        return "decisive"
    if delta_bic < 2:
        return "not worth more than a bare mention"
    if delta_bic < 6:
        return "positive"
    if delta_bic < 10:
        return "strong"
    return "very strong"


def _short(key: str) -> str:
    """'Cauchy + Urbach tail' from the menu label 'Cauchy + Urbach tail (weak ...)'."""
    return MODEL_CHOICES.get(key, key).split(" (")[0]


# ----------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Appearance:
    """What the spectrum alone says about the film, and the model families that follows.

    Attributes
    ----------
    traits : tuple of str
        "transparent", "absorption edge" and/or "free-carrier fall-off"
        (keys of :data:`FAMILIES`); "undetermined" when too few fringes
        show to read absorption from, "unknown" for a reflectance spectrum.
    families : tuple of str
        :data:`~fitting.presets.MODEL_CHOICES` keys to try, in order.
    clear_nm : (float, float) or None
        Where the film is clear (read from the fringe envelope; None without fringes).
    edge_nm : float or None
        T falls below this wavelength (absorption edge).
    falloff_nm : float or None
        T falls above this wavelength (free carriers).
    text : str
        The same in words ("the data show an absorption edge below 420 nm").
    """

    traits: tuple
    families: tuple
    clear_nm: tuple | None = None
    edge_nm: float | None = None
    falloff_nm: float | None = None
    text: str = ""

    def to_dict(self) -> dict:
        return {"traits": list(self.traits), "families": list(self.families),
                "clear_nm": None if self.clear_nm is None else list(self.clear_nm),
                "edge_nm": self.edge_nm, "falloff_nm": self.falloff_nm, "text": self.text}


def _short_side(edge: EdgeData) -> bool:
    """The envelope sinks (or T reaches the noise floor) on the short side of the clear span."""
    if edge.clear_nm is None:
        return edge.absorbs
    strong = edge.alpha_d > -math.log(ABSORBING_TRANSPARENCY)
    return edge.opaque_below_nm is not None or bool(
        np.any(strong & (edge.wavelength_nm < edge.clear_nm[0])))


def lossless_floor(substrate_n: np.ndarray, n_max: float = LOSSLESS_N_MAX) -> np.ndarray:
    """Lowest T a lossless film of index <= ``n_max`` can give on a thick substrate.

    The quarter-wave film, R_f = ((s - n²)/(s + n²))² (H. A. Macleod, *Thin-Film
    Optical Filters*, ch. 2), with the incoherent back face R_b = ((s - 1)/(s + 1))²
    added: T = (1 - R_f)(1 - R_b)/(1 - R_f R_b) (O. S. Heavens, *Optical
    Properties of Thin Solid Films*, 1955).
    """
    s = np.asarray(substrate_n, float)
    rf = ((s - n_max ** 2) / (s + n_max ** 2)) ** 2
    rb = ((s - 1) / (s + 1)) ** 2
    return (1 - rf) * (1 - rb) / (1 - rf * rb)


def _smooth(y: np.ndarray, width: int) -> np.ndarray:
    if y.size < width or width < 2:
        return y.copy()
    pad = width // 2
    ext = np.r_[np.full(pad, y[0]), y, np.full(width - 1 - pad, y[-1])]
    return np.convolve(ext, np.ones(width) / width, mode="valid")


def _extrema(y: np.ndarray, sigma: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(all extrema, minima) of a (smoothed) spectrum that stand 6σ above the noise."""
    from scipy.signal import find_peaks
    if y.size < 5:
        return np.zeros(0, int), np.zeros(0, int)
    prom = max(6 * float(np.median(sigma)), 0.005)
    minima = find_peaks(-y, prominence=prom)[0]
    return np.sort(np.r_[find_peaks(y, prominence=prom)[0], minima]), minima


def falloff_start(wl: np.ndarray, y: np.ndarray, sigma: np.ndarray,
                  substrate_n: np.ndarray) -> float | None:
    """Where T starts its last, steady fall towards the long-wavelength end, if it has one.

    A free-carrier film (a transparent conductor) loses T steadily towards the
    infrared past its plasma edge (Drude 1900); a clear film's T only swings
    with its fringes there. So the fall counts when, on the smoothed spectrum,
    T falls without rising again (by more than 3σ) from a last maximum to the
    end of the data; loses more than :data:`FALLOFF_DROP` of its value; ends
    more than that below the bare-substrate line 2s/(s² + 1); and, where
    fringes come before it, either lasts longer than 1.5 fringe half-periods
    (in 1/λ), which no falling half of a fringe does, or ends that much below
    the last fringe minimum (a clear film with normal dispersion has shallower
    minima towards the infrared, Swanepoel 1983). These thresholds are set
    here (common practice, no publication); a false alarm costs one more
    candidate fit, which the BIC then ranks.

    Parameters
    ----------
    wl, y, sigma, substrate_n : ndarray of shape (W,)
        Wavelengths (nm, increasing), measured T, its 1σ and the substrate's
        real index.

    Returns
    -------
    float or None
        The wavelength (nm) where the fall starts; None if there is none.
    """
    if wl.size < 20:
        return None
    width = max(3, wl.size // 100)
    s = _smooth(y, width)
    tol = 3 * float(np.median(sigma)) / math.sqrt(width) + 1e-3
    top, p = s[-1], wl.size - 1
    for i in range(wl.size - 1, -1, -1):
        if s[i] < top - tol:
            break
        if s[i] >= top:
            top, p = s[i], i
    if p >= wl.size - 5:
        return None
    ts_end = 2 * substrate_n[-1] / (substrate_n[-1] ** 2 + 1)
    end = float(np.mean(s[-max(3, width):]))
    if not (end < (1 - FALLOFF_DROP) * s[p] and end < (1 - FALLOFF_DROP) * ts_end):
        return None
    ext, minima = _extrema(s[:p], sigma)
    if ext.size >= 2:
        inv = 1.0 / wl[ext[-3:]]
        half = float(np.median(np.abs(np.diff(inv))))
        longer = 1.0 / wl[p] - 1.0 / wl[-1] > 1.5 * half
        # ... or deeper than the fringe minimum before it: with normal dispersion a
        # clear film's next minimum is no deeper than its last.
        deeper = minima.size > 0 and end < (1 - FALLOFF_DROP) * s[minima[-1]]
        if not (longer or deeper):
            return None
    return float(wl[p])


def classify(spectrum, stack: Stack, options=None) -> Appearance:
    """Read from the spectrum alone whether the film is clear, has an edge or free carriers.

    With fringes (:data:`MIN_EXTREMA` or more extrema), the absorption edge is
    read from the envelope (:func:`fitting.edge.absorption_edge`, module
    docstring). Without
    them a thin film's own interference dip looks like loss to an envelope, so
    an edge is claimed only where T falls below what any lossless film of
    index up to :data:`LOSSLESS_N_MAX` could give (:func:`lossless_floor`)
    or reaches the noise floor; otherwise the data cannot tell, and both the
    transparent and the absorbing families are tried. A free-carrier fall-off
    is read by :func:`falloff_start`.

    Parameters
    ----------
    spectrum : Spectrum
    stack : Stack
        Gives the substrate (the bare-substrate line the envelope is read
        against); the film models are not used.
    options : FitOptions, optional
        Its fit range and masks select the points, as in the fit.

    Returns
    -------
    Appearance

    Raises
    ------
    FitError
        No usable points (as :func:`fitting.fit.fit_spectrum` would).
    """
    options = options or _fit.FitOptions()
    part = build_part(0, spectrum, stack, options)
    both = FAMILIES["transparent"] + ("tauc_lorentz",)
    if part.quantity != "T" or part.wl.size < 20:
        why = ("a reflectance spectrum" if part.quantity != "T"
               else f"only {part.wl.size} points")
        return Appearance(("unknown",), both,
                          text=f"{why}: absorption cannot be read from the data alone, so "
                               f"transparent and absorbing models are tried")
    wl, y, sig = part.wl, part.y, part.sigma
    sub_n = part.stack.substrate.N(wl).real
    floor = opaque_floor(y, sig)
    keep = ~floor
    seed = (fringe_seed(wl[keep], y[keep], "T", sub_n[keep]) if keep.sum() >= 12
            else Seed(False))
    falloff = falloff_start(wl, y, sig, sub_n)
    traits, families, words = [], [], []
    edge_nm = clear = None
    n_ext = _extrema(_smooth(y, max(3, wl.size // 200)), sig)[0].size
    if seed.has_fringes and n_ext >= MIN_EXTREMA:
        edge = absorption_edge(wl, y, sig, sub_n, thickness_nm=seed.thickness_nm,
                               n_film=seed.n_ref)
        clear = edge.clear_nm
        if _short_side(edge):
            traits.append("absorption edge")
            edge_nm = None if clear is None else clear[0]
    else:
        # 3 % below the floor: the 100 % line's ±1 % and the noise.
        low = floor | (y < 0.97 * lossless_floor(sub_n))
        short = low & (wl < (wl[0] + wl[-1]) / 2)
        if short.any():
            traits.append("absorption edge")
            edge_nm = float(wl[short].max())
        elif falloff is None:
            traits.append("undetermined")
    if falloff is not None:
        traits.insert(0, "free-carrier fall-off")
    if not traits:
        traits.append("transparent")
    for t in traits:
        families += both if t == "undetermined" else FAMILIES[t]
    if falloff is not None and "absorption edge" not in traits and not clear:
        # A transparent conductor's band gap: the few fringes cannot show it.
        families.append("tauc_lorentz")
    if falloff is not None:
        words.append(f"a steady fall of T above {falloff:.0f} nm (free carriers)")
    if "absorption edge" in traits:
        words.append(f"an absorption edge below {edge_nm:.0f} nm" if edge_nm is not None
                     else "absorption across the whole range")
    if "undetermined" in traits:
        words.append(f"{n_ext} fringe extrema, too few to read absorption from, "
                     f"so transparent and absorbing models are tried")
    if traits == ["transparent"]:
        words.append("a clear film (no absorption edge, no fall-off in the infrared)")
    text = "the data show " + " and ".join(words)
    return Appearance(tuple(traits), tuple(dict.fromkeys(families)), clear, edge_nm,
                      falloff, text)


# ----------------------------------------------------------------------------------------
def _target_layer(stack: Stack, layer: str | None) -> int:
    names = [x.name for x in stack.layers]
    if not names:
        raise FitError("the stack has no film layer: a model suggestion needs a film to try "
                       "models on; add a layer")
    if layer is not None:
        if layer not in names:
            raise FitError(f"layer {layer!r} is not in the stack (layers: {', '.join(names)}); "
                           f"name the film to try models on")
        return names.index(layer)
    # A roughness mixture follows its film; a known layer (measured earlier) is held.
    films = [i for i, x in enumerate(stack.layers) if not isinstance(x.material, Bruggeman)
             and not getattr(x, "known", False)]
    if not films:
        raise FitError("the stack has no film to try models on (only roughness or known "
                       "layers); add the film whose model is unknown")
    varied = [i for i in films if stack.layers[i].thickness.vary]
    return (varied or films)[0]


def candidate_stack(stack: Stack, layer_index: int, model: str) -> Stack:
    """A copy of ``stack`` with one layer's material replaced by ``model``'s defaults.

    The layer keeps its thickness parameter (start, bounds, fixed or not);
    every other layer, the substrate and the media are unchanged. A roughness
    layer tied to this film (Bruggeman host, :func:`fitting.presets.tie_roughness`)
    is tied to the new model.

    Raises
    ------
    FitError
        If another parameter is tied to a material parameter of the layer,
        which the new model does not have.
    """
    st = Stack.from_dict(stack.to_dict())
    target = st.layers[layer_index]
    old = set(f"{target.name}_{k}" for k in target.material.params)
    target.material = make_model(model)
    for i, other in enumerate(st.layers):
        if i == layer_index:
            continue
        tied = [(f"{other.name}_{k}", p.expr) for k, p in other.material.params.items()
                if p.expr and old & set(_NAME.findall(p.expr))]
        if not tied:
            continue
        if isinstance(other.material, Bruggeman):
            frac = {k: p for k, p in other.material.params.items() if not
                    k.startswith(("host_", "incl_"))}
            other.material = make_model("roughness", host=target.material)
            for k, p in frac.items():
                other.material.params[k] = p
            tie_roughness(other, target)
            continue
        name, expr = tied[0]
        raise FitError(f"parameter {name!r} is tied to the film's model ({expr!r}); another "
                       f"model of {target.name!r} has other parameters. Remove the tie, or "
                       f"choose the film model by hand")
    return st


# ----------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Candidate:
    """One model fitted for the suggestion, and where it ranks.

    Attributes
    ----------
    model : str
        :data:`~fitting.presets.MODEL_CHOICES` key.
    label : str
        Short name ("Tauc-Lorentz").
    current : bool
        The user's own model, fitted as set up (the others from their defaults).
    result : FitResult or None
        None if the fit could not start (``error`` says why).
    bic : float
        χ²/ĉ + k ln N (inf if not ranked).
    delta_bic : float
        bic minus the lowest bic of the ranked candidates.
    k : int
        Varied parameters (nuisance parameters included).
    verdict : str
    ranked : bool
        Took part in the ranking (fitted to the end, no error).
    error : str
    elapsed_s : float
    """

    model: str
    label: str
    current: bool
    result: FitResult | None
    bic: float = math.inf
    delta_bic: float = math.inf
    k: int = 0
    verdict: str = ""
    ranked: bool = False
    error: str = ""
    elapsed_s: float = 0.0

    @property
    def thickness_nm(self) -> float | None:
        if self.result is None:
            return None
        try:
            return float(self.result.thickness()[0])
        except KeyError:
            return None

    def to_dict(self) -> dict:
        r = self.result
        d = {"model": self.model, "label": self.label, "current": self.current,
             "bic": _fin(self.bic), "delta_bic": _fin(self.delta_bic), "k": self.k,
             "verdict": self.verdict, "ranked": self.ranked, "error": self.error,
             "elapsed_s": round(self.elapsed_s, 3), "thickness_nm": _fin(self.thickness_nm)}
        if r is not None:
            d.update(chisqr=_fin(r.chisqr), redchi=_fin(r.redchi), ndata=r.ndata,
                     success=bool(r.success), aborted=bool(r.aborted),
                     rms_residual=None if r.diagnostics is None
                     else _fin(r.diagnostics.rms_residual))
        return d


@dataclass(frozen=True)
class Suggestion:
    """The ranked candidates, the chosen model and why.

    Attributes
    ----------
    candidates : tuple of Candidate
        Ranked candidates by BIC (lowest first), then those not ranked.
    chosen : str or None
        Model key of the chosen candidate (None only if no candidate was fitted).
    reason : str
        Why, in plain words.
    appearance : Appearance
        What the data showed before any fit.
    layer : str
        The layer the models were tried on.
    c_hat : float
        ĉ, the χ² scale of the BIC (1 when the best candidate fits within the noise).
    n_points : int
        N of the BIC.
    stopped : bool
        The user stopped it: not every candidate was fitted to the end.
    """

    candidates: tuple
    chosen: str | None
    reason: str
    appearance: Appearance
    layer: str
    c_hat: float = 1.0
    n_points: int = 0
    stopped: bool = False

    @property
    def chosen_candidate(self) -> Candidate | None:
        return next((c for c in self.candidates if c.model == self.chosen), None)

    @property
    def result(self) -> FitResult | None:
        """The chosen model's fit (with the model-choice line and the ranking in ``extra``)."""
        c = self.chosen_candidate
        return None if c is None else c.result

    def ranking(self) -> list[Candidate]:
        """The ranked candidates, lowest BIC first."""
        return [c for c in self.candidates if c.ranked]

    def ranking_table(self) -> str:
        """The ranking as a fixed-width text table, with the choice and its reason."""
        head = (f"Model suggestion for layer '{self.layer}' (BIC = χ²/ĉ + k·ln N, "
                f"N = {self.n_points}, ĉ = {self.c_hat:.3g}; lower is better)")
        lines = [head, f"  {'':2s}{'model':<24s}{'k':>3s}{'χ²_red':>10s}{'BIC':>12s}"
                       f"{'ΔBIC':>10s}  {'verdict':<8s}{'thickness nm':>13s}"]
        for c in self.candidates:
            mark = "->" if c.model == self.chosen else "  "
            name = c.label + (" (yours)" if c.current else "")
            if c.result is None or not c.ranked:
                why = c.error or ("stopped" if c.result is not None and c.result.aborted
                                  else "not ranked")
                lines.append(f"  {mark}{name:<24s}   not ranked: {why}")
                continue
            d = c.thickness_nm
            lines.append(f"  {mark}{name:<24s}{c.k:>3d}{c.result.redchi:>10.3g}"
                         f"{c.bic:>12.1f}{c.delta_bic:>10.1f}  {c.verdict:<8s}"
                         f"{'' if d is None else format(d, '.1f'):>13s}")
        lines.append(f"chosen: {self.reason}")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """JSON-able summary (candidates without their full results)."""
        return {"criterion": "BIC = chi2/c_hat + k ln N (Schwarz 1978)",
                "chosen": self.chosen, "reason": self.reason, "layer": self.layer,
                "c_hat": _fin(self.c_hat), "n_points": self.n_points, "stopped": self.stopped,
                "appearance": self.appearance.to_dict(),
                "candidates": [c.to_dict() for c in self.candidates]}


# ----------------------------------------------------------------------------------------
def suggest_model(spectrum, stack: Stack, options=None, *, families=None, layer=None,
                  progress: Callable | None = None,
                  stop: threading.Event | None = None) -> Suggestion:
    """Fit the plausible film models and choose one by the Bayesian information criterion.

    Parameters
    ----------
    spectrum : Spectrum
    stack : Stack
        The user's setup; its film model is always a candidate. Not modified.
    options : FitOptions, optional
        Used unchanged for every candidate (each candidate gets the full time
        limit and evaluation budget).
    families : sequence of str, optional
        :data:`~fitting.presets.MODEL_CHOICES` keys to try instead of those
        the data suggest (:func:`classify`); the user's model is added.
    layer : str, optional
        The film to try models on (default: the first non-roughness layer
        whose thickness is fitted).
    progress : callable(FitProgress), optional
        Called from the fitting thread; ``fraction`` runs over all candidates
        and ``message`` names the candidate.
    stop : threading.Event, optional
        Set it from another thread to end the running fit and skip the rest;
        the suggestion is then made from the candidates fitted so far
        (``stopped=True``).

    Returns
    -------
    Suggestion

    Raises
    ------
    FitError
        A setup no candidate can be fitted with, an unknown family, a layer
        not in the stack.

    Examples
    --------
    A worker thread of the app would run::

        s = suggest_model(spectrum, stack, options, progress=emit, stop=event)
        show(s.ranking_table()); use(s.result)
    """
    out = None
    for item in iter_suggest(spectrum, stack, options, families=families, layer=layer,
                             progress=progress, stop=stop):
        out = item
    return out


def _check_families(families) -> tuple:
    if isinstance(families, str):
        families = (families,)
    out = []
    for f in families:
        if f not in SUGGESTABLE:
            raise FitError(f"model family {f!r} cannot be tried from its defaults; choose from "
                           f"{', '.join(SUGGESTABLE)}")
        out.append(f)
    if not out:
        raise FitError("the list of model families to try is empty; give at least one, or "
                       "leave it out to let the data decide")
    return tuple(dict.fromkeys(out))


def iter_suggest(spectrum, stack: Stack, options=None, *, families=None, layer=None,
                 progress: Callable | None = None,
                 stop: threading.Event | None = None) -> Iterator:
    """Generator form of :func:`suggest_model`: yields FitProgress, then the Suggestion."""
    options = options or _fit.FitOptions()
    li = _target_layer(stack, layer)
    layer_name = stack.layers[li].name
    appearance = classify(spectrum, stack, options)
    tried = _check_families(families) if families is not None else appearance.families
    current = model_choice_of(stack.layers[li].material)
    plan = [(current, True)] + [(f, False) for f in tried if f != current]
    n = len(plan)
    done: list[Candidate] = []
    stopped = False
    for i, (key, is_current) in enumerate(plan):
        if i > 0 and stop is not None and stop.is_set():
            stopped = True
            break
        label = _short(key)
        msg = f"{label} ({i + 1}/{n})"
        yield FitProgress("suggest", i / n, 0, math.inf, f"fitting {msg}")

        def sub(p, _i=i, _msg=msg):
            if progress is not None:
                progress(FitProgress(p.stage, (_i + p.fraction) / n, p.nfev, p.best_chisqr,
                                     f"{_msg}: {p.message}" if p.message else _msg))

        t0 = time.perf_counter()
        try:
            st = stack if is_current else candidate_stack(stack, li, key)
            result = None
            for item in _fit.iter_fit(spectrum, st, options, progress=sub, stop=stop):
                result = item if isinstance(item, FitResult) else result
            # A fit the user stopped is not comparable; one that ran out of time or
            # evaluations is (its verdict "poor" keeps it from being chosen).
            user_stop = result.aborted and stop is not None and stop.is_set()
            done.append(Candidate(key, label, is_current, result,
                                  error="stopped before it finished" if user_stop else "",
                                  elapsed_s=time.perf_counter() - t0))
        except PellucidError as e:
            done.append(Candidate(key, label, is_current, None, error=str(e),
                                  elapsed_s=time.perf_counter() - t0))
        if stop is not None and stop.is_set():
            stopped = True
        r = done[-1].result
        yield FitProgress("suggest", (i + 1) / n, 0 if r is None else r.nfev,
                          math.inf if r is None else r.chisqr,
                          f"{msg} done" + ("" if r is None else
                                           f": χ²_red {r.redchi:.3g}, verdict {r.verdict}"))
    if not any(c.result is not None for c in done):
        raise FitError(done[0].error if done else "no model could be fitted")
    suggestion = _rank(done, appearance, layer_name, stopped, n)
    if progress is not None:
        progress(FitProgress("done", 1.0, sum(c.result.nfev for c in done if c.result), 0.0,
                             suggestion.reason))
    yield suggestion


# ----------------------------------------------------------------------------------------
def _rank(done: list, appearance: Appearance, layer: str, stopped: bool,
          planned: int) -> Suggestion:
    """BIC of every fitted candidate, the choice by the rules of the module, the reason."""
    fitted = [c for c in done if c.result is not None and not c.error]
    n_pts = max((c.result.ndata for c in fitted), default=0)
    redchis = [c.result.redchi for c in fitted if math.isfinite(c.result.redchi)]
    c_hat = max(1.0, min(redchis)) if redchis else 1.0
    scored = []
    for c in done:
        r = c.result
        if r is None or c.error or not math.isfinite(r.chisqr):
            scored.append(dataclasses.replace(
                c, k=0 if r is None else r.nvarys, verdict="" if r is None else r.verdict,
                error=c.error or "no finite χ²"))
            continue
        bic = r.chisqr / c_hat + r.nvarys * math.log(r.ndata)
        scored.append(dataclasses.replace(c, bic=bic, k=r.nvarys, verdict=r.verdict,
                                          ranked=True))
    ranked = sorted((c for c in scored if c.ranked), key=lambda c: c.bic)
    best_bic = ranked[0].bic if ranked else math.inf
    ranked = [dataclasses.replace(c, delta_bic=c.bic - best_bic) for c in ranked]
    rest = [c for c in scored if not c.ranked]
    if not ranked:
        # Everything stopped or failed: keep the user's model's result as it is.
        chosen = next((c for c in rest if c.result is not None), None)
        reason = (f"stopped before any candidate finished; {chosen.label} is the fit of the "
                  f"user's model so far" if stopped else
                  f"no candidate could be ranked ({chosen.error}); {chosen.label}'s fit is kept "
                  f"as it is")
        return Suggestion(tuple(rest), chosen.model, reason, appearance, layer, c_hat, n_pts,
                          stopped)
    chosen, runner, why = _choose(ranked)
    reason = _reason(chosen, runner, why, ranked, appearance, c_hat)
    if stopped:
        reason = (f"stopped after {len(ranked)} of {planned} candidates; among those: "
                  + reason)
    s = Suggestion(tuple(ranked + rest), chosen.model, reason, appearance, layer, c_hat,
                   n_pts, stopped)
    return _amend(s, chosen, _credible(ranked, chosen))


def _choose(ranked: list) -> tuple:
    """(chosen, the one it is compared with, how it was chosen) by the module's rules."""
    usable = [c for c in ranked if c.verdict != "poor"]
    pool = usable or ranked
    if pool[0].verdict == "check":
        good = [c for c in pool if c.verdict == "good" and c.bic - pool[0].bic < CREDIBLE]
        pool = good or pool
    top = pool[0]
    close = [c for c in pool if c.bic - top.bic < INDISTINGUISHABLE]
    chosen = min(close, key=lambda c: (not _kk_ok(c), c.k, _VERDICT_RANK.get(c.verdict, 1),
                                       c.bic))
    others = [c for c in ranked if c is not chosen]
    runner = others[0] if others else None
    if not usable:
        how = "all poor"
    elif len(close) > 1:
        how = "indistinguishable"
        runner = next(c for c in close if c is not chosen)
    elif top is not usable[0]:
        how = "check passed over"
        runner = usable[0]
    elif top is not ranked[0]:
        how = "poor passed over"
        runner = ranked[0]
    else:
        how = "lowest"
    return chosen, runner, how


def _kk_ok(c: Candidate) -> bool:
    """No fitted layer of the candidate fails the Kramers-Kronig check (unchecked passes)."""
    return not any(k.consistent is False for k in (getattr(c.result, "kk", None) or {}).values())


def _credible(ranked: list, chosen: Candidate) -> Candidate | None:
    """The best other candidate that is a credible alternative (see the module docstring)."""
    for c in ranked:
        if c is chosen:
            continue
        if abs(c.bic - chosen.bic) < CREDIBLE and c.verdict != "poor" and c.result.success:
            return c
    return None


def _region_rms(result: FitResult, lo: float, hi: float) -> float | None:
    used = np.asarray(result.used, bool)
    wl = np.asarray(result.wavelength_nm)
    sel = used & (wl >= lo) & (wl <= hi) & np.isfinite(result.residuals)
    if sel.sum() < 3:
        return None
    r = np.asarray(result.residuals)[sel]
    return float(np.sqrt(np.mean(r * r)))


def _misfit_words(loser: Candidate, winner: Candidate, appearance: Appearance) -> str:
    """'Cauchy misses the data by 1.2 % RMS below 420 nm (Tauc-Lorentz: 0.21 %)', or ''.

    Said for the part of the spectrum the appearance points at (below the
    edge, above the fall-off) where the loser misses most, or the whole range;
    only when the loser misses by at least 1.5 times the winner there.
    """
    spans = [((-math.inf, math.inf), "")]
    if appearance.edge_nm is not None:
        spans.append(((-math.inf, appearance.edge_nm), f" below {appearance.edge_nm:.0f} nm"))
    if appearance.falloff_nm is not None:
        spans.append(((appearance.falloff_nm, math.inf),
                      f" above {appearance.falloff_nm:.0f} nm"))
    best = None
    for span, where in spans:
        a, b = _region_rms(loser.result, *span), _region_rms(winner.result, *span)
        if a is not None and b is not None and (best is None or a > best[0]):
            best = (a, b, where)
    if best is None or best[0] < 1.5 * best[1]:
        return ""
    a, b, where = best
    return (f"{loser.label} misses the data by {100 * a:.2g} % RMS{where} "
            f"({winner.label}: {100 * b:.2g} %)")


def _reason(chosen: Candidate, runner: Candidate | None, how: str, ranked: list,
            appearance: Appearance, c_hat: float) -> str:
    parts = []
    name = chosen.label + (" (your model)" if chosen.current else "")
    if runner is None:
        parts.append(f"{name}: the only candidate that could be ranked")
    else:
        d = runner.bic - chosen.bic
        if how == "lowest":
            margin = f"{d:.1f}" if d < 10 else f"{d:.0f}"
            parts.append(f"{name}: lowest BIC, by {margin} over {runner.label} "
                         f"({evidence_words(d)} evidence, Kass & Raftery 1995)")
        elif how == "indistinguishable":
            if _kk_ok(chosen) and not _kk_ok(runner):
                how_chosen = (f"so the one whose n and κ obey the Kramers-Kronig relations "
                              f"is chosen ({runner.label}'s do not)")
            elif chosen.k < runner.k:
                how_chosen = (f"so the simpler model is chosen ({chosen.k} parameters "
                              f"against {runner.k})")
            elif _VERDICT_RANK.get(chosen.verdict, 1) < _VERDICT_RANK.get(runner.verdict, 1):
                how_chosen = f"so the one with the better verdict ({chosen.verdict}) is chosen"
            else:
                how_chosen = "both as simple, so the lower BIC is chosen"
            parts.append(f"{name}: {runner.label} fits as well (ΔBIC {abs(d):.1f} < 2, not "
                         f"distinguishable), {how_chosen}")
        elif how == "check passed over":
            first = (runner.result.verdict_reasons or ("",))[0]
            parts.append(f"{name}: {runner.label} has a BIC lower by {-d:.1f} "
                         f"({evidence_words(-d)} evidence, short of very strong) but its fit "
                         f"needs checking ({first.split(':')[0].rstrip('.')}); "
                         f"{chosen.label} fits without a warning")
        elif how == "poor passed over":
            first = (runner.result.verdict_reasons or ("",))[0]
            parts.append(f"{name}: {runner.label} has a BIC lower by {-d:.0f} but its fit is "
                         f"poor ({first.split(':')[0].rstrip('.')}); {chosen.label} is the "
                         f"best candidate with a usable fit")
        else:
            first = (chosen.result.verdict_reasons or ("",))[0]
            parts.append(f"{name}: lowest BIC, but no candidate describes the data well "
                         f"(every verdict is poor): {first}")
    parts.append(appearance.text)
    loser = next((c for c in ranked if c.current and c is not chosen), None)
    if loser is None and runner is not None and how in ("lowest", "poor passed over"):
        loser = runner
    if loser is not None and loser.delta_bic - chosen.delta_bic >= CREDIBLE:
        words = _misfit_words(loser, chosen, appearance)
        if words:
            parts.append(words)
    if c_hat > 1.5:
        parts.append(f"even the best candidate leaves χ²_red = {c_hat:.3g}, so χ² differences "
                     f"were divided by it (Burnham & Anderson 2002)")
    return "; ".join(parts)


def add_model_choice(result: FitResult, other: Candidate | None) -> FitResult:
    """``result`` with a model-choice line per budget quantity the runner-up also has.

    The line is :func:`fitting.uncertainty.with_model_choice` of the runner-up's
    value (half the difference, rectangular, GUM 4.3.7); the verdict is judged
    again with the wider budget. ``other`` None returns ``result`` unchanged.
    """
    if other is None or other.result is None:
        return result
    unc = dict(result.uncertainty)
    for key, u in unc.items():
        alt = other.result.uncertainty.get(key)
        if alt is not None:
            alt_value = alt.value
        elif key.endswith("_thickness") and key in other.result.params:
            alt_value = other.result.params[key].value
        else:
            continue
        unc[key] = with_model_choice(u, alt_value, other.label)
    amended = dataclasses.replace(result, uncertainty=unc)
    status, reasons = _verdict.judge(amended)
    return dataclasses.replace(amended, verdict=status, verdict_reasons=reasons)


def _amend(s: Suggestion, chosen: Candidate, other: Candidate | None) -> Suggestion:
    """The chosen result with its model-choice lines and, in ``extra``, the ranking."""
    amended = add_model_choice(chosen.result, other)

    def put(sug, result):
        return dataclasses.replace(sug, candidates=tuple(
            dataclasses.replace(c, result=result, verdict=result.verdict) if c is chosen
            or c.model == chosen.model and c.current == chosen.current else c
            for c in sug.candidates))

    s = put(s, amended)
    # Stored after the verdict is final, so the ranking in the result shows it.
    return put(s, dataclasses.replace(amended, extra={**amended.extra,
                                                      "model_suggestion": s.to_dict()}))
