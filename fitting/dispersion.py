"""Dispersion models: the complex refractive index N(λ) = n + iκ of a material.

Every model is a small object holding named :class:`~fitting.params.Param` s and
one vectorised method, :meth:`Dispersion.N`. The sign convention is the one of
the time dependence exp(-iωt): κ >= 0 is loss, ε = N² = ε1 + iε2 with ε2 >= 0.

Oscillator-type models (Lorentz, Drude, Tauc-Lorentz) add *susceptibilities*:
``Oscillators(eps_inf, [Lorentz(...), Drude(...), TaucLorentz(...)])`` gives
ε(E) = ε∞ + Σ χ_k(E). Each term is Kramers-Kronig consistent on its own, so any
sum of them is too. Cauchy (with its optional Urbach tail) and Sellmeier are
the usual transparent-region formulas; they are not KK-consistent outside it.

Models are saved as ``{"kind": ..., "params": {...}}`` and rebuilt through a
registry (:func:`model_from_dict`): nothing is pickled or executed.
"""

from __future__ import annotations

import math
from typing import ClassVar
from collections.abc import Iterable, Mapping

import numpy as np

from .errors import ParameterError, WavelengthRangeError
from .params import PARAM_FIELDS, Param, check_finite, refuse_unknown_fields
from .units import HC_EV_NM

__all__ = [
    "Dispersion", "Constant", "Cauchy", "Sellmeier", "Oscillators", "Lorentz", "Drude",
    "TaucLorentz", "Tabulated", "Bruggeman", "Term", "model_from_dict", "MODEL_KINDS",
    "check_wavelengths",
]

INF = math.inf


def check_wavelengths(wavelength_nm, *, what: str = "wavelength_nm") -> np.ndarray:
    """Return wavelengths as a float array; refuse empty, non-finite or non-positive values."""
    wl = np.asarray(wavelength_nm, dtype=float)
    if wl.size == 0:
        raise ParameterError(what, "[]", "needs at least one wavelength")
    if not np.all(np.isfinite(wl)):
        raise ParameterError(what, "array with NaN/inf", "all wavelengths must be finite")
    if np.any(wl <= 0):
        raise ParameterError(what, float(wl.min()), "wavelengths must be positive (in nm)")
    return wl


def _spec(name, value, lo=-INF, hi=INF, unit="", doc="", vary=True) -> Param:
    return Param(name, value, lo, hi, unit, doc, vary)


class _HasParams:
    """Shared parameter handling of models and oscillator terms."""

    def _init_params(self, specs: Iterable[Param], values: Mapping[str, float]):
        self.params: dict[str, Param] = {p.name: p for p in specs}
        unknown = set(values) - set(self.params)
        if unknown:
            raise ParameterError(", ".join(sorted(unknown)), values[sorted(unknown)[0]],
                                 f"unknown parameter of {type(self).__name__}; known: "
                                 f"{', '.join(self.params)}")
        for k, v in values.items():
            self.set(k, v)

    def set(self, name: str, value: float, *, widen: bool = False) -> None:
        """Set a parameter's value (must lie within its bounds unless ``widen``)."""
        p = self.params[name]
        v = check_finite(name, value)
        if widen:
            p.min, p.max = min(p.min, v), max(p.max, v)
        if not p.min <= v <= p.max:
            raise ParameterError(name, v, f"must lie within [{p.min:g}, {p.max:g}]")
        p.value = v

    def values(self) -> dict[str, float]:
        """Current parameter values, by local name."""
        return {k: p.value for k, p in self.params.items()}

    def _merged(self, overrides: Mapping[str, float] | None) -> dict[str, float]:
        v = self.values()
        if overrides:
            for k, x in overrides.items():
                if k in v:
                    v[k] = check_finite(k, x)
        return v


class Dispersion(_HasParams):
    """Base class of all dispersion models.

    Subclasses set ``kind`` (the registry name) and ``label`` and implement
    :meth:`_N` (or :meth:`_eps`). ``valid_nm`` is the wavelength range in which
    the model is defined; outside it :meth:`N` raises
    :class:`~fitting.errors.WavelengthRangeError`.
    """

    kind: ClassVar[str] = ""
    label: ClassVar[str] = ""
    valid_nm: tuple[float, float] = (0.0, INF)
    #: The parameter that moves the whole index up or down: the automatic start sets
    #: it from the fringes' n (None: the model has no such parameter).
    level_param: ClassVar[str | None] = None
    #: Parameters that shape n(λ) besides the level, fitted to the fringes' n.
    shape_params: ClassVar[tuple] = ()
    #: Higher dispersion terms and the fewest fringe extrema that support fitting
    #: them: with fewer, the automatic start holds them at 0.
    higher_orders: ClassVar[tuple] = ()
    #: What the app's model menu offers of this class: (key, label, factory); the
    #: factory takes keyword context (``host``, ``table_path``) and returns a model.
    presets: ClassVar[tuple] = ()

    def N(self, wavelength_nm, values: Mapping[str, float] | None = None) -> np.ndarray:
        """Complex refractive index n + iκ at the given vacuum wavelengths (nm).

        Parameters
        ----------
        wavelength_nm : array_like
            Vacuum wavelengths in nm.
        values : mapping, optional
            Parameter values overriding the stored ones for this call only.

        Returns
        -------
        ndarray of complex, same shape as ``wavelength_nm``.
        """
        wl = check_wavelengths(wavelength_nm)
        self.check_range(wl)
        v = self._merged(values)
        # A pole on a requested wavelength (undamped Lorentz at E0, Sellmeier at
        # λ² = C) gives inf/NaN: say so instead of passing NaN on to a fit.
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            N = self.N_unchecked(wl, v)
        bad = ~np.isfinite(N)
        if np.any(bad):
            at = float(np.atleast_1d(wl)[np.atleast_1d(bad)][0])
            raise ParameterError(
                self.describe(), v,
                f"these parameters give a non-finite refractive index at {at:g} nm "
                f"(a resonance without damping sits on a requested wavelength); move the "
                f"resonance, add broadening or leave that wavelength out")
        return N

    def N_unchecked(self, wl: np.ndarray, v: Mapping[str, float]) -> np.ndarray:
        """:meth:`N` without input checks, for the fit engine's inner loop."""
        return self._N(wl, v)

    def dN(self, wl: np.ndarray, v: Mapping[str, float], names, N0=None) -> np.ndarray:
        """dN/dθ on ``wl`` for each parameter θ in ``names``: shape (len(names), W).

        Forward differences of relative step √ε (scipy's ``approx_derivative``
        "2-point"), taken inwards at a parameter's upper bound and the other way
        when the model refuses the shifted value. ``N0`` is N at ``v`` if known.
        Models with parameters that enter linearly override this with exact terms.
        """
        if N0 is None:
            N0 = self.N_unchecked(wl, v)
        return np.array([_forward_dN(lambda vv: self.N_unchecked(wl, vv), v, k,
                                     self.params[k].max, N0) for k in names])

    def epsilon(self, wavelength_nm, values=None) -> np.ndarray:
        """Complex dielectric function ε = N²."""
        return self.N(wavelength_nm, values) ** 2

    def check_range(self, wl: np.ndarray) -> None:
        lo, hi = self.valid_nm
        wmin, wmax = float(np.min(wl)), float(np.max(wl))
        # A relative slack of 1e-9 lets grids that end exactly on the limit through.
        if wmin < lo * (1 - 1e-9) or wmax > hi * (1 + 1e-9):
            raise WavelengthRangeError(self.describe(), lo, hi, wmin, wmax)

    def describe(self) -> str:
        return self.label or type(self).__name__

    # -- what the model knows about starting a fit -------------------------------------
    def edge_params(self) -> tuple:
        """Parameters that mostly set the absorption edge, not n where the film is clear.

        The fringes of the transparent region say little about them, so the first
        stages of an automatic fit hold them at their start.
        """
        return ()

    def edge_starts(self, local: Mapping[str, float], edge_eV: float | None,
                    top_eV: float) -> list[dict]:
        """Starting values of the absorption parameters from the measured edge.

        ``edge_eV`` is where the film's αd reaches about 1 (None: the film is
        clear over the whole range), ``top_eV`` the photon energy of the shortest
        wavelength. Each dict is one plausible edge shape; the fit engine fits
        each to the edge data and chooses on the spectrum. Models without an
        absorption edge return [].
        """
        return []

    def edge_fit_params(self) -> tuple:
        """Parameters adjusted when the model's absorption is fitted to the measured edge
        (with the level): those :meth:`edge_starts` sets, and the amplitudes they need."""
        return ()

    def preset_key(self) -> str:
        """The menu key (:data:`fitting.presets.MODEL_CHOICES`) of this model."""
        return self.presets[0][0] if self.presets else self.kind

    def _N(self, wl, v):
        return _sqrt_eps(self._eps(wl, v))

    def _eps(self, wl, v):  # pragma: no cover - every subclass defines _N or _eps
        raise NotImplementedError

    # -- persistence -----------------------------------------------------------------
    def to_dict(self) -> dict:
        d = {"kind": self.kind, "params": {k: p.to_dict() for k, p in self.params.items()},
             **self._shape_dict()}
        if self.label != type(self).label:  # a named material, e.g. "fused silica"
            d["label"] = self.label
        return d

    def _shape_dict(self) -> dict:
        """Construction options other than parameter values (e.g. number of terms)."""
        return {}

    @classmethod
    def from_shape(cls, d: Mapping, where: str) -> Dispersion:
        """A fresh model from the construction options of :meth:`to_dict` (not the values)."""
        return cls()

    def copy(self) -> Dispersion:
        return model_from_dict(self.to_dict())

    def __repr__(self) -> str:
        vals = ", ".join(f"{k}={p.value:g}" for k, p in self.params.items())
        return f"{type(self).__name__}({vals})"


