"""Named model parameters: value, bounds, unit, one-line meaning and fit flag.

A :class:`Param` is what a user edits in the parameter table and what a recipe
saves. The fit engine turns a set of them into :class:`lmfit.Parameters`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

from .errors import ParameterError, RecipeError

__all__ = ["Param", "check_finite", "refuse_unknown_fields", "PARAM_FIELDS"]

#: Fields of a saved parameter entry.
PARAM_FIELDS = ("value", "min", "max", "vary", "expr")


def refuse_unknown_fields(d, known, where: str) -> None:
    """Raise :class:`RecipeError` for a key of ``d`` not in ``known``, suggesting the closest.

    A typo in a saved file must not be silently ignored: it would leave a default value.
    """
    import difflib
    for key in d:
        if key not in known:
            close = difflib.get_close_matches(str(key), known, n=1)
            hint = f"; did you mean {close[0]!r}?" if close else \
                f"; known fields: {', '.join(known)}"
            raise RecipeError(f"{where}.{key}", "unknown field" + hint)


def check_finite(name: str, value) -> float:
    """Return ``value`` as float, or raise :class:`ParameterError` if it is not a finite number."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(name, value, "is not a number") from None
    if not math.isfinite(v):
        raise ParameterError(name, value, "must be a finite number (not NaN or infinite)")
    return v


@dataclass
class Param:
    """One adjustable number of a model.

    Parameters
    ----------
    name : str
        Local name within its model (``"A"``, ``"o1_E0"``, ``"thickness"``).
    value : float
        Current value.
    min, max : float
        Bounds used by fits; ``value`` must lie inside them.
    unit : str
        Unit shown to the user (``"nm"``, ``"eV"``, ``"µm²"``, ``""``).
    doc : str
        One-line meaning shown as a tooltip.
    vary : bool
        Whether a fit adjusts it.
    expr : str or None
        Optional lmfit constraint expression tying it to other parameters.
    """

    name: str
    value: float
    min: float = -math.inf
    max: float = math.inf
    unit: str = ""
    doc: str = ""
    vary: bool = True
    expr: str | None = None

    def __post_init__(self):
        self.value = check_finite(self.name, self.value)
        self.min, self.max = float(self.min), float(self.max)
        if math.isnan(self.min) or math.isnan(self.max):
            raise ParameterError(self.name, (self.min, self.max), "bounds must not be NaN")
        if self.min >= self.max:
            raise ParameterError(self.name, (self.min, self.max),
                                 "lower bound must be smaller than upper bound")
        if not self.min <= self.value <= self.max:
            raise ParameterError(self.name, self.value,
                                 f"must lie within its bounds [{self.min:g}, {self.max:g}]")

    def copy(self, **changes) -> Param:
        return replace(self, **changes)

    def to_dict(self) -> dict:
        # JSON has no infinity: an open bound is written as null.
        bound = lambda b: b if math.isfinite(b) else None  # noqa: E731
        d = {"value": self.value, "min": bound(self.min), "max": bound(self.max),
             "vary": self.vary}
        if self.expr:
            d["expr"] = self.expr
        return d
