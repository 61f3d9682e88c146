"""Recipes: one saved fitting setup, applied unchanged to one spectrum or thousands.

A recipe holds everything needed to turn a spectrum file into a result: the
layer stack with its start values, bounds and ties, how to read the file, which
part of the spectrum to fit, how to fit, optional specification limits, and
which exports to write. It is plain JSON: readable, diffable, and free of code
(models are rebuilt through the registry in :mod:`fitting.dispersion`; nothing
is pickled or evaluated).

File format ``pellucid-recipe``, version 2
------------------------------------------
::

    {
      "format": "pellucid-recipe",          # required, exactly this string
      "version": 2,                         # required; 1 if no layer is known
                                            #   (see "Versions" below)
      "name": "ITO on glass, line 3",       # free text
      "notes": "",                          # free text
      "stack": { ... },                     # Stack.to_dict(): ambient, layers,
                                            #   substrate, exit_medium,
                                            #   thickness_spread, bandwidth_nm
      "reader": { ... },                    # ReaderOptions.to_dict() ({} = defaults)
      "fit": {
        "range_nm": [400.0, 1100.0],        # fit window; null = open end
        "masks_nm": [[655.0, 657.0]],       # windows left out (lamp switch-over ...)
        "options": { ... },                 # FitOptions.to_dict(): method, nuisance flags
        "suggest_model": true               # optional: try the plausible film models and
                                            #   keep the one the BIC prefers (see below)
      },
      "limits": {                           # optional specification limits
        "film_thickness": {"target": 500, "tol": 25},   # nm, pass if |x - target| <= tol
        "film_n@633": {"min": 1.95, "max": 2.05},       # either bound may be left out
        "band_gap": {"min": 3.2},                       # eV
        "redchi": {"max": 5}
      },
      "reference": {                        # optional: raw signals -> T (or R)
        "baseline": "refs/100pct.csv",      # the 100 % line, measured like the samples
        "dark": "refs/dark.csv"             # optional; null or left out = no dark signal
      },
      "outputs": {
        "exports": ["nk", "curves", "json", "report", "plots"],
                                            # per-spectrum files: n/κ tables, measured
                                            #   vs fitted curves, full JSON result, text
                                            #   report, figures (default: all)
        "plot_formats": ["png"]             # png, svg and/or pdf
      }
    }

A layer in ``stack.layers`` (ambient side first) looks like::

    {"name": "film",                        # letters and digits
     "material": {"kind": "cauchy", "urbach": false,
                  "params": {"A": {"value": 2.0, "min": 1.0, "max": 4.0, "vary": true},
                             "B": {"value": 0.02, "min": -0.05, "max": 0.5, "vary": true}}},
     "thickness": {"value": 500.0, "min": 0.0, "max": 5000.0, "vary": true}}

and the substrate is ``{"library": "fused_silica", "thickness_mm": 1.0}`` or
``{"material": {...}, "thickness_mm": ...}``. Model kinds and their parameters
are those of :data:`fitting.dispersion.MODEL_KINDS`; ``null`` bounds are open.

A *known* layer (measured earlier; held as a whole by every fit, see
:class:`fitting.stack.Layer`) adds ``"known": true``; its thickness value is
required. Its material is usually the n, κ table of an earlier result, either
named by file (read from the recipe's folder when relative, checked and
embedded on load, see :func:`fitting.known.embed_table_files`)::

    {"name": "barrier", "known": true,
     "material": {"kind": "tabulated", "file": "barrier_nk.csv"},
     "thickness": {"value": 98.2}}        # left out: taken from the result JSON
                                          #   beside an exported table

or embedded, which is how Pellucid saves it, so that a recipe saved beside batch
results needs no other file::

    {"name": "barrier", "known": true,
     "material": {"kind": "tabulated", "name": "barrier_nk.csv",
                  "wavelength_nm": [350.0, ...], "n": [1.66, ...], "k": [0.0, ...]},
     "thickness": {"value": 98.2, "min": 0.0, "max": 50000.0, "vary": false},
     "source": {"file": "barrier_nk.csv", "sha256": "3f1c...", "layer": "barrier",
                "fit": {"software": ..., "input_file": ..., "input_sha256": ...},
                "thickness": {"value": 98.2, "from": "s017_result.json", ...}}}

``source`` (optional, any layer) is provenance only: where the values came
from. A known layer's own fit flags and ties are kept but not applied; a tie
in another layer may refer to a known layer's parameters.

Each parameter in the stack is ``{"value", "min", "max", "vary"}`` plus an
optional ``"expr"``: an lmfit constraint tying it to other parameters by their
global names (``film2_thickness = "2 * film1_thickness"``). Ties are checked
on load: only parameter names of the stack, numbers, ``+ - * / **``,
parentheses and the functions ``sqrt exp log log10 sin cos tan abs`` (and the
constant ``pi``) are accepted; anything else refuses the whole file with the
field named.

Limit keys are result quantities:

* ``{layer}_thickness`` (nm),
* ``{layer}_n@{wavelength}`` and ``{layer}_k@{wavelength}`` (wavelength in nm,
  interpolated on the fitted n, κ),
* ``band_gap`` (eV, Tauc gap), ``redchi`` (reduced χ²),
* any other global parameter name of the stack (``film_A``, ``film_o1_E0``).

A limit is either ``{"target": x, "tol": t}`` (t > 0) or ``{"min": a, "max": b}``
with at least one of the two.

Versions. A recipe is saved with the lowest version that holds it: version 2
only when a layer carries ``known`` or ``source`` (added in version 2), else
version 1, so recipes without known layers keep their bytes and hashes. Version
1 files load unchanged; an older Pellucid refuses a version 2 file with "newer
than this Pellucid understands" instead of misreading it.

Version 0 (earlier layout, upgraded automatically by :func:`upgrade`): no
``reader``, ``limits`` or ``outputs`` sections; each layer had a flat
``"thickness_nm": 500`` with optional ``"thickness_range_nm": [lo, hi]`` and
``"fit_thickness": true``; the fit window was a top-level ``"range_nm"`` and
the method a top-level ``"method"``.

Model suggestion (optional ``fit.suggest_model``): ``true`` fits, for every
spectrum, the film models the data make plausible (transparent: Cauchy,
Cauchy + Urbach tail, Sellmeier; absorption edge: Tauc-Lorentz, Cauchy + Urbach
tail; free-carrier fall-off in the infrared: Drude + Lorentz) besides the
stack's own model, and keeps the one with the lowest Bayesian information
criterion (:mod:`fitting.suggest`); a list of model keys
(``["cauchy", "tauc_lorentz"]``, keys of :data:`fitting.presets.MODEL_CHOICES`
except ``tabulated`` and ``roughness``) tries exactly those besides the stack's
own. ``false`` or leaving it out fits the stack's model only. The models are
tried on the first film whose thickness is fitted. **Each spectrum then takes
one full fit per candidate, typically 3-4 times as long**; the result says
which model was chosen and why (``extra.model_suggestion`` in its JSON, the
``model`` column of a batch summary). The option is part of
:func:`recipe_identity`: a resumed batch refits spectra done without it.

Reference correction (optional ``reference`` section): every spectrum is read
as the raw signal S and turned into T = (S - D) / (B - D) with the 100 % line B
and the dark signal D (:func:`fitting.reference.reference_correct`). Relative
paths are resolved from the folder of the recipe file; :meth:`Recipe.resolved`
makes them absolute (the batch runner saves that form beside its results). The
reference files' names and SHA-256 go into the provenance of every result.

Loading validates everything before anything runs and raises
:class:`~fitting.errors.RecipeError` naming the field
(``stack.layers[0].material.kind``) and the problem: wrong types (a thickness of
``"abc"``, ``"vary": "false"`` as text), numbers that are not finite
(``Infinity``, ``NaN``) or absurdly large (beyond ±1e12, or integers of more
than 15 digits), nesting deeper than 32 levels, unknown fields and unknown
format versions. A UTF-8 byte-order mark at the start of the file is accepted.
Saving is atomic.

Two hashes identify a recipe:

* :func:`recipe_hash`, the SHA-256 of the canonical JSON (sorted keys, no
  whitespace, after validation, so key order and number spelling do not matter;
  name and notes count too), is written into every result as provenance: it
  says exactly which recipe produced it.
* :func:`recipe_identity` decides whether an earlier result may be reused by
  ``pellucid batch --resume``. It covers everything that can change a result:
  the models and their kinds, every bound, the fixed/varied flags, the values of
  fixed parameters, ties, which layers are known and all their values (a
  known layer's table numbers included; its ``source`` is left out), the
  substrate and media, non-uniformity and bandwidth, the reader, the fit
  window, masks and options, the limits, the outputs and the *content*
  (SHA-256) of the reference files. It leaves out the name, the
  notes, the location of the reference files and the start values of varied
  parameters: the automatic start finds its own starting point from the data,
  so one interactive fit that moved the start values does not make a resumed
  batch refit everything. (With a purely local method, ``"leastsq"`` or
  ``"least_squares"``, start values can change the answer; run without
  ``--resume`` after changing them.)
"""