#: Relative step of forward differences: √ε, as scipy's ``approx_derivative`` "2-point".
EPS_STEP = math.sqrt(np.finfo(float).eps)


def forward_step(x: float, upper: float) -> float:
    """Step of a forward difference at ``x``: √ε·max(|x|, 1), negative where it would
    pass the upper bound (scipy's ``approx_derivative`` "2-point" rule)."""
    h = EPS_STEP * max(abs(x), 1.0)
    return -h if x + h > upper else h


def _forward_dN(model, v: Mapping[str, float], name: str, upper: float, f0) -> np.ndarray:
    """(f(v + h e_name) - f0)/h for a function ``model`` of the parameter values.

    The step (:func:`forward_step`) is taken inwards at the upper bound, and the other
    way when the model refuses the shifted value (a Tauc-Lorentz C at 2·E0).
    """
    x = v[name]
    h = forward_step(x, upper)
    for step in (h, -h):
        try:
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                f1 = model({**v, name: x + step})
        except ParameterError:
            continue
        if np.all(np.isfinite(f1)):
            return (f1 - f0) / step
    raise ParameterError(name, x, "the model cannot be evaluated on either side of this "
                                  "value to take its derivative")


def _sqrt_eps(eps: np.ndarray) -> np.ndarray:
    """N = sqrt(ε) on the branch with κ >= 0 and n >= 0.

    Passive media have Im ε >= 0. A slightly negative Im ε can still come out of
    rounding (a Bruggeman root is ε_host - 3e-15j at f = 0); it is set to +0 before
    the principal square root, which then gives n >= 0 and κ >= 0. (Flipping the
    sign of N instead turned such a film's n = 2.42 into n = -2.42.)
    """
    eps = np.asarray(eps, dtype=complex)
    return np.sqrt(eps.real + 1j * np.where(eps.imag > 0, eps.imag, 0.0))


# ----------------------------------------------------------------------------------------
class Constant(Dispersion):
    """Wavelength-independent N = n + iκ (common practice for ambient media and quick looks)."""

    kind, label = "constant", "Constant n, κ"
    level_param = "n"
    presets = (("constant", "Constant n, κ", lambda **_: Constant(1.8, 0.0)),)

    def __init__(self, n: float = 1.5, k: float = 0.0, **values):
        self._init_params([
            _spec("n", 1.5, 0.01, 20.0, "", "refractive index n"),
            _spec("k", 0.0, 0.0, 20.0, "", "extinction coefficient κ", vary=False),
        ], {"n": n, "k": k, **values})

    def _N(self, wl, v):
        return np.full(wl.shape, complex(v["n"], v["k"]))


