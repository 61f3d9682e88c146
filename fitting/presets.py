"""What a new user starts from: the film models on offer, the default stack and fit options.

The desktop app, the command line and new recipes all take their defaults from
here, so a fresh setup fits the same way wherever it was made.

* :data:`MODEL_CHOICES` - the film models a user can pick, in menu order
  (key -> label), with :func:`make_model` building a fresh model for a key
  and :func:`model_choice_of` naming the key of an existing model.
* :data:`SUBSTRATE_NAMES` - display names of the substrate library.
* :func:`default_stack` - one Cauchy film on 1 mm fused silica.
* :func:`default_fit_options` - the fit options of a fresh setup (those of
  :class:`fitting.fit.FitOptions`).
"""

from __future__ import annotations

from .dispersion import (Bruggeman, Cauchy, Constant, Drude, Lorentz, Oscillators,
                         Sellmeier, Tabulated, TaucLorentz)
from .errors import ParameterError
from .stack import Layer, Stack
from .substrates import library_substrate

__all__ = ["MODEL_CHOICES", "SUBSTRATE_NAMES", "make_model", "model_choice_of",
           "default_stack", "default_fit_options", "tie_roughness"]

#: Dispersion models a user can pick for a film, in menu order: key -> label.
MODEL_CHOICES = {
    "cauchy": "Cauchy (transparent film)",
    "cauchy_urbach": "Cauchy + Urbach tail (weak absorption edge)",
    "sellmeier": "Sellmeier (1 term)",
    "lorentz": "Lorentz oscillator",
    "drude": "Drude (free carriers)",
    "drude_lorentz": "Drude + Lorentz (transparent conductor)",
    "tauc_lorentz": "Tauc-Lorentz (amorphous semiconductor)",
    "constant": "Constant n, κ",
    "tabulated": "Tabulated n, κ from file…",
    "roughness": "Surface roughness (Bruggeman, film + voids)",
}

#: Display names of the substrate library keys.
SUBSTRATE_NAMES = {
    "fused_silica": "Fused silica",
    "n_bk7": "N-BK7 borosilicate glass",
    "sapphire_o": "Sapphire (ordinary ray)",
    "caf2": "Calcium fluoride (CaF₂)",
    "generic_glass": "Glass, constant n",
}


def make_model(choice: str, *, host=None, table_path=None):
    """A fresh dispersion model for a :data:`MODEL_CHOICES` key.

    ``host`` is the material a roughness layer mixes with voids; ``table_path``
    the n, κ file of a tabulated material.
    """
    if choice == "cauchy":
        return Cauchy()
    if choice == "cauchy_urbach":
        return Cauchy(urbach=True)
    if choice == "sellmeier":
        return Sellmeier(1)
    if choice == "lorentz":
        return Oscillators(1.0, [Lorentz(1.5, 6.0, 0.5)])
    if choice == "drude":
        return Oscillators(3.5, [Drude(1.5, 0.1)])
    if choice == "drude_lorentz":
        return Oscillators(3.5, [Drude(1.5, 0.1), Lorentz(1.0, 6.0, 0.5)])
    if choice == "tauc_lorentz":
        return Oscillators(2.0, [TaucLorentz()])
    if choice == "constant":
        return Constant(1.8, 0.0)
    if choice == "tabulated":
        if table_path is None:
            raise ParameterError("table file", None, "choose an n, κ table file")
        return Tabulated.from_file(table_path)
    if choice == "roughness":
        return Bruggeman(host.copy() if host is not None else Cauchy(), Constant(1.0, 0.0), 0.5)
    raise ParameterError("model", choice, f"choose one of {', '.join(MODEL_CHOICES)}")


def model_choice_of(model) -> str:
    """The :data:`MODEL_CHOICES` key that best describes an existing model."""
    if isinstance(model, Cauchy):
        return "cauchy_urbach" if model.urbach else "cauchy"
    if isinstance(model, Sellmeier):
        return "sellmeier"
    if isinstance(model, Oscillators):
        kinds = [t.kind for t in model.terms]
        if kinds == ["lorentz"]:
            return "lorentz"
        if kinds == ["drude"]:
            return "drude"
        if kinds == ["tauc_lorentz"]:
            return "tauc_lorentz"
        return "drude_lorentz"
    if isinstance(model, Tabulated):
        return "tabulated"
    if isinstance(model, Bruggeman):
        return "roughness"
    return "constant"


def tie_roughness(layer: Layer, host_layer: Layer) -> None:
    """Tie a Bruggeman roughness layer's film part to the film below, and fix the voids.

    The roughness layer mixes the *same* material with voids (Aspnes 1982), so its
    ``host_*`` parameters follow the film's (lmfit tie expressions, which recipes
    save and validate) instead of adding free copies the data cannot separate.
    """
    m = layer.material
    if not isinstance(m, Bruggeman):
        return
    for name, p in list(m.params.items()):
        if name.startswith("host_"):
            local = name[len("host_"):]
            if local in host_layer.material.params:
                m.params[name] = p.copy(expr=f"{host_layer.name}_{local}", vary=False,
                                        value=host_layer.material.params[local].value,
                                        min=min(p.min, host_layer.material.params[local].value),
                                        max=max(p.max, host_layer.material.params[local].value))
        elif name.startswith("incl_"):
            m.params[name] = p.copy(vary=False)


def default_stack(model: str = "cauchy", substrate: str = "fused_silica") -> Stack:
    """One film of a :data:`MODEL_CHOICES` model on 1 mm of a library substrate."""
    return Stack([Layer("film", make_model(model))], library_substrate(substrate, 1.0))


def default_fit_options() -> dict:
    """The fit options of a fresh setup, as :meth:`fitting.fit.FitOptions.to_dict` gives them."""
    from .fit import FitOptions
    return FitOptions().to_dict()
