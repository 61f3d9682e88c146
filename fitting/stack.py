"""The sample as a layer stack: ambient | coherent films | thick substrate | exit medium.

A :class:`Stack` is what a user builds and a recipe saves; :meth:`Stack.RT`
computes front-side reflectance and transmittance over wavelength.
:meth:`Stack.evaluator` returns a :class:`StackModel` bound to one wavelength
grid and geometry, which is what fits call thousands of times: it caches every
material's N(λ) between calls whose parameters did not change (the substrate
and the ambient are computed once).

Two effects of real samples and instruments are included as averages over
quadrature nodes:

* thickness non-uniformity: all film thicknesses scaled by (1 + s·x) with x
  normally distributed (relative standard deviation s): 7-point Gauss-Hermite
  while the fringe phase spread is small, a uniform rule with more nodes beyond;
* finite spectral bandwidth: a triangular slit function of the given FWHM
  (common practice for grating monochromators), Gauss-Jacobi nodes on each
  half of the triangle (12 in all).

Global parameter names are ``{layer}_{param}``, e.g. ``film_thickness``,
``film_A``, ``film_o1_E0``.

A layer can be *known* as a whole (``Layer(..., known=True)``): a film measured
earlier, whose thickness and optical constants every fit holds while it fits
the others. :meth:`Stack.parameters` hands a fit held copies of its parameters,
so the fit engine needs no notion of it; :mod:`fitting.known` loads such a
layer from an earlier result's n, κ export.
"""

from __future__ import annotations

import copy
import functools
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Mapping

import numpy as np
from scipy.special import roots_jacobi

from .dispersion import (EPS_STEP, Constant, Dispersion, check_wavelengths, forward_step,
                         model_from_dict)
from .errors import ParameterError, RecipeError
from .optics import films_RT, outer_media
from .params import PARAM_FIELDS, Param, check_finite, refuse_unknown_fields
from .substrates import Substrate

__all__ = ["Layer", "Stack", "StackModel", "POLARIZATIONS", "LAYER_FIELDS"]

POLARIZATIONS = ("s", "p", "u")
#: Fields of a saved layer ("known" and "source" only when used).
LAYER_FIELDS = ("name", "material", "thickness", "known", "source")
_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9]*$")

# 7-point Gauss-Hermite nodes/weights for E[f(x)], x ~ N(0, 1).
_GH_X, _GH_W = np.polynomial.hermite_e.hermegauss(7)
_GH_W = _GH_W / _GH_W.sum()


@functools.lru_cache(maxsize=64)
def _spread_nodes(n_nodes: int):
    """Nodes and weights for E[f(x)], x ~ N(0, 1): uniform on [-6, 6], Gaussian weights.

    The Airy fringes are periodic in x with many harmonics once the phase spread
    is large, where Gauss-Hermite converges only slowly (7 nodes are off by 0.1
    in T for a 5 µm film with 2 % spread); the trapezoid rule converges
    geometrically for such smooth integrands (common practice; Trefethen &
    Weideman, SIAM Rev. 56, 385 (2014)).
    """
    x = np.linspace(-6.0, 6.0, n_nodes)
    w = np.exp(-0.5 * x * x)
    return x, w / w.sum()


# Triangular slit of unit FWHM (base -1..1): 6-point Gauss-Jacobi rules for the
# weight (1 - |u|) on each half, where the spectrum is smooth. The earlier 7-point
# midpoint rule straddled the kink at u = 0 and converged only as h², off by 2e-4
# in T for a 1 µm film with a 5 nm slit and 7e-3 for 10 µm; this rule gives 1e-9
# and 8e-4 (brute-force checks in tests/test_stack.py).
def _slit_rule(m: int = 6):
    x, w = roots_jacobi(m, 1.0, 0.0)  # weight (1 - x) on [-1, 1]
    u = (x + 1) / 2                     # -> weight (1 - u) on [0, 1]
    return np.concatenate([-u[::-1], u]), np.concatenate([w[::-1], w]) / (2 * w.sum())