class Cauchy(Dispersion):
    r"""Cauchy transparent-region dispersion with an optional Urbach absorption tail.

    .. math::
        n(λ) = A + B/λ^2 + C/λ^4 \quad (λ \text{ in µm}), \qquad
        κ(E) = κ_0 \exp\big((E - E_{edge})/E_U\big), \quad E = hc/λ

    The Urbach tail (Urbach 1953) describes the exponential absorption edge of
    disordered films; ``E_edge`` is a reference energy (kept fixed by default,
    since κ0 and E_edge are fully correlated). The combination is not
    Kramers-Kronig consistent; use it in and near the transparent region only.

    References
    ----------
    .. [1] A.-L. Cauchy, "Mémoire sur la dispersion de la lumière" (1836).
    .. [2] F. Urbach, "The long-wavelength edge of photographic sensitivity and of
           the electronic absorption of solids", Phys. Rev. 92, 1324 (1953).
    """

    kind, label = "cauchy", "Cauchy"
    level_param = "A"
    shape_params = ("B",)
    # A third term follows a high-index film into the UV; with few fringes it only
    # trades off against the thickness (common practice).
    higher_orders = (("C", 4),)
    presets = (("cauchy", "Cauchy (transparent film)", lambda **_: Cauchy()),
               ("cauchy_urbach", "Cauchy + Urbach tail (weak absorption edge)",
                lambda **_: Cauchy(urbach=True)))

    def __init__(self, A: float = 1.9, B: float = 0.02, C: float = 0.0, *, urbach: bool = False,
                 **values):
        self.urbach = bool(urbach)
        specs = [
            _spec("A", 1.9, 1.0, 4.0, "", "Cauchy constant term of n"),
            _spec("B", 0.02, -0.05, 0.5, "µm²", "Cauchy 1/λ² coefficient"),
            # Fitted by default: two terms cannot follow a high-index film (titania,
            # niobia) from the visible into the near UV; the third can.
            _spec("C", 0.0, -0.05, 0.05, "µm⁴", "Cauchy 1/λ⁴ coefficient"),
        ]
        if self.urbach:
            specs += [
                _spec("k0", 1e-3, 0.0, 5.0, "", "κ of the Urbach tail at E_edge"),
                _spec("Eu", 0.2, 0.01, 2.0, "eV", "Urbach energy (edge steepness)"),
                _spec("E_edge", 3.5, 0.5, 10.0, "eV", "reference energy of the tail",
                      vary=False),
            ]
        self._init_params(specs, {"A": A, "B": B, "C": C, **values})

    def _N(self, wl, v):
        lu2 = (wl * 1e-3) ** 2
        n = v["A"] + v["B"] / lu2 + v["C"] / (lu2 * lu2)
        if not self.urbach:
            return n + 0j
        # The exponent is capped: past e^50 the film is opaque anyway, and inf would
        # poison the transfer-matrix arithmetic.
        x = np.minimum((HC_EV_NM / wl - v["E_edge"]) / v["Eu"], 50.0)
        return n + 1j * (v["k0"] * np.exp(x))

    def _shape_dict(self):
        return {"urbach": self.urbach}

    @classmethod
    def from_shape(cls, d, where):
        return cls(urbach=bool(d.get("urbach", False)))

    def preset_key(self) -> str:
        return "cauchy_urbach" if self.urbach else "cauchy"

    def describe(self) -> str:
        if self.label != type(self).label:
            return self.label
        return "Cauchy + Urbach tail" if self.urbach else "Cauchy"

    def edge_params(self) -> tuple:
        return tuple(k for k in ("k0", "Eu", "E_edge") if k in self.params)

    def edge_fit_params(self) -> tuple:
        return ("k0", "Eu") if self.urbach else ()

    def edge_starts(self, local, edge_eV, top_eV):
        """Urbach tails of three steepnesses through κ = 0.1 at the edge (E_U 0.08-0.4
        eV spans sharp to disordered edges, common practice), or one that stays
        negligible over the range when the film is clear."""
        if not self.urbach:
            return []
        E_ref = local.get("E_edge", 3.5)
        if edge_eV is None:
            return [{"Eu": 0.1, "k0": 1e-4 * math.exp((E_ref - top_eV) / 0.1)}]
        return [{"Eu": eu, "k0": 0.1 * math.exp((E_ref - edge_eV) / eu)}
                for eu in (0.08, 0.2, 0.4)]


class Sellmeier(Dispersion):
    r"""Sellmeier dispersion with 1 to 3 terms.

    .. math::

       n^2(λ) = A + \sum_i \frac{B_i λ^2}{λ^2 - C_i}
       \quad (λ \text{ in µm}, C_i \text{ in µm}^2)

    With A = 1 this is the form used by glass makers' datasheets and by
    Malitson (1965) for fused silica.

    References
    ----------
    .. [1] W. Sellmeier, Ann. Phys. Chem. 219, 272 (1871).
    .. [2] I. H. Malitson, "Interspecimen comparison of the refractive index of fused
           silica", J. Opt. Soc. Am. 55, 1205 (1965). :DOI:`10.1364/JOSA.55.001205`
    """

    kind, label = "sellmeier", "Sellmeier"
    level_param = "B1"
    shape_params = ("C1",)
    presets = (("sellmeier", "Sellmeier (1 term)", lambda **_: Sellmeier(1)),)

    def __init__(self, terms: int = 1, *, valid_nm: tuple[float, float] = (0.0, INF),
                 **values):
        if terms not in (1, 2, 3):
            raise ParameterError("terms", terms, "a Sellmeier model has 1, 2 or 3 terms")
        self.terms = terms
        self.valid_nm = (float(valid_nm[0]), float(valid_nm[1]))
        specs = [_spec("A", 1.0, 0.5, 10.0, "", "constant term of n²", vary=False)]
        defaults = [(1.5, 0.01), (0.3, 0.05), (1.0, 100.0)]
        for i in range(terms):
            b, c = defaults[i]
            specs += [_spec(f"B{i + 1}", b, 0.0, 50.0, "", f"strength of term {i + 1}"),
                      _spec(f"C{i + 1}", c, 0.0, 1e4, "µm²", f"resonance λ² of term {i + 1}")]
        self._init_params(specs, values)

    def _eps(self, wl, v):
        l2 = (wl * 1e-3) ** 2
        eps = np.full(wl.shape, v["A"], dtype=float)
        for i in range(1, self.terms + 1):
            eps = eps + v[f"B{i}"] * l2 / (l2 - v[f"C{i}"])
        return eps + 0j

    def _shape_dict(self):
        d = {"terms": self.terms}
        if self.valid_nm != (0.0, INF):
            d["valid_nm"] = list(self.valid_nm)
        return d

    @classmethod
    def from_shape(cls, d, where):
        return cls(int(d.get("terms", 1)), valid_nm=tuple(d.get("valid_nm", (0.0, INF))))

    def describe(self) -> str:
        if self.label != type(self).label:
            return self.label
        return f"Sellmeier ({self.terms} term{'s' if self.terms > 1 else ''})"


# ----------------------------------------------------------------------------------------
class Term(_HasParams):
    """One susceptibility term χ(E) of an :class:`Oscillators` model (E in eV)."""

    kind: ClassVar[str] = ""
    #: Readable name of the term kind.
    title: ClassVar[str] = ""
    #: Parameters that shape only the term's absorption edge (see Dispersion.edge_params).
    edge_params: ClassVar[tuple] = ()
    #: Parameters fitted to a measured edge (see Dispersion.edge_fit_params).
    edge_fit: ClassVar[tuple] = ()

    def chi(self, E: np.ndarray, v: Mapping[str, float]) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def edge_starts(self, edge_eV: float | None, top_eV: float) -> list[dict]:
        """Starting values of this term from the measured edge (see Dispersion.edge_starts)."""
        return []

    def dchi(self, E: np.ndarray, v: Mapping[str, float], names, chi0) -> np.ndarray:
        """dχ/dθ for each parameter in ``names`` (forward differences; see Dispersion.dN)."""
        return np.array([_forward_dN(lambda vv: self.chi(E, vv), v, k, self.params[k].max,
                                     chi0) for k in names])

    @staticmethod
    def check(v: Mapping[str, float]) -> None:
        """Raise :class:`ParameterError` for parameter sets outside the term's domain."""

    def to_dict(self) -> dict:
        return {"kind": self.kind, "params": {k: p.to_dict() for k, p in self.params.items()}}


class Lorentz(Term):
    r"""Lorentz oscillator, χ(E) = f E_0^2 / (E_0^2 - E^2 - iΓE).

    ``f`` is the oscillator's contribution to the static dielectric constant.

    References
    ----------
    .. [1] H. A. Lorentz, *The Theory of Electrons* (1909); see also M. Fox,
           *Optical Properties of Solids*, 2nd ed., Oxford (2010), ch. 2.
    """

    kind, title = "lorentz", "Lorentz"
    edge_params = ("gamma",)

    def __init__(self, f: float = 1.0, E0: float = 5.0, gamma: float = 0.5, **values):
        self._init_params([
            _spec("f", 1.0, 0.0, 100.0, "", "oscillator strength (static ε contribution)"),
            _spec("E0", 5.0, 0.01, 50.0, "eV", "resonance energy"),
            _spec("gamma", 0.5, 0.0, 20.0, "eV", "broadening (damping)"),
        ], {"f": f, "E0": E0, "gamma": gamma, **values})

    def chi(self, E, v):
        E0sq = v["E0"] ** 2
        return v["f"] * E0sq / (E0sq - E * E - 1j * v["gamma"] * E)