from __future__ import annotations

import ast
import hashlib
import importlib
import inspect
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from collections.abc import Mapping

from .atomic import atomic_write_text
from .errors import PellucidError, RecipeError
from .known import embed_table_files
from .limits import Limit
from .stack import Stack

__all__ = ["Recipe", "Limit", "load_recipe", "save_recipe", "recipe_from_dict", "recipe_hash",
           "recipe_identity", "canonical_json", "upgrade", "validate_expression", "FORMAT",
           "VERSION", "EXPORT_CHOICES", "PLOT_FORMATS", "STANDARD_WAVELENGTHS_NM",
           "MAX_NUMBER", "MAX_DEPTH"]

FORMAT = "pellucid-recipe"
#: Newest format version this build reads and writes. A recipe is saved with the lowest
#: version that holds its content (1 unless a layer is known or has a source), so
#: recipes without known layers keep their bytes and hashes.
VERSION = 2

#: Per-spectrum exports a recipe may ask for: n/κ tables, measured-vs-fitted curves,
#: the full JSON result, the text report and the figures (see fitting.export).
EXPORT_CHOICES = ("nk", "curves", "json", "report", "plots")
PLOT_FORMATS = ("png", "svg", "pdf")
#: Wavelengths at which every batch summary row reports n and κ.
STANDARD_WAVELENGTHS_NM = (550, 633, 1000)