_SLIT_U, _SLIT_W = _slit_rule()


def _medium(m: Dispersion) -> str:
    """Ambient or exit medium in words: "air (n = 1)", "n = 1.33", or the model."""
    if isinstance(m, Constant):
        n, k = m.params["n"].value, m.params["k"].value
        if n == 1 and k == 0:
            return "air (n = 1)"
        return f"n = {n:g}" + (f", κ = {k:g}" if k else "")
    return m.describe()


@dataclass
class Layer:
    """One coherent film: a name, a material and a thickness parameter (nm).

    Parameters
    ----------
    name : str
        Letters and digits, starting with a letter; prefixes the global parameter
        names (``film_thickness``, ``film_A``).
    material : Dispersion
    thickness : Param or float
        Physical thickness in nm; a number becomes a parameter with bounds
        [0, max(50 µm, 2d)].
    known : bool
        The layer is known as a whole (measured earlier): its thickness and every
        material parameter are held at their values by every fit, whatever their
        own fit flags say, and ties *inside* it are suspended (it keeps its stored
        values). The flags and ties stay stored, so unticking ``known`` restores
        them. A tie in another layer that refers to a known layer's parameter
        still works: it reads the held value.
    source : dict or None
        Where the layer's values came from (a JSON object; provenance only, it
        does not change the optics): for a layer loaded from an earlier result's
        n, κ export, the table file and its SHA-256, the earlier fit's provenance
        and where the thickness came from (see :mod:`fitting.known`).
    """

    name: str
    material: Dispersion
    thickness: Param = field(default_factory=lambda: Param(
        "thickness", 500.0, 0.0, 50000.0, "nm", "physical film thickness"))
    known: bool = False
    source: dict | None = field(default=None, repr=False)

    def __post_init__(self):
        if not _NAME_RE.match(self.name or ""):
            raise ParameterError("layer name", self.name,
                                 "must start with a letter and hold only letters and digits")
        if isinstance(self.thickness, (int, float)):
            d = check_finite(f"{self.name} thickness", self.thickness)
            if d < 0:
                raise ParameterError(f"{self.name}_thickness", d, "thickness must not be negative")
            self.thickness = Param("thickness", d, 0.0, max(50000.0, 2 * d), "nm",
                                   "physical film thickness")
        if self.thickness.value < 0:
            raise ParameterError(f"{self.name}_thickness", self.thickness.value,
                                 "thickness must not be negative")
        if not isinstance(self.known, (bool, np.bool_)):
            # "false" as text would read as true: refuse instead of guessing.
            raise ParameterError(f"{self.name} known", self.known, "must be True or False")
        self.known = bool(self.known)
        if self.source is not None:
            if not isinstance(self.source, Mapping):
                raise ParameterError(f"{self.name} source", self.source,
                                     "must be a mapping (file, sha256, ...) or None")
            try:   # a deep, JSON-clean copy: it is saved in recipes as it is
                self.source = json.loads(json.dumps(dict(self.source), allow_nan=False))
            except (TypeError, ValueError) as e:
                raise ParameterError(f"{self.name} source", self.source,
                                     f"must hold only text, numbers and lists ({e})") from None

    @property
    def thickness_nm(self) -> float:
        return self.thickness.value

    def parameters(self, *, live: bool = False) -> dict[str, Param]:
        """Local parameters (``thickness`` and the material's) as a fit sees them.

        For a known layer these are held copies (``vary=False``, no tie) unless
        ``live``; otherwise, and always with ``live=True``, the layer's own
        objects, which an editor may change in place.
        """
        out = {"thickness": self.thickness, **self.material.params}
        if self.known and not live:
            out = {k: p.copy(vary=False, expr=None) for k, p in out.items()}
        return out

    def describe(self) -> str:
        """One line for lists and reports: name, material, thickness, known or fitted."""
        d = self.thickness
        text = f"{self.name}: {self.material.describe()}, {d.value:.6g} nm"
        if self.known:
            text += ", known (held, not fitted)"
            tied = [k for k, p in self.parameters(live=True).items() if p.expr]
            if tied:
                text += f"; tie on {', '.join(tied)} suspended"
        else:
            text += ", thickness fitted" if d.vary and not d.expr else \
                (f", thickness tied: {d.expr}" if d.expr else ", thickness fixed")
        src = self.source or {}
        if src.get("file"):
            sha = str(src.get("sha256") or "")
            text += f"; from {Path(str(src['file'])).name}" + (f" (SHA-256 {sha[:12]}…)"
                                                              if sha else "")
        return text

    def to_dict(self) -> dict:
        d = {"name": self.name, "material": self.material.to_dict(),
             "thickness": self.thickness.to_dict()}
        # Only when used, so stacks without them keep their layout and hash.
        if self.known:
            d["known"] = True
        if self.source is not None:
            d["source"] = json.loads(json.dumps(self.source))
        return d