class Drude(Term):
    r"""Drude free-carrier term, χ(E) = -E_p^2 / (E^2 + iΓE).

    E_p is the (unscreened) plasma energy, Γ the carrier scattering rate in eV;
    the usual model of transparent conducting oxides in the near infrared.

    References
    ----------
    .. [1] P. Drude, Ann. Phys. 306, 566 (1900); H. Fujiwara, *Spectroscopic
           Ellipsometry*, Wiley (2007), sec. 5.3.
    """

    kind, title = "drude", "Drude"

    def __init__(self, Ep: float = 1.0, gamma: float = 0.1, **values):
        self._init_params([
            _spec("Ep", 1.0, 0.0, 30.0, "eV", "plasma energy"),
            _spec("gamma", 0.1, 1e-4, 10.0, "eV", "scattering rate (broadening)"),
        ], {"Ep": Ep, "gamma": gamma, **values})

    def chi(self, E, v):
        return -(v["Ep"] ** 2) / (E * E + 1j * v["gamma"] * E)


class TaucLorentz(Term):
    r"""Tauc-Lorentz interband absorption of amorphous materials.

    .. math::
        ε_2(E) = \frac{A E_0 C (E - E_g)^2}{(E^2 - E_0^2)^2 + C^2 E^2} \frac{1}{E}
        \quad (E > E_g), \qquad 0 \text{ otherwise},

    with ε1 from the closed-form Kramers-Kronig integral of Jellison & Modine
    (1996, with the erratum of the same year). The ε∞ of the original model is
    the ``eps_inf`` of the :class:`Oscillators` model this term belongs to.
    Requires C < 2 E0.

    References
    ----------
    .. [1] G. E. Jellison Jr. and F. A. Modine, "Parameterization of the optical
           functions of amorphous materials in the interband region", Appl. Phys.
           Lett. 69, 371 (1996); erratum Appl. Phys. Lett. 69, 2137 (1996).
           :DOI:`10.1063/1.118064`
    """

    kind, title = "tauc_lorentz", "Tauc-Lorentz"
    edge_params = ("Eg", "C")
    edge_fit = ("A", "E0", "C", "Eg")
    #: Edge shapes tried from the data: (Eg below the measured edge, E0 - Eg, C), eV:
    #: broad amorphous (a-Si-like; Jellison & Modine 1996 give E0 - Eg ≈ 2.3,
    #: C ≈ 2.5), medium (titania, niobia) and sharp (a nearly crystalline direct gap,
    #: zinc-oxide-like). Common practice, from memory.
    SHAPES = ((0.45, 2.2, 2.4), (0.25, 1.2, 1.3), (0.05, 0.35, 0.35))

    def __init__(self, A: float = 100.0, E0: float = 4.5, C: float = 1.5, Eg: float = 3.0,
                 **values):
        self._init_params([
            _spec("A", 100.0, 0.1, 1000.0, "eV", "transition amplitude"),
            _spec("E0", 4.5, 0.5, 20.0, "eV", "peak transition energy"),
            _spec("C", 1.5, 0.01, 20.0, "eV", "broadening"),
            _spec("Eg", 3.0, 0.1, 10.0, "eV", "Tauc optical gap"),
        ], {"A": A, "E0": E0, "C": C, "Eg": Eg, **values})
        self.check(self.values())

    @staticmethod
    def check(v: Mapping[str, float]) -> None:
        """Refuse parameter sets outside the model's domain (C < 2·E0)."""
        if not v["C"] < 2 * v["E0"]:
            raise ParameterError("C", v["C"], f"Tauc-Lorentz needs C < 2·E0 = {2 * v['E0']:g} eV")

    def chi(self, E, v):
        # χ is A times a shape set by (E0, C, Eg) alone. Fits vary A, ε∞, thickness
        # and the 100 % line far more often than the edge (the fringe stages hold
        # it), so the last few shapes are kept: the closed form is the costliest
        # step of a model call.
        return v["A"] * self._shape(E, v)[0]

    def _shape(self, E, v):
        """(shape, parts) of ``_tl_arrays`` at v's (E0, C, Eg) on E, from the cache."""
        key = (float(v["E0"]), float(v["C"]), float(v["Eg"]))
        E = np.asarray(E, dtype=float)
        cache = self.__dict__.setdefault("_shapes", [])
        for entry in cache:
            if entry[0] == key and entry[1].shape == E.shape and np.array_equal(entry[1], E):
                return entry[2]
        _check_tl(*key[:2])
        arrays = _tl_arrays(E, *key, keep=True)
        # The parts are kept too: the slopes at the same point reuse them.
        cache.insert(0, (key, E.copy(), arrays))
        del cache[self.SHAPE_CACHE:]
        return arrays

    #: How many edge shapes :meth:`chi` keeps (the start tries a few edge shapes).
    SHAPE_CACHE = 4

    def dchi(self, E, v, names, chi0):
        """dχ/dθ in closed form (see :func:`tauc_lorentz_slopes`)."""
        return tauc_lorentz_slopes(E, float(v["A"]), float(v["E0"]), float(v["C"]),
                                   float(v["Eg"]), list(names), arrays=self._shape(E, v))

    def __getstate__(self):
        # The shape cache is a speed-up of this process only: not pickled to workers.
        state = dict(self.__dict__)
        state.pop("_shapes", None)
        return state

    def edge_starts(self, edge_eV, top_eV):
        if edge_eV is None:     # clear everywhere: the gap just above the range
            return [{"Eg": top_eV + 0.3, "E0": top_eV + 1.5, "C": 1.5}]
        return [{"Eg": max(edge_eV - a, 0.3), "E0": max(edge_eV - a, 0.3) + b, "C": c}
                for a, b, c in self.SHAPES]


def tauc_lorentz_chi(E, A, E0, C, Eg):
    """Closed-form Tauc-Lorentz χ = (ε1 - ε∞) + iε2 (Jellison & Modine 1996, with erratum).

    The five terms of ε1 are gathered by what depends on E: three are a
    polynomial in E² over ζ⁴ with scalar coefficients, the two log terms share
    the factor A·E0·C/(π ζ⁴), so a call costs about 35 array operations
    instead of 55 (the model's costliest step). The published term-by-term form
    is transcribed in the tests, which check this one against it.
    """
    _check_tl(E0, C)
    return A * _tl_arrays(np.asarray(E, dtype=float), E0, C, Eg)[0]


