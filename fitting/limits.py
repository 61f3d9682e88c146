"""Specification limits on result quantities, and the one rule that judges a value.

A limit is either a target with a tolerance (pass if ``|x - target| <= tol``) or a
range ``min``/``max`` (inclusive; either end may be open). The batch summary's
``spec_*`` columns, the PDF report's spec column and the limit lines of the thickness
plots all go through :class:`Limit`, so a value on the edge is judged the same in every
file (inclusive limits: common practice for specification limits).

Classes and functions
---------------------
Limit                    one limit: ``passes``, ``check``, ``bounds``, ``describe``
Limit.from_dict(d)       strict, for recipes (a bad limit is a ``RecipeError``)
Limit.coerce(obj)        lenient, for limits handed to plots and reports
overall_state(states)    the verdict of several limits: "fail", "n/a" or "pass"
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from .errors import RecipeError

__all__ = ["Limit", "overall_state"]


def _float_or_nan(x) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


@dataclass(frozen=True)
class Limit:
    """A specification limit on one result quantity.

    Either ``target`` with ``tol`` (pass if ``|x - target| <= tol``) or
    ``min`` and/or ``max`` (inclusive). A limit with neither is open: every
    finite value passes.
    """

    target: float | None = None
    tol: float | None = None
    min: float | None = None
    max: float | None = None

    @property
    def bounds(self) -> tuple[float, float]:
        """(lowest, highest) passing value; ±inf where open."""
        if self.target is not None:
            return self.target - self.tol, self.target + self.tol
        return (-math.inf if self.min is None else self.min,
                math.inf if self.max is None else self.max)

    def passes(self, value) -> bool | None:
        """True inside the limit, False outside, None if ``value`` is missing or not a
        finite number (a quantity the fit did not give cannot pass)."""
        v = _float_or_nan(value)
        if not math.isfinite(v):
            return None
        lo, hi = self.bounds
        return lo <= v <= hi

    def check(self, value) -> str:
        """``"pass"``, ``"fail"`` or ``"n/a"`` (value missing or not a number)."""
        ok = self.passes(value)
        return "n/a" if ok is None else "pass" if ok else "fail"

    def describe(self) -> str:
        if self.target is not None:
            return f"{self.target:g} ± {self.tol:g}"
        lo, hi = self.min, self.max
        if lo is not None and hi is not None:
            return f"{lo:g} to {hi:g}"
        if lo is None and hi is None:
            return "any value"
        return f">= {lo:g}" if lo is not None else f"<= {hi:g}"

    def to_dict(self) -> dict:
        if self.target is not None:
            return {"target": self.target, "tol": self.tol}
        return {k: v for k, v in (("min", self.min), ("max", self.max)) if v is not None}

    @classmethod
    def from_dict(cls, d, *, where: str = "limit") -> Limit:
        """A limit from a recipe's ``{"target", "tol"}`` or ``{"min", "max"}``; raises
        :class:`~fitting.errors.RecipeError` naming ``where`` for anything else."""
        if not isinstance(d, Mapping):
            raise RecipeError(where, 'must be an object like {"target": 500, "tol": 25} '
                                     'or {"min": 480, "max": 520}')
        extra = set(d) - {"target", "tol", "min", "max"}
        if extra:
            raise RecipeError(f"{where}.{sorted(extra)[0]}",
                              "unknown field; use target/tol or min/max")
        vals = {}
        for k, v in d.items():
            if v is None:
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise RecipeError(f"{where}.{k}", f"must be a finite number, got {v!r}")
            vals[k] = float(v)
        if "target" in vals or "tol" in vals:
            if "min" in vals or "max" in vals:
                raise RecipeError(where, "give either target/tol or min/max, not both")
            if "target" not in vals or "tol" not in vals:
                raise RecipeError(where, "target and tol must be given together")
            if vals["tol"] <= 0:
                raise RecipeError(f"{where}.tol", f"must be positive, got {vals['tol']:g}")
            return cls(target=vals["target"], tol=vals["tol"])
        if not vals:
            raise RecipeError(where, "needs target/tol or at least one of min/max")
        if "min" in vals and "max" in vals and vals["min"] >= vals["max"]:
            raise RecipeError(where, f"min ({vals['min']:g}) must be smaller than "
                                     f"max ({vals['max']:g})")
        return cls(min=vals.get("min"), max=vals.get("max"))

    @classmethod
    def coerce(cls, obj) -> Limit:
        """A :class:`Limit` as it is, or one read leniently from a mapping.

        For limits handed to plots and reports, which draw what they can instead of
        refusing: a negative ``tol`` counts as its size, an end that is missing or not
        a finite number is open (a target without a usable tolerance is no limit).
        """
        if isinstance(obj, Limit):
            return obj
        if not isinstance(obj, Mapping):
            return cls()
        if obj.get("target") is not None and obj.get("tol") is not None:
            t, tol = _float_or_nan(obj["target"]), abs(_float_or_nan(obj["tol"]))
            return cls(target=t, tol=tol) if math.isfinite(t + tol) else cls()
        lo, hi = _float_or_nan(obj.get("min")), _float_or_nan(obj.get("max"))
        return cls(min=lo if math.isfinite(lo) else None, max=hi if math.isfinite(hi) else None)


def overall_state(states: Iterable[str]) -> str:
    """One verdict for several limits: ``"fail"`` if any fails, else ``"n/a"`` if any
    could not be judged, else ``"pass"`` (also for no limits at all)."""
    states = list(states)
    return "fail" if "fail" in states else "n/a" if "n/a" in states else "pass"