#: Functions a tie expression may call; all exist in lmfit's expression interpreter.
TIE_FUNCTIONS = frozenset({"sqrt", "exp", "log", "log10", "sin", "cos", "tan", "abs"})
TIE_CONSTANTS = frozenset({"pi"})
_MAX_EXPR_LEN = 500
#: Largest magnitude of any number in a recipe: far beyond any thickness (nm), bound,
#: time limit or evaluation budget, far below overflow. Open bounds are null.
MAX_NUMBER = 1e12
#: Deepest nesting of objects and lists a recipe may have (a real one needs about 6).
MAX_DEPTH = 32
_MAX_INT_DIGITS = 15

_LAYER = r"[A-Za-z][A-Za-z0-9]*"
_NK_RE = re.compile(rf"^(?P<layer>{_LAYER})_(?P<q>[nk])@(?P<wl>\d+(?:\.\d+)?)$")
_THICK_RE = re.compile(rf"^(?P<layer>{_LAYER})_thickness$")


# ---------------------------------------------------------------------------------
# Tie expressions
def validate_expression(expr, names, *, field_name: str = "expr") -> str:
    """Check an lmfit tie expression without evaluating it.

    Parameters
    ----------
    expr : str
        The expression, e.g. ``"2 * film1_thickness"``.
    names : collection of str
        Parameter names the expression may refer to.
    field_name : str
        Field named in the error.

    Returns
    -------
    str
        ``expr`` unchanged.

    Raises
    ------
    RecipeError
        If it is not a string, does not parse, or holds anything but parameter
        names, numbers, ``+ - * / **``, parentheses and :data:`TIE_FUNCTIONS`.
    """
    if not isinstance(expr, str) or not expr.strip():
        raise RecipeError(field_name, "must be a non-empty text expression")
    if len(expr) > _MAX_EXPR_LEN:
        raise RecipeError(field_name, f"is longer than {_MAX_EXPR_LEN} characters")
    try:
        tree = ast.parse(expr.strip(), mode="eval")
    except SyntaxError:
        raise RecipeError(field_name, f"{expr!r} is not a valid arithmetic expression") from None
    allowed_ops = (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.Pow, ast.UAdd, ast.USub)
    names = names if hasattr(names, "__contains__") else set(names)

    def refuse(what):
        raise RecipeError(field_name, f"{expr!r}: {what} is not allowed; a tie may use only "
                                      f"parameter names, numbers, + - * / ** ( ) and "
                                      f"{', '.join(sorted(TIE_FUNCTIONS))}")

    def check(node):
        if isinstance(node, ast.Expression):
            check(node.body)
        elif isinstance(node, ast.BinOp):
            if not isinstance(node.op, allowed_ops):
                refuse(f"operator {type(node.op).__name__}")
            check(node.left)
            check(node.right)
        elif isinstance(node, ast.UnaryOp):
            if not isinstance(node.op, allowed_ops):
                refuse(f"operator {type(node.op).__name__}")
            check(node.operand)
        elif isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
                refuse(f"the literal {node.value!r}")
        elif isinstance(node, ast.Name):
            if node.id.startswith("_"):
                refuse(f"the name {node.id!r}")
            if node.id not in names and node.id not in TIE_CONSTANTS:
                if node.id in TIE_FUNCTIONS:
                    refuse(f"{node.id!r} without a call")
                raise RecipeError(field_name, f"{expr!r} refers to {node.id!r}, which is not a "
                                              f"parameter of this stack; known: "
                                              f"{', '.join(sorted(names)) or '(none)'}")
        elif isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in TIE_FUNCTIONS:
                refuse("this function call")
            if node.keywords or len(node.args) != 1:
                refuse(f"calling {node.func.id} with other than one argument")
            check(node.args[0])
        else:
            refuse(type(node).__name__.lower())

    check(tree)
    return expr


def _walk_exprs(obj, where):
    """Yield (field path, expression) for every "expr" entry in a nested dict."""
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            w = f"{where}.{k}"
            if k == "expr" and v is not None:
                yield w, v
            else:
                yield from _walk_exprs(v, w)
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _walk_exprs(v, f"{where}[{i}]")


class _HugeInt(str):
    """An integer literal too long to be a sensible number; refused by :func:`check_plain`."""


def _parse_int(text: str):
    # json's own int() would refuse (or slowly convert) thousands of digits with a bare
    # ValueError; keep the text so the error can name the field.
    return _HugeInt(text) if len(text.lstrip("-")) > _MAX_INT_DIGITS else int(text)