def tauc_lorentz_slopes(E, A, E0, C, Eg, names, *, arrays=None) -> np.ndarray:
    """dχ/dθ of :func:`tauc_lorentz_chi` for θ in ``names`` (of A, E0, C, Eg), analytic.

    χ = A·[(P E² + Q + w·L(E))/ζ⁴ + i ε2/A] with scalar P, Q, w, ln S, γ² and
    ζ⁴ = (E² - γ²)² + α²C²/4: every E-dependent factor is differentiated in
    closed form (L depends on Eg through ln|E - Eg|, ln(E + Eg) and E² + Eg²;
    ζ⁴ on E0 and C through γ² and α²C²/4; ε2 on all three), and so are the
    scalars P and Q, term by term. One call costs less than the closed form
    twice; forward differences of χ cost it three times and are good to ~1e-8
    only. ``arrays``: the (shape, parts) of ``_tl_arrays(E, E0, C, Eg, keep=True)``
    when the caller has them.
    """
    _check_tl(E0, C)
    E = np.asarray(E, dtype=float)
    shape, parts = _tl_arrays(E, E0, C, Eg, keep=True) if arrays is None else arrays
    E2, u, z4, l_d, l_p, logs, lorentz, dE, above = parts
    P, Q, w, log_s, g2, h = _tl_scalars(E0, C, Eg)
    E02, Eg2, C2 = E0 * E0, Eg * Eg, C * C
    D = (E02 - Eg2) ** 2 + Eg2 * C2              # S², ln S = ½ ln D
    out = np.empty((len(names), E.size), dtype=complex)
    for row, k in enumerate(names):
        if k == "A":
            out[row] = shape
            continue
        dP, dQ = _tl_dPQ(E0, C, Eg, k)
        if k == "Eg":
            dlog_s = 0.5 * (-4 * Eg * (E02 - Eg2) + 2 * Eg * C2) / D
            # d/dEg of 2Eg(l_d + l_p - ln S) - (E² + Eg²)/E (l_d - l_p); the 1/(E - Eg)
            # of d l_d cancels against the (E - Eg)² of its coefficient: a constant 2.
            dlogs = 2 * (l_d + l_p - log_s) - 2 * Eg * dlog_s - (2 * Eg / E) * (l_d - l_p) + 2
            re = (dP * E2 + dQ + w * dlogs) / z4
            im = np.where(above, -2 * (E0 * C) * dE / (lorentz * E), 0.0)
        else:
            if k == "E0":
                dw, dg2, dh = w / E0, 2 * E0, 2 * E0 * C2
                dlog_s = 0.5 * 4 * E0 * (E02 - Eg2) / D
                dlor = -4 * E0 * (E2 - E02)
            elif k == "C":
                dw, dg2, dh = w / C, -C, 2 * E02 * C - C2 * C
                dlog_s = 0.5 * 2 * Eg2 * C / D
                dlor = 2 * C * E2
            else:
                raise KeyError(f"{k!r} is not a Tauc-Lorentz parameter (A, E0, C, Eg)")
            num = dP * E2 + (dQ - 2 * Eg * w * dlog_s) + dw * logs
            re = (num - shape.real * (-2 * dg2 * u + dh)) / z4
            im = shape.imag * (dw / w - dlor / lorentz)
        out[row].real = re
        out[row].imag = im
    if A != 1.0:
        out[[row for row, k in enumerate(names) if k != "A"]] *= A
    return out


def _check_tl(E0, C):
    if not C < 2 * E0:
        raise ParameterError("C", C, f"Tauc-Lorentz needs C < 2·E0 = {2 * E0:g} eV")


def _tl_scalars(E0, C, Eg):
    """(P, Q, w, ln S, γ², α²C²/4) of the Tauc-Lorentz shape (χ per unit A)."""
    E02, Eg2, C2 = E0 * E0, Eg * Eg, C * C
    a = math.sqrt(4 * E02 - C2)                              # α
    g2 = E02 - C2 / 2                                        # γ²
    # t1 + t2 + t3 = (P E² + Q)/ζ⁴: their E-dependence is a_ln, a_atan and E² - γ²,
    # each linear in E².
    s1 = C / (2 * math.pi * a * E0) * math.log((E02 + Eg2 + a * Eg) / (E02 + Eg2 - a * Eg))
    s2 = -1 / (math.pi * E0) * (math.pi - math.atan((2 * Eg + a) / C)
                                + math.atan((a - 2 * Eg) / C))
    s3 = 2 * E0 * Eg / (math.pi * a) * (math.pi + 2 * math.atan(2 * (g2 - Eg2) / (a * C)))
    P = s1 * (Eg2 - E02) + s2 * (E02 + Eg2) + s3
    Q = s1 * (Eg2 * C2 - E02 * (E02 + 3 * Eg2)) + s2 * (Eg2 * C2 - E02 * (E02 + Eg2)) - s3 * g2
    log_s = 0.5 * math.log((E02 - Eg2) ** 2 + Eg2 * C2)
    return P, Q, E0 * C / math.pi, log_s, g2, a * a * C2 / 4


def _tl_dPQ(E0, C, Eg, name):
    """dP/dθ and dQ/dθ of :func:`_tl_scalars` (forward-mode chain rule, term by term)."""
    dE0, dC, dEg = (float(name == k) for k in ("E0", "C", "Eg"))
    E02, Eg2, C2 = E0 * E0, Eg * Eg, C * C
    a = math.sqrt(4 * E02 - C2)
    da = (4 * E0 * dE0 - C * dC) / a
    g2, dg2 = E02 - C2 / 2, 2 * E0 * dE0 - C * dC
    # s1 = C L1/(2π a E0), L1 = ln(N1/D1)
    N1, D1 = E02 + Eg2 + a * Eg, E02 + Eg2 - a * Eg
    dN1 = 2 * E0 * dE0 + 2 * Eg * dEg + Eg * da + a * dEg
    dD1 = 2 * E0 * dE0 + 2 * Eg * dEg - Eg * da - a * dEg
    L1 = math.log(N1 / D1)
    k1 = C / (2 * math.pi * a * E0)
    dk1 = k1 * (dC / C - da / a - dE0 / E0)
    s1, ds1 = k1 * L1, dk1 * L1 + k1 * (dN1 / N1 - dD1 / D1)
    # s2 = -T2/(π E0), T2 = π - atan(z1) + atan(z2)
    z1, z2 = (2 * Eg + a) / C, (a - 2 * Eg) / C
    dz1 = (2 * dEg + da) / C - z1 * dC / C
    dz2 = (da - 2 * dEg) / C - z2 * dC / C
    T2 = math.pi - math.atan(z1) + math.atan(z2)
    dT2 = -dz1 / (1 + z1 * z1) + dz2 / (1 + z2 * z2)
    s2 = -T2 / (math.pi * E0)
    ds2 = -dT2 / (math.pi * E0) + T2 * dE0 / (math.pi * E02)
    # s3 = 2 E0 Eg T3/(π a), T3 = π + 2 atan(z3)
    z3 = 2 * (g2 - Eg2) / (a * C)
    dz3 = 2 * (dg2 - 2 * Eg * dEg) / (a * C) - z3 * (da / a + dC / C)
    T3 = math.pi + 2 * math.atan(z3)
    dT3 = 2 * dz3 / (1 + z3 * z3)
    s3 = 2 * E0 * Eg * T3 / (math.pi * a)
    ds3 = 2 / (math.pi * a) * (dE0 * Eg * T3 + E0 * dEg * T3 + E0 * Eg * dT3) - s3 * da / a
    p1, dp1 = Eg2 - E02, 2 * Eg * dEg - 2 * E0 * dE0
    p2, dp2 = E02 + Eg2, 2 * E0 * dE0 + 2 * Eg * dEg
    q1 = Eg2 * C2 - E02 * (E02 + 3 * Eg2)
    dq1 = (2 * Eg * C2 * dEg + 2 * Eg2 * C * dC - (4 * E02 * E0 + 6 * E0 * Eg2) * dE0
           - 6 * E02 * Eg * dEg)
    q2 = Eg2 * C2 - E02 * (E02 + Eg2)
    dq2 = (2 * Eg * C2 * dEg + 2 * Eg2 * C * dC - (4 * E02 * E0 + 2 * E0 * Eg2) * dE0
           - 2 * E02 * Eg * dEg)
    dP = ds1 * p1 + s1 * dp1 + ds2 * p2 + s2 * dp2 + ds3
    dQ = ds1 * q1 + s1 * dq1 + ds2 * q2 + s2 * dq2 - ds3 * g2 - s3 * dg2
    return dP, dQ