@dataclass
class Stack:
    """ambient | layers (coherent, ambient side first) | substrate (incoherent) | exit.

    Parameters
    ----------
    layers : list of Layer
    substrate : Substrate
    ambient, exit_medium : Dispersion
        Default air (n = 1).
    thickness_spread : float
        Relative standard deviation of film thickness over the measured spot (0 = uniform).
    bandwidth_nm : float
        Spectral bandwidth (FWHM of a triangular slit) of the instrument, nm.
    """

    layers: list[Layer]
    substrate: Substrate
    ambient: Dispersion = field(default_factory=lambda: Constant(1.0))
    exit_medium: Dispersion = field(default_factory=lambda: Constant(1.0))
    thickness_spread: float = 0.0
    bandwidth_nm: float = 0.0

    def __post_init__(self):
        self.layers = list(self.layers)
        names = [layer.name for layer in self.layers]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise ParameterError("layer name", sorted(dup)[0], "layer names must be unique")
        for what in ("thickness_spread", "bandwidth_nm"):
            v = check_finite(what, getattr(self, what))
            if v < 0:
                raise ParameterError(what, v, "must not be negative")
            setattr(self, what, v)
        if self.thickness_spread > 0.3:
            raise ParameterError("thickness_spread", self.thickness_spread,
                                 "a relative spread above 0.3 (30 %) is not a film")

    # -- parameters -----------------------------------------------------------------
    def parameters(self, *, live: bool = False) -> dict[str, Param]:
        """All film parameters by global name ``{layer}_{param}``, as a fit sees them.

        The layers' own objects, except for a known layer, whose entries are held
        copies (``vary=False``, no tie: see :class:`Layer`). Editors that change
        flags or ties in place pass ``live=True`` to get the own objects of every
        layer; :meth:`set_values` always writes into them.
        """
        out: dict[str, Param] = {}
        for layer in self.layers:
            for k, p in layer.parameters(live=live).items():
                out[f"{layer.name}_{k}"] = p
        return out

    def known_layers(self) -> list[str]:
        """Names of the layers marked known (held as a whole by every fit)."""
        return [layer.name for layer in self.layers if layer.known]

    def describe(self) -> str:
        """The stack in words, ambient side first, one layer per line."""
        lines = [f"ambient: {_medium(self.ambient)}"]
        lines += [f"  {layer.describe()}" for layer in self.layers] or ["  (no films)"]
        lines.append(f"substrate: {self.substrate.name}, {self.substrate.thickness_mm:g} mm")
        lines.append(f"exit medium: {_medium(self.exit_medium)}")
        if self.thickness_spread:
            lines.append(f"thickness spread: {100 * self.thickness_spread:.3g} % (1σ)")
        if self.bandwidth_nm:
            lines.append(f"bandwidth: {self.bandwidth_nm:g} nm")
        return "\n".join(lines)

    def values(self) -> dict[str, float]:
        return {k: p.value for k, p in self.parameters().items()}

    def set_values(self, values: Mapping[str, float]) -> None:
        """Write values (global names) into the stack's parameters, widening no bounds."""
        params = self.parameters(live=True)
        for k, v in values.items():
            if k in params:
                params[k].value = check_finite(k, v)

    def layer(self, name: str) -> Layer:
        for layer in self.layers:
            if layer.name == name:
                return layer
        raise KeyError(name)

    # -- optics ---------------------------------------------------------------------
    def RT(self, wavelength_nm, *, angle_deg: float = 0.0, polarization: str = "u",
           values: Mapping[str, float] | None = None):
        """Front-side reflectance and transmittance.

        Parameters
        ----------
        wavelength_nm : array_like of shape (W,)
        angle_deg : float
            Angle of incidence in the ambient, degrees (0 <= angle < 90).
        polarization : {"s", "p", "u"}
        values : mapping, optional
            Global-name parameter values overriding the stored ones.

        Returns
        -------
        R, T : ndarray of shape (W,)
        """
        return self.evaluator(wavelength_nm, angle_deg=angle_deg,
                              polarization=polarization).RT(values)

    def transmittance(self, wavelength_nm, **kw) -> np.ndarray:
        return self.RT(wavelength_nm, **kw)[1]

    def reflectance(self, wavelength_nm, **kw) -> np.ndarray:
        return self.RT(wavelength_nm, **kw)[0]

    def evaluator(self, wavelength_nm, *, angle_deg: float = 0.0,
                  polarization: str = "u") -> StackModel:
        return StackModel(self, wavelength_nm, angle_deg=angle_deg, polarization=polarization)

    # -- persistence ----------------------------------------------------------------
    def to_dict(self) -> dict:
        return {"ambient": self.ambient.to_dict(), "layers": [x.to_dict() for x in self.layers],
                "substrate": self.substrate.to_dict(), "exit_medium": self.exit_medium.to_dict(),
                "thickness_spread": self.thickness_spread, "bandwidth_nm": self.bandwidth_nm}

    @classmethod
    def from_dict(cls, d: Mapping, *, where: str = "stack") -> Stack:
        if not isinstance(d, Mapping):
            raise RecipeError(where, "must be an object")
        known = {"ambient", "layers", "substrate", "exit_medium", "thickness_spread",
                 "bandwidth_nm"}
        extra = set(d) - known
        if extra:
            raise RecipeError(f"{where}.{sorted(extra)[0]}", "unknown field")
        if "substrate" not in d:
            raise RecipeError(f"{where}.substrate", "is missing")
        layers_in = d.get("layers", [])
        if not isinstance(layers_in, list):
            raise RecipeError(f"{where}.layers", "must be a list")
        layers = []
        for i, ld in enumerate(layers_in):
            w = f"{where}.layers[{i}]"
            if not isinstance(ld, Mapping) or "material" not in ld:
                raise RecipeError(w, "must be an object with 'name', 'material', 'thickness'")
            refuse_unknown_fields(ld, LAYER_FIELDS, w)
            if isinstance(ld.get("thickness"), Mapping):
                refuse_unknown_fields(ld["thickness"], PARAM_FIELDS, f"{w}.thickness")
            known_flag = ld.get("known", False)
            if not isinstance(known_flag, bool):
                raise RecipeError(f"{w}.known",
                                  f"must be true or false (without quotes), got {known_flag!r}")
            if known_flag and (not isinstance(ld.get("thickness"), (Mapping, int, float))
                               or (isinstance(ld["thickness"], Mapping)
                                   and "value" not in ld["thickness"])):
                # The 500 nm default would be a silent guess for a layer said to be known.
                raise RecipeError(f"{w}.thickness", "is missing; a known layer needs its "
                                                   'thickness in nm, e.g. {"value": 98.2}')
            if "source" in ld and not isinstance(ld["source"], (Mapping, type(None))):
                raise RecipeError(f"{w}.source", "must be an object (file, sha256, ...)")
            mat_d = ld["material"]
            if isinstance(mat_d, Mapping) and "file" in mat_d:
                raise RecipeError(f"{w}.material.file",
                                  "a table file can be named only in a recipe file (it is "
                                  "read from the recipe's folder and embedded); here give "
                                  "the table itself, e.g. from fitting.known."
                                  "known_layer_from_export")
            th = ld.get("thickness", {})
            try:
                if isinstance(th, Mapping):
                    lo, hi = th.get("min", 0.0), th.get("max", 50000.0)
                    tp = Param("thickness", th.get("value", 500.0), 0.0 if lo is None else lo,
                               math.inf if hi is None else hi, "nm", "physical film thickness",
                               bool(th.get("vary", True)), th.get("expr"))
                    if tp.min < 0:
                        raise ParameterError("thickness", tp.min, "lower bound must be >= 0")
                else:
                    tp = float(th)
                layers.append(Layer(str(ld.get("name", f"film{i + 1}")),
                                    model_from_dict(ld["material"], where=f"{w}.material"), tp,
                                    known_flag, ld.get("source")))
            except ParameterError as e:
                field_name = ("thickness" if "thickness" in e.name else
                              "source" if e.name.endswith(" source") else "name")
                raise RecipeError(f"{w}.{field_name}", e.reason) from None
        try:
            return cls(layers, Substrate.from_dict(d["substrate"], where=f"{where}.substrate"),
                       model_from_dict(d.get("ambient", Constant(1.0).to_dict()),
                                       where=f"{where}.ambient"),
                       model_from_dict(d.get("exit_medium", Constant(1.0).to_dict()),
                                       where=f"{where}.exit_medium"),
                       d.get("thickness_spread", 0.0), d.get("bandwidth_nm", 0.0))
        except ParameterError as e:
            raise RecipeError(f"{where}.{e.name}", e.reason) from None