def check_plain(obj, where: str = "(recipe)", depth: int = 0) -> None:
    """Refuse what no recipe field can hold, naming the field.

    Numbers must be finite and within ±:data:`MAX_NUMBER` (integers of at most 15
    digits), nesting at most :data:`MAX_DEPTH` levels, keys text, every ``"vary"``
    a JSON boolean (``"false"`` in quotes is text, and text is true in Python).

    Raises
    ------
    RecipeError
    """
    if depth > MAX_DEPTH:
        raise RecipeError(where, f"is nested more than {MAX_DEPTH} levels deep; "
                                 "this is not a recipe layout")
    if isinstance(obj, _HugeInt):
        raise RecipeError(where, f"the number {obj[:12]}… has {len(obj.lstrip('-'))} digits; "
                                 f"no recipe value needs more than {_MAX_INT_DIGITS}")
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return
    if isinstance(obj, int):
        if len(str(abs(obj))) > _MAX_INT_DIGITS:
            raise RecipeError(where, f"the number {str(obj)[:12]}… has {len(str(abs(obj)))} "
                                     f"digits; no recipe value needs more than {_MAX_INT_DIGITS}")
        return
    if isinstance(obj, float):
        if not math.isfinite(obj):
            raise RecipeError(where, f"must be a finite number, got {obj!r}; use null for "
                                     "an open bound or leave the field out")
        if abs(obj) > MAX_NUMBER:
            raise RecipeError(where, f"{obj:g} is far too large (more than {MAX_NUMBER:g}); "
                                     "check the units, or use null for an open bound")
        return
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            if not isinstance(k, str):
                raise RecipeError(where, f"has a key {k!r} that is not text")
            w = f"{where}.{k}" if where != "(recipe)" else k
            if k == "vary" and not isinstance(v, bool):
                raise RecipeError(w, f"must be true or false (without quotes), got {v!r}")
            check_plain(v, w, depth + 1)
        return
    if isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            check_plain(v, f"{where}[{i}]", depth + 1)
        return
    raise RecipeError(where, f"holds a {type(obj).__name__}, which JSON cannot store")


def _check_field_types(d: Mapping, cls, where: str) -> None:
    """Values of a dataclass-backed section must have the type of the field's default.

    Booleans must be booleans, numbers numbers (not booleans), whole-number fields
    whole numbers; fields defaulting to None or text are left to the owner's own
    checks. Catches ``"fit_scale": "false"`` before it reads as true.
    """
    import dataclasses
    if not dataclasses.is_dataclass(cls):
        return
    for f in dataclasses.fields(cls):
        if f.name not in d or d[f.name] is None:
            continue
        default = f.default
        if default is dataclasses.MISSING:
            continue
        v, w = d[f.name], f"{where}.{f.name}"
        if isinstance(default, bool):
            if not isinstance(v, bool):
                raise RecipeError(w, f"must be true or false (without quotes), got {v!r}")
        elif isinstance(default, int):
            if isinstance(v, bool) or not (isinstance(v, int) or
                                           (isinstance(v, float) and v.is_integer())):
                raise RecipeError(w, f"must be a whole number, got {v!r}")
        elif isinstance(default, float):
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise RecipeError(w, f"must be a number, got {v!r}")


def _check_limit_key(key: str, stack: Stack, where: str) -> None:
    layers = [layer.name for layer in stack.layers]
    if key in ("band_gap", "redchi") or key in stack.parameters():
        return
    m = _NK_RE.match(key) or _THICK_RE.match(key)
    if m:
        if m.group("layer") not in layers:
            raise RecipeError(where, f"no layer named {m.group('layer')!r} in the stack; "
                                     f"layers: {', '.join(layers) or '(none)'}")
        if "wl" in m.groupdict() and not float(m.group("wl")) > 0:
            raise RecipeError(where, "the wavelength after '@' must be positive (nm)")
        return
    raise RecipeError(where, "unknown quantity; use {layer}_thickness, {layer}_n@633, "
                             "{layer}_k@550, band_gap, redchi or a parameter name")


# ---------------------------------------------------------------------------------
# Sections owned by other modules (reader, fit engine), imported when first needed:
# the modules that import recipe need not load the fit engine with it.
def _lazy(module: str, name: str):
    return getattr(importlib.import_module(f"fitting.{module}"), name)


def _normalise_section(d, module: str, cls_name: str, where: str) -> dict:
    """Validate a section through its owner's ``from_dict`` and return its canonical dict."""
    if d is None:
        d = {}
    if not isinstance(d, Mapping) and hasattr(d, "to_dict"):
        d = d.to_dict()
    if not isinstance(d, Mapping):
        raise RecipeError(where, "must be an object")
    cls = _lazy(module, cls_name)
    _check_field_types(d, cls, where)
    try:
        if "where" in inspect.signature(cls.from_dict).parameters:
            obj = cls.from_dict(dict(d), where=where)
        else:
            obj = cls.from_dict(dict(d))
    except RecipeError as e:
        f = e.field
        if not (f == where.split(".")[0] or f.startswith(where)):
            f = f"{where}.{f}"
        raise RecipeError(f, e.problem) from None
    except (PellucidError, ValueError, TypeError, KeyError, OverflowError) as e:
        raise RecipeError(where, str(e)) from None
    return obj.to_dict()


def _suggest_section(v):
    """Validate ``fit.suggest_model``: true/false, or a list of model keys to try."""
    where = "fit.suggest_model"
    if isinstance(v, bool):
        return v
    if v is None:
        return False
    if not isinstance(v, (list, tuple)):
        raise RecipeError(where, f"must be true, false or a list of film models such as "
                                 f'["cauchy", "tauc_lorentz"], got {v!r}')
    from .presets import MODEL_CHOICES
    allowed = [k for k in MODEL_CHOICES if k not in ("tabulated", "roughness")]
    if not v:
        raise RecipeError(where, "the list of models is empty; give at least one, or true to "
                                 "let the data decide")
    for i, key in enumerate(v):
        if key not in allowed:
            raise RecipeError(f"{where}[{i}]", f"unknown film model {key!r}; choose from "
                                               f"{', '.join(allowed)}")
    return tuple(dict.fromkeys(v))