def _tl_arrays(E, E0, C, Eg, keep=False):
    """χ per unit A on E, and (with ``keep``) the arrays the slopes reuse."""
    P, Q, w, log_s, g2, h = _tl_scalars(E0, C, Eg)
    E2 = E * E
    u = E2 - g2
    z4 = u * u + h                                            # ζ⁴
    dE = E - Eg
    # |E - Eg| -> tiny at E = Eg: the log terms' coefficients cancel there, the
    # limit is finite.
    l_d = np.log(np.maximum(np.abs(dE), 1e-12))
    l_p = np.log(E + Eg)
    # t4 + t5 = w/ζ⁴ · [2 Eg (ln|E - Eg| + ln(E + Eg) - ln S)
    #                  - (E² + Eg²)/E · ln(|E - Eg|/(E + Eg))]
    logs = 2 * Eg * (l_d + l_p - log_s) - (E2 + Eg * Eg) / E * (l_d - l_p)
    out = np.empty(E.shape, dtype=complex)
    out.real = (P * E2 + Q + w * logs) / z4
    lorentz = (E2 - E0 * E0) ** 2 + C * C * E2
    above = dE > 0
    out.imag = np.where(above, (E0 * C) * (dE * dE) / (lorentz * E), 0.0)
    if not keep:
        return out, None
    return out, (E2, u, z4, l_d, l_p, logs, lorentz, dE, above)


TERM_KINDS: dict[str, type[Term]] = {c.kind: c for c in (Lorentz, Drude, TaucLorentz)}


class Oscillators(Dispersion):
    r"""ε∞ plus a sum of susceptibility terms: ε(E) = ε∞ + Σ χ_k(E).

    Build Lorentz-oscillator, Drude (transparent conductor) and Tauc-Lorentz
    films, or any combination, e.g.
    ``Oscillators(eps_inf=1.0, terms=[TaucLorentz(), Drude()])``.
    Term parameters are named ``o1_f``, ``o2_E0`` ... by position.
    """

    kind, label = "oscillators", "Oscillators (ε∞ + Lorentz / Drude / Tauc-Lorentz)"
    level_param = "eps_inf"
    presets = (
        ("lorentz", "Lorentz oscillator",
         lambda **_: Oscillators(1.0, [Lorentz(1.5, 6.0, 0.5)])),
        ("drude", "Drude (free carriers)", lambda **_: Oscillators(3.5, [Drude(1.5, 0.1)])),
        ("drude_lorentz", "Drude + Lorentz (transparent conductor)",
         lambda **_: Oscillators(3.5, [Drude(1.5, 0.1), Lorentz(1.0, 6.0, 0.5)])),
        ("tauc_lorentz", "Tauc-Lorentz (amorphous semiconductor)",
         lambda **_: Oscillators(2.0, [TaucLorentz()])),
    )

    def __init__(self, eps_inf: float = 1.0, terms: Iterable[Term] = (), **values):
        self.terms = list(terms)
        if not self.terms:
            raise ParameterError("terms", "[]", "an oscillator model needs at least one term")
        specs = [_spec("eps_inf", 1.0, 0.1, 30.0, "", "high-frequency dielectric constant ε∞")]
        for i, t in enumerate(self.terms, start=1):
            for p in t.params.values():
                specs.append(p.copy(name=f"o{i}_{p.name}", doc=f"term {i} ({t.kind}): {p.doc}"))
        self._init_params(specs, {"eps_inf": eps_inf, **values})

    def _eps(self, wl, v):
        E = HC_EV_NM / wl
        eps = np.full(wl.shape, v["eps_inf"], dtype=complex)
        for i, t in enumerate(self.terms, start=1):
            pre = f"o{i}_"
            try:
                eps = eps + t.chi(E, {k: v[pre + k] for k in t.params})
            except ParameterError as e:  # name the parameter as the user sees it
                raise ParameterError(pre + e.name, e.value, e.reason) from None
        return eps

    def check_params(self, values: Mapping[str, float] | None = None) -> None:
        """Raise :class:`ParameterError` if a term's parameters are outside its domain."""
        v = self._merged(values)
        for i, t in enumerate(self.terms, start=1):
            pre = f"o{i}_"
            try:
                t.check({k: v[pre + k] for k in t.params})
            except ParameterError as e:
                raise ParameterError(pre + e.name, e.value, e.reason) from None

    def dN(self, wl, v, names, N0=None):
        """dN/dθ = (dε/dθ)/(2N): dε/dε∞ = 1, each term's dχ/dθ from the term itself
        (see :meth:`Dispersion.dN`). Falls back to differences of N where N is
        near 0 (dN/dε is singular there)."""
        if N0 is None:
            N0 = self.N_unchecked(wl, v)
        if np.min(np.abs(N0)) < 1e-3:
            return super().dN(wl, v, names, N0)
        E = HC_EV_NM / wl
        deps = np.zeros((len(names), wl.size), dtype=complex)
        row = {k: i for i, k in enumerate(names)}
        if "eps_inf" in row:
            deps[row["eps_inf"]] = 1.0
        for i, t in enumerate(self.terms, start=1):
            pre = f"o{i}_"
            mine = [k for k in t.params if pre + k in row]
            if mine:
                tv = {k: v[pre + k] for k in t.params}
                d = t.dchi(E, tv, mine, t.chi(E, tv))
                for k, dk in zip(mine, d):
                    deps[row[pre + k]] = dk
        eps0 = N0 * N0
        # Where the model gives Im ε <= 0 (below a gap), N is held at κ = 0 (see
        # _sqrt_eps): an ε2 that cannot go negative has no downward slope there.
        held = ~(eps0.imag > 0)[None, :] & (deps.imag < 0)
        if held.any():
            deps = np.where(held, deps.real + 0j, deps)
        return deps / (2 * N0)

    def components(self, wavelength_nm, values=None) -> list[np.ndarray]:
        """Each term's χ(λ), for plotting the parts of a fitted model."""
        wl = check_wavelengths(wavelength_nm)
        v = self._merged(values)
        E = HC_EV_NM / wl
        return [t.chi(E, {k: v[f"o{i}_{k}"] for k in t.params})
                for i, t in enumerate(self.terms, start=1)]

    def _shape_dict(self):
        return {"terms": [t.kind for t in self.terms]}

    @classmethod
    def from_shape(cls, d, where):
        from .errors import RecipeError
        kinds = d.get("terms")
        if not isinstance(kinds, list) or not kinds:
            raise RecipeError(f"{where}.terms", "must be a non-empty list of term kinds")
        bad = [k for k in kinds if k not in TERM_KINDS]
        if bad:
            raise RecipeError(f"{where}.terms", f"unknown term {bad[0]!r}; choose from "
                                                f"{', '.join(TERM_KINDS)}")
        return cls(terms=[TERM_KINDS[k]() for k in kinds])

    def describe(self) -> str:
        if self.label != type(self).label:
            return self.label
        return " + ".join(t.title or t.kind for t in self.terms)

    def preset_key(self) -> str:
        """The preset with the same terms, else the closest: the first term's kind."""
        kinds = [t.kind for t in self.terms]
        for key, _, factory in self.presets:
            if [t.kind for t in factory().terms] == kinds:
                return key
        first = {"tauc_lorentz": "tauc_lorentz", "lorentz": "lorentz", "drude": "drude"}
        return "drude_lorentz" if kinds[:2] == ["drude", "lorentz"] else first[kinds[0]]

    def edge_params(self) -> tuple:
        return tuple(f"o{i}_{k}" for i, t in enumerate(self.terms, start=1)
                     for k in t.edge_params)

    def edge_fit_params(self) -> tuple:
        for i, t in enumerate(self.terms, start=1):
            if t.edge_fit:
                return tuple(f"o{i}_{k}" for k in t.edge_fit)
        return ()

    def edge_starts(self, local, edge_eV, top_eV):
        """The first term with an absorption edge gives the starts (see its edge_starts)."""
        for i, t in enumerate(self.terms, start=1):
            starts = t.edge_starts(edge_eV, top_eV)
            if starts:
                return [{f"o{i}_{k}": v for k, v in st.items()} for st in starts]
        return []


