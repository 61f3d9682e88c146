"""Plain, strict JSON from results: the one cleaner every writer of a JSON file uses.

JSON (RFC 8259, section 6) has no NaN or infinity, and :mod:`json` writes them as the
non-standard tokens ``NaN`` and ``Infinity`` that other tools refuse to read. A fit has
them where a quantity was not estimated (a σ of a fixed parameter, a χ² of a fit that
could not start), so every export, marker, summary, project and benchmark file passes
its data through :func:`json_safe` first and is then written with ``allow_nan=False``:
a value the cleaner missed fails loudly instead of making an unreadable file.

Functions
---------
json_safe(obj)         nested data -> plain JSON data (NaN/inf -> None, numpy -> Python)
                       (``runs=``: long runs of numbers handed to a writer instead)
json_text(doc)         plain JSON data -> strict JSON text, one line per key (two levels)
finite_or_none(x)      one number -> a finite float, or None
is_plain_json(v)       True for values that are JSON types already (no cleaning needed)
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping

import numpy as np

__all__ = ["json_safe", "json_text", "finite_or_none", "is_plain_json"]


def finite_or_none(x) -> float | None:
    """``x`` as a finite float; None if it is None, not a number, NaN or infinite."""
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


#: Item types of a list that is plain JSON as it stands (exact types: not subclasses).
_PLAIN = frozenset({str, int, bool, type(None)})
_FLOAT = {float}


def json_safe(obj, *, runs=None):
    """Nested data as plain JSON data, the same shape.

    NaN and infinity become None; numpy scalars and arrays become Python numbers and
    lists; tuples become lists; mapping keys become text. Anything else that is not a
    JSON type is written as its number if it has one, else as its text (``Path``).

    Long runs of numbers (curves, n and κ, about a thousand points per spectrum) are
    cleaned in one vectorised step: the exports of a batch call this for every spectrum.
    With ``runs`` (a function of a 1-D float array), each such run is replaced by what
    ``runs`` returns for it, unchanged: a writer that formats the numbers itself.
    """
    return _clean(obj, runs)


def _clean(obj, runs):
    # The common types first, by exact type: Mapping is an abstract class and slow to test.
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t is str or t is int or t is bool or obj is None:
        return obj
    if t is dict:
        return {str(k): _clean(v, runs) for k, v in obj.items()}
    if t is list or t is tuple:
        # The item types tested at C speed (a generator costs ~10x): texts, ints, bools
        # and None are plain JSON as they are, floats may be a run.
        types = set(map(type, obj))
        if types <= _PLAIN:
            return list(obj)
        if len(obj) > 8 and types == _FLOAT:
            clean = _float_run(obj, runs)
            if clean is not None:
                return clean
        return [_clean(v, runs) for v in obj]
    if isinstance(obj, (list, tuple, np.ndarray)):
        if len(obj) > 8 and (isinstance(obj, np.ndarray) or set(map(type, obj)) == _FLOAT):
            clean = _float_run(obj, runs)
            if clean is not None:
                return clean
        if isinstance(obj, np.ndarray):
            return _clean(obj.tolist(), runs)
        return [_clean(v, runs) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, str):        # a str subclass (an enum of texts): json writes its text
        return obj
    if isinstance(obj, Mapping):
        return {str(k): _clean(v, runs) for k, v in obj.items()}
    try:
        return _clean(float(obj), runs)
    except (TypeError, ValueError):
        return str(obj)


#: One encoder for every value (json.dumps would build one per call).
_COMPACT = json.JSONEncoder(ensure_ascii=False, allow_nan=False, separators=(", ", ": "))


def json_text(doc: Mapping) -> str:
    """Strict JSON of plain data ``doc`` (see :func:`json_safe`) laid out for reading: one
    line per top-level key and per key one level down, each value compact.

    Encoded by the C encoder: an indented :func:`json.dumps` takes the pure-Python
    path, several times slower on a result. NaN or infinity raise ValueError.
    """
    compact = _COMPACT.encode
    parts = []
    for k, v in doc.items():
        if isinstance(v, dict) and v:
            inner = ",\n".join(f"    {compact(str(k2))}: {compact(v2)}" for k2, v2 in v.items())
            parts.append(f"  {compact(str(k))}: {{\n{inner}\n  }}")
        else:
            parts.append(f"  {compact(str(k))}: {compact(v)}")
    return "{\n" + ",\n".join(parts) + "\n}\n"


def _float_run(obj, runs=None):
    """A flat run of real numbers cleaned at once, or None if ``obj`` is not one.

    ``obj`` is an array or a list of Python floats only: a list that mixes in ints,
    bools or texts goes element by element, so each keeps its type ("2" stays text).
    """
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind in "iub":
            return obj.tolist()         # always finite: Python ints and bools as they are
        if obj.dtype.kind != "f":
            return None
    try:
        a = np.asarray(obj, dtype=float)
    except (TypeError, ValueError):
        return None
    if a.ndim != 1:
        return None
    if runs is not None:
        return runs(a)
    ok = np.isfinite(a)
    if ok.all():
        return a.tolist()
    return [x if f else None for x, f in zip(a.tolist(), ok.tolist(), strict=True)]


def is_plain_json(v) -> bool:
    """True if ``v`` is of a JSON type already (text, number, bool, list, dict, None).

    For optional extras a result carries: plain values go into its JSON, typed objects
    (which have their own fields in the file) are left out.
    """
    return isinstance(v, (str, int, float, bool, list, dict, type(None)))
