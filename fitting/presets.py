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

from .dispersion import MODEL_KINDS, Bruggeman
from .errors import ParameterError
from .stack import Layer, Stack
from .substrates import library_substrate

__all__ = ["MODEL_CHOICES", "SUBSTRATE_NAMES", "make_model", "model_choice_of",
           "default_stack", "default_fit_options", "tie_roughness"]

def _menu() -> dict:
    """key -> (label, factory) of every preset of every registered model, in menu order."""
    return {key: (label, factory) for cls in MODEL_KINDS.values()
            for key, label, factory in cls.presets}


_PRESETS = _menu()
#: Dispersion models a user can pick for a film, in menu order: key -> label. Each
#: model class declares its own entries (``Dispersion.presets``).
MODEL_CHOICES = {key: label for key, (label, _) in _PRESETS.items()}

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
    if choice not in _PRESETS:
        raise ParameterError("model", choice, f"choose one of {', '.join(MODEL_CHOICES)}")
    return _PRESETS[choice][1](host=host, table_path=table_path)


def model_choice_of(model) -> str:
    """The :data:`MODEL_CHOICES` key that best describes an existing model."""
    return model.preset_key()


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