# ----------------------------------------------------------------------------------------
class Tabulated(Dispersion):
    """Tabulated n, κ interpolated linearly in wavelength.

    Refuses wavelengths outside the table (no extrapolation). The table is
    saved inside recipes so that a recipe is self-contained.
    """

    kind, label = "tabulated", "Tabulated n, κ"
    presets = (("tabulated", "Tabulated n, κ from file…",
                lambda table_path=None, **_: Tabulated.from_file(_need(table_path))),)

    def __init__(self, wavelength_nm, n, k=None, *, name: str = "table"):
        wl = check_wavelengths(wavelength_nm, what="table wavelength")
        n = np.asarray(n, dtype=float)
        k = np.zeros_like(n) if k is None else np.asarray(k, dtype=float)
        if wl.ndim != 1 or wl.size < 2 or n.shape != wl.shape or k.shape != wl.shape:
            raise ParameterError("table", f"{wl.size} rows",
                                 "needs at least 2 rows of wavelength, n and κ of equal length")
        if not (np.all(np.isfinite(n)) and np.all(np.isfinite(k))):
            raise ParameterError("table", "NaN", "n and κ must be finite numbers")
        if np.any(k < 0):
            raise ParameterError("table κ", float(k.min()), "κ must not be negative")
        order = np.argsort(wl)
        self.wl, self.n, self.k = wl[order], n[order], k[order]
        if np.any(np.diff(self.wl) <= 0):
            raise ParameterError("table wavelength", "duplicates", "wavelengths must be distinct")
        self.name = name
        self.valid_nm = (float(self.wl[0]), float(self.wl[-1]))
        self.params = {}

    @classmethod
    def from_file(cls, path) -> Tabulated:
        """Read a table of wavelength, n and (optionally) κ.

        The table is parsed by the spectrum reader (:func:`fitting.reader.read_table`):
        tab, ';', ',' or space separated, decimal point or comma (``400;2,10;0,01``),
        UTF-8/16 or Latin-1, a header and "# key: value" lines above it. Columns named
        in the header are found by name (wavelength or λ; n; k, κ or kappa), as in
        Pellucid's own ``*_nk_*.csv`` exports; otherwise they are taken in the order
        wavelength, n, κ. Wavelengths are in nm unless the column name gives µm, Å,
        cm⁻¹ or eV. A row without a κ value, or a table without a κ column, has κ = 0.

        Raises
        ------
        SpectrumFormatError
            Naming the file and line: no table, text where a number belongs, a missing
            wavelength or n, a non-positive wavelength, a negative κ, a repeated
            wavelength, unitless wavelengths that look like µm, fewer than 2 rows.
        """
        import re

        from .reader import abscissa_unit, read_table, to_nm
        table = read_table(path)
        names = [re.sub(r"[\s_]*[(\[].*$", "", n).strip().lower() for n in table.names]

        def find(*words):
            return next((i for i, n in enumerate(names) if n in words), None)
        wl_i = next((i for i, n in enumerate(table.names)
                     if re.match(r"\s*(wavelength|wave length|lambda|λ|wl\b)", n, re.I)), None)
        n_i, k_i = find("n"), find("k", "κ", "kappa")
        if wl_i is None or n_i is None:          # no names: wavelength, n, κ in that order
            wl_i, n_i = 0, 1
            k_i = 2 if table.values.shape[1] > 2 else None
        if table.values.shape[1] < 2:
            raise table.fail(0, "an n, κ table needs a wavelength and an n column",
                             expected="wavelength n [κ]", found=f"{table.values.shape[1]} "
                             "column(s) of numbers")
        wl = table.values[:, wl_i]
        n = table.values[:, n_i]
        k = np.zeros_like(n) if k_i is None else table.values[:, k_i]
        k = np.where(np.isnan(k), 0.0, k)
        for what, col in (("wavelength", wl), ("n", n), ("κ", k)):
            bad = np.flatnonzero(~np.isfinite(col))
            if bad.size:
                raise table.fail(bad[0], f"this row has no finite {what} value; complete or "
                                 "delete the row", expected="wavelength n [κ]",
                                 found=f"{col[bad[0]]:g}")
        unit = abscissa_unit(table.names[wl_i]) if table.names else None
        if unit is None and wl.max() <= 30:
            raise table.fail(0, f"wavelengths {wl.min():g}-{wl.max():g} with no unit look "
                             "like µm (or eV), not nm; state the unit in the column name, "
                             "e.g. 'Wavelength (µm)'", expected="wavelengths in nm",
                             found=f"{wl[0]:g}")
        if (wl <= 0).any():
            at = int(np.flatnonzero(wl <= 0)[0])
            raise table.fail(at, "wavelengths must be positive", expected="a wavelength > 0",
                             found=f"{wl[at]:g}")
        if (k < 0).any():
            at = int(np.flatnonzero(k < 0)[0])
            raise table.fail(at, "κ must not be negative (an absorbing material has κ > 0)",
                             expected="κ >= 0", found=f"{k[at]:g}")
        wl = to_nm(wl, unit or "nm")
        _, first = np.unique(wl, return_index=True)
        if first.size < wl.size:
            at = int(np.setdiff1d(np.arange(wl.size), first)[0])
            raise table.fail(at, "this wavelength appears twice; keep one row per wavelength",
                             expected="distinct wavelengths", found=f"{wl[at]:g} nm")
        if wl.size < 2:
            raise table.fail(None, "an n, κ table needs at least 2 data rows",
                             expected="2 or more rows", found=f"{wl.size}")
        try:
            return cls(wl, n, k, name=str(path))
        except ParameterError as e:
            raise table.fail(None, str(e)) from None

    def _N(self, wl, v):
        return np.interp(wl, self.wl, self.n) + 1j * np.interp(wl, self.wl, self.k)

    def describe(self):
        return f"table {self.name}"

    def to_dict(self):
        return {"kind": self.kind, "name": self.name, "wavelength_nm": self.wl.tolist(),
                "n": self.n.tolist(), "k": self.k.tolist()}

    @classmethod
    def from_shape(cls, d, where):
        return cls(d["wavelength_nm"], d["n"], d.get("k"), name=d.get("name", "table"))