class StackModel:
    """A stack bound to a wavelength grid and geometry, for repeated evaluation.

    Call :meth:`RT` with a mapping of global parameter values; anything not
    given takes the stack's stored value. Material indices are cached per
    layer and recomputed only when that layer's parameters change.
    """

    def __init__(self, stack: Stack, wavelength_nm, *, angle_deg: float = 0.0,
                 polarization: str = "u"):
        wl = check_wavelengths(wavelength_nm)
        if wl.ndim != 1:
            raise ParameterError("wavelength_nm", wl.shape, "must be a 1-D array")
        angle = check_finite("angle_deg", angle_deg)
        if not 0 <= angle < 90:
            raise ParameterError("angle_deg", angle, "angle of incidence must be in [0, 90)")
        if polarization not in POLARIZATIONS:
            raise ParameterError("polarization", polarization, "must be 's', 'p' or 'u'")
        self.stack, self.wavelength_nm = stack, wl
        self.angle_rad, self.polarization = math.radians(angle), polarization
        if stack.bandwidth_nm > 0:
            nodes = wl[None, :] + stack.bandwidth_nm * _SLIT_U[:, None]
            if np.any(nodes <= 0):
                raise ParameterError("bandwidth_nm", stack.bandwidth_nm,
                                     "is wider than the shortest wavelength")
            self._wl = nodes.ravel()
        else:
            self._wl = wl
        for m in [stack.ambient, stack.exit_medium, stack.substrate.material,
                  *(layer.material for layer in stack.layers)]:
            m.check_range(self._wl)
        self._N_amb = stack.ambient.N(self._wl)
        if angle and np.any(np.abs(self._N_amb.imag) > 0):
            raise ParameterError("ambient", stack.ambient,
                                 "must be lossless (κ = 0) for oblique incidence")
        self._N_exit = stack.exit_medium.N(self._wl)
        self._N_sub = stack.substrate.N(self._wl)
        self._sub_d = stack.substrate.thickness_nm
        # Ambient, substrate and back side never change during a fit: bind them once.
        self._outer = outer_media(self._wl, self._N_amb, self._N_sub, self._sub_d, self._N_exit,
                                  angle_rad=self.angle_rad, polarization=polarization)
        self._names = [(layer, f"{layer.name}_", f"{layer.name}_thickness",
                        tuple(layer.material.params)) for layer in stack.layers]
        self._cache: list[tuple | None] = [None] * len(stack.layers)
        self._last = None           # (Ns, ds, spread, R, T) of the last RT call, node grid
        self._tiled: dict = {}      # outer media on the node grid repeated V times, by V
        # Global name -> (layer index, material parameter or None for the thickness).
        self._where = {n: (i, k) for i, (_, pre, tname, pnames) in enumerate(self._names)
                       for n, k in ((tname, None), *((pre + k, k) for k in pnames))}
        #: Names :meth:`RT_jacobian` differentiates by: thicknesses and material parameters.
        self.parameter_names = frozenset(self._where)

    def with_substrate(self, *, dn: float = 0.0, thickness_nm: float | None = None
                       ) -> StackModel:
        """A copy bound to the same grid with the substrate's index shifted by ``dn``
        (real part) or its thickness replaced: for uncertainty budgets."""
        out = copy.copy(self)
        d = self._sub_d if thickness_nm is None else float(thickness_nm)
        out._N_sub = self._N_sub + dn
        out._sub_d = d
        out._outer = outer_media(self._wl, self._N_amb, out._N_sub, d, self._N_exit,
                                 angle_rad=self.angle_rad, polarization=self.polarization)
        out._cache = list(self._cache)
        out._last = None
        out._tiled = {}
        return out

    def layer_values(self, values: Mapping[str, float] | None = None):
        """Per-layer (thickness, local parameter dict), stored values overridden."""
        values = values or {}
        out = []
        for layer, pre, tname, pnames in self._names:
            d = values.get(tname, layer.thickness.value)
            local = {k: values.get(pre + k, layer.material.params[k].value) for k in pnames}
            out.append((d, local))
        return out

    def RT(self, values: Mapping[str, float] | None = None, *, only: str | None = None):
        """(R, T) on the bound grid for the given global parameter values; with
        ``only="T"`` R is not computed (None): what a fit to transmittance needs."""
        Ns, ds = self._indices(values)
        R, T = self._node_RT(Ns, ds, want_R=only != "T")
        # A fit asks for the Jacobian where it has just evaluated: keep the node values
        # (read-only, so no caller can change them in place).
        for a in (R, T):
            if a is not None:
                a.flags.writeable = False
        self._last = (Ns, ds, self.stack.thickness_spread, R, T)
        return self._on_grid(R), self._on_grid(T)

    def RT_jacobian(self, values: Mapping[str, float] | None, wrt, *, only: str | None = None):
        """(R, T, dR, dT): R and T with their derivatives by the stack parameters ``wrt``.

        ``wrt`` lists global names of layer thicknesses and material parameters
        (``film_thickness``, ``film_o1_E0``); dR and dT have shape
        (len(wrt), W). The derivatives follow the chain rule through each
        film's index: T depends on a material parameter θ only through N(λ),
        so dT/dθ = ∂T/∂n · Re dN/dθ + ∂T/∂κ · Im dN/dθ, wavelength by
        wavelength. ∂T/∂n, ∂T/∂κ and ∂T/∂d come from copies of the stack with one
        film's whole N(λ) or thickness shifted (every wavelength is independent of
        the others), all evaluated in one model call on the grid taken that many
        times, and dN/dθ from the dispersion model alone: a film with P material
        parameters costs one call of three shifts and P dispersion slopes instead
        of the P + 1 model calls of forward differences by parameter.
        Steps are forward differences of relative size √ε (as scipy's
        ``approx_derivative``), taken inwards at a bound; the slit average
        (``bandwidth_nm``) is applied after the chain rule, node by node.
        ``only="T"`` (or ``"R"``) skips the other quantity's derivatives, which
        are then None (and with ``only="T"`` R itself may be None): a fit to T
        alone never reads R or dR.
        """
        values = dict(values or {})
        Ns, ds = self._indices(values)
        want_R, want_T = only != "T", only != "R"
        last = self._last
        if last is not None and last[1] == ds and last[2] == self.stack.thickness_spread \
                and all(a is b for a, b in zip(last[0], Ns)) \
                and (last[3] is not None or not want_R):
            R0, T0 = last[3], last[4]           # N arrays are cached: same object, same N
        else:
            R0, T0 = self._node_RT(Ns, ds, want_R=want_R)
        dR = np.zeros((len(wrt), R0.size)) if want_R else None
        dT = np.zeros((len(wrt), T0.size)) if want_T else None
        by_layer: dict[int, list] = {}
        for j, name in enumerate(wrt):
            if name not in self._where:
                raise KeyError(f"{name!r} is not a parameter of this stack")
            i, k = self._where[name]
            by_layer.setdefault(i, []).append((j, k))
        # Every shifted stack first (N + h, N + ih per film with material parameters,
        # d + step per thickness), then all of them in one model call.
        shifted, plan = [], []
        for i, items in by_layer.items():
            N = Ns[i]
            if any(k is not None for _, k in items):
                h = EPS_STEP * np.maximum(np.abs(N), 1.0)
                shifted += [(Ns[:i] + [N + h] + Ns[i + 1:], ds),
                            (Ns[:i] + [N + 1j * h] + Ns[i + 1:], ds)]
                plan.append(("N", i, h))
            if any(k is None for _, k in items):
                step = forward_step(ds[i], self._names[i][0].thickness.max)
                shifted.append((Ns, ds[:i] + [ds[i] + step] + ds[i + 1:]))
                plan.append(("d", i, step))
        Rs, Ts = self._shifted_RT(shifted, Ns, ds, want_R) if shifted else ((), ())
        at = 0
        for what, i, h in plan:
            items = by_layer[i]
            if what == "d":
                j = next(j for j, k in items if k is None)
                if want_R:
                    dR[j] = (Rs[at] - R0) / h
                if want_T:
                    dT[j] = (Ts[at] - T0) / h
                at += 1
                continue
            layer, pre, _, pnames = self._names[i]
            mat = [(j, k) for j, k in items if k is not None]
            local = {k: values.get(pre + k, layer.material.params[k].value) for k in pnames}
            dN = layer.material.dN(self._wl, local, [k for _, k in mat], Ns[i])
            for out, M0, M in ((dR, R0, Rs), (dT, T0, Ts)):
                if out is not None:
                    Mn, Mk = M[at], M[at + 1]
                    gn, gk = (Mn - M0) / h, (Mk - M0) / h     # ∂/∂n, ∂/∂κ
                    for (j, _), d in zip(mat, dN):
                        out[j] = gn * d.real + gk * d.imag
            at += 2
        return self._on_grid(R0), self._on_grid(T0), self._on_grid(dR), self._on_grid(dT)

    def _indices(self, values):
        """(Ns, ds): each film's N on the node grid and its thickness, cached per layer."""
        Ns, ds = [], []
        for i, (d, local) in enumerate(self.layer_values(values)):
            if not d >= 0:  # also catches NaN
                raise ParameterError(f"{self._names[i][2]}", d,
                                     "thickness must be a non-negative number")
            key = tuple(local.values())
            hit = self._cache[i]
            if hit is not None and hit[0] == key:
                N = hit[1]
            else:
                for k, x in local.items():
                    if not math.isfinite(x):
                        raise ParameterError(self._names[i][1] + k, x, "must be finite")
                material = self._names[i][0].material
                with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                    N = material.N_unchecked(self._wl, local)
                if not np.all(np.isfinite(N)):  # a pole on the grid: refuse, never pass NaN on
                    raise ParameterError(
                        self._names[i][0].name, local,
                        f"{material.describe()} gives a non-finite refractive index on this "
                        f"wavelength grid (a resonance without damping on a measured "
                        f"wavelength); add broadening or move the resonance")
                self._cache[i] = (key, N)
            Ns.append(N)
            ds.append(d)
        return Ns, ds

    def _node_RT(self, Ns, ds, want_R: bool = True):
        """R, T on the node grid (before the slit average), thickness spread included."""
        # The interface terms do not depend on thickness: films_RT computes them once
        # for all nodes of the spread.
        scales, weights = self._spread_rule(Ns, ds) or (None, None)
        return films_RT(self._outer, Ns, ds, thickness_scales=scales, weights=weights,
                        want_R=want_R)

    def _spread_rule(self, Ns, ds):
        """(thickness scales, weights) of the thickness-spread average, None without one.

        σ: spread (rad) of the round-trip phase 4πnd/λ at the shortest wavelength.
        Node counts calibrated against an 801-node average for T <= 1e-5 even for
        n = 3.5 on glass (strong reflections, many harmonics): 7-point Gauss-Hermite
        up to 0.5 rad, beyond it a uniform rule of 8 + 13σ nodes (checked against a
        brute force in tests/test_stack.py). A Gaussian this wide reaches below zero
        thickness: that tail (< 5e-4 of the weight for spread <= 0.3) is lumped at
        d = 0.
        """
        spread = self.stack.thickness_spread
        if not spread > 0:
            return None
        sigma = 4 * np.pi * spread * sum(float(np.max(np.abs(N.real) / self._wl)) * d
                                         for N, d in zip(Ns, ds))
        xs, ws = ((_GH_X, _GH_W) if sigma <= 0.5
                  else _spread_nodes(min(401, int(8 + 13 * sigma) | 1)))
        return np.maximum(1 + spread * xs, 0.0), ws

    def _shifted_RT(self, shifted, Ns, ds, want_R: bool = True):
        """R, T on the node grid of each (Ns, ds) in ``shifted``, shape (V, nodes): one
        model call on the node grid repeated V times (its outer media bound once per
        V), element by element what V calls of :meth:`_node_RT` compute. The
        thickness-spread quadrature is the one of the unshifted (Ns, ds)."""
        V, W = len(shifted), self._wl.size
        outer = self._tiled.get(V)
        if outer is None:
            outer = self._tiled[V] = outer_media(
                np.tile(self._wl, V), np.tile(self._N_amb, V), np.tile(self._N_sub, V),
                self._sub_d, np.tile(self._N_exit, V), angle_rad=self.angle_rad,
                polarization=self.polarization)
        N_all = [np.concatenate([v[0][j] for v in shifted]) for j in range(len(Ns))]
        d_all = [np.repeat([v[1][j] for v in shifted], W) for j in range(len(ds))]
        scales, weights = self._spread_rule(Ns, ds) or (None, None)
        R, T = films_RT(outer, N_all, d_all, thickness_scales=scales, weights=weights,
                        want_R=want_R)
        return None if R is None else R.reshape(V, W), T.reshape(V, W)

    def _on_grid(self, a):
        """The slit average of node values (last axis) onto the bound grid (None stays None)."""
        if a is None or self._wl is self.wavelength_nm:
            return a
        m = self.wavelength_nm.size
        return _SLIT_W @ a.reshape(a.shape[:-1] + (_SLIT_W.size, m))