def _range_pair(v, where):
    if v is None:
        return (None, None)
    if not isinstance(v, (list, tuple)) or len(v) != 2:
        raise RecipeError(where, "must be [start_nm, stop_nm] (null for an open end)")
    out = []
    for i, x in enumerate(v):
        if x is None:
            out.append(None)
            continue
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) \
                or x <= 0:
            raise RecipeError(f"{where}[{i}]", f"must be a positive wavelength in nm, got {x!r}")
        out.append(float(x))
    if out[0] is not None and out[1] is not None and out[0] >= out[1]:
        raise RecipeError(where, f"start ({out[0]:g} nm) must be below stop ({out[1]:g} nm)")
    return tuple(out)


# ---------------------------------------------------------------------------------
@dataclass
class Recipe:
    """A saved fitting setup.

    Parameters
    ----------
    stack : Stack
        Layers with start values, bounds, fixed flags and ties.
    name, notes : str
    reader : dict or ReaderOptions
        How spectrum files are read; stored as ``ReaderOptions.to_dict()``.
    fit_options : dict or FitOptions
        How fits run; stored as ``FitOptions.to_dict()``.
    range_nm : (float or None, float or None)
        Fit window; None is an open end.
    masks_nm : list of (float, float)
        Windows excluded from the fit.
    limits : dict of str -> Limit
        Specification limits by quantity key (see the module docstring).
    exports : tuple of str
        Per-spectrum exports to write.
    plot_formats : tuple of str
        Image formats of exported plots (``"png"``, ``"svg"``).
    reference : dict or None
        ``{"baseline": path, "dark": path or None}``: divide every spectrum by
        this 100 % line after subtracting the dark signal (see the module
        docstring); None for spectra that are already T or R.
    suggest_model : bool or tuple of str
        Try other film models and keep the one the BIC prefers: True for the
        families the data make plausible, a tuple of model keys for exactly
        those (see the module docstring); False (the default) fits the
        stack's model only.
    source_dir : Path or None
        Folder relative reference paths are resolved from (the recipe file's
        folder; set by :func:`load_recipe`). Not saved, not hashed.
    """

    stack: Stack
    name: str = ""
    notes: str = ""
    reader: Any = field(default_factory=dict)
    fit_options: Any = field(default_factory=dict)
    range_nm: tuple = (None, None)
    masks_nm: list = field(default_factory=list)
    limits: dict = field(default_factory=dict)
    exports: tuple = EXPORT_CHOICES
    plot_formats: tuple = ("png",)
    reference: dict | None = None
    suggest_model: Any = False
    source_dir: Path | None = field(default=None, compare=False, repr=False)

    def __post_init__(self):
        if not isinstance(self.stack, Stack):
            raise RecipeError("stack", "must be a Stack")
        self.reference = _reference_section(self.reference)
        self.suggest_model = _suggest_section(self.suggest_model)
        for what in ("name", "notes"):
            if not isinstance(getattr(self, what), str):
                raise RecipeError(what, "must be text")
        self.reader = _normalise_section(self.reader, "reader", "ReaderOptions", "reader")
        self.fit_options = _normalise_section(self.fit_options, "fit", "FitOptions",
                                              "fit.options")
        # The fit window lives in one place, fit.range_nm / fit.masks_nm; values given
        # inside the fit options are moved there.
        opt_range = self.fit_options.pop("fit_range_nm", None)
        opt_masks = self.fit_options.pop("mask_windows_nm", None) or []
        if opt_range is not None:
            if tuple(self.range_nm) not in ((None, None), tuple(opt_range)):
                raise RecipeError("fit.options.fit_range_nm",
                                  "conflicts with fit.range_nm; give the fit window once")
            self.range_nm = opt_range
        if opt_masks:
            self.masks_nm = list(self.masks_nm) + [m for m in opt_masks
                                                   if list(m) not in map(list, self.masks_nm)]
        self.range_nm = _range_pair(self.range_nm, "fit.range_nm")
        if not isinstance(self.masks_nm, (list, tuple)):
            raise RecipeError("fit.masks_nm", "must be a list of [start_nm, stop_nm] pairs")
        masks = []
        for i, m in enumerate(self.masks_nm):
            lo, hi = _range_pair(m, f"fit.masks_nm[{i}]")
            if lo is None or hi is None:
                raise RecipeError(f"fit.masks_nm[{i}]", "both ends must be given")
            masks.append((lo, hi))
        self.masks_nm = masks
        if not isinstance(self.limits, Mapping):
            raise RecipeError("limits", "must be an object of quantity: limit")
        limits = {}
        for key, lim in self.limits.items():
            where = f"limits.{key}"
            _check_limit_key(str(key), self.stack, where)
            limits[str(key)] = lim if isinstance(lim, Limit) else Limit.from_dict(lim,
                                                                                   where=where)
        self.limits = limits
        self.exports = self._choices(self.exports, EXPORT_CHOICES, "outputs.exports")
        self.plot_formats = self._choices(self.plot_formats, PLOT_FORMATS, "outputs.plot_formats")
        names = set(self.stack.parameters())
        for w, expr in _walk_exprs(self.stack.to_dict(), "stack"):
            validate_expression(expr, names, field_name=w)

    @staticmethod
    def _choices(values, allowed, where) -> tuple:
        if isinstance(values, str) or not isinstance(values, (list, tuple)):
            raise RecipeError(where, f"must be a list drawn from {', '.join(allowed)}")
        for i, v in enumerate(values):
            if v not in allowed:
                raise RecipeError(f"{where}[{i}]", f"unknown choice {v!r}; choose from "
                                                   f"{', '.join(allowed)}")
        return tuple(dict.fromkeys(values))

    # -- reference files ---------------------------------------------------------
    def reference_files(self) -> dict:
        """``{"baseline": Path, "dark": Path or None}`` resolved from :attr:`source_dir`
        (empty if the recipe has no reference correction).

        Raises
        ------
        RecipeError
            If a named file does not exist; the message gives the resolved path.
        """
        if not self.reference:
            return {}
        base = Path(self.source_dir) if self.source_dir is not None else Path.cwd()
        out = {}
        for role in ("baseline", "dark"):
            name = self.reference.get(role)
            if not name:
                out[role] = None
                continue
            p = Path(name).expanduser()
            p = p if p.is_absolute() else base / p
            if not p.is_file():
                what = "100 % line" if role == "baseline" else "dark spectrum"
                hint = "" if Path(name).is_absolute() else \
                    " (a relative path is read from the folder of the recipe file)"
                raise RecipeError(f"reference.{role}",
                                  f"the {what} {str(p)!r} does not exist{hint}; check the path")
            out[role] = p.resolve()
        return out

    def resolved(self) -> Recipe:
        """This recipe with absolute reference paths, ready to be saved anywhere."""
        if not self.reference:
            return self
        files = self.reference_files()
        ref = {k: (None if v is None else str(v)) for k, v in files.items()}
        return recipe_from_dict({**self.to_dict(), "reference": ref})

    # -- objects for the other parts -------------------------------------------------
    def new_stack(self) -> Stack:
        """A fresh copy of the stack (fits change parameter values in place)."""
        return Stack.from_dict(self.stack.to_dict())

    def reader_options(self):
        """``ReaderOptions`` built from the ``reader`` section."""
        return _lazy("reader", "ReaderOptions").from_dict(dict(self.reader))

    def make_fit_options(self, spectrum=None):
        """``FitOptions`` from ``fit.options`` plus the fit window and masks.

        An open end of ``range_nm`` is closed with the spectrum's first or last
        wavelength.
        """
        d = dict(self.fit_options)
        lo, hi = self.range_nm
        if spectrum is not None and len(spectrum):
            lo = float(spectrum.wavelength_nm[0]) if lo is None else lo
            hi = float(spectrum.wavelength_nm[-1]) if hi is None else hi
        if lo is not None and hi is not None:
            d["fit_range_nm"] = [lo, hi]
        if self.masks_nm:
            d["mask_windows_nm"] = [list(m) for m in self.masks_nm]
        return _lazy("fit", "FitOptions").from_dict(d)

    # -- persistence ---------------------------------------------------------------
    def to_dict(self) -> dict:
        stack = self.stack.to_dict()
        return {"format": FORMAT, "version": _version_needed(stack), "name": self.name,
                "notes": self.notes, "stack": stack, "reader": dict(self.reader),
                "fit": {"range_nm": list(self.range_nm),
                        "masks_nm": [list(m) for m in self.masks_nm],
                        "options": dict(self.fit_options),
                # Only when used, so recipes without it keep their hash.
                **({"suggest_model": (list(self.suggest_model) if isinstance(
                    self.suggest_model, tuple) else True)} if self.suggest_model else {})},
                "limits": {k: v.to_dict() for k, v in self.limits.items()},
                "outputs": {"exports": list(self.exports),
                            "plot_formats": list(self.plot_formats)},
                # Only when used, so recipes without it keep their hash.
                **({"reference": dict(self.reference)} if self.reference else {})}

    @classmethod
    def from_dict(cls, d, *, path=None) -> Recipe:
        return recipe_from_dict(d, path=path)

    def hash(self) -> str:
        return recipe_hash(self)


