"""The app-side state of one working session, and the only place edits are made.

A :class:`Session` holds the current spectrum, the sample stack, the fit
options, the masked windows and the last fit result. Panels read it and call
its methods to change it; it emits a signal for each kind of change so every
view can refresh itself (the pattern of napari's ``QtDims`` wrapping ``Dims``:
views never own the data).

Every edit to the stack, the parameters, the options or the masks goes through
a :class:`QUndoCommand` on :attr:`Session.undo`, so Ctrl+Z / Ctrl+Shift+Z work
for all of them. A command stores the whole editable state before and after
(the stack as :meth:`fitting.stack.Stack.to_dict`, a few kilobytes), which is
simpler and safer than per-field inverse operations.

A recipe loaded into the app keeps what the app has no control for: its
notes, specification limits, outputs and reference section (the 100 % line and
dark files, made absolute so the recipe can be saved anywhere) stay in
:attr:`Session.extras` and are written back by :meth:`Session.recipe`; limits
follow a renamed layer and are dropped, with a message, when their quantity
leaves the stack. ``fit.suggest_model`` is kept with the fit options.

The session also keeps the result honest. When a result arrives it takes a
fingerprint of the setup (stack, options, masks, spectrum and its correction);
any later difference marks the result *out of date* (:attr:`Session.result_stale`,
with the reason in :attr:`Session.stale_reason`) until the setup is back where it
was (undo) or a new fit arrives. A second fingerprint, taken when the project is
saved or opened, tells whether there are unsaved changes (:meth:`Session.is_modified`).
"""

from __future__ import annotations

import copy
import json
import math
import re
from pathlib import Path

from PySide6.QtCore import QObject, Signal
from PySide6.QtGui import QUndoCommand, QUndoStack

from fitting.errors import FitError, ParameterError, PellucidError, RecipeError
# Imported at start-up, not on the first Fit: importing the fit engine (lmfit, scipy)
# takes a second or more, which must not freeze the window when the user clicks Fit.
from fitting.fit import FitOptions
from fitting.params import Param, check_finite
from fitting.presets import (MODEL_CHOICES, SUBSTRATE_NAMES, default_fit_options,
                             default_stack, make_model, model_choice_of, tie_roughness)
from fitting.recipe import Recipe
from fitting.stack import Layer, Stack
from fitting.substrates import Substrate, library_substrate

__all__ = ["Session", "MODEL_CHOICES", "make_model", "model_choice_of", "default_options",
           "SUBSTRATE_NAMES"]

def default_options() -> dict:
    """The fit options a new session starts with: every ``FitOptions`` field but the
    masked windows (kept in :attr:`Session.masks`), so a recipe's options survive
    a load and save through the app unchanged, plus the recipe's ``suggest_model``
    (False, True or a tuple of model keys; see :mod:`fitting.suggest`), which is
    not a ``FitOptions`` field but decides, like them, what Fit does."""
    d = default_fit_options()
    d.pop("mask_windows_nm", None)
    d["suggest_model"] = False
    return d


#: Recipe sections the app has no control for, kept from a loaded recipe and saved back.
_EXTRA_KEYS = ("notes", "limits", "exports", "plot_formats", "reference")


class _StateCommand(QUndoCommand):
    """Undo entry that swaps the whole editable state (stack, options, masks)."""

    def __init__(self, session: "Session", text: str, before: dict, after: dict):
        super().__init__(text)
        self._s, self._before, self._after = session, before, after
        self._first = True

    def redo(self):
        # The edit was already applied when the command was pushed.
        if self._first:
            self._first = False
            return
        self._s._restore(self._after)

    def undo(self):
        self._s._restore(self._before)


