"""Plain names for parameters, as the parameter table and the warnings show them.

Global parameter names (``film_o1_E0``) are precise but not for reading; every
message a technician sees uses :func:`param_label` (``film, term 1: E₀``).
"""

from __future__ import annotations

__all__ = ["pretty_name", "param_label", "NUISANCE_LABELS"]

_SYMBOL = {"k": "κ", "k0": "κ₀", "eps_inf": "ε∞", "gamma": "Γ", "Eu": "E_U", "E0": "E₀",
           "Eg": "E_g", "Ep": "E_p", "E_edge": "E_edge", "thickness": "thickness d"}

#: Names of the measurement's nuisance parameters.
NUISANCE_LABELS = {"scale": "100 % line scale", "tilt": "100 % line tilt",
                   "offset": "baseline offset (stray light)", "angle_deg": "angle of incidence",
                   "thickness_spread": "thickness non-uniformity"}


def pretty_name(local: str) -> str:
    """A readable label for a layer's local parameter name (``o1_E0`` -> ``term 1: E₀``)."""
    if local.startswith("o") and "_" in local and local[1:local.index("_")].isdigit():
        i, rest = local[1:].split("_", 1)
        return f"term {i}: {_SYMBOL.get(rest, rest)}"
    for pre, what in (("host_", "film "), ("incl_", "void ")):
        if local.startswith(pre):
            rest = local[len(pre):]
            return what + _SYMBOL.get(rest, rest)
    return _SYMBOL.get(local, local)


def param_label(name: str, layer_names=()) -> str:
    """``film_o1_E0`` -> ``film, term 1: E₀``; ``scale`` -> ``100 % line scale``.

    ``layer_names`` are the stack's layer names (longest match wins); a joint
    fit's part prefix (``p2_``) is kept in words.
    """
    part = ""
    if name.startswith("p") and "_" in name and name[1:name.index("_")].isdigit():
        idx, name = name[1:].split("_", 1)
        part = f"spectrum {idx}: "
    if name in NUISANCE_LABELS:
        return part + NUISANCE_LABELS[name]
    for layer in sorted(layer_names, key=len, reverse=True):
        if name.startswith(layer + "_"):
            return f"{part}{layer}, {pretty_name(name[len(layer) + 1:])}"
    return part + name