def _version_needed(stack: dict) -> int:
    """Lowest format version that holds this stack dict: 2 for known layers or sources."""
    new = any("known" in ld or "source" in ld for ld in stack.get("layers", []))
    return 2 if new else 1


def _reference_section(ref):
    """Validate the ``reference`` section: None or {"baseline": text, "dark": text or None}."""
    if ref is None:
        return None
    if not isinstance(ref, Mapping):
        raise RecipeError("reference", 'must be an object like {"baseline": "refs/100.csv", '
                                       '"dark": "refs/dark.csv"}')
    extra = set(ref) - {"baseline", "dark"}
    if extra:
        raise RecipeError(f"reference.{sorted(extra)[0]}", "unknown field; use baseline and dark")
    out = {}
    for role in ("baseline", "dark"):
        v = ref.get(role)
        if v is None and role == "dark":
            out[role] = None
            continue
        if not isinstance(v, str) or not v.strip():
            need = "is missing" if v is None else f"must be a file path (text), got {v!r}"
            raise RecipeError(f"reference.{role}", need)
        out[role] = v.strip()
    return out


# ---------------------------------------------------------------------------------
def upgrade(d: Mapping, *, path=None) -> dict:
    """Bring a recipe dict of an older format version to the current one.

    Version 0 -> 1: flat layer ``thickness_nm`` (+ ``thickness_range_nm``,
    ``fit_thickness``) becomes a thickness parameter; top-level ``range_nm`` and
    ``method`` move into ``fit``; empty ``reader``, ``limits`` and ``outputs``
    sections are added. The input is not modified.
    """
    if not isinstance(d, Mapping):
        raise RecipeError("(file)", "must be a JSON object", path=path)
    if d.get("format") != FORMAT:
        raise RecipeError("format", f"expected {FORMAT!r}, found {d.get('format')!r}; "
                                    f"this is not a Pellucid recipe", path=path)
    version = d.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise RecipeError("version", f"must be a whole number, found {version!r}", path=path)
    if version > VERSION:
        raise RecipeError("version", f"version {version} is newer than this Pellucid "
                                     f"understands (up to {VERSION}); update Pellucid",
                          path=path)
    if version < 0:
        raise RecipeError("version", f"unknown version {version}", path=path)
    d = json.loads(json.dumps(d))          # a deep copy; input stays untouched
    if version == 0:
        d = _upgrade_0_to_1(d, path)
    return d


