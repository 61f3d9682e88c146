"""Plain text for people: parameter names and values with their uncertainty.

Global parameter names (``film_o1_E0``) are precise but not for reading; every
message a technician sees uses :func:`param_label` (``film, term 1: E₀``). Every
"value ± σ" in a report, plot, message or window is written by :func:`format_pm`.
"""

from __future__ import annotations

import math

from .jsonsafe import finite_or_none

__all__ = ["pretty_name", "param_label", "format_pm", "two_digits", "NUISANCE_LABELS"]

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


def format_pm(value, sigma=None, unit: str = "", *, fmt: str = ".1f",
              sigma_fmt: str | None = None, sep: str = " ± ", missing: str = "–",
              no_sigma: str = "") -> str:
    """``"231.0 ± 0.06 nm"``: a value with its standard uncertainty (1σ) and unit.

    Parameters
    ----------
    value, sigma : number or None
        A value that is missing or not finite gives ``missing``; a σ that is missing or
        not finite is left out (with ``no_sigma`` after the unit, if given), never
        printed as "nan".
    unit : str
        Written after the number(s), separated by a space.
    fmt, sigma_fmt : str
        Format specs of the value and of σ (``sigma_fmt`` defaults to ``fmt``): ``".1f"``
        for a thickness in nm; ``".2g"`` gives σ to two significant digits (GUM,
        JCGM 100:2008, 7.2.6: "at most two significant digits"). ``sigma_fmt`` may
        also be a function of σ returning text, e.g. :func:`two_digits`.
    sep : str
        ``" ± "``; ``" +/- "`` for ASCII text reports.
    """
    v = finite_or_none(value)
    if v is None:
        return missing
    s = finite_or_none(sigma)
    if s is None:
        text = format(v, fmt)
    else:
        s_text = sigma_fmt(s) if callable(sigma_fmt) else format(s, sigma_fmt or fmt)
        text = f"{format(v, fmt)}{sep}{s_text}"
    text = f"{text} {unit}".rstrip()
    return f"{text} {no_sigma}" if s is None and no_sigma else text


def two_digits(x) -> str:
    """An uncertainty to two significant digits, trailing zero kept: ``1.0``, ``0.50``, ``120``.

    GUM (JCGM 100:2008, 7.2.6): an uncertainty is stated with at most two
    significant digits; ``format(1.0, ".2g")`` would drop the second one ("1").
    Not finite: "–".
    """
    v = finite_or_none(x)
    if v is None:
        return "–"
    if v == 0:
        return "0"
    for _ in range(2):           # rounding may add a digit (0.0996 -> 0.10)
        decimals = 1 - math.floor(math.log10(abs(v)))
        v = round(v, decimals)
    return f"{v:.{max(decimals, 0)}f}"