class Session(QObject):
    """Current spectrum, stack, fit options, masks and result, with change signals.

    Signals
    -------
    spectrum_changed : the measured spectrum was replaced (or cleared)
    stack_changed : layers, materials, parameters or substrate changed
    options_changed : fit options changed
    masks_changed : masked wavelength windows changed
    result_changed : a fit result arrived (or was cleared)
    result_stale_changed(bool) : the result became out of date (True) or current again
    modified_changed(bool) : there are (True) or no longer are unsaved changes
    message(str, bool) : a status message for the user; True for an error
    """

    spectrum_changed = Signal()
    stack_changed = Signal()
    options_changed = Signal()
    masks_changed = Signal()
    result_changed = Signal()
    result_stale_changed = Signal(bool)
    modified_changed = Signal(bool)
    message = Signal(str, bool)

    def __init__(self, parent=None):
        super().__init__(parent)
        self.undo = QUndoStack(self)
        self.spectrum = None          # fitting.spectrum.Spectrum or None
        self.spectrum_path = ""       # file it was read from
        self.reader_options = None    # fitting.reader.ReaderOptions used, or None
        self.stack: Stack = default_stack()
        self.options: dict = default_options()
        self.masks: list[tuple[float, float]] = []
        self.reference = None         # {"baseline", "dark", "raw_counts"} of the correction
        self.extras: dict = {}        # a loaded recipe's sections without controls (_EXTRA_KEYS)
        self.result = None            # fitting.result.FitResult or None
        self.result_recipe_hash = ""  # hash of the recipe that produced the result
        self.result_stale = False     # the setup changed since the result arrived
        self.stale_reason = ""        # what changed, in words
        self.project_path = ""
        self._result_fp: dict | None = None
        self._result_stacks: set = set()   # other stacks the result is current for (adopted)
        self._result_frozen = False    # stored as out of date: stays so until a new fit
        self._saved_fp = self._save_fingerprint()
        self._modified = False
        for sig in (self.stack_changed, self.options_changed, self.masks_changed,
                    self.spectrum_changed):
            sig.connect(self._setup_changed)
        self.result_changed.connect(self._update_modified)

    # -- what the result and the saved file were made from --------------------------------
    _PARTS = {"stack": "the sample stack", "options": "the fit options",
              "masks": "the masked windows", "spectrum": "the spectrum"}

    def _fingerprint(self) -> dict:
        """The setup as comparable text, one entry per part the user can change."""
        s = self.spectrum
        spec = None if s is None else {
            "path": self.spectrum_path, "sha256": s.sha256, "n": len(s),
            "range": [float(s.wavelength_nm[0]), float(s.wavelength_nm[-1])] if len(s) else [],
            "reader": None if self.reader_options is None else self.reader_options.to_dict(),
            "reference": self.reference}
        parts = {"stack": self.stack.to_dict(), "options": self.options,
                 "masks": [list(m) for m in self.masks], "spectrum": spec}
        return {k: json.dumps(v, sort_keys=True, default=str) for k, v in parts.items()}

    def _save_fingerprint(self) -> dict:
        """What a save would write. Opening another spectrum file counts only when a
        project is open (it would point to another file); a correction always counts."""
        fp = self._fingerprint()
        if not self.project_path:
            fp["spectrum"] = json.dumps(self.reference, sort_keys=True, default=str)
        fp["result"] = f"{id(self.result)} {self.result_stale}" if self.result else ""
        fp["extras"] = json.dumps(self.extras, sort_keys=True, default=str)
        return fp

    def _setup_changed(self) -> None:
        if self._result_fp is not None and self.result is not None and not self._result_frozen:
            now = self._fingerprint()
            changed = [k for k in self._PARTS if now[k] != self._result_fp[k]
                       and not (k == "stack" and now[k] in self._result_stacks)]
            self._set_stale(bool(changed), " and ".join(self._PARTS[k] for k in changed))
        self._update_modified()

    def _set_stale(self, stale: bool, reason: str) -> None:
        if stale != self.result_stale or reason != self.stale_reason:
            self.result_stale, self.stale_reason = stale, reason
            self.result_stale_changed.emit(stale)
            self._update_modified()

    def is_modified(self) -> bool:
        """True if the setup, correction or result differ from the last save or open."""
        return self._modified

    def _update_modified(self) -> None:
        mod = self._save_fingerprint() != self._saved_fp
        if mod != self._modified:
            self._modified = mod
            self.modified_changed.emit(mod)

    def mark_saved(self) -> None:
        """The current state is what the project file holds (after save or open)."""
        self._saved_fp = self._save_fingerprint()
        self.undo.setClean()
        self._update_modified()

    # -- snapshots for undo -----------------------------------------------------------
    def _state(self) -> dict:
        return {"stack": self.stack.to_dict(), "options": copy.deepcopy(self.options),
                "masks": list(self.masks), "extras": copy.deepcopy(self.extras)}

    def _restore(self, state: dict) -> None:
        self.stack = Stack.from_dict(state["stack"])
        changed_opts = state["options"] != self.options
        changed_masks = state["masks"] != self.masks
        self.options = copy.deepcopy(state["options"])
        self.masks = list(state["masks"])
        self.extras = copy.deepcopy(state.get("extras", {}))
        self.stack_changed.emit()
        if changed_opts:
            self.options_changed.emit()
        if changed_masks:
            self.masks_changed.emit()

    def _edit(self, text: str, apply) -> None:
        """Run ``apply()`` (which mutates the state) as one undoable step.

        If ``apply`` raises a :class:`PellucidError`, the state is put back and the
        error is re-raised for the caller to show.
        """
        before = self._state()
        try:
            apply()
        except PellucidError:
            self._restore(before)
            raise
        after = self._state()
        if after == before:
            return
        self.undo.push(_StateCommand(self, text, before, after))

    # -- spectrum ---------------------------------------------------------------------
    def set_spectrum(self, spectrum, *, path: str = "", reader_options=None,
                     reference: dict | None = None) -> None:
        """Replace the measured spectrum (not undoable: it is data, not a setup edit).

        ``reference`` records the reference correction the spectrum went through
        (``{"baseline": path, "dark": path or "", "raw_counts": bool}``), None if it
        is used as read. A result of an earlier spectrum stays, marked out of date.
        """
        self.spectrum = spectrum
        self.spectrum_path = str(path or getattr(spectrum, "source", "") or "")
        self.reader_options = reader_options
        self.reference = dict(reference) if reference else None
        self.spectrum_changed.emit()

    # -- stack ------------------------------------------------------------------------
    def find_param(self, global_name: str) -> tuple[Layer, str]:
        """(layer, local name) of a global parameter name such as ``film_A``."""
        for layer in self.stack.layers:
            pre = layer.name + "_"
            if global_name.startswith(pre):
                local = global_name[len(pre):]
                if local == "thickness" or local in layer.material.params:
                    return layer, local
        raise ParameterError("parameter", global_name, "no such parameter in the stack")

    def param(self, global_name: str) -> Param:
        layer, local = self.find_param(global_name)
        return layer.thickness if local == "thickness" else layer.material.params[local]

    def set_param(self, global_name: str, **changes) -> None:
        """Change a parameter's ``value``, ``min``, ``max`` or ``vary`` (undoable).

        Raises :class:`~fitting.errors.ParameterError` with the reason if the new
        entry is impossible (value outside bounds, min >= max, negative thickness).
        """
        unknown = set(changes) - {"value", "min", "max", "vary"}
        if unknown:
            raise ParameterError("field", sorted(unknown)[0], "only value, min, max, vary")
        for k in ("value", "min", "max"):
            if k in changes:
                v = changes[k]
                open_bound = ("", "inf", "+inf", "-inf", "none", "∞", "-∞")
                if isinstance(v, str) and v.strip().lower() in open_bound and k != "value":
                    changes[k] = -math.inf if k == "min" else math.inf
                else:
                    changes[k] = check_finite(f"{global_name} {k}", v)
        layer, local = self.find_param(global_name)
        old = self.param(global_name)
        new = old.copy(**changes)              # Param validates bounds on construction
        if local == "thickness" and new.min < 0:
            raise ParameterError(global_name, new.min, "a thickness bound must not be negative")
        what = ", ".join(changes)

        def apply():
            if local == "thickness":
                layer.thickness = new
            else:
                layer.material.params[local] = new

        self._edit(f"Set {global_name} {what}", apply)
        self.stack_changed.emit()

    def _new_layer_name(self, base: str) -> str:
        names = {layer.name for layer in self.stack.layers}
        if base not in names:
            return base
        i = 2
        while f"{base}{i}" in names:
            i += 1
        return f"{base}{i}"

    def add_layer(self, choice: str = "cauchy", *, index: int | None = None,
                  table_path=None) -> str:
        """Add a film (ambient side first; default on top). Returns its name."""
        layers = self.stack.layers
        index = 0 if index is None else max(0, min(index, len(layers)))
        below = None
        if choice == "roughness":
            if not layers:
                raise ParameterError("roughness", "no film",
                                     "add the film first; roughness mixes it with voids")
            below = layers[min(index, len(layers) - 1)]
            model = make_model(choice, host=below.material)
            name = self._new_layer_name("rough")
            thickness = Param("thickness", 10.0, 0.0, 200.0, "nm", "roughness layer thickness")
            new = Layer(name, model, thickness)
            tie_roughness(new, below)
        else:
            model = make_model(choice, table_path=table_path)
            name = self._new_layer_name("film")
            thickness = Param("thickness", 500.0, 0.0, 50000.0, "nm", "physical film thickness")

        new_layer = Layer(name, model, thickness) if below is None else new

        def apply():
            self.stack.layers.insert(index, new_layer)

        self._edit(f"Add layer {name}", apply)
        self.stack_changed.emit()
        return name

    def remove_layer(self, index: int) -> None:
        name = self.stack.layers[index].name

        def apply():
            self.stack.layers.pop(index)
            self._repair_ties()
            self._repair_limits()

        self._edit(f"Remove layer {name}", apply)
        self.stack_changed.emit()

    def move_layer(self, index: int, delta: int) -> int:
        """Move a layer up (-1, toward the ambient) or down (+1). Returns its new index."""
        layers = self.stack.layers
        j = index + delta
        if not (0 <= index < len(layers) and 0 <= j < len(layers)):
            return index

        def apply():
            layers[index], layers[j] = layers[j], layers[index]

        self._edit(f"Move layer {layers[index].name}", apply)
        self.stack_changed.emit()
        return j

    def set_layer_model(self, index: int, choice: str, *, table_path=None) -> None:
        """Give a layer a new dispersion model (its thickness is kept)."""
        layers = self.stack.layers
        layer = layers[index]
        host = layers[index + 1].material if index + 1 < len(layers) else layer.material
        model = make_model(choice, host=host, table_path=table_path)

        def apply():
            layer.material = model
            if choice == "roughness" and index + 1 < len(layers):
                tie_roughness(layer, layers[index + 1])
            self._repair_ties()
            self._repair_limits()

        self._edit(f"Model of {layer.name}: {MODEL_CHOICES[choice].split(' (')[0]}", apply)
        self.stack_changed.emit()

    def rename_layer(self, index: int, name: str) -> None:
        layer = self.stack.layers[index]
        Layer(name, layer.material, layer.thickness)   # validates the name
        if any(x.name == name for i, x in enumerate(self.stack.layers) if i != index):
            raise ParameterError("layer name", name, "another layer already has this name")

        old = layer.name
        pattern = re.compile(rf"\b{re.escape(old)}_")

        def apply():
            layer.name = name
            for p in self.stack.parameters(live=True).values():   # ties follow the new name
                if p.expr:
                    p.expr = pattern.sub(f"{name}_", p.expr)
            if self.extras.get("limits"):                          # so do the recipe's limits
                self.extras["limits"] = {
                    (f"{name}_{k[len(old) + 1:]}" if k.startswith(f"{old}_") else k): v
                    for k, v in self.extras["limits"].items()}

        self._edit(f"Rename layer to {name}", apply)
        self.stack_changed.emit()

    def _repair_ties(self) -> list[str]:
        """Drop tie expressions that name parameters no longer in the stack (and say so)."""
        names = set(self.stack.parameters())
        dropped = []
        for layer in self.stack.layers:
            for k, p in list(layer.material.params.items()):
                if p.expr and any(t not in names for t in re.findall(r"[A-Za-z_]\w*", p.expr)
                                  if t not in ("sqrt", "exp", "log", "log10", "sin", "cos",
                                               "tan", "abs", "pi")):
                    layer.material.params[k] = p.copy(expr=None, vary=True)
                    dropped.append(f"{layer.name}_{k}")
        if dropped:
            self.message.emit("Ties removed (their parameters no longer exist): "
                              + ", ".join(dropped), True)
        return dropped

    def _repair_limits(self) -> list[str]:
        """Drop recipe limits whose quantity is no longer in the stack (and say so)."""
        limits = self.extras.get("limits") or {}
        dropped = []
        for key in list(limits):
            try:       # the recipe's own check of a limit key against a stack
                Recipe(self.stack, limits={key: limits[key]})
            except RecipeError as e:
                if e.field.startswith("limits."):
                    dropped.append(key)
                    limits.pop(key)
        if dropped:
            self.message.emit("Recipe limits removed (their quantity is no longer in the "
                              "stack): " + ", ".join(dropped), True)
        return dropped

    def set_layer_known(self, index: int, known: bool) -> None:
        """Hold a layer as known (measured earlier: nothing of it is fitted) or fit it again.

        Its own fit flags and ties are kept and come back when ``known`` is
        cleared (:class:`fitting.stack.Layer`). Undoable.
        """
        layer = self.stack.layers[index]
        known = bool(known)
        if layer.known == known:
            return
        text = f"Hold layer {layer.name} as known" if known else f"Fit layer {layer.name} again"
        self._edit(text, lambda: setattr(layer, "known", known))
        self.stack_changed.emit()

    def insert_layer(self, layer: Layer, *, index: int | None = None) -> str:
        """Insert a ready-made layer (ambient side first; default on top). Returns its name,
        which gets a number when another layer already has it."""
        layers = self.stack.layers
        index = 0 if index is None else max(0, min(index, len(layers)))
        layer.name = self._new_layer_name(layer.name)

        def apply():
            self.stack.layers.insert(index, layer)

        what = "known layer" if layer.known else "layer"
        self._edit(f"Add {what} {layer.name}", apply)
        self.stack_changed.emit()
        return layer.name

    def set_substrate(self, key: str | None = None, *, thickness_mm: float | None = None,
                      n: float | None = None, material=None) -> None:
        """Pick a library substrate (or a custom material) and/or its thickness in mm."""
        old = self.stack.substrate
        d = old.thickness_mm if thickness_mm is None else thickness_mm
        if material is not None:
            new = Substrate(material, d, old.kappa, old.internal_transmittance, "")
        else:
            key = key or old.library or "fused_silica"
            if key == "generic_glass":
                from fitting.substrates import generic_glass
                nn = n if n is not None else (old.material.params["n"].value
                                              if old.library == "generic_glass" else 1.52)
                new = Substrate(generic_glass(check_finite("substrate n", nn)), d,
                                old.kappa, old.internal_transmittance, key)
            else:
                new = library_substrate(key, d, kappa=old.kappa,
                                        internal_transmittance=old.internal_transmittance)

        def apply():
            self.stack.substrate = new

        self._edit(f"Substrate {new.name}, {new.thickness_mm:g} mm", apply)
        self.stack_changed.emit()

    def set_stack_option(self, name: str, value: float) -> None:
        """Set the stack's ``thickness_spread`` (fraction) or ``bandwidth_nm`` (undoable)."""
        if name not in ("thickness_spread", "bandwidth_nm"):
            raise ParameterError("stack option", name, "only thickness_spread, bandwidth_nm")
        value = check_finite(name, value)
        st = self.stack
        # The Stack constructor holds the limits (>= 0; spread at most 0.3).
        Stack(st.layers, st.substrate, thickness_spread=value if name == "thickness_spread"
              else st.thickness_spread, bandwidth_nm=value if name == "bandwidth_nm"
              else st.bandwidth_nm)
        if getattr(st, name) == value:
            return
        label = {"thickness_spread": "Thickness non-uniformity",
                 "bandwidth_nm": "Instrument bandwidth"}[name]
        self._edit(label, lambda: setattr(self.stack, name, value))
        self.stack_changed.emit()

    def set_stack(self, stack: Stack, text: str = "Replace stack") -> None:
        def apply():
            self.stack = stack

        self._edit(text, apply)
        self.stack_changed.emit()

    def adopt_result_stack(self, text: str = "Use the fitted model") -> None:
        """Put the result's fitted stack (its models and values) into the setup (undoable).

        For a model suggestion whose choice is not the user's model: the result
        stays current both for the setup it was made from and for the adopted
        stack, since it describes exactly that stack.
        """
        r = self.result
        if r is None or not r.stack:
            raise FitError("there is no fit result whose stack could be used; fit first")
        fitted = Stack.from_dict(r.stack)
        self._result_stacks.add(json.dumps(fitted.to_dict(), sort_keys=True, default=str))

        def apply():
            self.stack = fitted
            self._repair_limits()

        self._edit(text, apply)
        self.stack_changed.emit()

    # -- options and masks ------------------------------------------------------------
    def set_option(self, name: str, value) -> None:
        if name not in self.options:
            raise ParameterError("fit option", name, f"known: {', '.join(self.options)}")
        if name == "angle_deg":
            value = check_finite("angle of incidence", value)
            if not 0 <= value < 90:
                raise ParameterError("angle of incidence", value, "must be in [0, 90) degrees")
        if name == "suggest_model":
            value = value if isinstance(value, tuple) else bool(value)
        if name == "fit_range_nm" and value is not None:
            lo, hi = (check_finite("fit range start", value[0]),
                      check_finite("fit range end", value[1]))
            if not 0 < lo < hi:
                raise ParameterError("fit range", (lo, hi),
                                     "start must be positive and below the end")
            value = (lo, hi)
        if self.options.get(name) == value:
            return

        def apply():
            self.options[name] = value

        self._edit(f"Fit option {name}", apply)
        self.options_changed.emit()

    def add_mask(self, lo_nm: float, hi_nm: float) -> None:
        """Exclude the window [lo, hi] nm from fits (undoable)."""
        lo, hi = sorted((float(lo_nm), float(hi_nm)))
        if not hi > lo:
            return
        self._edit(f"Mask {lo:.0f}-{hi:.0f} nm", lambda: self.masks.append((lo, hi)))
        self.masks_changed.emit()

    def remove_mask(self, index: int) -> None:
        lo, hi = self.masks[index]
        self._edit(f"Unmask {lo:.0f}-{hi:.0f} nm", lambda: self.masks.pop(index))
        self.masks_changed.emit()

    def clear_masks(self) -> None:
        if self.masks:
            self._edit("Remove all masks", self.masks.clear)
            self.masks_changed.emit()

    # -- fit --------------------------------------------------------------------------
    def recipe(self, name: str = "", *, relative_to=None):
        """The current setup as a :class:`fitting.recipe.Recipe` (what a batch would run).

        The single fit in the app goes through the same recipe, so it gives
        exactly what a batch run of the same file would give. A loaded recipe's
        sections the app has no control for (:attr:`extras`) are written back as
        they were. ``relative_to`` (the folder the recipe will be saved in)
        writes reference files inside that folder as relative paths, as
        recipes usually name them.
        """
        o = self.options
        fit = FitOptions.from_dict({k: v for k, v in o.items()
                                    if k not in ("fit_range_nm", "suggest_model")},
                                   where="fit options")
        reader = self.reader_options.to_dict() if self.reader_options is not None else {}
        rng = o.get("fit_range_nm") or (None, None)
        extra = {k: copy.deepcopy(self.extras[k]) for k in _EXTRA_KEYS if k in self.extras}
        if extra.get("reference") and relative_to is not None:
            extra["reference"] = {k: None if v is None else _relative(v, relative_to)
                                  for k, v in extra["reference"].items()}
        limits = extra.pop("limits", {})
        while True:
            try:
                return Recipe(Stack.from_dict(self.stack.to_dict()), name=name, reader=reader,
                              fit_options=fit.to_dict(), range_nm=tuple(rng),
                              masks_nm=[tuple(m) for m in self.masks], limits=limits,
                              suggest_model=o.get("suggest_model", False), **extra)
            except RecipeError as e:
                # A limit the stack no longer has (edits drop them, this is the backstop).
                key = e.field[len("limits."):]
                if not e.field.startswith("limits.") or key not in limits:
                    raise
                limits.pop(key)

    def fit_inputs(self):
        """(spectrum, fresh stack copy, FitOptions with range and masks) for one fit."""
        if self.spectrum is None:
            raise FitError("no spectrum loaded: open a measured spectrum first (Ctrl+O)")
        recipe = self.recipe()
        return self.spectrum, recipe.new_stack(), recipe.make_fit_options(self.spectrum)

    def apply_recipe(self, recipe, text: str = "Load recipe") -> None:
        """Take the whole setup from a recipe (undoable): stack, fit options, range,
        masks, ``suggest_model`` and, kept for saving, the sections without controls."""
        fo = dict(recipe.fit_options or {})
        options = default_options()
        for k in options:
            if k in fo and k != "fit_range_nm":
                options[k] = copy.deepcopy(fo[k])
        options["suggest_model"] = recipe.suggest_model
        lo, hi = recipe.range_nm
        if lo is not None or hi is not None:
            options["fit_range_nm"] = (lo if lo is not None else 1.0,
                                       hi if hi is not None else 1e5)
        stack = recipe.new_stack()
        extras = {"notes": recipe.notes,
                  "limits": {k: v.to_dict() for k, v in recipe.limits.items()},
                  "exports": list(recipe.exports), "plot_formats": list(recipe.plot_formats)}
        if recipe.reference:
            # Absolute, so the recipe can be saved anywhere and still find its files.
            base = Path(recipe.source_dir) if recipe.source_dir is not None else Path.cwd()
            extras["reference"] = {k: None if v is None else str(base / Path(v).expanduser())
                                   for k, v in recipe.reference.items()}

        def apply():
            self.stack = stack
            self.options = options
            self.masks = [tuple(m) for m in recipe.masks_nm]
            self.extras = extras

        self._edit(text, apply)
        if recipe.reader:
            from fitting.reader import ReaderOptions
            self.reader_options = ReaderOptions.from_dict(dict(recipe.reader))
        self.stack_changed.emit()
        self.options_changed.emit()
        self.masks_changed.emit()

    def setup_fingerprint(self) -> dict:
        """The setup now, to pass to :meth:`set_result` when a fit started from it ends."""
        return self._fingerprint()

    def set_result(self, result, *, apply: bool = True, recipe_hash: str = "",
                   current: bool = True, setup: dict | None = None) -> None:
        """Store a fit result; with ``apply`` write the fitted values into the stack (undoable).

        ``recipe_hash`` is the hash of the recipe the fit ran with (exports and
        projects record it, not the hash of whatever the setup is later). The
        result counts as current for the setup as it is after this call; with
        ``current=False`` (a project saved with an out-of-date result) it starts
        out of date. ``setup`` is :meth:`setup_fingerprint` from when the fit
        started: options, masks or spectrum changed while it ran make it out of date.
        """
        self._result_fp = None           # no staleness checks while the fit is applied
        self._result_stacks = set()
        self.result = result
        self.result_recipe_hash = recipe_hash if result is not None else ""
        if result is not None and apply and not result.aborted and result.stack:
            try:
                fitted = Stack.from_dict(result.stack)
            except PellucidError:
                fitted = None
            if fitted is not None:
                self.set_stack(fitted, "Apply fit result")
        self._result_frozen = result is not None and not current
        changed = []
        if result is not None:
            self._result_fp = self._fingerprint()
            for k in ("options", "masks", "spectrum"):    # the stack is the fitted one now
                if setup is not None and setup.get(k) != self._result_fp[k]:
                    self._result_fp[k] = setup[k]
                    changed.append(k)
        was = self.result_stale
        self.result_stale = self._result_frozen or bool(changed)
        self.stale_reason = ("the setup was changed after this fit, before the project was "
                             "saved" if self._result_frozen else
                             " and ".join(self._PARTS[k] for k in changed))
        self.result_changed.emit()       # views read result_stale already set
        if was != self.result_stale:
            self.result_stale_changed.emit(self.result_stale)

    def clear_result(self) -> None:
        self.set_result(None)

    def spectrum_for_fit(self):
        """The spectrum with masks applied (what the fit and the plot's 'used' points see)."""
        if self.spectrum is None:
            return None
        s = self.spectrum
        if self.masks:
            s = s.masked_windows(self.masks)
        return s


def _relative(path, folder) -> str:
    """``path`` relative to ``folder`` when it lies inside it (POSIX form), else as given."""
    try:
        return Path(path).resolve().relative_to(Path(folder).resolve()).as_posix()
    except (ValueError, OSError):
        return str(path)