def _upgrade_0_to_1(d: dict, path) -> dict:
    stack = d.get("stack")
    if not isinstance(stack, dict):
        raise RecipeError("stack", "must be an object", path=path)
    for layer in stack.get("layers", []) or []:
        if not isinstance(layer, dict) or "thickness_nm" not in layer:
            continue
        d_nm = layer.pop("thickness_nm")
        lo, hi = layer.pop("thickness_range_nm", [0.0, None]) or [0.0, None]
        layer["thickness"] = {"value": d_nm, "min": lo, "max": hi,
                              "vary": bool(layer.pop("fit_thickness", True))}
    fit = {"range_nm": d.pop("range_nm", [None, None]), "masks_nm": d.pop("masks_nm", []),
           "options": {}}
    if "method" in d:
        fit["options"]["method"] = d.pop("method")
    d.update(version=1, fit=fit)
    d.setdefault("reader", {})
    d.setdefault("limits", {})
    d.setdefault("outputs", {})
    return d


def recipe_from_dict(d: Mapping, *, path=None, source_dir=None) -> Recipe:
    """Validate a recipe dict (any supported version) and build a :class:`Recipe`.

    ``source_dir`` is the folder relative reference paths are read from (default:
    the folder of ``path`` when given).
    """
    try:
        check_plain(d)
    except RecipeError as e:
        raise RecipeError(e.field, e.problem, path=path) from None
    d = upgrade(d, path=path)
    if source_dir is None and path is not None:
        source_dir = Path(path).parent
    known = {"format", "version", "name", "notes", "stack", "reader", "fit", "limits",
             "outputs", "reference"}
    extra = set(d) - known
    try:
        if extra:
            raise RecipeError(sorted(extra)[0], "unknown field")
        if "stack" not in d:
            raise RecipeError("stack", "is missing")
        # Table files named by layers are read (from the recipe's folder) and embedded.
        d["stack"] = embed_table_files(d["stack"], source_dir, where="stack")
        # Ties are checked for syntax before anything else touches the data.
        for w, expr in _walk_exprs(d["stack"], "stack"):
            validate_expression(expr, _ANY_NAME, field_name=w)
        stack = _stack_from_dict(d["stack"])
        fit = d.get("fit", {})
        if not isinstance(fit, Mapping):
            raise RecipeError("fit", "must be an object")
        extra = set(fit) - {"range_nm", "masks_nm", "options", "suggest_model"}
        if extra:
            raise RecipeError(f"fit.{sorted(extra)[0]}", "unknown field")
        outputs = d.get("outputs", {})
        if not isinstance(outputs, Mapping):
            raise RecipeError("outputs", "must be an object")
        extra = set(outputs) - {"exports", "plot_formats"}
        if extra:
            raise RecipeError(f"outputs.{sorted(extra)[0]}", "unknown field")
        defaults = Recipe.__dataclass_fields__
        return Recipe(stack, name=d.get("name", ""), notes=d.get("notes", ""),
                      reader=d.get("reader", {}), fit_options=fit.get("options", {}),
                      range_nm=fit.get("range_nm", (None, None)),
                      masks_nm=fit.get("masks_nm", []), limits=d.get("limits", {}),
                      exports=outputs.get("exports", defaults["exports"].default),
                      plot_formats=outputs.get("plot_formats",
                                               defaults["plot_formats"].default),
                      reference=d.get("reference"),
                      suggest_model=fit.get("suggest_model", False),
                      source_dir=None if source_dir is None else Path(source_dir))
    except RecipeError as e:
        if path is not None and e.path is None:
            raise RecipeError(e.field, e.problem, path=path) from None
        raise