class Bruggeman(Dispersion):
    r"""Bruggeman effective-medium mixture of two materials.

    Solves  f (ε_a - ε)/(ε_a + 2ε) + (1 - f)(ε_b - ε)/(ε_b + 2ε) = 0  for ε, with
    ``fraction`` = f the volume fraction of the inclusion a in the host b; the
    root with Im ε >= 0 (and Re ε > 0 for lossless media) is the physical one.
    Used for surface roughness (film + voids, f ≈ 0.5) and porosity.
    Parameters of the two parts are named ``host_...`` and ``incl_...``.

    References
    ----------
    .. [1] D. A. G. Bruggeman, "Berechnung verschiedener physikalischer Konstanten von
           heterogenen Substanzen", Ann. Phys. 416, 636 (1935).
    .. [2] D. E. Aspnes, "Optical properties of thin films", Thin Solid Films 89, 249
           (1982).
    """

    kind, label = "bruggeman", "Bruggeman mixture"
    presets = (("roughness", "Surface roughness (Bruggeman, film + voids)",
                lambda host=None, **_: Bruggeman(host.copy() if host is not None else Cauchy(),
                                                 Constant(1.0, 0.0), 0.5)),)

    @classmethod
    def from_shape(cls, d, where):
        return cls(model_from_dict(d.get("host"), where=f"{where}.host"),
                   model_from_dict(d.get("inclusion"), where=f"{where}.inclusion"))

    def __init__(self, host: Dispersion, inclusion: Dispersion | None = None,
                 fraction: float = 0.5, **values):
        self.host = host
        self.inclusion = inclusion if inclusion is not None else Constant(1.0, 0.0)
        specs = [_spec("fraction", 0.5, 0.0, 1.0, "", "volume fraction of the inclusion")]
        for pre, m in (("host_", self.host), ("incl_", self.inclusion)):
            specs += [p.copy(name=pre + p.name) for p in m.params.values()]
        self._init_params(specs, {"fraction": fraction, **values})
        self.valid_nm = (max(host.valid_nm[0], self.inclusion.valid_nm[0]),
                         min(host.valid_nm[1], self.inclusion.valid_nm[1]))

    def _eps(self, wl, v):
        sub = lambda pre, m: {k: v[pre + k] for k in m.params}  # noqa: E731
        ea = self.inclusion.N_unchecked(wl, sub("incl_", self.inclusion)) ** 2
        eb = self.host.N_unchecked(wl, sub("host_", self.host)) ** 2
        f = v["fraction"]
        b = (3 * f - 1) * ea + (2 - 3 * f) * eb
        root = np.sqrt(b * b + 8 * ea * eb)
        e1, e2 = (b + root) / 4, (b - root) / 4
        # Physical branch: larger Im ε (>= 0); for lossless parts, the positive root.
        pick1 = (e1.imag > e2.imag + 1e-14) | ((np.abs(e1.imag - e2.imag) <= 1e-14)
                                               & (e1.real >= e2.real))
        return np.where(pick1, e1, e2)

    def to_dict(self):
        d = super().to_dict()
        d["host"], d["inclusion"] = self.host.to_dict(), self.inclusion.to_dict()
        return d


# ----------------------------------------------------------------------------------------
#: Every dispersion model by its saved name, in the order the app's menu lists them.
MODEL_KINDS: dict[str, type[Dispersion]] = {
    c.kind: c for c in (Cauchy, Sellmeier, Oscillators, Constant, Tabulated, Bruggeman)}


def _need(table_path):
    if table_path is None:
        raise ParameterError("table file", None, "choose an n, κ table file")
    return table_path


def _apply_saved_params(model: _HasParams, saved: Mapping, where: str) -> None:
    from .errors import RecipeError
    if not isinstance(saved, Mapping):
        raise RecipeError(f"{where}.params", "must be an object of parameter entries")
    for name, entry in saved.items():
        if name not in model.params:
            raise RecipeError(f"{where}.params.{name}",
                              f"unknown parameter; known: {', '.join(model.params)}")
        p = model.params[name]
        if isinstance(entry, Mapping):
            refuse_unknown_fields(entry, PARAM_FIELDS, f"{where}.params.{name}")
            lo = entry.get("min", p.min)
            hi = entry.get("max", p.max)
            try:
                new = Param(name, entry.get("value", p.value), -INF if lo is None else lo,
                            INF if hi is None else hi, p.unit, p.doc,
                            bool(entry.get("vary", p.vary)), entry.get("expr"))
            except ParameterError as e:
                raise RecipeError(f"{where}.params.{name}", e.reason) from None
            model.params[name] = new
        else:
            try:
                model.set(name, entry, widen=True)
            except ParameterError as e:
                raise RecipeError(f"{where}.params.{name}", e.reason) from None


def model_from_dict(d: Mapping, *, where: str = "model") -> Dispersion:
    """Rebuild a dispersion model from :meth:`Dispersion.to_dict` output.

    Raises :class:`~fitting.errors.RecipeError` naming the field on any problem.
    """
    from .errors import RecipeError
    if not isinstance(d, Mapping):
        raise RecipeError(where, "must be an object with a 'kind'")
    kind = d.get("kind")
    if kind not in MODEL_KINDS:
        raise RecipeError(f"{where}.kind", f"unknown model {kind!r}; choose one of "
                                           f"{', '.join(MODEL_KINDS)}")
    try:
        m = MODEL_KINDS[kind].from_shape(d, where)
        if kind == "tabulated":
            return m
    except KeyError as e:
        raise RecipeError(f"{where}.{e.args[0]}", "is missing") from None
    except ParameterError as e:
        raise RecipeError(f"{where}.{e.name}", e.reason) from None
    _apply_saved_params(m, d.get("params", {}), where)
    if "label" in d:
        m.label = str(d["label"])
    if isinstance(m, Oscillators):
        try:
            m.check_params()
        except ParameterError as e:
            raise RecipeError(f"{where}.params.{e.name}", e.reason) from None
    return m