def _stack_from_dict(d) -> Stack:
    """Stack.from_dict, with any slip of its checks turned into a named error."""
    layers = d.get("layers") if isinstance(d, Mapping) else None
    for i, layer in enumerate(layers if isinstance(layers, list) else []):
        th = layer.get("thickness") if isinstance(layer, Mapping) else None
        if isinstance(layer, Mapping) and "thickness" in layer and not isinstance(th, Mapping) \
                and (isinstance(th, bool) or not isinstance(th, (int, float))):
            raise RecipeError(f"stack.layers[{i}].thickness",
                              f"must be a number (nm) or an object like {{\"value\": 500, "
                              f"\"min\": 0, \"max\": 2000, \"vary\": true}}, got {th!r}")
    try:
        return Stack.from_dict(d, where="stack")
    except RecipeError:
        raise
    except PellucidError as e:
        raise RecipeError("stack", str(e)) from None
    except (ValueError, TypeError, OverflowError, KeyError) as e:
        # A value of the wrong type where the layout expected a number or an object.
        raise RecipeError("stack", f"a value has the wrong type or form ({e}); compare "
                                   "with a recipe saved by Pellucid") from None


class _AnyName:
    """Name set that admits every identifier (syntax-only check before the stack exists)."""

    def __contains__(self, name):
        return True

    def __iter__(self):
        return iter(())


_ANY_NAME = _AnyName()


def canonical_json(obj) -> str:
    """Sorted keys, no whitespace, ASCII only: the same recipe always gives the same bytes."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                      allow_nan=False)


def recipe_hash(recipe) -> str:
    """Hex SHA-256 of a recipe's canonical JSON (a :class:`Recipe` or its dict)."""
    d = recipe.to_dict() if isinstance(recipe, Recipe) else recipe_from_dict(recipe).to_dict()
    return hashlib.sha256(canonical_json(d).encode("ascii")).hexdigest()


def recipe_identity(recipe, reference_sha256: Mapping | None = None) -> str:
    """Hex SHA-256 of what decides a recipe's results (the key ``--resume`` compares).

    Everything of :func:`recipe_hash` except the name, the notes, the reference
    files' locations and the start values of varied, untied film parameters (see
    the module docstring for why). ``reference_sha256`` (``{"baseline": hex,
    "dark": hex or None}``) puts the reference files' content in instead of their
    paths; the batch runner passes it.
    """
    r = recipe if isinstance(recipe, Recipe) else recipe_from_dict(recipe)
    d = r.to_dict()
    for key in ("name", "notes"):
        d.pop(key, None)
    for layer in d["stack"]["layers"]:
        # Where a known table came from is provenance; its numbers are the model.
        layer.pop("source", None)
        if layer.get("known"):
            continue               # every value of a known layer is part of the model
        params = [layer["thickness"], *layer["material"].get("params", {}).values()]
        for p in params:
            if isinstance(p, dict) and p.get("vary") is True and not p.get("expr"):
                p.pop("value", None)            # a start value, not part of the model
    d["version"] = _version_needed(d["stack"])   # a source alone changes no result
    if "reference" in d:
        d["reference"] = dict(reference_sha256 or {"files": "unhashed"})
    d["identity"] = "pellucid-recipe-identity-1"
    return hashlib.sha256(canonical_json(d).encode("ascii")).hexdigest()


def load_recipe(path) -> Recipe:
    """Read and validate a recipe file.

    Raises
    ------
    RecipeError
        If the file is missing, not JSON, of an unknown version or invalid; the
        message names the file, the field and the problem.
    """
    path = Path(path)
    if path.is_dir():
        raise RecipeError("(file)", "is a folder; give the recipe file (.json)", path=path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise RecipeError("(file)", "file not found", path=path) from None
    except OSError as e:
        raise RecipeError("(file)", f"cannot be read: {e.strerror or e}", path=path) from None
    if len(raw) > _MAX_FILE_BYTES:
        raise RecipeError("(file)", f"is {len(raw) / 2 ** 20:.0f} MB; a recipe is a few kB of "
                                    "JSON; is this the right file?", path=path)
    try:
        text = raw.decode("utf-8-sig")           # a byte-order mark some editors add is fine
    except UnicodeDecodeError as e:
        raise RecipeError("(file)", f"is not UTF-8 text (byte {e.start}); save it as UTF-8",
                          path=path) from None
    return recipe_from_dict(parse_recipe_json(text, path=path), path=path)


#: Largest recipe file read (a real one is a few kB).
_MAX_FILE_BYTES = 16 * 2 ** 20


def parse_recipe_json(text: str, *, path=None):
    """JSON text -> plain data, refusing what :func:`json.loads` turns into a traceback
    (nesting too deep for the parser, integers of thousands of digits)."""
    try:
        return json.loads(text, parse_int=_parse_int)
    except json.JSONDecodeError as e:
        raise RecipeError("(file)", f"not valid JSON at line {e.lineno}, column {e.colno}: "
                                    f"{e.msg}", path=path) from None
    except RecursionError:
        raise RecipeError("(file)", f"is nested more than {MAX_DEPTH} levels deep; this is "
                                    "not a recipe layout", path=path) from None
    except ValueError as e:
        raise RecipeError("(file)", f"not valid JSON: {e}", path=path) from None


def save_recipe(recipe: Recipe, path) -> Path:
    """Write a recipe as indented JSON, atomically. Returns the path."""
    text = json.dumps(recipe.to_dict(), indent=2, ensure_ascii=False, allow_nan=False)
    return atomic_write_text(Path(path), text + "\n")
